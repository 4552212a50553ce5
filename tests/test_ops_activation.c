/* Activations: Relu, LeakyRelu, PRelu, Elu, Clip, Sigmoid, HardSigmoid,
 * HardSwish, Tanh, Softplus, Gelu. Expected values come from the ONNX
 * operator spec's formulas evaluated by hand or in double precision here;
 * kink conventions are PyTorch's autograd (named where checked). */
#include "ops_check.h"

typedef struct act_case {
  const char *op;
  int opset;
  float alpha, beta; /* NAN: attribute left at its default */
  float x, y;
  const char *source;
} act_case;

static void set_attrs(oh_case *c, const act_case *a) {
  if (!isnan(a->alpha)) oh_attr_float(c, "alpha", a->alpha);
  if (!isnan(a->beta)) oh_attr_float(c, "beta", a->beta);
}

static void test_values(void) {
  const double gelu_tanh_1 = 0.5 * (1 + tanh(sqrt(2 / 3.14159265358979323846) * (1 + 0.044715)));
  const act_case cases[] = {
      {"Relu", 14, NAN, NAN, -2, 0, "spec: max(0, x)"},
      {"Relu", 14, NAN, NAN, 3, 3, "spec: max(0, x)"},
      {"LeakyRelu", 16, NAN, NAN, -2, -0.02f, "spec: default alpha 0.01"},
      {"LeakyRelu", 16, 0.1f, NAN, -2, -0.2f, "spec: alpha * x for x < 0"},
      {"Elu", 6, NAN, NAN, -1, (float)(exp(-1) - 1), "spec: alpha (e^x - 1), alpha 1"},
      {"Elu", 6, 2.0f, NAN, 0.5f, 0.5f, "spec: x for x > 0"},
      {"Sigmoid", 13, NAN, NAN, 0, 0.5f, "1/(1+e^0)"},
      {"Sigmoid", 13, NAN, NAN, 2, 0.880797078f, "1/(1+e^-2)"},
      {"Sigmoid", 13, NAN, NAN, -100, 0.0f, "no overflow at -100"},
      {"Tanh", 13, NAN, NAN, 0.5f, 0.462117157f, "tanh(0.5)"},
      {"HardSigmoid", 6, NAN, NAN, 1, 0.7f, "spec: 0.2 x + 0.5"},
      {"HardSigmoid", 6, 0.5f, 0.1f, 3, 1.0f, "spec: clipped at 1"},
      {"HardSwish", 14, NAN, NAN, 1, (float)(1.0 / 6 + 0.5), "spec: x (x/6 + 1/2)"},
      {"HardSwish", 14, NAN, NAN, -4, 0.0f, "spec: 0 below -3"},
      {"HardSwish", 14, NAN, NAN, 4, 4.0f, "spec: x above 3"},
      {"Softplus", 1, NAN, NAN, 0, 0.693147181f, "ln 2"},
      {"Softplus", 1, NAN, NAN, 100, 100.0f, "ln(1 + e^100) = 100 in float"},
      {"Gelu", 20, NAN, NAN, 1, 0.841344746f, "spec: x Phi(x); Phi(1) from normal tables"},
  };
  for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
    oh_case c;
    oh_init(&c, cases[i].op, cases[i].opset);
    set_attrs(&c, &cases[i]);
    const int64_t d[] = {1};
    oh_input(&c, RC_DTYPE_FLOAT, 1, d, &cases[i].x);
    CHECK(run_ok(&c));
    CHECK_NEAR(oh_out_f(&c, 0)[0], cases[i].y, 1e-6, 1e-6);
    oh_free(&c);
  }
  oh_case c;
  oh_init(&c, "Gelu", 20);
  oh_attr_string(&c, "approximate", "tanh");
  const int64_t d[] = {1};
  oh_input(&c, RC_DTYPE_FLOAT, 1, d, (float[]){1});
  CHECK(run_ok(&c));
  CHECK_NEAR(oh_out_f(&c, 0)[0], gelu_tanh_1, 1e-6, 1e-6); /* spec formula in double */
  oh_free(&c);
}

/* Gradient checks on inputs away from the kinks (|x| in [0.2, 1.2] and a
 * few in (3, 4) for HardSwish's outer pieces). */
