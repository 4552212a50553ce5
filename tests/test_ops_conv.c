/* Conv and ConvTranspose: hand-computed cases from the ONNX operator
 * specification (Operators.md, Conv / ConvTranspose) and finite-difference
 * gradient checks over a spread of attribute combinations. */
#include "op_harness.h"
#include "test.h"
#include "op_expect.h"

static void iota(float *x, int64_t n, float start) {
  for (int64_t i = 0; i < n; i++) x[i] = start + (float)i;
}
static void ones(float *x, int64_t n) {
  for (int64_t i = 0; i < n; i++) x[i] = 1.0f;
}

/* ONNX spec, Conv example "conv_with_strides_padding": x = 0..34 as (1,1,7,5),
 * W = ones (1,1,3,3), strides 2, pads 1 -> (1,1,4,3); e.g. y[0][0] = 0+1+5+6. */
static void conv_spec_strides_padding(void) {
  oh_case c;
  oh_init(&c, "Conv", 13);
  float x[35], w[9];
  iota(x, 35, 0);
  ones(w, 9);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 1, 7, 5}, x);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 1, 3, 3}, w);
  oh_attr_ints(&c, "kernel_shape", 2, (int64_t[]){3, 3});
  oh_attr_ints(&c, "pads", 4, (int64_t[]){1, 1, 1, 1});
  oh_attr_ints(&c, "strides", 2, (int64_t[]){2, 2});
  const float want[] = {12, 27, 24, 63, 108, 81, 123, 198, 141, 112, 177, 124};
  oe_expect_out(&c, (int64_t[]){1, 1, 4, 3}, 4, want);
  oh_free(&c);
}

/* Same spec example without padding: (1,1,3,2); y[0][0] = sum of x[0..2][0..2] = 54. */
static void conv_spec_strides_no_padding(void) {
  oh_case c;
  oh_init(&c, "Conv", 11);
  float x[35], w[9];
  iota(x, 35, 0);
  ones(w, 9);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 1, 7, 5}, x);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 1, 3, 3}, w);
  oh_attr_ints(&c, "strides", 2, (int64_t[]){2, 2});
  const float want[] = {54, 72, 144, 162, 234, 252};
  oe_expect_out(&c, (int64_t[]){1, 1, 3, 2}, 4, want);
  oh_free(&c);
}

/* ONNX spec, Conv example "conv_with_autopad_same": x = 0..24 (1,1,5,5),
 * W ones 3x3, strides 2, auto_pad SAME_LOWER: out = ceil(5/2) = 3, total pad
 * (3-1)*2+3-5 = 2 split 1/1; y[2][0] = x30+x31+x40+x41 = 72. */
static void conv_spec_autopad_same(void) {
  oh_case c;
  oh_init(&c, "Conv", 11);
  float x[25], w[9];
  iota(x, 25, 0);
  ones(w, 9);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 1, 5, 5}, x);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 1, 3, 3}, w);
  oh_attr_string(&c, "auto_pad", "SAME_LOWER");
  oh_attr_ints(&c, "strides", 2, (int64_t[]){2, 2});
  const float want[] = {12, 27, 24, 63, 108, 81, 72, 117, 84};
  oe_expect_out(&c, (int64_t[]){1, 1, 3, 3}, 4, want);
  oh_free(&c);
}

/* 1-D, x = [1,2,3,4], W = [1,1]: SAME_* keeps 4 outputs with one cell of
 * padding; the spec puts the odd cell at the end for SAME_UPPER and at the
 * beginning for SAME_LOWER. VALID gives the 3 windows inside the input. */
static void conv_1d_auto_pad_modes(void) {
  const char *modes[] = {"SAME_UPPER", "SAME_LOWER", "VALID"};
  const float want[3][4] = {{3, 5, 7, 4}, {1, 3, 5, 7}, {3, 5, 7, 0}};
  const int64_t len[] = {4, 4, 3};
  for (int m = 0; m < 3; m++) {
    oh_case c;
    oh_init(&c, "Conv", 11);
    oh_input(&c, RC_DTYPE_FLOAT, 3, (int64_t[]){1, 1, 4}, (float[]){1, 2, 3, 4});
    oh_input(&c, RC_DTYPE_FLOAT, 3, (int64_t[]){1, 1, 2}, (float[]){1, 1});
    oh_attr_string(&c, "auto_pad", modes[m]);
    oe_expect_out(&c, (int64_t[]){1, 1, len[m]}, 3, want[m]);
    oh_free(&c);
  }
}

