/* MaxPool, AveragePool, GlobalAveragePool, GlobalMaxPool: hand-computed cases
 * from the ONNX operator specification (Operators.md, the ops' examples and
 * output-shape equations) and finite-difference gradient checks. */
#include "op_harness.h"
#include "test.h"
#include "op_expect.h"

static void iota(float *x, int64_t n, float start) {
  for (int64_t i = 0; i < n; i++) x[i] = start + (float)i;
}

static void pool_case(oh_case *c, const char *op, int opset, int rank, const int64_t *dims, const float *x) {
  oh_init(c, op, opset);
  oh_input(c, RC_DTYPE_FLOAT, rank, dims, x);
}

/* ONNX spec, MaxPool example "maxpool_2d_ceil": x = 1..16 (1,1,4,4), kernel 3,
 * strides 2, ceil_mode: out = ceil((4-3)/2)+1 = 2; last window holds x[3][3]. */
static void maxpool_spec_ceil(void) {
  oh_case c;
  float x[16];
  iota(x, 16, 1);
  pool_case(&c, "MaxPool", 12, 4, (int64_t[]){1, 1, 4, 4}, x);
  oh_attr_ints(&c, "kernel_shape", 2, (int64_t[]){3, 3});
  oh_attr_ints(&c, "strides", 2, (int64_t[]){2, 2});
  oh_attr_int(&c, "ceil_mode", 1);
  oe_expect_out(&c, (int64_t[]){1, 1, 2, 2}, 4, (float[]){11, 12, 15, 16});
  oh_free(&c);
}

/* ceil_mode where the rounded-up last window would start in the end padding:
 * 1-D size 5, kernel 2, stride 2, pads 1/1: ceil((5+2-2)/2)+1 = 4, but window
 * 4 would start at cell 5 (padding only), so it is dropped: 3 outputs, the
 * rule PyTorch applies and later revisions of the spec state. */
static void maxpool_ceil_drops_padding_window(void) {
  oh_case c;
  pool_case(&c, "MaxPool", 12, 3, (int64_t[]){1, 1, 5}, (float[]){1, 5, 2, 4, 3});
  oh_attr_ints(&c, "kernel_shape", 1, (int64_t[]){2});
  oh_attr_ints(&c, "strides", 1, (int64_t[]){2});
  oh_attr_ints(&c, "pads", 2, (int64_t[]){1, 1});
  oh_attr_int(&c, "ceil_mode", 1);
  /* windows [-1,0] [1,2] [3,4] */
  oe_expect_out(&c, (int64_t[]){1, 1, 3}, 3, (float[]){1, 5, 4});
  oh_free(&c);
}

/* ONNX spec, "maxpool_2d_pads": x = 1..25 (1,1,5,5), kernel 5, pads 2:
 * y[0][0] = max of x[0..2][0..2] = 13 (padded cells never win). */
static void maxpool_spec_pads(void) {
  oh_case c;
  float x[25];
  iota(x, 25, 1);
  pool_case(&c, "MaxPool", 12, 4, (int64_t[]){1, 1, 5, 5}, x);
  oh_attr_ints(&c, "kernel_shape", 2, (int64_t[]){5, 5});
  oh_attr_ints(&c, "pads", 4, (int64_t[]){2, 2, 2, 2});
  const float want[] = {13, 14, 15, 15, 15, 18, 19, 20, 20, 20, 23, 24, 25, 25, 25,
                        23, 24, 25, 25, 25, 23, 24, 25, 25, 25};
  oe_expect_out(&c, (int64_t[]){1, 1, 5, 5}, 4, want);
  oh_free(&c);
}

/* ONNX spec, "maxpool_2d_dilations": x = 1..16 (1,1,4,4), kernel 2,
 * dilations 2: y[0][0] = max(x00, x02, x20, x22) = 11. */
static void maxpool_spec_dilations(void) {
  oh_case c;
  float x[16];
  iota(x, 16, 1);
  pool_case(&c, "MaxPool", 12, 4, (int64_t[]){1, 1, 4, 4}, x);
  oh_attr_ints(&c, "kernel_shape", 2, (int64_t[]){2, 2});
  oh_attr_ints(&c, "dilations", 2, (int64_t[]){2, 2});
  oe_expect_out(&c, (int64_t[]){1, 1, 2, 2}, 4, (float[]){11, 12, 15, 16});
  oh_free(&c);
}

