/* Pointwise, softmax and normalisation kernels against PyTorch (Debian
 * python3-torch): forward outputs and autograd gradients written by
 * scripts/ref_ops_elementwise.py (a ctest fixture, see
 * tests/ops_elementwise_ref.cmake) into the build folder.
 * Forward: |ours - ref| <= 1e-4 (1 + |ref|) per element. Gradients:
 * max |ours - ref| / max |ref| <= 1e-3 per tensor. */
#include <errno.h>

#include "ops_check.h"

#define SOURCE "PyTorch (Debian python3-torch)"

typedef struct ref_entry {
  char key[64];
  long long off;
  int rank;
  int64_t dims[RC_MAX_RANK];
} ref_entry;

static ref_entry refs[512];
static int n_refs;
static float *ref_data;
static long long ref_count;

static int load_refs(void) {
  const char *dir = getenv("RECOUP_BINARY_DIR");
  char txt[4096], bin[4096];
  snprintf(txt, sizeof txt, "%s/ref_ops/ops_elementwise_ref.txt", dir ? dir : ".");
  snprintf(bin, sizeof bin, "%s/ref_ops/ops_elementwise_ref.bin", dir ? dir : ".");
  FILE *f = fopen(txt, "r");
  if (!f) {
    fprintf(stderr,
            "MISSING reference data %s (%s): run scripts/ref_ops_elementwise.py through ctest "
            "(fixture ref_ops_elementwise) first\n",
            txt, strerror(errno));
    return 0;
  }
  char line[512];
  while (fgets(line, sizeof line, f) && n_refs < (int)(sizeof refs / sizeof refs[0])) {
    ref_entry *r = &refs[n_refs];
    int used = 0;
    if (sscanf(line, "%63s %lld %d%n", r->key, &r->off, &r->rank, &used) != 3 || r->rank < 0 ||
        r->rank > RC_MAX_RANK)
      continue;
    char *p = line + used;
    for (int d = 0; d < r->rank; d++) r->dims[d] = strtoll(p, &p, 10);
    n_refs++;
  }
  fclose(f);
  f = fopen(bin, "rb");
  if (!f) {
    fprintf(stderr, "MISSING reference data %s (%s)\n", bin, strerror(errno));
    return 0;
  }
  fseek(f, 0, SEEK_END);
  long size = ftell(f);
  fseek(f, 0, SEEK_SET);
  ref_data = malloc((size_t)size + 4);
  ref_count = size / 4;
  int ok = ref_data && fread(ref_data, 1, (size_t)size, f) == (size_t)size;
  fclose(f);
  if (!ok) fprintf(stderr, "cannot read %s\n", bin);
  return ok && n_refs > 0;
}

static const ref_entry *ref_find(const char *cs, const char *name) {
  char key[64];
  snprintf(key, sizeof key, "%s/%s", cs, name);
  for (int i = 0; i < n_refs; i++)
    if (!strcmp(refs[i].key, key)) {
      int64_t n = 1;
      for (int d = 0; d < refs[i].rank; d++) n *= refs[i].dims[d];
      if (refs[i].off + n > ref_count) break;
      return &refs[i];
    }
  fprintf(stderr, "MISSING reference tensor %s\n", key);
  return NULL;
}
static const float *ref_ptr(const ref_entry *r) { return ref_data + r->off; }
static int64_t ref_numel(const ref_entry *r) {
  int64_t n = 1;
  for (int d = 0; d < r->rank; d++) n *= r->dims[d];
  return n;
}

static void compare_forward(const char *what, const float *got, const ref_entry *r) {
  const float *want = ref_ptr(r);
  int64_t n = ref_numel(r), bad = 0;
  double worst = 0;
  for (int64_t i = 0; i < n; i++) {
    double d = fabs((double)got[i] - want[i]), lim = 1e-4 * (1 + fabs(want[i]));
    if (d > lim) bad++;
    if (d / lim > worst) worst = d / lim;
  }
  if (bad) fprintf(stderr, "%s vs " SOURCE ": %lld elements beyond tolerance (worst %.3g x tol)\n", what,
                   (long long)bad, worst);
  CHECK_INT(bad, 0);
}

static void compare_grad(const char *what, const float *got, const ref_entry *r) {
  const float *want = ref_ptr(r);
  int64_t n = ref_numel(r);
  double diff = 0, scale = 0;
  for (int64_t i = 0; i < n; i++) {
    diff = fmax(diff, fabs((double)got[i] - want[i]));
    scale = fmax(scale, fabs(want[i]));
  }
  double rel = diff / (scale > 1e-12 ? scale : 1e-12);
  if (!(rel <= 1e-3)) fprintf(stderr, "%s vs " SOURCE ": relative error %.3g\n", what, rel);
  CHECK_LE(rel, 1e-3);
}