/* Depthwise (group = C): each channel scaled by its own 1x1 weight, plus bias
 * (spec: Y = conv(X, W) + B per output channel). */
static void conv_depthwise_bias(void) {
  oh_case c;
  oh_init(&c, "Conv", 11);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 2, 2, 2}, (float[]){1, 2, 3, 4, 5, 6, 7, 8});
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){2, 1, 1, 1}, (float[]){2, 3});
  oh_input(&c, RC_DTYPE_FLOAT, 1, (int64_t[]){2}, (float[]){1, -1});
  oh_attr_int(&c, "group", 2);
  const float want[] = {3, 5, 7, 9, 14, 17, 20, 23};
  oe_expect_out(&c, (int64_t[]){1, 2, 2, 2}, 4, want);
  oh_free(&c);
}

/* Dilation 2 in 1-D: y[i] = x[i] + x[i+2] for W = [1,1] (spec: dilation
 * spaces the kernel taps). */
static void conv_1d_dilation(void) {
  oh_case c;
  oh_init(&c, "Conv", 11);
  oh_input(&c, RC_DTYPE_FLOAT, 3, (int64_t[]){1, 1, 5}, (float[]){1, 2, 3, 4, 5});
  oh_input(&c, RC_DTYPE_FLOAT, 3, (int64_t[]){1, 1, 2}, (float[]){1, 1});
  oh_attr_ints(&c, "dilations", 1, (int64_t[]){2});
  const float want[] = {4, 6, 8};
  oe_expect_out(&c, (int64_t[]){1, 1, 3}, 3, want);
  oh_free(&c);
}

/* ONNX spec, ConvTranspose example "convtranspose_1d": x = [0,1,2],
 * W = ones (1,2,3) -> two channels of [0,1,3,3,2] (each input cell adds
 * itself to 3 consecutive outputs). */
static void convt_spec_1d(void) {
  oh_case c;
  oh_init(&c, "ConvTranspose", 11);
  float w[6];
  ones(w, 6);
  oh_input(&c, RC_DTYPE_FLOAT, 3, (int64_t[]){1, 1, 3}, (float[]){0, 1, 2});
  oh_input(&c, RC_DTYPE_FLOAT, 3, (int64_t[]){1, 2, 3}, w);
  const float want[] = {0, 1, 3, 3, 2, 0, 1, 3, 3, 2};
  oe_expect_out(&c, (int64_t[]){1, 2, 5}, 3, want);
  oh_free(&c);
}

/* ONNX spec, ConvTranspose example "convtranspose": x = 0..8 (1,1,3,3),
 * W = ones (1,2,3,3) -> (1,2,5,5), each channel the 2-D "full" correlation. */
static void convt_spec_2d(void) {
  oh_case c;
  oh_init(&c, "ConvTranspose", 11);
  float x[9], w[18];
  iota(x, 9, 0);
  ones(w, 18);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 1, 3, 3}, x);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 2, 3, 3}, w);
  const float ch[] = {0, 1, 3, 3, 2, 3, 8, 15, 12, 7, 9, 21, 36, 27, 15, 9, 20, 33, 24, 13, 6, 13, 21, 15, 8};
  float want[50];
  memcpy(want, ch, sizeof ch);
  memcpy(want + 25, ch, sizeof ch);
  oe_expect_out(&c, (int64_t[]){1, 2, 5, 5}, 4, want);
  oh_free(&c);
}

/* Direct scatter from the spec's definition, for the cases below:
 * y[o] += x[i] * w[kk] where o = i*s - pad_begin + kk*d (1-D, one channel). */
static void scatter_1d(float *y, int64_t ny, const float *x, int64_t nx, const float *w, int64_t nk,
                       int64_t s, int64_t d, int64_t pb) {
  for (int64_t o = 0; o < ny; o++) y[o] = 0;
  for (int64_t i = 0; i < nx; i++)
    for (int64_t kk = 0; kk < nk; kk++) {
      int64_t o = i * s - pb + kk * d;
      if (o >= 0 && o < ny) y[o] += x[i] * w[kk];
    }
}

/* ConvTranspose output size and pads per the spec's equations:
 * out = s*(in-1) + output_padding + (k-1)*d + 1 - pads; with output_shape,
 * total_padding = s*(in-1) + op + (k-1)*d + 1 - output_shape, split with the
 * odd cell at the beginning unless SAME_UPPER (opset 11 text). */