/* ONNX spec, "maxpool_2d_same_lower" in 1-D form: SAME_LOWER with kernel 2
 * puts the one padding cell first, so y[i] = max(x[i-1], x[i]);
 * SAME_UPPER puts it last, y[i] = max(x[i], x[i+1]). */
static void maxpool_auto_pad(void) {
  const float x[] = {3, 1, 4, 1, 5};
  const char *modes[] = {"SAME_LOWER", "SAME_UPPER", "VALID"};
  const float want[3][5] = {{3, 3, 4, 4, 5}, {3, 4, 4, 5, 5}, {3, 4, 4, 5, 0}};
  const int64_t len[] = {5, 5, 4};
  for (int m = 0; m < 3; m++) {
    oh_case c;
    pool_case(&c, "MaxPool", 12, 3, (int64_t[]){1, 1, 5}, x);
    oh_attr_ints(&c, "kernel_shape", 1, (int64_t[]){2});
    oh_attr_string(&c, "auto_pad", modes[m]);
    oe_expect_out(&c, (int64_t[]){1, 1, len[m]}, 3, want[m]);
    oh_free(&c);
  }
}

/* ONNX spec, "maxpool_with_argmax_2d_precomputed_strides": x = 1..25
 * (1,1,5,5), kernel 2, strides 2, storage_order 1 -> y [[7,9],[17,19]],
 * Indices column-major [[6,16],[8,18]] (row-major would be [[6,8],[16,18]]). */
static void maxpool_spec_indices(void) {
  for (int order = 0; order < 2; order++) {
    oh_case c;
    float x[50];
    iota(x, 25, 1);
    iota(x + 25, 25, 1);
    pool_case(&c, "MaxPool", 12, 4, (int64_t[]){1, 2, 5, 5}, x);
    c.n_out = 2;
    oh_attr_ints(&c, "kernel_shape", 2, (int64_t[]){2, 2});
    oh_attr_ints(&c, "strides", 2, (int64_t[]){2, 2});
    oh_attr_int(&c, "storage_order", order);
    oe_expect_out(&c, (int64_t[]){1, 2, 2, 2}, 4, (float[]){7, 9, 17, 19, 7, 9, 17, 19});
    CHECK_INT(c.out_t[1].dtype, RC_DTYPE_INT64);
    const int64_t *ind = c.out_t[1].data;
    const int64_t want_row[] = {6, 8, 16, 18}, want_col[] = {6, 16, 8, 18};
    /* Indices flatten over the whole tensor: channel 1 adds 25. */
    for (int i = 0; i < 4; i++) {
      CHECK_INT(ind[i], order ? want_col[i] : want_row[i]);
      CHECK_INT(ind[4 + i], 25 + (order ? want_col[i] : want_row[i]));
    }
    oh_free(&c);
  }
}

/* Ties: the gradient goes to the first maximum only. */
static void maxpool_ties_route_to_first(void) {
  oh_case c;
  pool_case(&c, "MaxPool", 12, 3, (int64_t[]){1, 1, 4}, (float[]){2, 2, 1, 1});
  oh_attr_ints(&c, "kernel_shape", 1, (int64_t[]){4});
  int ok = run_ok(&c);
  CHECK(ok);
  if (ok) {
    run_backward(&c, NULL, (const int[]){0, -1});
    const float *dx = grad_of(&c, 0);
    CHECK_NEAR(dx[0], 1, 0, 0);
    CHECK_NEAR(dx[1], 0, 0, 0);
  }
  oh_free(&c);
}

/* ONNX spec, "averagepool_2d_ceil": x = 1..16 (1,1,4,4), kernel 3, strides
 * 2, ceil_mode: y[0][1] = (3+4+7+8+11+12)/6 = 7.5 (cells beyond the input
 * never count). */
