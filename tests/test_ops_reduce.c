/* Reduce-family kernels. Expected values are the ONNX operator
 * specification's examples (ReduceSum/ReduceMean/ReduceMax "keepdims"
 * examples, recalled from memory and re-derived by hand), named beside each
 * check; gradients against finite differences. */
#include "ops_expect.h"

static const int CHECK0[] = {0, -1};
static const float SUM_X[] = {1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12};
static const float MEAN_X[] = {5, 1, 20, 2, 30, 1, 40, 2, 55, 1, 60, 2};

static void test_reduce_sum_spec(void) {
  oh_case c;
  /* spec ReduceSum keepdims example (opset 13, axes input [1]) */
  oh_init(&c, "ReduceSum", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(3, 2, 2), SUM_X);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(1), I64(1));
  CHECK(run_ok(&c));
  CHECK_EQ(c.out_t[0].rank, 3);
  CHECK_EQ(c.out_t[0].dims[1], 1);
  check_floats(oh_out_f(&c, 0), F32(4, 6, 12, 14, 20, 22), 6);
  CHECK_LT(oh_gradcheck(&c, CHECK0, 1e-2), 1e-3);
  oh_free(&c);
  /* spec: no axes and noop_with_empty_axes=0 reduces everything (keepdims 0 -> scalar) */
  oh_init(&c, "ReduceSum", 13);
  oh_attr_int(&c, "keepdims", 0);
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(3, 2, 2), SUM_X);
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].rank, 0);
  CHECK_NEAR(oh_out_f(&c, 0)[0], 78, 0, 0);
  oh_free(&c);
  /* spec: empty axes with noop_with_empty_axes=1 is an identity */
  oh_init(&c, "ReduceSum", 13);
  oh_attr_int(&c, "noop_with_empty_axes", 1);
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(3, 2, 2), SUM_X);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(0), NULL);
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].rank, 3);
  check_floats(oh_out_f(&c, 0), SUM_X, 12);
  CHECK_LT(oh_gradcheck(&c, CHECK0, 1e-2), 1e-3);
  oh_free(&c);
  /* opset 11: axes attribute, negative axis, keepdims 0 */
  oh_init(&c, "ReduceSum", 11);
  oh_attr_ints(&c, "axes", 2, I64(-1, 0));
  oh_attr_int(&c, "keepdims", 0);
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(3, 2, 2), SUM_X);
  CHECK(run_ok(&c));
  CHECK_EQ(c.out_t[0].rank, 1);
  CHECK_EQ(c.out_t[0].dims[0], 2);
  check_floats(oh_out_f(&c, 0), F32(1 + 2 + 5 + 6 + 9 + 10, 3 + 4 + 7 + 8 + 11 + 12), 2);
  oh_free(&c);
  /* int64 (shape arithmetic) */
  oh_init(&c, "ReduceSum", 13);
  oh_attr_int(&c, "keepdims", 0);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(3), I64(4, 5, -2));
  CHECK(run_ok(&c));
  CHECK_INT(((int64_t *)c.out_t[0].data)[0], 7);
  oh_free(&c);
}

static void test_reduce_mean_spec(void) {
  oh_case c;
  /* spec ReduceMean keepdims example (axes attribute [1] before opset 18) */
  oh_init(&c, "ReduceMean", 13);
  oh_attr_ints(&c, "axes", 1, I64(1));
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(3, 2, 2), MEAN_X);
  CHECK(run_ok(&c));
  check_floats(oh_out_f(&c, 0), F32(12.5f, 1.5f, 35, 1.5f, 57.5f, 1.5f), 6);
  oh_free(&c);
  /* opset 18: axes input; global average over H, W */
  float x[2 * 3 * 4 * 5];
  oh_fill(x, 120, 17);
  oh_init(&c, "ReduceMean", 18);
  oh_input(&c, RC_DTYPE_FLOAT, 4, I64(2, 3, 4, 5), x);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(2, 3));
  CHECK(run_ok(&c));
  double s = 0;
  for (int i = 20; i < 40; i++) s += x[i];
  CHECK_NEAR(oh_out_f(&c, 0)[1], s / 20, 1e-6, 1e-5);
  CHECK_LT(oh_gradcheck(&c, CHECK0, 1e-2), 1e-3);
  oh_free(&c);
  /* before 18 an axes input does not exist: refuse a duplicate axis in the attribute */
  oh_init(&c, "ReduceMean", 13);
  oh_attr_ints(&c, "axes", 2, I64(1, -2));
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(3, 2, 2), MEAN_X);
  rc_err e = {0};
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_INVALID);
  oh_free(&c);
}

static void test_reduce_max_spec(void) {
  oh_case c;
  /* spec ReduceMax keepdims example (opset 18, axes input [1]) */
  oh_init(&c, "ReduceMax", 18);
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(3, 2, 2), MEAN_X);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(1), I64(1));
  CHECK(run_ok(&c));
  check_floats(oh_out_f(&c, 0), F32(20, 2, 40, 2, 60, 2), 6);
  oh_free(&c);
  /* gradient on distinct values */
  float x[60];
  oh_fill(x, 60, 23);
  oh_init(&c, "ReduceMax", 13);
  oh_attr_ints(&c, "axes", 1, I64(1));
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(3, 4, 5), x);
  CHECK_LT(oh_gradcheck(&c, CHECK0, 1e-4), 1e-3);
  oh_free(&c);
  /* ties: our documented choice sends the whole gradient to the first maximum */
  oh_init(&c, "ReduceMax", 13);
  oh_attr_int(&c, "keepdims", 0);
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(4), F32(1, 3, 3, 2));
  CHECK(run_ok(&c));
  CHECK_EQ(oh_out_f(&c, 0)[0], 3.0f);
  run_backward(&c, NULL, CHECK0);
  const float *g = grad_of(&c, 0);
  CHECK_EQ(g[0], 0);
  CHECK_EQ(g[1], 1);
  CHECK_EQ(g[2], 0);
  CHECK_EQ(g[3], 0);
  oh_free(&c);
  /* int64 max */
  oh_init(&c, "ReduceMax", 13);
  oh_attr_int(&c, "keepdims", 0);
  oh_input(&c, RC_DTYPE_INT64, 2, I64(2, 2), I64(-5, 9, 4, -1));
  oh_attr_ints(&c, "axes", 1, I64(0));
  CHECK(run_ok(&c));
  CHECK_EQ(((int64_t *)c.out_t[0].data)[0], 4);
  CHECK_EQ(((int64_t *)c.out_t[0].data)[1], 9);
  oh_free(&c);
}

int main(void) {
  RUN(test_reduce_sum_spec);
  RUN(test_reduce_mean_spec);
  RUN(test_reduce_max_spec);
  return TEST_REPORT();
}