static void convt_1d_shapes_and_pads(void) {
  const float x[] = {1, -2, 3, 0.5f}, w[] = {1, 2, -1};
  struct {
    const char *what;
    int64_t out, pb;
    int use_pads, use_out_shape, out_pad, opset;
    const char *auto_pad;
  } cases[] = {
      /* s=2: full = 2*3 + 3 = 9; pads [1,2] -> 6 */
      {"pads", 6, 1, 1, 0, 0, 11, NULL},
      /* output_padding 1 -> 10 */
      {"output_padding", 10, 0, 0, 0, 1, 11, NULL},
      /* output_shape 8: total 1, NOTSET puts the odd cell first: pb = 1 */
      {"output_shape", 8, 1, 0, 1, 0, 11, NULL},
      /* output_shape written in full as (N, C, 8) */
      {"output_shape (N, C, L)", 8, 1, 0, 2, 0, 11, NULL},
      /* opset 10 text: pb = total/2 = 0 unless SAME_UPPER */
      {"output_shape opset 10", 8, 0, 0, 1, 0, 10, NULL},
      /* SAME_UPPER: out = in*s = 8, total 1, pb = 0 */
      {"SAME_UPPER", 8, 0, 0, 0, 0, 11, "SAME_UPPER"},
      {"SAME_LOWER", 8, 1, 0, 0, 0, 11, "SAME_LOWER"},
  };
  for (size_t t = 0; t < sizeof cases / sizeof cases[0]; t++) {
    oh_case c;
    oh_init(&c, "ConvTranspose", cases[t].opset);
    oh_input(&c, RC_DTYPE_FLOAT, 3, (int64_t[]){1, 1, 4}, x);
    oh_input(&c, RC_DTYPE_FLOAT, 3, (int64_t[]){1, 1, 3}, w);
    oh_attr_ints(&c, "strides", 1, (int64_t[]){2});
    if (cases[t].use_pads) oh_attr_ints(&c, "pads", 2, (int64_t[]){1, 2});
    if (cases[t].out_pad) oh_attr_ints(&c, "output_padding", 1, (int64_t[]){1});
    if (cases[t].use_out_shape == 1) oh_attr_ints(&c, "output_shape", 1, (int64_t[]){8});
    if (cases[t].use_out_shape == 2) oh_attr_ints(&c, "output_shape", 3, (int64_t[]){1, 1, 8});
    if (cases[t].auto_pad) oh_attr_string(&c, "auto_pad", cases[t].auto_pad);
    float want[16];
    scatter_1d(want, cases[t].out, x, 4, w, 3, 2, 1, cases[t].pb);
    int before = test_failed_checks_;
    oe_expect_out(&c, (int64_t[]){1, 1, cases[t].out}, 3, want);
    if (test_failed_checks_ != before) fprintf(stderr, "  in case '%s'\n", cases[t].what);
    oh_free(&c);
  }
}

/* ---- gradient checks ---- */

typedef struct conv_setup {
  const char *op;
  int64_t n, cin, cout, group;
  int nsp;
  int64_t in[3], k[3], s[3], d[3], pads[6], out_pad[3];
  int bias;
  const char *auto_pad;
} conv_setup;

