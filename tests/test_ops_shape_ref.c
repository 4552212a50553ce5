/* Shape, resize and fake-quant kernels against PyTorch (Debian
 * python3-torch). scripts/ref_ops_shape.py (a ctest fixture, see
 * tests/ops_shape_ref.cmake) writes inputs, torch outputs, upstream
 * gradients and torch input gradients into $RECOUP_BINARY_DIR/ref_ops_shape;
 * this test runs recoup's ops on the same inputs with the ONNX attributes
 * that express the same computation, and compares:
 *   forward   |ours - torch| <= 1e-4 * (1 + |torch|)
 *   gradient  |ours - torch| <= 1e-3 * (1 + |torch|)
 * It fails loudly when the reference files are missing. */

#include "ops/quant.h"
#include "ops_expect.h"

#define SOURCE "PyTorch (Debian python3-torch)"

typedef struct ref_tensor {
  char name[64];
  int64_t n;
  int rank;
  int64_t dims[RC_MAX_RANK];
  float *data;
} ref_tensor;

static ref_tensor refs[128];
static int n_refs;
static char ref_dir[4096];

static int load_refs(void) {
  FILE *f = test_ref_open(ref_dir, sizeof ref_dir, "ref_ops_shape", "cases.txt", "scripts/ref_ops_shape.py",
                          "ops_shape_ref_data");
  if (!f) return 0;
  char path[4352];
  char line[512];
  while (n_refs < 128 && fgets(line, sizeof line, f)) {
    ref_tensor *r = &refs[n_refs];
    char *p = line;
    int used = 0;
    long long n;
    if (sscanf(p, "%63s %lld%n", r->name, &n, &used) != 2) continue;
    p += used;
    r->n = n;
    r->rank = 0;
    long long d;
    while (r->rank < RC_MAX_RANK && sscanf(p, "%lld%n", &d, &used) == 1) {
      r->dims[r->rank++] = d;
      p += used;
    }
    snprintf(path, sizeof path, "%s/%s.f32", ref_dir, r->name);
    FILE *b = fopen(path, "rb");
    r->data = malloc(sizeof(float) * (size_t)(n ? n : 1));
    size_t got = b ? fread(r->data, sizeof(float), (size_t)n, b) : 0;
    if (b) fclose(b);
    if (got != (size_t)n) {
      fprintf(stderr, "reference file %s is missing or short (%zu of %lld floats)\n", path, got, n);
      fclose(f);
      return 0;
    }
    n_refs++;
  }
  fclose(f);
  return n_refs > 0;
}

static const ref_tensor *ref_get(const char *kase, const char *tensor) {
  char key[96];
  snprintf(key, sizeof key, "%s-%s", kase, tensor);
  for (int i = 0; i < n_refs; i++)
    if (!strcmp(refs[i].name, key)) return &refs[i];
  fprintf(stderr, "reference tensor %s not found in %s/cases.txt\n", key, ref_dir);
  return NULL;
}

/* Worst |a - b| / (1 + |b|), printing the place of the first failure. */
static double worst_rel(const char *what, const float *a, const float *b, int64_t n, double tol) {
  double worst = 0;
  int reported = 0;
  for (int64_t i = 0; i < n; i++) {
    double err = fabs((double)a[i] - (double)b[i]) / (1 + fabs((double)b[i]));
    if (err > tol && !reported) {
      fprintf(stderr, "%s [%lld]: recoup %.7g, %s %.7g\n", what, (long long)i, a[i], SOURCE, b[i]);
      reported = 1;
    }
    if (err > worst || err != err) worst = err != err ? INFINITY : err;
  }
  return worst;
}

/* Input 0 of the case from the reference x. */
static int add_ref_input(oh_case *c, const char *kase) {
  const ref_tensor *x = ref_get(kase, "x");
  if (!x) return 0;
  oh_input(c, RC_DTYPE_FLOAT, x->rank, x->dims, x->data);
  return 1;
}

/* Runs the op forward, compares y; runs backward with dy, compares dx. */
static void compare_op(oh_case *c, const char *kase) {
  const ref_tensor *y = ref_get(kase, "y"), *dy = ref_get(kase, "dy"), *dx = ref_get(kase, "dx");
  CHECK(y && dy && dx);
  if (!y || !dy || !dx) return;
  rc_err e = {0};
  rc_status s = oh_run(c, &e);
  if (s != RC_OK) fprintf(stderr, "%s: %s\n", kase, e.msg);
  CHECK_STATUS(s, RC_OK);
  if (s != RC_OK) return;
  CHECK_EQ(c->out_t[0].rank, y->rank);
  CHECK_EQ(rc_tensor_numel(&c->out_t[0]), y->n);
  if (rc_tensor_numel(&c->out_t[0]) != y->n) return;
  char what[128];
  snprintf(what, sizeof what, "%s forward", kase);
  CHECK_LE(worst_rel(what, oh_out_f(c, 0), y->data, y->n, 1e-4), 1e-4);
  run_backward(c, dy->data, (const int[]){0, -1});
  snprintf(what, sizeof what, "%s gradient", kase);
  CHECK_LE(worst_rel(what, grad_of(c, 0), dx->data, dx->n, 1e-3), 1e-3);
}