static void avgpool_spec_ceil(void) {
  oh_case c;
  float x[16];
  iota(x, 16, 1);
  pool_case(&c, "AveragePool", 11, 4, (int64_t[]){1, 1, 4, 4}, x);
  oh_attr_ints(&c, "kernel_shape", 2, (int64_t[]){3, 3});
  oh_attr_ints(&c, "strides", 2, (int64_t[]){2, 2});
  oh_attr_int(&c, "ceil_mode", 1);
  oe_expect_out(&c, (int64_t[]){1, 1, 2, 2}, 4, (float[]){6, 7.5f, 12, 13.5f});
  oh_free(&c);
}

/* ONNX spec, "averagepool_2d_pads" / "..._count_include_pad": x = 1..25
 * (1,1,5,5), kernel 3, pads 2 -> 7x7. Corner window holds only x00 = 1:
 * 1/9 when padding counts, 1/1 when it does not. Centre y[3][3] = mean of
 * x[1..3][1..3] = 13 either way. */
static void avgpool_spec_count_include_pad(void) {
  for (int cip = 0; cip < 2; cip++) {
    oh_case c;
    float x[25];
    iota(x, 25, 1);
    pool_case(&c, "AveragePool", 11, 4, (int64_t[]){1, 1, 5, 5}, x);
    oh_attr_ints(&c, "kernel_shape", 2, (int64_t[]){3, 3});
    oh_attr_ints(&c, "pads", 4, (int64_t[]){2, 2, 2, 2});
    oh_attr_int(&c, "count_include_pad", cip);
    int ok = run_ok(&c);
    CHECK(ok);
    if (!ok) {
      oh_free(&c);
      continue;
    }
    CHECK_INT(c.out_t[0].dims[2], 7);
    const float *y = oh_out_f(&c, 0);
    CHECK_NEAR(y[0], cip ? 1.0 / 9 : 1.0, 1e-6, 1e-6);
    CHECK_NEAR(y[3 * 7 + 3], 13, 1e-5, 1e-6);
    /* y[0][1]: rows -2..0, cols -1..1 -> x00 + x01 = 3 over 9 or 2 cells */
    CHECK_NEAR(y[1], cip ? 3.0 / 9 : 1.5, 1e-6, 1e-6);
    oh_free(&c);
  }
}

/* count_include_pad with ceil_mode: x = 1..6, kernel 3, stride 2, pads 1/1:
 * ceil((6+2-3)/2)+1 = 4 windows starting at -1, 1, 3, 5. The last covers x5
 * = 6, one padding cell (counted) and one cell beyond the padded input (never
 * counted): 6/2 = 3. First: (0+1+2)/3 = 1 with padding, (1+2)/2 otherwise. */
static void avgpool_ceil_with_include_pad(void) {
  const float want[2][4] = {{1.5f, 3, 5, 6}, {1, 3, 5, 3}};
  for (int cip = 0; cip < 2; cip++) {
    oh_case c;
    pool_case(&c, "AveragePool", 11, 3, (int64_t[]){1, 1, 6}, (float[]){1, 2, 3, 4, 5, 6});
    oh_attr_ints(&c, "kernel_shape", 1, (int64_t[]){3});
    oh_attr_ints(&c, "strides", 1, (int64_t[]){2});
    oh_attr_ints(&c, "pads", 2, (int64_t[]){1, 1});
    oh_attr_int(&c, "ceil_mode", 1);
    oh_attr_int(&c, "count_include_pad", cip);
    oe_expect_out(&c, (int64_t[]){1, 1, 4}, 3, want[cip]);
    oh_free(&c);
  }
}

/* AveragePool SAME_UPPER (spec "averagepool_2d_same_upper" in 1-D form):
 * x = [1,2,3,4], kernel 2: padding cell at the end is excluded from the
 * mean: [1.5, 2.5, 3.5, 4]. */
static void avgpool_same_upper(void) {
  oh_case c;
  pool_case(&c, "AveragePool", 11, 3, (int64_t[]){1, 1, 4}, (float[]){1, 2, 3, 4});
  oh_attr_ints(&c, "kernel_shape", 1, (int64_t[]){2});
  oh_attr_string(&c, "auto_pad", "SAME_UPPER");
  oe_expect_out(&c, (int64_t[]){1, 1, 4}, 3, (float[]){1.5f, 2.5f, 3.5f, 4});
  oh_free(&c);
}