static void grad_case(const conv_setup *cs) {
  oh_case c;
  oh_init(&c, cs->op, 17);
  int transpose = !strcmp(cs->op, "ConvTranspose");
  int64_t xd[5] = {cs->n, cs->cin}, wd[5];
  wd[0] = transpose ? cs->cin : cs->cout;
  wd[1] = transpose ? cs->cout / cs->group : cs->cin / cs->group;
  for (int i = 0; i < cs->nsp; i++) xd[2 + i] = cs->in[i], wd[2 + i] = cs->k[i];
  int64_t nx = 1, nw = 1;
  for (int i = 0; i < 2 + cs->nsp; i++) nx *= xd[i], nw *= wd[i];
  float *x = malloc(sizeof(float) * (size_t)nx), *w = malloc(sizeof(float) * (size_t)nw), b[64];
  oh_fill(x, nx, 11);
  oh_fill(w, nw, 22);
  oh_fill(b, cs->cout, 33);
  oh_input(&c, RC_DTYPE_FLOAT, 2 + cs->nsp, xd, x);
  oh_input(&c, RC_DTYPE_FLOAT, 2 + cs->nsp, wd, w);
  if (cs->bias) oh_input(&c, RC_DTYPE_FLOAT, 1, (int64_t[]){cs->cout}, b);
  if (cs->group > 1) oh_attr_int(&c, "group", cs->group);
  if (cs->s[0]) oh_attr_ints(&c, "strides", cs->nsp, cs->s);
  if (cs->d[0]) oh_attr_ints(&c, "dilations", cs->nsp, cs->d);
  int any_pad = 0;
  for (int i = 0; i < 2 * cs->nsp; i++) any_pad |= cs->pads[i] != 0;
  if (any_pad) oh_attr_ints(&c, "pads", 2 * cs->nsp, cs->pads);
  if (cs->out_pad[0] || cs->out_pad[1]) oh_attr_ints(&c, "output_padding", cs->nsp, cs->out_pad);
  if (cs->auto_pad) oh_attr_string(&c, "auto_pad", cs->auto_pad);
  const int check_xwb[] = {0, 1, 2, -1}, check_xw[] = {0, 1, -1};
  double err = oh_gradcheck(&c, cs->bias ? check_xwb : check_xw, 1e-2);
  if (!(err < 2e-3))
    fprintf(stderr, "gradcheck %s (group %lld, %d-D): worst error %.3g\n", cs->op, (long long)cs->group,
            cs->nsp, err);
  CHECK_LT(err, 2e-3);
  free(x);
  free(w);
  oh_free(&c);
}

static void conv_gradients(void) {
  const conv_setup cases[] = {
      /* plain 2-D with bias */
      {"Conv", 2, 3, 4, 1, 2, {5, 6}, {3, 3}, {0}, {0}, {0}, {0}, 1, NULL},
      /* grouped, strided, padded asymmetrically */
      {"Conv", 2, 4, 6, 2, 2, {6, 5}, {3, 2}, {2, 1}, {0}, {1, 0, 2, 1}, {0}, 1, NULL},
      /* depthwise, dilated */
      {"Conv", 1, 3, 3, 3, 2, {7, 7}, {3, 3}, {1, 1}, {2, 2}, {2, 2, 2, 2}, {0}, 1, NULL},
      /* 1x1 stride-1 (plain GEMM path) */
      {"Conv", 3, 4, 5, 1, 2, {3, 4}, {1, 1}, {0}, {0}, {0}, {0}, 1, NULL},
      /* depthwise 1x1 (direct, per-channel path) and grouped 1x1 */
      {"Conv", 2, 4, 4, 4, 2, {3, 3}, {1, 1}, {0}, {0}, {0}, {0}, 1, NULL},
      {"Conv", 2, 4, 6, 2, 2, {3, 2}, {1, 1}, {0}, {0}, {0}, {0}, 1, NULL},
      /* depth multiplier 2 (one input channel, two outputs per group), strided */
      {"Conv", 2, 3, 6, 3, 2, {5, 6}, {3, 3}, {2, 2}, {0}, {1, 1, 1, 1}, {0}, 1, NULL},
      /* 1-D, stride 2, SAME_UPPER */
      {"Conv", 2, 2, 3, 1, 1, {9}, {4}, {2}, {0}, {0}, {0}, 1, "SAME_UPPER"},
      /* 3-D */
      {"Conv", 1, 2, 2, 1, 3, {3, 4, 3}, {2, 2, 2}, {1, 2, 1}, {0}, {1, 0, 0, 0, 1, 1}, {0}, 0, NULL},
      /* ConvTranspose: strided with output_padding, grouped */
      {"ConvTranspose", 2, 4, 6, 2, 2, {3, 4}, {3, 2}, {2, 3}, {0}, {1, 0, 0, 1}, {1, 2}, 1, NULL},
      /* ConvTranspose: dilated 1-D */
      {"ConvTranspose", 2, 3, 2, 1, 1, {5}, {3}, {1}, {2}, {1, 0}, {0}, 1, NULL},
      /* ConvTranspose: 1x1 stride-1 (plain GEMM path), no bias */
      {"ConvTranspose", 2, 3, 4, 1, 2, {2, 3}, {1, 1}, {0}, {0}, {0}, {0}, 0, NULL},
      /* ConvTranspose: grouped 1x1 (direct) */
      {"ConvTranspose", 2, 4, 6, 2, 2, {2, 3}, {1, 1}, {0}, {0}, {0}, {0}, 1, NULL},
      /* ConvTranspose: depthwise, SAME_LOWER */
      {"ConvTranspose", 1, 3, 3, 3, 2, {3, 3}, {2, 3}, {2, 2}, {0}, {0}, {0}, 1, "SAME_LOWER"},
  };
  for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) grad_case(&cases[i]);
}