static void test_gradients(void) {
  const act_case cases[] = {
      {"Relu", 14, NAN, NAN, 0, 0, ""},       {"LeakyRelu", 16, 0.2f, NAN, 0, 0, ""},
      {"Elu", 6, 1.5f, NAN, 0, 0, ""},        {"Sigmoid", 13, NAN, NAN, 0, 0, ""},
      {"Tanh", 13, NAN, NAN, 0, 0, ""},       {"HardSigmoid", 6, 0.3f, 0.4f, 0, 0, ""},
      {"HardSwish", 14, NAN, NAN, 0, 0, ""},  {"Softplus", 1, NAN, NAN, 0, 0, ""},
      {"Gelu", 20, NAN, NAN, 0, 0, ""},
  };
  for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
    oh_case c;
    oh_init(&c, cases[i].op, cases[i].opset);
    set_attrs(&c, &cases[i]);
    const int64_t d[] = {4, 5};
    oh_input(&c, RC_DTYPE_FLOAT, 2, d, NULL);
    float *x = oh_in_f(&c, 0);
    oh_fill(x, 20, 101);
    for (int j = 0; j < 20; j++) x[j] = (x[j] < 0 ? -1.0f : 1.0f) * (0.2f + fabsf(x[j]));
    x[3] = 3.5f;
    x[7] = -3.7f;
    CHECK_GRAD(&c, 5e-3, 0);
    oh_free(&c);
  }
  oh_case c;
  oh_init(&c, "Gelu", 20);
  oh_attr_string(&c, "approximate", "tanh");
  const int64_t d[] = {9};
  oh_input(&c, RC_DTYPE_FLOAT, 1, d, (float[]){-3, -1.5f, -0.7f, -0.1f, 0, 0.2f, 0.9f, 2, 4});
  CHECK_GRAD(&c, 5e-3, 0);
  oh_free(&c);
}

/* PyTorch's conventions at kinks: Relu'(0) = 0, HardSwish'(-3) = -1/2,
 * HardSwish'(3) = 3/2, HardSigmoid'(+-3) = 0 (open interval). */
static void test_kink_conventions(void) {
  struct {
    const char *op;
    int opset;
    float x, g;
  } k[] = {{"Relu", 14, 0, 0},       {"HardSwish", 14, -3, -0.5f},      {"HardSwish", 14, 3, 1.5f},
           {"HardSigmoid", 6, -2.5f, 0}, {"HardSigmoid", 6, 2.5f, 0}, {"LeakyRelu", 16, 0, 0.01f}};
  for (size_t i = 0; i < sizeof k / sizeof k[0]; i++) {
    oh_case c;
    oh_init(&c, k[i].op, k[i].opset);
    const int64_t d[] = {1};
    oh_input(&c, RC_DTYPE_FLOAT, 1, d, &k[i].x);
    CHECK(run_ok(&c));
    run_backward(&c, NULL, (const int[]){0, -1});
    CHECK_NEAR(grad_of(&c, 0)[0], k[i].g, 1e-6, 0);
    oh_free(&c);
  }
}

/* PRelu with a per-channel slope (C,1,1) on (N,C,H,W): values by the spec's
 * rule, gradients for X and for the slope (reduced over N, H, W). */
static void test_prelu(void) {
  oh_case c;
  oh_init(&c, "PRelu", 16);
  const int64_t x[] = {2, 3, 2, 2}, s[] = {3, 1, 1};
  oh_input(&c, RC_DTYPE_FLOAT, 4, x, NULL);
  oh_input(&c, RC_DTYPE_FLOAT, 3, s, (float[]){0.1f, 0.25f, -0.5f});
  oh_fill(oh_in_f(&c, 0), 24, 7);
  CHECK(run_ok(&c));
  int bad = 0;
  for (int i = 0; i < 24; i++) {
    float v = oh_in_f(&c, 0)[i], slope = oh_in_f(&c, 1)[(i / 4) % 3];
    float want = v >= 0 ? v : slope * v;
    if (oh_out_f(&c, 0)[i] != want) bad++;
  }
  CHECK_INT(bad, 0);
  CHECK_GRAD(&c, 5e-3, 0, 1);
  oh_free(&c);

  /* A scalar slope and a shared-across-spatial slope (1,C,1,1). */
  oh_init(&c, "PRelu", 9);
  const int64_t s4[] = {1, 3, 1, 1};
  oh_input(&c, RC_DTYPE_FLOAT, 4, x, NULL);
  oh_input(&c, RC_DTYPE_FLOAT, 4, s4, (float[]){0.3f, 0.6f, 0.9f});
  oh_fill(oh_in_f(&c, 0), 24, 8);
  for (int i = 0; i < 24; i++) oh_in_f(&c, 0)[i] += oh_in_f(&c, 0)[i] < 0 ? -0.1f : 0.1f; /* off the kink */
  CHECK_GRAD(&c, 5e-3, 0, 1);
  oh_free(&c);

  /* Unidirectional: the slope may not grow X. */
  oh_init(&c, "PRelu", 16);
  const int64_t small[] = {3}, wide[] = {2, 3};
  oh_input(&c, RC_DTYPE_FLOAT, 1, small, NULL);
  oh_input(&c, RC_DTYPE_FLOAT, 2, wide, NULL);
  CHECK_REFUSED(&c, RC_ERR_SHAPE, "does not broadcast to X");
  oh_free(&c);
}