typedef void (*case_hook)(oh_case *c);

typedef struct ref_case {
  const char *name, *op;
  int opset;
  const char *inputs[5]; /* reference tensors, in the ONNX op's input order */
  int grad_inputs[6];    /* inputs whose gradient is compared, -1 ends */
  case_hook attrs;       /* before inputs */
  case_hook fix;         /* after inputs: reshape / retype / extra inputs */
} ref_case;

static void gelu_tanh_attrs(oh_case *c) { oh_attr_string(c, "approximate", "tanh"); }
static void hardsigmoid_attrs(oh_case *c) {
  /* torch's hardsigmoid is relu6(x + 3) / 6: alpha 1/6, beta 1/2. */
  oh_attr_float(c, "alpha", 1.0f / 6.0f);
  oh_attr_float(c, "beta", 0.5f);
}
static void elu_attrs(oh_case *c) { oh_attr_float(c, "alpha", 1.3f); }
static void leaky_attrs(oh_case *c) { oh_attr_float(c, "alpha", 0.05f); }
static void axis1_attrs(oh_case *c) { oh_attr_int(c, "axis", 1); }
static void axis_m2_attrs(oh_case *c) { oh_attr_int(c, "axis", -2); }
static void train_attrs(oh_case *c) {
  c->training = 1; /* batch statistics, as our planner's training flag asks */
  c->n_out = 3;
  oh_attr_float(c, "momentum", 0.9f); /* torch momentum 0.1 */
}
/* torch's prelu weight (C) is the ONNX slope (C, 1, 1). */
static void prelu_fix(oh_case *c) {
  c->in_t[1].rank = 3;
  c->in_t[1].dims[1] = c->in_t[1].dims[2] = 1;
}
static void clamp_fix(oh_case *c) {
  oh_input(c, RC_DTYPE_FLOAT, 0, NULL, (float[]){-0.5f});
  oh_input(c, RC_DTYPE_FLOAT, 0, NULL, (float[]){0.7f});
}
/* The condition was stored as 0/1 floats. */
static void where_fix(oh_case *c) {
  rc_tensor *t = &c->in_t[0];
  int64_t n = rc_tensor_numel(t);
  uint8_t *b = rc__arena_alloc(&c->arena, (size_t)n);
  for (int64_t i = 0; i < n; i++) b[i] = ((float *)t->data)[i] > 0.5f;
  t->dtype = RC_DTYPE_BOOL;
  t->data = b;
}

static const ref_case cases[] = {
    {"gelu_none", "Gelu", 20, {"x"}, {0, -1}, NULL, NULL},
    {"gelu_tanh", "Gelu", 20, {"x"}, {0, -1}, gelu_tanh_attrs, NULL},
    {"hardswish", "HardSwish", 14, {"x"}, {0, -1}, NULL, NULL},
    {"hardsigmoid", "HardSigmoid", 6, {"x"}, {0, -1}, hardsigmoid_attrs, NULL},
    {"sigmoid", "Sigmoid", 13, {"x"}, {0, -1}, NULL, NULL},
    {"tanh", "Tanh", 13, {"x"}, {0, -1}, NULL, NULL},
    {"softplus", "Softplus", 1, {"x"}, {0, -1}, NULL, NULL},
    {"elu", "Elu", 6, {"x"}, {0, -1}, elu_attrs, NULL},
    {"leaky_relu", "LeakyRelu", 16, {"x"}, {0, -1}, leaky_attrs, NULL},
    {"relu", "Relu", 14, {"x"}, {0, -1}, NULL, NULL},
    {"prelu", "PRelu", 16, {"x", "slope"}, {0, 1, -1}, NULL, prelu_fix},
    {"clamp", "Clip", 13, {"x"}, {0, -1}, NULL, clamp_fix},
    {"sqrt", "Sqrt", 13, {"x"}, {0, -1}, NULL, NULL},
    {"log", "Log", 13, {"x"}, {0, -1}, NULL, NULL},
    {"exp", "Exp", 13, {"x"}, {0, -1}, NULL, NULL},
    {"erf", "Erf", 13, {"x"}, {0, -1}, NULL, NULL},
    {"reciprocal", "Reciprocal", 13, {"x"}, {0, -1}, NULL, NULL},
    {"abs", "Abs", 13, {"x"}, {0, -1}, NULL, NULL},
    {"add_bias", "Add", 14, {"a", "b"}, {0, 1, -1}, NULL, NULL},
    {"mul_bcast", "Mul", 14, {"a", "b"}, {0, 1, -1}, NULL, NULL},
    {"sub_scalar", "Sub", 14, {"a", "b"}, {0, 1, -1}, NULL, NULL},
    {"div_row", "Div", 14, {"a", "b"}, {0, 1, -1}, NULL, NULL},
    {"pow", "Pow", 15, {"a", "b"}, {0, 1, -1}, NULL, NULL},
    {"where", "Where", 16, {"c", "a", "b"}, {1, 2, -1}, NULL, where_fix},
    {"softmax_last", "Softmax", 13, {"x"}, {0, -1}, NULL, NULL},
    {"log_softmax_axis1", "LogSoftmax", 13, {"x"}, {0, -1}, axis1_attrs, NULL},
    {"softmax_coerced", "Softmax", 11, {"x"}, {0, -1}, NULL, NULL},
    {"bn_train", "BatchNormalization", 15, {"x", "scale", "b", "mean", "var"}, {0, 1, 2, -1}, train_attrs, NULL},
    {"bn_eval", "BatchNormalization", 15, {"x", "scale", "b", "mean", "var"}, {0, 1, 2, -1}, NULL, NULL},
    {"bn_eval_stats", "BatchNormalization", 15, {"x", "scale", "b", "mean", "var"}, {3, 4, -1}, NULL, NULL},
    {"ln_last", "LayerNormalization", 17, {"x", "scale", "b"}, {0, 1, 2, -1}, NULL, NULL},
    {"ln_last2", "LayerNormalization", 17, {"x", "scale", "b"}, {0, 1, 2, -1}, axis_m2_attrs, NULL},
    {"instnorm", "InstanceNormalization", 6, {"x", "scale", "b"}, {0, 1, 2, -1}, NULL, NULL},
};

