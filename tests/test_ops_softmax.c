/* Softmax and LogSoftmax: values, the opset-dependent meaning of `axis`
 * (ONNX spec: coerced 2-D before opset 13, one axis from 13), numerical
 * stability, gradients. */
#include "ops_check.h"

static void run_pair(const char *op, const float *logits, float *out) {
  oh_case c;
  oh_init(&c, op, 13);
  const int64_t d[] = {1, 2};
  oh_input(&c, RC_DTYPE_FLOAT, 2, d, logits);
  CHECK(run_ok(&c));
  out[0] = oh_out_f(&c, 0)[0];
  out[1] = oh_out_f(&c, 0)[1];
  oh_free(&c);
}

/* Common practice: logits (5, 1) give probabilities 0.982 / 0.018, logits
 * (3, 2) give 0.731 / 0.269. */
static void test_known_values(void) {
  float p[2];
  run_pair("Softmax", (const float[]){5, 1}, p);
  CHECK_NEAR(p[0], 0.982, 5e-4, 0);
  CHECK_NEAR(p[1], 0.018, 5e-4, 0);
  run_pair("Softmax", (const float[]){3, 2}, p);
  CHECK_NEAR(p[0], 0.731, 5e-4, 0);
  CHECK_NEAR(p[1], 0.269, 5e-4, 0);
  run_pair("LogSoftmax", (const float[]){3, 2}, p);
  CHECK_NEAR(p[0], log(0.731), 1e-3, 0);
  CHECK_NEAR(p[1], log(0.269), 1e-3, 0);
  /* Shifting logits by 1000 changes nothing: the max is subtracted first. */
  run_pair("Softmax", (const float[]){1003, 1002}, p);
  CHECK_NEAR(p[0], 0.731, 5e-4, 0);
  run_pair("LogSoftmax", (const float[]){-1000, -1001}, p);
  CHECK_NEAR(p[1], log(0.269), 1e-3, 0);
}

/* Reference: softmax over groups of `len` elements at stride `inner`. */
static void ref_softmax(float *y, const float *x, int64_t outer, int64_t len, int64_t inner, int log_form) {
  for (int64_t o = 0; o < outer; o++)
    for (int64_t i = 0; i < inner; i++) {
      double m = -INFINITY, s = 0;
      for (int64_t j = 0; j < len; j++) m = fmax(m, x[(o * len + j) * inner + i]);
      for (int64_t j = 0; j < len; j++) s += exp(x[(o * len + j) * inner + i] - m);
      for (int64_t j = 0; j < len; j++) {
        double v = x[(o * len + j) * inner + i] - m;
        y[(o * len + j) * inner + i] = (float)(log_form ? v - log(s) : exp(v) / s);
      }
    }
}

typedef struct axis_case {
  int opset;
  int has_axis;
  int64_t axis;
  int64_t outer, len, inner; /* expected grouping of a (2, 3, 4) input */
} axis_case;

static void test_axis_by_opset(void) {
  const axis_case cases[] = {
      {11, 0, 0, 2, 12, 1},  /* default axis 1, coerced to (2, 12) */
      {11, 1, 2, 6, 4, 1},   /* (6, 4) */
      {11, 1, 0, 1, 24, 1},  /* everything in one row */
      {11, 1, -2, 2, 12, 1}, /* negative axis (opset 11+) */
      {13, 0, 0, 6, 4, 1},   /* default axis -1 */
      {13, 1, 1, 2, 3, 4},   /* only dim 1 */
      {13, 1, 0, 1, 2, 12},
  };
  const char *ops[] = {"Softmax", "LogSoftmax"};
  for (int o = 0; o < 2; o++)
    for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
      const axis_case *a = &cases[i];
      oh_case c;
      oh_init(&c, ops[o], a->opset);
      if (a->has_axis) oh_attr_int(&c, "axis", a->axis);
      const int64_t d[] = {2, 3, 4};
      oh_input(&c, RC_DTYPE_FLOAT, 3, d, NULL);
      oh_fill(oh_in_f(&c, 0), 24, 40 + (uint32_t)i);
      for (int j = 0; j < 24; j++) oh_in_f(&c, 0)[j] *= 3;
      CHECK(run_ok(&c));
      float want[24];
      ref_softmax(want, oh_in_f(&c, 0), a->outer, a->len, a->inner, o);
      int bad = 0;
      for (int j = 0; j < 24; j++)
        if (fabsf(oh_out_f(&c, 0)[j] - want[j]) > 1e-5f * (1 + fabsf(want[j]))) bad++;
      if (bad) fprintf(stderr, "%s opset %d axis case %zu\n", ops[o], a->opset, i);
      CHECK_INT(bad, 0);
      CHECK_GRAD(&c, 5e-3, 0);
      oh_free(&c);
    }
}

static void test_refusals(void) {
  oh_case c;
  oh_init(&c, "Softmax", 13);
  oh_attr_int(&c, "axis", 3);
  const int64_t d[] = {2, 3, 4};
  oh_input(&c, RC_DTYPE_FLOAT, 3, d, NULL);
  CHECK_REFUSED(&c, RC_ERR_INVALID, "axis 3");
  oh_free(&c);
  oh_init(&c, "LogSoftmax", 13);
  oh_input(&c, RC_DTYPE_DOUBLE, 3, d, NULL);
  CHECK_REFUSED(&c, RC_ERR_UNSUPPORTED, "float64");
  oh_free(&c);
}

/* A long class axis (threaded path) still sums to one per row. */
static void test_rows_sum_to_one(void) {
  oh_case c;
  oh_init(&c, "Softmax", 13);
  const int64_t d[] = {64, 1000};
  oh_input(&c, RC_DTYPE_FLOAT, 2, d, NULL);
  oh_fill(oh_in_f(&c, 0), 64000, 9);
  CHECK(run_ok(&c));
  double worst = 0;
  for (int r = 0; r < 64; r++) {
    double s = 0;
    for (int j = 0; j < 1000; j++) s += oh_out_f(&c, 0)[r * 1000 + j];
    worst = fmax(worst, fabs(s - 1));
  }
  CHECK_NEAR(worst, 0, 1e-5, 0);
  oh_free(&c);
}

int main(void) {
  RUN(test_known_values);
  RUN(test_axis_by_opset);
  RUN(test_refusals);
  RUN(test_rows_sum_to_one);
  return TEST_REPORT();
}
