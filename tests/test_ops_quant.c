/* QuantizeLinear / DequantizeLinear and the fake-quant helpers. Expected
 * values are the ONNX operator specification's examples (named) or follow
 * its formulas y = saturate(round_half_even(x / s) + z), y = (x - z) * s,
 * worked out by hand beside each check. The spec example values are
 * recalled from memory; each one was re-derived from the formula before use. */
#include "ops/quant.h"
#include "ops_expect.h"

static void test_round_half_even_and_saturate(void) {
  oh_case c;
  /* spec: rounding is half to even: .5 1.5 2.5 -.5 -2.5 -> 0 2 2 0 -2; saturation at the int8 ends */
  oh_init(&c, "QuantizeLinear", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(7), F32(0.5f, 1.5f, 2.5f, -0.5f, -2.5f, 1000, -1000));
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, F32(1));
  oh_input(&c, RC_DTYPE_INT8, 0, NULL, ((const int8_t[]){0}));
  CHECK(run_ok(&c));
  const int8_t *y = c.out_t[0].data;
  CHECK_EQ(y[0], 0);
  CHECK_EQ(y[1], 2);
  CHECK_EQ(y[2], 2);
  CHECK_EQ(y[3], 0);
  CHECK_EQ(y[4], -2);
  CHECK_EQ(y[5], 127);
  CHECK_EQ(y[6], -128);
  oh_free(&c);
  /* spec QuantizeLinear example: x [0 2 3 1000 -254 -1000], scale 2, zero point 128 (uint8) */
  oh_init(&c, "QuantizeLinear", 10);
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(6), F32(0, 2, 3, 1000, -254, -1000));
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, F32(2));
  oh_input(&c, RC_DTYPE_UINT8, 0, NULL, ((const uint8_t[]){128}));
  CHECK(run_ok(&c));
  const uint8_t *u = c.out_t[0].data;
  CHECK_EQ(u[0], 128);
  CHECK_EQ(u[1], 129);
  CHECK_EQ(u[2], 130);
  CHECK_EQ(u[3], 255);
  CHECK_EQ(u[4], 1);
  CHECK_EQ(u[5], 0);
  oh_free(&c);
  /* spec: without a zero point the output is uint8 with zero point 0 */
  oh_init(&c, "QuantizeLinear", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(3), F32(-3, 3.5f, 300));
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, F32(1));
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dtype, RC_DTYPE_UINT8);
  u = c.out_t[0].data;
  CHECK_EQ(u[0], 0);
  CHECK_EQ(u[1], 4);
  CHECK_EQ(u[2], 255);
  oh_free(&c);
}

/* spec example quantizelinear_axis / dequantizelinear_axis: x (1,3,3,2), per-channel on axis 1 */
static const float AX_X[] = {-162, 10, -100, 232, -20, -50, -76, 0, 0, 252, 32, -44, 245, -485, -960, -270, -375, -470};
static const uint8_t AX_Q[] = {3, 89, 34, 200, 74, 59, 5, 24, 24, 87, 32, 13, 245, 99, 4, 142, 121, 102};

static void test_per_axis(void) {
  oh_case c;
  oh_init(&c, "QuantizeLinear", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 4, I64(1, 3, 3, 2), AX_X);
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(3), F32(2, 4, 5));
  oh_input(&c, RC_DTYPE_UINT8, 1, I64(3), ((const uint8_t[]){84, 24, 196}));
  CHECK(run_ok(&c));
  CHECK_MEM_EQ(c.out_t[0].data, AX_Q, sizeof AX_Q);
  oh_free(&c);
  oh_init(&c, "DequantizeLinear", 13);
  oh_input(&c, RC_DTYPE_UINT8, 4, I64(1, 3, 3, 2), AX_Q);
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(3), F32(2, 4, 5));
  oh_input(&c, RC_DTYPE_UINT8, 1, I64(3), ((const uint8_t[]){84, 24, 196}));
  CHECK(run_ok(&c));
  for (int i = 0; i < 18; i++) CHECK_NEAR(oh_out_f(&c, 0)[i], AX_X[i], 0, 0);
  oh_free(&c);
  /* per-axis on another axis (axis=-1) and a length mismatch refused */
  oh_init(&c, "DequantizeLinear", 13);
  oh_attr_int(&c, "axis", -1);
  oh_input(&c, RC_DTYPE_INT8, 2, I64(2, 2), ((const int8_t[]){1, 2, -3, 4}));
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(2), F32(0.5f, 2));
  CHECK(run_ok(&c));
  CHECK_EQ(oh_out_f(&c, 0)[0], 0.5f);
  CHECK_EQ(oh_out_f(&c, 0)[1], 4);
  CHECK_EQ(oh_out_f(&c, 0)[2], -1.5f);
  oh_free(&c);
  oh_init(&c, "DequantizeLinear", 13);
  oh_input(&c, RC_DTYPE_INT8, 2, I64(2, 4), NULL);
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(3), F32(1, 1, 1));
  rc_err e = {0};
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_SHAPE);
  CHECK_STR_CONTAINS(e.msg, "DequantizeLinear");
  oh_free(&c);
}