static void test_clip(void) {
  /* Opsets 6-10: bounds are attributes. */
  oh_case c;
  oh_init(&c, "Clip", 6);
  oh_attr_float(&c, "min", -1);
  oh_attr_float(&c, "max", 2);
  const int64_t d[] = {5};
  oh_input(&c, RC_DTYPE_FLOAT, 1, d, (float[]){-3, -1, 0.5f, 2, 5});
  CHECK(run_ok(&c));
  const float want[] = {-1, -1, 0.5f, 2, 2};
  for (int i = 0; i < 5; i++) CHECK_NEAR(oh_out_f(&c, 0)[i], want[i], 0, 0);
  oh_free(&c);

  /* Opset 11+: optional inputs; min only, then max only (absent input). */
  oh_init(&c, "Clip", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 1, d, (float[]){-3, -1, 0.5f, 2, 5});
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, (float[]){0});
  CHECK(run_ok(&c));
  CHECK_NEAR(oh_out_f(&c, 0)[0], 0, 0, 0);
  CHECK_NEAR(oh_out_f(&c, 0)[4], 5, 0, 0);
  oh_free(&c);
  oh_init(&c, "Clip", 12);
  oh_input(&c, RC_DTYPE_FLOAT, 1, d, (float[]){-3, -1, 0.5f, 2, 5});
  oh_input_absent(&c);
  oh_input(&c, RC_DTYPE_FLOAT, 1, (const int64_t[]){1}, (float[]){1});
  CHECK(run_ok(&c));
  CHECK_NEAR(oh_out_f(&c, 0)[0], -3, 0, 0);
  CHECK_NEAR(oh_out_f(&c, 0)[4], 1, 0, 0);
  oh_free(&c);

  /* Gradients: x passes where min <= x <= max, bounds included (PyTorch's
   * clamp backward); the bound that set an output receives its gradient. */
  oh_init(&c, "Clip", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 1, d, (float[]){-1, 2, 0.5f, -3, 5});
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, (float[]){-1});
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, (float[]){2});
  CHECK(run_ok(&c));
  run_backward(&c, (const float[]){1, 10, 100, 1000, 10000}, (const int[]){0, 1, 2, -1});
  const float gx[] = {1, 10, 100, 0, 0};
  for (int i = 0; i < 5; i++) CHECK_NEAR(grad_of(&c, 0)[i], gx[i], 0, 0);
  CHECK_NEAR(grad_of(&c, 1)[0], 1000, 0, 0);
  CHECK_NEAR(grad_of(&c, 2)[0], 10000, 0, 0);
  oh_free(&c);

  /* Finite differences away from the bounds, for x, min and max. */
  oh_init(&c, "Clip", 13);
  const int64_t m[] = {3, 4};
  oh_input(&c, RC_DTYPE_FLOAT, 2, m, NULL);
  oh_fill(oh_in_f(&c, 0), 12, 31);
  for (int i = 0; i < 12; i++) oh_in_f(&c, 0)[i] *= 1.3f;
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, (float[]){-0.55f});
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, (float[]){0.45f});
  CHECK_GRAD(&c, 5e-3, 0, 1, 2);
  oh_free(&c);

  oh_init(&c, "Clip", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 1, d, NULL);
  oh_input(&c, RC_DTYPE_FLOAT, 1, (const int64_t[]){2}, NULL);
  CHECK_REFUSED(&c, RC_ERR_SHAPE, "scalar");
  oh_free(&c);
}

static void test_refusals(void) {
  oh_case c;
  oh_init(&c, "Gelu", 20);
  oh_attr_string(&c, "approximate", "sigmoid");
  const int64_t d[] = {2};
  oh_input(&c, RC_DTYPE_FLOAT, 1, d, NULL);
  CHECK_REFUSED(&c, RC_ERR_UNSUPPORTED, "approximate");
  oh_free(&c);
  oh_init(&c, "Relu", 14);
  oh_input(&c, RC_DTYPE_INT32, 1, d, NULL);
  CHECK_REFUSED(&c, RC_ERR_UNSUPPORTED, "int32");
  oh_free(&c);
  CHECK_NULL(rc__op_find("HardSwish", "", 13)); /* new in opset 14 */
  CHECK_NULL(rc__op_find("Gelu", "", 19));      /* new in opset 20 */
  CHECK_NOT_NULL(rc__op_find("Gelu", "", 21));
}

int main(void) {
  RUN(test_values);
  RUN(test_gradients);
  RUN(test_kink_conventions);
  RUN(test_prelu);
  RUN(test_clip);
  RUN(test_refusals);
  return TEST_REPORT();
}