static void run_case(const ref_case *rc) {
  oh_case c;
  oh_init(&c, rc->op, rc->opset);
  if (rc->attrs) rc->attrs(&c);
  const char *grad_names[5] = {0};
  for (int i = 0; i < 5 && rc->inputs[i]; i++) {
    const ref_entry *r = ref_find(rc->name, rc->inputs[i]);
    if (!r) {
      CHECK(0);
      oh_free(&c);
      return;
    }
    oh_input(&c, RC_DTYPE_FLOAT, r->rank, r->dims, ref_ptr(r));
    grad_names[i] = rc->inputs[i];
  }
  if (rc->fix) rc->fix(&c);
  const ref_entry *y = ref_find(rc->name, "y"), *gy = ref_find(rc->name, "gy");
  if (!y || !gy || !run_ok(&c)) {
    CHECK(0);
    oh_free(&c);
    return;
  }
  char what[160];
  snprintf(what, sizeof what, "%s (%s) forward", rc->name, rc->op);
  CHECK_INT(rc_tensor_numel(&c.out_t[0]), ref_numel(y));
  compare_forward(what, oh_out_f(&c, 0), y);
  if (!strcmp(rc->name, "bn_train")) {
    /* Running statistics: mean from torch's own update; variance by the
     * spec's population-variance formula on torch's batch variance. */
    const ref_entry *rm = ref_find(rc->name, "running_mean"), *rv = ref_find(rc->name, "running_var_spec");
    CHECK(rm && rv);
    if (rm) compare_forward("bn_train running_mean", oh_out_f(&c, 1), rm);
    if (rv) compare_forward("bn_train running_var", oh_out_f(&c, 2), rv);
  }
  run_backward(&c, ref_ptr(gy), rc->grad_inputs);
  for (int k = 0; rc->grad_inputs[k] >= 0; k++) {
    int i = rc->grad_inputs[k];
    char key[32];
    snprintf(key, sizeof key, "d%s", grad_names[i]);
    const ref_entry *g = ref_find(rc->name, key);
    if (!g) {
      CHECK(0);
      continue;
    }
    snprintf(what, sizeof what, "%s (%s) gradient of input %d (%s)", rc->name, rc->op, i, grad_names[i]);
    compare_grad(what, grad_of(&c, i), g);
  }
  oh_free(&c);
}

static void test_against_pytorch(void) {
  for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
    int before = test_failed_checks_;
    run_case(&cases[i]);
    if (test_failed_checks_ != before) fprintf(stderr, "case %s failed\n", cases[i].name);
  }
}

int main(void) {
  if (!load_refs()) {
    fprintf(stderr, "FAIL: reference data from " SOURCE " is missing\n");
    return 1;
  }
  RUN(test_against_pytorch);
  free(ref_data);
  return TEST_REPORT();
}