static void test_dequantize(void) {
  oh_case c;
  /* spec DequantizeLinear example: x [0 3 128 255] uint8, scale 2, zero point 128 */
  oh_init(&c, "DequantizeLinear", 10);
  oh_input(&c, RC_DTYPE_UINT8, 1, I64(4), ((const uint8_t[]){0, 3, 128, 255}));
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, F32(2));
  oh_input(&c, RC_DTYPE_UINT8, 0, NULL, ((const uint8_t[]){128}));
  CHECK(run_ok(&c));
  const float *y = oh_out_f(&c, 0);
  CHECK_EQ(y[0], -256);
  CHECK_EQ(y[1], -250);
  CHECK_EQ(y[2], 0);
  CHECK_EQ(y[3], 254);
  oh_free(&c);
  /* int32 input (a bias), no zero point: y = x * s */
  oh_init(&c, "DequantizeLinear", 13);
  oh_input(&c, RC_DTYPE_INT32, 1, I64(3), ((const int32_t[]){-300, 0, 1000}));
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, F32(0.5f));
  CHECK(run_ok(&c));
  CHECK_EQ(oh_out_f(&c, 0)[0], -150);
  CHECK_EQ(oh_out_f(&c, 0)[2], 500);
  oh_free(&c);
}

static void test_int4(void) {
  oh_case c;
  /* int4 (opset 21): range [-8, 7]; rint(7.6) = 8 saturates to 7 */
  oh_init(&c, "QuantizeLinear", 21);
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(4), F32(-10, -8.4f, 7.6f, 20));
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, F32(1));
  oh_input(&c, RC_DTYPE_INT4, 0, NULL, ((const int8_t[]){0}));
  CHECK(run_ok(&c));
  const int8_t *q = c.out_t[0].data;
  CHECK_EQ(q[0], -8);
  CHECK_EQ(q[1], -8);
  CHECK_EQ(q[2], 7);
  CHECK_EQ(q[3], 7);
  oh_free(&c);
  /* uint4: [0, 15], with zero point 3 */
  oh_init(&c, "QuantizeLinear", 21);
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(3), F32(-10, 2.2f, 40));
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, F32(2));
  oh_input(&c, RC_DTYPE_UINT4, 0, NULL, ((const uint8_t[]){3}));
  CHECK(run_ok(&c));
  const uint8_t *u = c.out_t[0].data;
  CHECK_EQ(u[0], 0);
  CHECK_EQ(u[1], 4);
  CHECK_EQ(u[2], 15);
  oh_free(&c);
  oh_init(&c, "DequantizeLinear", 21);
  oh_input(&c, RC_DTYPE_INT4, 1, I64(2), ((const int8_t[]){-8, 7}));
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, F32(0.25f));
  oh_input(&c, RC_DTYPE_INT4, 0, NULL, ((const int8_t[]){-1}));
  CHECK(run_ok(&c));
  CHECK_EQ(oh_out_f(&c, 0)[0], -1.75f);
  CHECK_EQ(oh_out_f(&c, 0)[1], 2.0f);
  oh_free(&c);
  /* int4 before opset 21 is refused */
  oh_init(&c, "DequantizeLinear", 19);
  oh_input(&c, RC_DTYPE_INT4, 1, I64(2), NULL);
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, F32(0.25f));
  rc_err e = {0};
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_UNSUPPORTED);
  oh_free(&c);
}