/* AveragePool dilations (opset 19): x = 1..5, kernel 2, dilation 2 ->
 * (x0+x2)/2, (x1+x3)/2, (x2+x4)/2. */
static void avgpool_dilations(void) {
  oh_case c;
  pool_case(&c, "AveragePool", 19, 3, (int64_t[]){1, 1, 5}, (float[]){1, 2, 3, 4, 5});
  oh_attr_ints(&c, "kernel_shape", 1, (int64_t[]){2});
  oh_attr_ints(&c, "dilations", 1, (int64_t[]){2});
  oe_expect_out(&c, (int64_t[]){1, 1, 3}, 3, (float[]){2, 3, 4});
  oh_free(&c);
}

/* ONNX spec, "globalaveragepool_precomputed" / "globalmaxpool_precomputed":
 * x = 1..9 (1,1,3,3) -> 5 and 9. */
static void global_pools_spec(void) {
  float x[9];
  iota(x, 9, 1);
  oh_case c;
  pool_case(&c, "GlobalAveragePool", 13, 4, (int64_t[]){1, 1, 3, 3}, x);
  oe_expect_out(&c, (int64_t[]){1, 1, 1, 1}, 4, (float[]){5});
  oh_free(&c);
  pool_case(&c, "GlobalMaxPool", 13, 4, (int64_t[]){1, 1, 3, 3}, x);
  oe_expect_out(&c, (int64_t[]){1, 1, 1, 1}, 4, (float[]){9});
  oh_free(&c);
}

/* ---- gradient checks ---- */

typedef struct pool_setup {
  const char *op;
  int nsp;
  int64_t in[3], k[3], s[3], d[3], pads[6];
  int ceil_mode, count_include_pad, opset;
  const char *auto_pad;
} pool_setup;

static void pool_grad(const pool_setup *ps) {
  oh_case c;
  int64_t dims[5] = {2, 3};
  int64_t n = 6;
  for (int i = 0; i < ps->nsp; i++) dims[2 + i] = ps->in[i], n *= ps->in[i];
  float *x = malloc(sizeof(float) * (size_t)n);
  /* Distinct values (a shuffled ramp) so that no max is a near-tie. */
  for (int64_t i = 0; i < n; i++) x[i] = (float)((i * 37) % n) * 0.25f - (float)n * 0.1f;
  pool_case(&c, ps->op, ps->opset ? ps->opset : 19, 2 + ps->nsp, dims, x);
  if (ps->k[0]) {
    oh_attr_ints(&c, "kernel_shape", ps->nsp, ps->k);
    if (ps->s[0]) oh_attr_ints(&c, "strides", ps->nsp, ps->s);
    if (ps->d[0]) oh_attr_ints(&c, "dilations", ps->nsp, ps->d);
    if (ps->auto_pad) oh_attr_string(&c, "auto_pad", ps->auto_pad);
    else oh_attr_ints(&c, "pads", 2 * ps->nsp, ps->pads);
    oh_attr_int(&c, "ceil_mode", ps->ceil_mode);
    if (!strcmp(ps->op, "AveragePool")) oh_attr_int(&c, "count_include_pad", ps->count_include_pad);
  }
  const int check[] = {0, -1};
  double err = oh_gradcheck(&c, check, 1e-2);
  if (!(err < 2e-3)) fprintf(stderr, "gradcheck %s %d-D: worst error %.3g\n", ps->op, ps->nsp, err);
  CHECK_LT(err, 2e-3);
  free(x);
  oh_free(&c);
}