/* Input gradient only (din for W and B NULL) must still be right, and
 * backward must add into din rather than overwrite it. */
static void conv_backward_accumulates(void) {
  oh_case c;
  oh_init(&c, "Conv", 13);
  float x[2 * 2 * 4 * 4], w[3 * 2 * 2 * 2];
  oh_fill(x, 64, 5);
  oh_fill(w, 24, 6);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){2, 2, 4, 4}, x);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){3, 2, 2, 2}, w);
  rc_err e = {0};
  CHECK_INT(oh_run(&c, &e), RC_OK);
  float dy[2 * 3 * 3 * 3], dx1[64], dx2[64];
  oh_fill(dy, 54, 7);
  rc_tensor dyt = c.out_t[0], dxt = c.in_t[0];
  dyt.data = dy;
  rc_tensor *dout[1] = {&dyt}, *din[2] = {&dxt, NULL};
  rc_kernel k = {&c.node, c.node.params, 2, 1, c.in, c.out, din, dout, c.work, c.saved, 0};
  memset(dx1, 0, sizeof dx1);
  dxt.data = dx1;
  c.node.def->backward(&k);
  for (int i = 0; i < 64; i++) dx2[i] = 1.0f;
  dxt.data = dx2;
  c.node.def->backward(&k);
  for (int i = 0; i < 64; i++) CHECK_NEAR(dx2[i], dx1[i] + 1.0f, 1e-5, 1e-5);
  oh_free(&c);
}

/* ---- refusals: one clear error naming the node ---- */

static void conv_refusals(void) {
  oh_case c;
  float x[16] = {0}, w[4] = {0};
  /* integer input */
  oh_init(&c, "Conv", 13);
  oh_input(&c, RC_DTYPE_INT8, 4, (int64_t[]){1, 1, 4, 4}, NULL);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 1, 2, 2}, w);
  CHECK_REFUSED(&c, RC_ERR_UNSUPPORTED, "only float");
  oh_free(&c);
  /* unknown auto_pad */
  oh_init(&c, "Conv", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 1, 4, 4}, x);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 1, 2, 2}, w);
  oh_attr_string(&c, "auto_pad", "SAME");
  CHECK_REFUSED(&c, RC_ERR_INVALID, "auto_pad");
  oh_free(&c);
  /* channels not matching the group count */
  oh_init(&c, "Conv", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 1, 4, 4}, x);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 1, 2, 2}, w);
  oh_attr_int(&c, "group", 2);
  CHECK_REFUSED(&c, RC_ERR_SHAPE, "groups");
  oh_free(&c);
  /* kernel larger than the input */
  oh_init(&c, "Conv", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 1, 1, 16}, x);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 1, 2, 2}, w);
  CHECK_REFUSED(&c, RC_ERR_SHAPE, "smaller than the window");
  oh_free(&c);
  /* kernel_shape disagreeing with W */
  oh_init(&c, "Conv", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 1, 4, 4}, x);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 1, 2, 2}, w);
  oh_attr_ints(&c, "kernel_shape", 2, (int64_t[]){3, 3});
  CHECK_REFUSED(&c, RC_ERR_SHAPE, "kernel_shape");
  oh_free(&c);
  /* output_padding not below stride or dilation */
  oh_init(&c, "ConvTranspose", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 1, 4, 4}, x);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){1, 1, 2, 2}, w);
  oh_attr_ints(&c, "output_padding", 2, (int64_t[]){1, 1});
  CHECK_REFUSED(&c, RC_ERR_INVALID, "output_padding");
  oh_free(&c);
}

int main(void) {
  RUN(conv_spec_strides_padding);
  RUN(conv_spec_strides_no_padding);
  RUN(conv_spec_autopad_same);
  RUN(conv_1d_auto_pad_modes);
  RUN(conv_depthwise_bias);
  RUN(conv_1d_dilation);
  RUN(convt_spec_1d);
  RUN(convt_spec_2d);
  RUN(convt_1d_shapes_and_pads);
  RUN(conv_gradients);
  RUN(conv_backward_accumulates);
  RUN(conv_refusals);
  return TEST_REPORT();
}