static void test_bad_scales_and_zero_points(void) {
  static const float bad[] = {0.0f, -1.0f, NAN, INFINITY};
  for (int i = 0; i < 4; i++) {
    oh_case c;
    oh_init(&c, "QuantizeLinear", 13);
    oh_input(&c, RC_DTYPE_FLOAT, 1, I64(2), F32(1, 2));
    oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, &bad[i]);
    rc_err e = {0};
    CHECK_STATUS(oh_run(&c, &e), RC_ERR_INVALID);
    CHECK_STR_CONTAINS(e.msg, "node 'QuantizeLinear'");
    CHECK_STR_CONTAINS(e.msg, "scale");
    oh_free(&c);
  }
  /* scale only known at run time: checked at forward */
  oh_case c;
  oh_init(&c, "DequantizeLinear", 13);
  oh_input(&c, RC_DTYPE_INT8, 1, I64(2), NULL);
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(1), F32(-2));
  void *keep = c.in_t[1].data;
  c.in_t[1].data = NULL;
  c.node.def = rc__op_find("DequantizeLinear", "", 13);
  rc_err e = {0};
  CHECK_STATUS(c.node.def->infer(&c.node, (const rc_tensor *const *)c.in, c.out_t, &e), RC_OK);
  c.in_t[1].data = keep;
  c.node.def = NULL;
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_INVALID);
  oh_free(&c);
  /* an int4 zero point held in a byte outside [-8, 7] */
  oh_init(&c, "DequantizeLinear", 21);
  oh_input(&c, RC_DTYPE_INT4, 1, I64(2), NULL);
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, F32(1));
  oh_input(&c, RC_DTYPE_INT4, 0, NULL, ((const int8_t[]){9}));
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_INVALID);
  CHECK_STR_CONTAINS(e.msg, "zero point");
  oh_free(&c);
  /* blocked quantization is refused at load time */
  oh_init(&c, "QuantizeLinear", 21);
  oh_attr_int(&c, "block_size", 4);
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(8), NULL);
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(2), F32(1, 1));
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_UNSUPPORTED);
  oh_free(&c);
}

static void test_fake_quant_helpers(void) {
  /* forward equals QuantizeLinear followed by DequantizeLinear (per-channel on axis 1 of (2,2,3)) */
  float x[12], y[12];
  oh_fill(x, 12, 77);
  for (int i = 0; i < 12; i++) x[i] *= 3;
  const float s[2] = {0.05f, 0.02f};
  const int32_t z[2] = {3, -5};
  rc__fake_quant_forward(y, x, 12, s, z, 2, 3, -8, 7);
  int bad = 0;
  for (int i = 0; i < 12; i++) {
    int ch = (i / 3) % 2;
    float q = rintf(x[i] / s[ch]) + (float)z[ch];
    q = q < -8 ? -8 : q > 7 ? 7 : q;
    bad += y[i] != (q - (float)z[ch]) * s[ch];
  }
  CHECK_INT(bad, 0);
  /* backward: clipped straight-through (common practice): gradient passes where
   * qmin <= round(x/s) + z <= qmax. scale 1, zero point 0, range [-2, 2]. */
  const float xs[] = {-3, -2.4f, -2.6f, 0.3f, 2.5f, 2.51f};
  const float one[] = {1, 1, 1, 1, 1, 1};
  float g[6] = {0};
  const float s1 = 1;
  rc__fake_quant_backward(g, one, xs, 6, &s1, NULL, 1, 6, -2, 2);
  /* round: -3 -2 -3 0 2 (half to even) 3 */
  CHECK_EQ(g[0], 0);
  CHECK_EQ(g[1], 1);
  CHECK_EQ(g[2], 0);
  CHECK_EQ(g[3], 1);
  CHECK_EQ(g[4], 1);
  CHECK_EQ(g[5], 0);
}

int main(void) {
  RUN(test_round_half_even_and_saturate);
  RUN(test_per_axis);
  RUN(test_dequantize);
  RUN(test_int4);
  RUN(test_bad_scales_and_zero_points);
  RUN(test_fake_quant_helpers);
  return TEST_REPORT();
}