static void pool_gradients(void) {
  const pool_setup cases[] = {
      {"MaxPool", 2, {6, 7}, {3, 2}, {2, 2}, {0}, {1, 0, 1, 1}, 1, 0, 0, NULL},
      {"MaxPool", 2, {7, 7}, {3, 3}, {1, 2}, {2, 1}, {2, 1, 2, 1}, 0, 0, 0, NULL},
      {"MaxPool", 1, {11}, {3}, {2}, {0}, {1, 1}, 1, 0, 0, NULL},
      {"MaxPool", 3, {4, 5, 4}, {2, 2, 2}, {2, 2, 1}, {0}, {0, 1, 0, 0, 0, 1}, 1, 0, 0, NULL},
      {"AveragePool", 2, {6, 7}, {3, 2}, {2, 2}, {0}, {1, 0, 1, 1}, 1, 1, 0, NULL},
      {"AveragePool", 2, {6, 7}, {3, 3}, {2, 3}, {0}, {1, 1, 1, 1}, 1, 0, 0, NULL},
      {"AveragePool", 1, {9}, {2}, {1}, {3}, {1, 0}, 0, 1, 0, NULL},
      {"AveragePool", 3, {4, 4, 5}, {2, 3, 2}, {2, 1, 2}, {0}, {1, 1, 0, 0, 1, 1}, 0, 1, 0, NULL},
      {"MaxPool", 2, {5, 6}, {2, 3}, {2, 2}, {0}, {0}, 0, 0, 0, "SAME_LOWER"},
      {"AveragePool", 2, {5, 6}, {3, 2}, {2, 1}, {0}, {0}, 0, 1, 0, "SAME_UPPER"},
      {"GlobalAveragePool", 2, {4, 5}, {0}, {0}, {0}, {0}, 0, 0, 0, NULL},
      {"GlobalMaxPool", 3, {2, 3, 4}, {0}, {0}, {0}, {0}, 0, 0, 0, NULL},
  };
  for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) pool_grad(&cases[i]);
}

/* ---- refusals ---- */

static void pool_refusals(void) {
  oh_case c;
  float x[16] = {0};
  /* dilations did not exist for MaxPool before opset 10 */
  pool_case(&c, "MaxPool", 9, 4, (int64_t[]){1, 1, 4, 4}, x);
  oh_attr_ints(&c, "kernel_shape", 2, (int64_t[]){2, 2});
  oh_attr_ints(&c, "dilations", 2, (int64_t[]){2, 2});
  CHECK_REFUSED(&c, RC_ERR_INVALID, "dilations");
  oh_free(&c);
  /* nor for AveragePool before opset 19 */
  pool_case(&c, "AveragePool", 18, 4, (int64_t[]){1, 1, 4, 4}, x);
  oh_attr_ints(&c, "kernel_shape", 2, (int64_t[]){2, 2});
  oh_attr_ints(&c, "dilations", 2, (int64_t[]){2, 2});
  CHECK_REFUSED(&c, RC_ERR_INVALID, "dilations");
  oh_free(&c);
  /* kernel_shape is required */
  pool_case(&c, "MaxPool", 12, 4, (int64_t[]){1, 1, 4, 4}, x);
  CHECK_REFUSED(&c, RC_ERR_INVALID, "kernel_shape");
  oh_free(&c);
  /* integer input */
  oh_init(&c, "MaxPool", 12);
  oh_input(&c, RC_DTYPE_UINT8, 4, (int64_t[]){1, 1, 4, 4}, NULL);
  oh_attr_ints(&c, "kernel_shape", 2, (int64_t[]){2, 2});
  CHECK_REFUSED(&c, RC_ERR_UNSUPPORTED, "only float");
  oh_free(&c);
  /* pads together with auto_pad */
  pool_case(&c, "AveragePool", 11, 4, (int64_t[]){1, 1, 4, 4}, x);
  oh_attr_ints(&c, "kernel_shape", 2, (int64_t[]){2, 2});
  oh_attr_ints(&c, "pads", 4, (int64_t[]){1, 1, 1, 1});
  oh_attr_string(&c, "auto_pad", "SAME_UPPER");
  CHECK_REFUSED(&c, RC_ERR_INVALID, "auto_pad");
  oh_free(&c);
}

int main(void) {
  RUN(maxpool_spec_ceil);
  RUN(maxpool_ceil_drops_padding_window);
  RUN(maxpool_spec_pads);
  RUN(maxpool_spec_dilations);
  RUN(maxpool_auto_pad);
  RUN(maxpool_spec_indices);
  RUN(maxpool_ties_route_to_first);
  RUN(avgpool_spec_ceil);
  RUN(avgpool_spec_count_include_pad);
  RUN(avgpool_ceil_with_include_pad);
  RUN(avgpool_same_upper);
  RUN(avgpool_dilations);
  RUN(global_pools_spec);
  RUN(pool_gradients);
  RUN(pool_refusals);
  return TEST_REPORT();
}