static void resize_ref(const char *kase, const char *mode, const char *coord, const char *nearest,
                       const int64_t *sizes) {
  oh_case c;
  oh_init(&c, "Resize", 13);
  oh_attr_string(&c, "mode", mode);
  oh_attr_string(&c, "coordinate_transformation_mode", coord);
  if (nearest) oh_attr_string(&c, "nearest_mode", nearest);
  if (add_ref_input(&c, kase)) {
    oh_input_absent(&c);
    oh_input_absent(&c);
    oh_input(&c, RC_DTYPE_INT64, 1, I64(4), sizes);
    compare_op(&c, kase);
  } else {
    CHECK(!"reference input missing");
  }
  oh_free(&c);
}

/* F.interpolate(nearest) reads floor(dst * in / out): Resize asymmetric + floor. */
static void test_resize_vs_torch(void) {
  resize_ref("nearest", "nearest", "asymmetric", "floor", I64(2, 3, 8, 4));
  /* F.interpolate(bilinear, align_corners=False) is the half-pixel mapping */
  resize_ref("bilinear_up", "linear", "half_pixel", NULL, I64(2, 3, 9, 11));
  resize_ref("bilinear_down", "linear", "half_pixel", NULL, I64(2, 3, 3, 4));
  /* align_corners=True */
  resize_ref("bilinear_corners", "linear", "align_corners", NULL, I64(2, 3, 9, 4));
}

static void pad_ref(const char *kase, const char *mode, const int64_t *pads) {
  oh_case c;
  oh_init(&c, "Pad", 13);
  oh_attr_string(&c, "mode", mode);
  if (add_ref_input(&c, kase)) {
    oh_input(&c, RC_DTYPE_INT64, 1, I64(8), pads);
    compare_op(&c, kase);
  } else {
    CHECK(!"reference input missing");
  }
  oh_free(&c);
}

/* F.pad reflect/replicate = ONNX Pad reflect/edge; torch's (left, right, top,
 * bottom) becomes ONNX [begins..., ends...]. */
static void test_pad_vs_torch(void) {
  pad_ref("pad_reflect", "reflect", I64(0, 0, 1, 2, 0, 0, 3, 1));
  pad_ref("pad_replicate", "edge", I64(0, 0, 2, 3, 0, 0, 4, 1));
}

/* index_select on axis 1 = Gather axis 1 (indices as in the script, negatives kept here). */
static void test_gather_transpose_vs_torch(void) {
  oh_case c;
  oh_init(&c, "Gather", 13);
  oh_attr_int(&c, "axis", 1);
  if (add_ref_input(&c, "gather")) {
    oh_input(&c, RC_DTYPE_INT64, 2, I64(2, 3), I64(1, -1, 0, -5, 3, 3));
    compare_op(&c, "gather");
  }
  oh_free(&c);
  static const int64_t perms[2][4] = {{0, 2, 3, 1}, {3, 1, 0, 2}};
  static const char *names[2] = {"permute_0231", "permute_3102"};
  for (int p = 0; p < 2; p++) {
    oh_init(&c, "Transpose", 13);
    oh_attr_ints(&c, "perm", 4, perms[p]);
    if (add_ref_input(&c, names[p])) compare_op(&c, names[p]);
    oh_free(&c);
  }
}

/* torch.fake_quantize_per_{tensor,channel}_affine against rc__fake_quant_*. */
static void fq_ref(const char *kase, const float *scale, const int32_t *zero, int64_t channels, int64_t inner,
                   int32_t qmin, int32_t qmax) {
  const ref_tensor *x = ref_get(kase, "x"), *y = ref_get(kase, "y"), *dy = ref_get(kase, "dy"),
                   *dx = ref_get(kase, "dx");
  CHECK(x && y && dy && dx);
  if (!x || !y || !dy || !dx) return;
  float *out = malloc(sizeof(float) * (size_t)x->n), *g = calloc((size_t)x->n, sizeof(float));
  rc__fake_quant_forward(out, x->data, x->n, scale, zero, channels, inner, qmin, qmax);
  char what[128];
  snprintf(what, sizeof what, "%s forward", kase);
  CHECK_LE(worst_rel(what, out, y->data, y->n, 1e-4), 1e-4);
  rc__fake_quant_backward(g, dy->data, x->data, x->n, scale, zero, channels, inner, qmin, qmax);
  snprintf(what, sizeof what, "%s gradient", kase);
  CHECK_LE(worst_rel(what, g, dx->data, dx->n, 1e-3), 1e-3);
  free(out);
  free(g);
}

static void test_fake_quant_vs_torch(void) {
  const float s1 = 0.0625f, s2 = 0.037f, sc[3] = {0.05f, 0.02f, 0.11f};
  const int32_t z1 = 3, z2 = -4, zc[3] = {0, 10, -7};
  fq_ref("fq_tensor", &s1, &z1, 1, 120, -128, 127);
  fq_ref("fq_tensor_odd", &s2, &z2, 1, 120, -8, 7);
  fq_ref("fq_channel", sc, zc, 3, 20, -128, 127); /* (2, 3, 4, 5), axis 1 */
}

int main(void) {
  if (!load_refs()) {
    fprintf(stderr, "FAIL: no %s reference data\n", SOURCE);
    return 1;
  }
  RUN(test_resize_vs_torch);
  RUN(test_pad_vs_torch);
  RUN(test_gather_transpose_vs_torch);
  RUN(test_fake_quant_vs_torch);
  for (int i = 0; i < n_refs; i++) free(refs[i].data);
  return TEST_REPORT();
}
