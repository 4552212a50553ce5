/* Shape-family kernels. Expected values come from the ONNX operator
 * specification (its worked examples and stated formulas), named beside each
 * check; gradients are checked against central finite differences. Example
 * values are recalled from memory and were re-derived from the spec's text. */
#include "ops_expect.h"

static const int CHECK0[] = {0, -1};

static int64_t *out_i64(oh_case *c, int i) { return (int64_t *)c->out_t[i].data; }

/* ---- Reshape (spec: 0 copies the input dim unless allowzero, -1 is inferred) ---- */

static void test_reshape_zero_and_minus_one(void) {
  oh_case c;
  oh_init(&c, "Reshape", 14);
  float x[24];
  oh_fill(x, 24, 1);
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(2, 3, 4), x);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(0, -1));
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].rank, 2);
  CHECK_INT(c.out_t[0].dims[0], 2);
  CHECK_INT(c.out_t[0].dims[1], 12);
  CHECK_MEM_EQ(oh_out_f(&c, 0), x, sizeof x);
  CHECK_LT(oh_gradcheck(&c, CHECK0, 1e-3), 1e-3);
  oh_free(&c);
}

static void test_reshape_allowzero(void) {
  /* spec: with allowzero=1 a 0 in shape is an explicit zero dim */
  oh_case c;
  oh_init(&c, "Reshape", 14);
  oh_attr_int(&c, "allowzero", 1);
  oh_input(&c, RC_DTYPE_FLOAT, 2, I64(0, 3), NULL);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(3, 0));
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dims[0], 3);
  CHECK_INT(c.out_t[0].dims[1], 0);
  oh_free(&c);
  /* spec: allowzero=1 with both 0 and -1 is invalid */
  oh_init(&c, "Reshape", 14);
  oh_attr_int(&c, "allowzero", 1);
  oh_input(&c, RC_DTYPE_FLOAT, 2, I64(0, 3), NULL);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(0, -1));
  rc_err e = {0};
  CHECK_FAILS(oh_run(&c, &e));
  CHECK_STR_CONTAINS(e.msg, "Reshape");
  oh_free(&c);
  /* without allowzero (opset 13) 0 copies the input's dim */
  oh_init(&c, "Reshape", 13);
  oh_input(&c, RC_DTYPE_INT64, 2, I64(4, 3), NULL);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(3), I64(0, 1, -1));
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dims[0], 4);
  CHECK_INT(c.out_t[0].dims[2], 3);
  oh_free(&c);
}

static void test_reshape_needs_plan_time_shape(void) {
  oh_case c;
  oh_init(&c, "Reshape", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(6), NULL);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(2, 3));
  c.in_t[1].data = NULL; /* known only at run time */
  rc_err e = {0};
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_UNSUPPORTED);
  CHECK_STR_CONTAINS(e.msg, "before the first batch");
  oh_free(&c);
  /* 16-bit floats are refused (no float16 gradients or consumers) */
  oh_init(&c, "Reshape", 13);
  oh_input(&c, RC_DTYPE_FLOAT16, 1, I64(6), NULL);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(2, 3));
  CHECK_REFUSED(&c, RC_ERR_UNSUPPORTED, "float16");
  oh_free(&c);
}

/* ---- Slice (spec: clamping rules; examples slice_neg_steps, end_out_of_bounds) ---- */

static float x20[20 * 10 * 5];

static void slice_case(oh_case *c, int opset, const int64_t *st, const int64_t *en, const int64_t *ax,
                       const int64_t *sp, int n) {
  oh_init(c, "Slice", opset);
  for (int i = 0; i < 1000; i++) x20[i] = (float)i;
  oh_input(c, RC_DTYPE_FLOAT, 3, I64(20, 10, 5), x20);
  oh_input(c, RC_DTYPE_INT64, 1, I64(n), st);
  oh_input(c, RC_DTYPE_INT64, 1, I64(n), en);
  oh_input(c, RC_DTYPE_INT64, 1, I64(n), ax);
  if (sp) oh_input(c, RC_DTYPE_INT64, 1, I64(n), sp);
}

static void test_slice_negative_steps(void) {
  /* spec example slice_neg_steps: x[20:0:-1, 10:0:-3, 4:1:-2] on (20,10,5) -> (19,3,2) */
  oh_case c;
  slice_case(&c, 13, I64(20, 10, 4), I64(0, 0, 1), I64(0, 1, 2), I64(-1, -3, -2), 3);
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dims[0], 19);
  CHECK_INT(c.out_t[0].dims[1], 3);
  CHECK_INT(c.out_t[0].dims[2], 2);
  const float *y = oh_out_f(&c, 0);
  int bad = 0, p = 0;
  for (int i = 19; i > 0; i--) /* start 20 clamps to 19 */
    for (int j = 9; j > 0; j -= 3)
      for (int k = 4; k > 1; k -= 2) bad += y[p++] != (float)(i * 50 + j * 5 + k);
  CHECK_INT(bad, 0);
  oh_free(&c);
}

static void test_slice_clamped_ends(void) {
  oh_case c;
  /* spec example slice_end_out_of_bounds: x[:, 1:1000] -> (20, 9, 5) */
  slice_case(&c, 13, I64(1), I64(1000), I64(1), NULL, 1);
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dims[1], 9);
  CHECK_EQ(oh_out_f(&c, 0)[0], 5.0f);
  oh_free(&c);
  /* spec example slice_start_out_of_bounds: x[:, 1000:1000] -> (20, 0, 5) */
  slice_case(&c, 13, I64(1000), I64(1000), I64(1), NULL, 1);
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dims[1], 0);
  oh_free(&c);
  /* negative step with an end below -dim clamps to -1: whole axis reversed */
  slice_case(&c, 13, I64(-1), I64(-1000), I64(-1), I64(-1), 1);
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dims[2], 5);
  CHECK_EQ(oh_out_f(&c, 0)[0], 4.0f);
  CHECK_EQ(oh_out_f(&c, 0)[4], 0.0f);
  oh_free(&c);
  /* step 0 is refused */
  slice_case(&c, 13, I64(0), I64(3), I64(0), I64(0), 1);
  rc_err e = {0};
  CHECK_FAILS(oh_run(&c, &e));
  oh_free(&c);
}

static void test_slice_opset9_attributes(void) {
  /* spec example (Slice-1): data [[1,2,3,4],[5,6,7,8]], axes [0,1], starts [1,0], ends [2,3] -> [[5,6,7]] */
  oh_case c;
  oh_init(&c, "Slice", 9);
  oh_attr_ints(&c, "axes", 2, I64(0, 1));
  oh_attr_ints(&c, "starts", 2, I64(1, 0));
  oh_attr_ints(&c, "ends", 2, I64(2, 3));
  oh_input(&c, RC_DTYPE_FLOAT, 2, I64(2, 4), F32(1, 2, 3, 4, 5, 6, 7, 8));
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dims[0], 1);
  CHECK_INT(c.out_t[0].dims[1], 3);
  CHECK_EQ(oh_out_f(&c, 0)[0], 5);
  CHECK_EQ(oh_out_f(&c, 0)[2], 7);
  oh_free(&c);
}

static void test_slice_int64_and_grad(void) {
  /* a computed-shape pattern: Shape -> Slice(start -2) on int64 */
  oh_case c;
  oh_init(&c, "Slice", 13);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(4), I64(8, 3, 32, 32));
  oh_input(&c, RC_DTYPE_INT64, 1, I64(1), I64(-2));
  oh_input(&c, RC_DTYPE_INT64, 1, I64(1), I64(INT64_MAX));
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dims[0], 2);
  CHECK_INT(out_i64(&c, 0)[0], 32);
  oh_free(&c);
  float x[60];
  oh_fill(x, 60, 3);
  oh_init(&c, "Slice", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(3, 4, 5), x);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(3, -1));
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(0, -6));
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(1, 2));
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(-1, -2));
  CHECK_LT(oh_gradcheck(&c, CHECK0, 1e-3), 1e-3);
  oh_free(&c);
}

/* ---- Pad (spec examples for constant, reflect and edge) ---- */

static const float PAD_X[] = {1.0f, 1.2f, 2.3f, 3.4f, 4.5f, 5.7f};

static void pad_case(oh_case *c, int opset, const char *mode, const int64_t *pads, int npads) {
  oh_init(c, "Pad", opset);
  oh_attr_string(c, "mode", mode);
  oh_input(c, RC_DTYPE_FLOAT, 2, I64(3, 2), PAD_X);
  oh_input(c, RC_DTYPE_INT64, 1, I64(npads), pads);
}

static void test_pad_spec_examples(void) {
  oh_case c;
  /* spec Pad example 1 (constant): pads [0,2,0,0], constant_value 0 */
  pad_case(&c, 13, "constant", I64(0, 2, 0, 0), 4);
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, F32(0.0f));
  CHECK(run_ok(&c));
  check_floats(oh_out_f(&c, 0), F32(0, 0, 1.0f, 1.2f, 0, 0, 2.3f, 3.4f, 0, 0, 4.5f, 5.7f), 12);
  oh_free(&c);
  /* spec Pad example 2 (reflect) */
  pad_case(&c, 13, "reflect", I64(0, 2, 0, 0), 4);
  CHECK(run_ok(&c));
  check_floats(oh_out_f(&c, 0), F32(1.0f, 1.2f, 1.0f, 1.2f, 2.3f, 3.4f, 2.3f, 3.4f, 4.5f, 5.7f, 4.5f, 5.7f), 12);
  oh_free(&c);
  /* spec Pad example 3 (edge) */
  pad_case(&c, 13, "edge", I64(0, 2, 0, 0), 4);
  CHECK(run_ok(&c));
  check_floats(oh_out_f(&c, 0), F32(1.0f, 1.0f, 1.0f, 1.2f, 2.3f, 2.3f, 2.3f, 3.4f, 4.5f, 4.5f, 4.5f, 5.7f), 12);
  oh_free(&c);
}

static void test_pad_negative_and_attr_forms(void) {
  oh_case c;
  /* negative pads crop (spec: "can be negative, in which case it removes pixels") */
  pad_case(&c, 13, "constant", I64(-1, -1, 0, 0), 4);
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dims[0], 2);
  CHECK_INT(c.out_t[0].dims[1], 1);
  check_floats(oh_out_f(&c, 0), F32(3.4f, 5.7f), 2);
  oh_free(&c);
  /* reflect mirrors on the end values without repeating them (spec wording; also
   * NumPy's 'reflect', which the spec's reference follows): [1 2 3] padded 2, 3 */
  oh_init(&c, "Pad", 13);
  oh_attr_string(&c, "mode", "reflect");
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(3), F32(1, 2, 3));
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(2, 3));
  CHECK(run_ok(&c));
  check_floats(oh_out_f(&c, 0), F32(3, 2, 1, 2, 3, 2, 1, 2), 8);
  oh_free(&c);
  /* opset 9: pads and value are attributes */
  oh_init(&c, "Pad", 9);
  oh_attr_ints(&c, "pads", 4, I64(1, 0, 0, 1));
  oh_attr_float(&c, "value", 9.0f);
  oh_input(&c, RC_DTYPE_FLOAT, 2, I64(3, 2), PAD_X);
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dims[0], 4);
  CHECK_INT(c.out_t[0].dims[1], 3);
  check_floats(oh_out_f(&c, 0), F32(9, 9, 9, 1.0f, 1.2f, 9, 2.3f, 3.4f, 9, 4.5f, 5.7f, 9), 12);
  oh_free(&c);
  /* opset 18 axes input: pad only the last axis */
  oh_init(&c, "Pad", 18);
  oh_attr_string(&c, "mode", "reflect");
  oh_input(&c, RC_DTYPE_FLOAT, 2, I64(3, 2), PAD_X);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(1, 0));
  oh_input_absent(&c);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(1), I64(-1));
  CHECK(run_ok(&c));
  check_floats(oh_out_f(&c, 0), F32(1.2f, 1.0f, 1.2f, 3.4f, 2.3f, 3.4f, 5.7f, 4.5f, 5.7f), 9);
  oh_free(&c);
  /* wrap (opset 19): [a b] padded 1 before -> [b a b]; refused before 19 */
  pad_case(&c, 19, "wrap", I64(0, 1, 0, 0), 4);
  CHECK(run_ok(&c));
  check_floats(oh_out_f(&c, 0), F32(1.2f, 1.0f, 1.2f), 3);
  oh_free(&c);
  pad_case(&c, 18, "wrap", I64(0, 1, 0, 0), 4);
  rc_err e = {0};
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_UNSUPPORTED);
  oh_free(&c);
  /* int64 data with an int64 constant */
  oh_init(&c, "Pad", 13);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(5, 6));
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(1, 2));
  oh_input(&c, RC_DTYPE_INT64, 0, NULL, I64(-7));
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dims[0], 5);
  CHECK_EQ(out_i64(&c, 0)[0], -7);
  CHECK_EQ(out_i64(&c, 0)[1], 5);
  CHECK_EQ(out_i64(&c, 0)[4], -7);
  oh_free(&c);
}

static void test_pad_gradients(void) {
  static const char *modes[] = {"constant", "reflect", "edge", "wrap"};
  for (int m = 0; m < 4; m++) {
    oh_case c;
    float x[2 * 3 * 4];
    oh_fill(x, 24, 11 + m);
    oh_init(&c, "Pad", 19);
    oh_attr_string(&c, "mode", modes[m]);
    oh_input(&c, RC_DTYPE_FLOAT, 3, I64(2, 3, 4), x);
    oh_input(&c, RC_DTYPE_INT64, 1, I64(6), I64(0, 2, -1, 1, 2, 3));
    double err = oh_gradcheck(&c, CHECK0, 1e-3);
    CHECK_LT(err, 1e-3);
    oh_free(&c);
  }
}

/* ---- Gather (spec examples; negative indices count from the end) ---- */

static void test_gather(void) {
  static const float data[] = {1.0f, 1.2f, 2.3f, 3.4f, 4.5f, 5.7f};
  oh_case c;
  /* spec example 1: axis 0, indices [[0,1],[1,2]] */
  oh_init(&c, "Gather", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 2, I64(3, 2), data);
  oh_input(&c, RC_DTYPE_INT64, 2, I64(2, 2), I64(0, 1, 1, 2));
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].rank, 3);
  check_floats(oh_out_f(&c, 0), F32(1.0f, 1.2f, 2.3f, 3.4f, 2.3f, 3.4f, 4.5f, 5.7f), 8);
  oh_free(&c);
  /* spec example 2 (3x3 data, axis 1, indices [[0, 2]]) with the 2 written as -1 */
  static const float d3[] = {1.0f, 1.2f, 1.9f, 2.3f, 3.4f, 3.9f, 4.5f, 5.7f, 5.9f};
  oh_init(&c, "Gather", 13);
  oh_attr_int(&c, "axis", 1);
  oh_input(&c, RC_DTYPE_FLOAT, 2, I64(3, 3), d3);
  oh_input(&c, RC_DTYPE_INT32, 2, I64(1, 2), ((const int32_t[]){0, -1}));
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dims[0], 3);
  CHECK_INT(c.out_t[0].dims[1], 1);
  CHECK_INT(c.out_t[0].dims[2], 2);
  check_floats(oh_out_f(&c, 0), F32(1.0f, 1.9f, 2.3f, 3.9f, 4.5f, 5.9f), 6);
  oh_free(&c);
  /* out of range index: an error naming the node */
  oh_init(&c, "Gather", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 2, I64(3, 2), data);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(1), I64(3));
  rc_err e = {0};
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_INVALID);
  CHECK_STR_CONTAINS(e.msg, "node 'Gather'");
  oh_free(&c);
  /* scalar index on a shape vector (Shape -> Gather) */
  oh_init(&c, "Gather", 13);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(4), I64(8, 3, 32, 16));
  oh_input(&c, RC_DTYPE_INT64, 0, NULL, I64(-1));
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].rank, 0);
  CHECK_INT(out_i64(&c, 0)[0], 16);
  oh_free(&c);
  /* gradient with repeated indices accumulates */
  float x[24];
  oh_fill(x, 24, 5);
  oh_init(&c, "Gather", 13);
  oh_attr_int(&c, "axis", 1);
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(2, 4, 3), x);
  oh_input(&c, RC_DTYPE_INT64, 2, I64(2, 2), I64(1, -3, 3, 0));
  CHECK_LT(oh_gradcheck(&c, CHECK0, 1e-3), 1e-3);
  oh_free(&c);
}

/* ---- Shape, Size, Cast, ConstantOfShape, Constant: integer subgraph ops ---- */

static void test_shape_and_size(void) {
  oh_case c;
  oh_init(&c, "Shape", 15);
  oh_attr_int(&c, "start", -3);
  oh_attr_int(&c, "end", -1);
  oh_input(&c, RC_DTYPE_FLOAT, 4, I64(8, 3, 32, 16), NULL);
  CHECK(run_ok(&c));
  CHECK(c.node.def->flags & RC_OP_SHAPE_ONLY);
  CHECK_INT(c.out_t[0].dims[0], 2); /* spec: start/end clamp and select dims 1..2 */
  CHECK_INT(out_i64(&c, 0)[0], 3);
  CHECK_INT(out_i64(&c, 0)[1], 32);
  oh_free(&c);
  oh_init(&c, "Shape", 13); /* before 15 start/end do not exist */
  oh_attr_int(&c, "start", 2);
  oh_input(&c, RC_DTYPE_FLOAT, 2, I64(5, 7), NULL);
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dims[0], 2);
  oh_free(&c);
  oh_init(&c, "Size", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(2, 3, 4), NULL);
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].rank, 0);
  CHECK_INT(out_i64(&c, 0)[0], 24);
  oh_free(&c);
}

static void test_cast(void) {
  oh_case c;
  /* spec: float to integer truncates toward zero */
  oh_init(&c, "Cast", 13);
  oh_attr_int(&c, "to", RC_DTYPE_INT64);
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(4), F32(-2.7f, 2.7f, -0.5f, 7.0f));
  CHECK(run_ok(&c));
  CHECK_EQ(out_i64(&c, 0)[0], -2);
  CHECK_EQ(out_i64(&c, 0)[1], 2);
  CHECK_EQ(out_i64(&c, 0)[2], 0);
  CHECK_EQ(out_i64(&c, 0)[3], 7);
  oh_free(&c);
  /* int64 -> float (the Div/Cast pattern of computed shapes) */
  oh_init(&c, "Cast", 13);
  oh_attr_int(&c, "to", RC_DTYPE_FLOAT);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(224, -3));
  CHECK(run_ok(&c));
  CHECK_EQ(oh_out_f(&c, 0)[0], 224.0f);
  CHECK_EQ(oh_out_f(&c, 0)[1], -3.0f);
  oh_free(&c);
  /* to bool: nonzero is true; int64 -> int8 wraps as NumPy's astype (300 -> 44) */
  oh_init(&c, "Cast", 13);
  oh_attr_int(&c, "to", RC_DTYPE_BOOL);
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(3), F32(0.0f, -0.1f, 2.0f));
  CHECK(run_ok(&c));
  const uint8_t *b = c.out_t[0].data;
  CHECK_EQ(b[0], 0);
  CHECK_EQ(b[1], 1);
  CHECK_EQ(b[2], 1);
  oh_free(&c);
  oh_init(&c, "Cast", 13);
  oh_attr_int(&c, "to", RC_DTYPE_INT8);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(300, -129));
  CHECK(run_ok(&c));
  CHECK_INT(((int8_t *)c.out_t[0].data)[0], 44);
  CHECK_INT(((int8_t *)c.out_t[0].data)[1], 127);
  oh_free(&c);
  /* unsupported target is refused at load time */
  oh_init(&c, "Cast", 13);
  oh_attr_int(&c, "to", RC_DTYPE_STRING);
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(1), NULL);
  rc_err e = {0};
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_UNSUPPORTED);
  oh_free(&c);
  /* float -> float is differentiable (identity) */
  float x[6];
  oh_fill(x, 6, 9);
  oh_init(&c, "Cast", 13);
  oh_attr_int(&c, "to", RC_DTYPE_FLOAT);
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(6), x);
  CHECK_LT(oh_gradcheck(&c, CHECK0, 1e-3), 1e-3);
  oh_free(&c);
}

static void test_constant_forms(void) {
  oh_case c;
  oh_init(&c, "Constant", 13);
  oh_attr_ints(&c, "value_ints", 3, I64(1, -1, 4));
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dtype, RC_DTYPE_INT64);
  CHECK_INT(c.out_t[0].dims[0], 3);
  CHECK_INT(out_i64(&c, 0)[1], -1);
  oh_free(&c);
  oh_init(&c, "Constant", 13);
  oh_attr_float(&c, "value_float", 0.25f);
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].rank, 0);
  CHECK_EQ(oh_out_f(&c, 0)[0], 0.25f);
  oh_free(&c);
  oh_init(&c, "Constant", 13);
  oh_attr_tensor(&c, "value", RC_DTYPE_INT32, 2, I64(1, 2), ((const int32_t[]){7, 8}));
  CHECK(run_ok(&c));
  CHECK_INT(((int32_t *)c.out_t[0].data)[1], 8);
  oh_free(&c);
  oh_init(&c, "Constant", 13);
  oh_attr_string(&c, "value_string", "no");
  rc_err e = {0};
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_UNSUPPORTED);
  CHECK_STR_CONTAINS(e.msg, "value_string");
  oh_free(&c);
  oh_init(&c, "Constant", 13);
  oh_attr_int(&c, "value_int", 1);
  oh_attr_float(&c, "value_float", 1);
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_INVALID); /* spec: exactly one value attribute */
  oh_free(&c);
}

static void test_constant_of_shape(void) {
  oh_case c;
  oh_init(&c, "ConstantOfShape", 9);
  oh_attr_tensor(&c, "value", RC_DTYPE_INT64, 1, I64(1), I64(7));
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(2, 3));
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dtype, RC_DTYPE_INT64);
  CHECK_INT(rc_tensor_numel(&c.out_t[0]), 6);
  CHECK_INT(out_i64(&c, 0)[5], 7);
  oh_free(&c);
  /* spec: default value is float 0; an empty shape gives a scalar */
  oh_init(&c, "ConstantOfShape", 9);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(0), NULL);
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dtype, RC_DTYPE_FLOAT);
  CHECK_INT(c.out_t[0].rank, 0);
  CHECK_EQ(oh_out_f(&c, 0)[0], 0.0f);
  oh_free(&c);
}

/* ---- Squeeze / Unsqueeze / Flatten / Identity / Dropout ---- */

static void test_squeeze_unsqueeze(void) {
  oh_case c;
  float x[12];
  oh_fill(x, 12, 2);
  oh_init(&c, "Unsqueeze", 11); /* axes attribute, negative axes refer to the output */
  oh_attr_ints(&c, "axes", 2, I64(-1, 0));
  oh_input(&c, RC_DTYPE_FLOAT, 2, I64(3, 4), x);
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].rank, 4);
  CHECK_EQ(c.out_t[0].dims[0], 1);
  CHECK_EQ(c.out_t[0].dims[1], 3);
  CHECK_EQ(c.out_t[0].dims[3], 1);
  CHECK_LT(oh_gradcheck(&c, CHECK0, 1e-3), 1e-3);
  oh_free(&c);
  oh_init(&c, "Unsqueeze", 13); /* axes input; a scalar index becomes 1-D (Gather -> Unsqueeze) */
  oh_input(&c, RC_DTYPE_INT64, 0, NULL, I64(32));
  oh_input(&c, RC_DTYPE_INT64, 1, I64(1), I64(0));
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].rank, 1);
  CHECK_INT(out_i64(&c, 0)[0], 32);
  oh_free(&c);
  oh_init(&c, "Squeeze", 13); /* no axes: every size-1 axis */
  oh_input(&c, RC_DTYPE_FLOAT, 4, I64(1, 3, 1, 4), x);
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].rank, 2);
  CHECK_LT(oh_gradcheck(&c, CHECK0, 1e-3), 1e-3);
  oh_free(&c);
  oh_init(&c, "Squeeze", 11);
  oh_attr_ints(&c, "axes", 1, I64(1));
  oh_input(&c, RC_DTYPE_FLOAT, 2, I64(3, 4), x);
  rc_err e = {0};
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_SHAPE); /* squeezing a dim that is not 1 */
  oh_free(&c);
  oh_init(&c, "Squeeze", 13); /* from opset 13 axes is an input: an attribute is not ignored but refused */
  oh_attr_ints(&c, "axes", 1, I64(1));
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(3, 1, 4), x);
  CHECK_REFUSED(&c, RC_ERR_INVALID, "axes");
  oh_free(&c);
  oh_init(&c, "Squeeze", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(3, 1, 4), x);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(1), I64(-2));
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].rank, 2);
  oh_free(&c);
}

static void test_flatten_identity_dropout(void) {
  oh_case c;
  float x[24];
  oh_fill(x, 24, 4);
  oh_init(&c, "Flatten", 13); /* spec: axis 0 gives (1, N); negative axis counts from the end */
  oh_attr_int(&c, "axis", 0);
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(2, 3, 4), x);
  CHECK(run_ok(&c));
  CHECK_EQ(c.out_t[0].dims[0], 1);
  CHECK_EQ(c.out_t[0].dims[1], 24);
  oh_free(&c);
  oh_init(&c, "Flatten", 13);
  oh_attr_int(&c, "axis", -1);
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(2, 3, 4), x);
  CHECK(run_ok(&c));
  CHECK_EQ(c.out_t[0].dims[0], 6);
  CHECK_EQ(c.out_t[0].dims[1], 4);
  CHECK_LT(oh_gradcheck(&c, CHECK0, 1e-3), 1e-3);
  oh_free(&c);
  oh_init(&c, "Identity", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 2, I64(4, 6), x);
  CHECK_LT(oh_gradcheck(&c, CHECK0, 1e-3), 1e-3);
  oh_free(&c);
  /* Dropout: identity; the mask is all true (bool from opset 10) */
  oh_init(&c, "Dropout", 13);
  c.n_out = 2;
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(5), x);
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, F32(0.5f));
  CHECK(run_ok(&c));
  CHECK_MEM_EQ(oh_out_f(&c, 0), x, 5 * sizeof(float));
  CHECK_INT(c.out_t[1].dtype, RC_DTYPE_BOOL);
  CHECK_EQ(((uint8_t *)c.out_t[1].data)[4], 1);
  CHECK_LT(oh_gradcheck(&c, CHECK0, 1e-3), 1e-3);
  oh_free(&c);
  oh_init(&c, "Dropout", 13); /* training_mode = true is refused: recoup runs Dropout as identity */
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(5), x);
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, F32(0.5f));
  oh_input(&c, RC_DTYPE_BOOL, 0, NULL, ((const uint8_t[]){1}));
  rc_err e = {0};
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_UNSUPPORTED);
  CHECK_STR_CONTAINS(e.msg, "training_mode");
  oh_free(&c);
  oh_init(&c, "Dropout", 13); /* a training_mode known only per batch is refused at plan time */
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(5), x);
  oh_input_absent(&c);
  oh_input(&c, RC_DTYPE_BOOL, 0, NULL, NULL);
  c.in_t[2].data = NULL;
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_UNSUPPORTED);
  CHECK_STR_CONTAINS(e.msg, "input 2");
  oh_free(&c);
}

/* ---- Transpose, Concat, Split, Expand, Tile ---- */

static void test_transpose(void) {
  oh_case c;
  float x[2 * 3 * 4 * 5];
  oh_fill(x, 120, 6);
  oh_init(&c, "Transpose", 13); /* NCHW -> NHWC; spec: y.shape[i] = x.shape[perm[i]] */
  oh_attr_ints(&c, "perm", 4, I64(0, 2, 3, 1));
  oh_input(&c, RC_DTYPE_FLOAT, 4, I64(2, 3, 4, 5), x);
  CHECK(run_ok(&c));
  const float *y = oh_out_f(&c, 0);
  int bad = 0;
  for (int n = 0; n < 2; n++)
    for (int h = 0; h < 4; h++)
      for (int w = 0; w < 5; w++)
        for (int ch = 0; ch < 3; ch++) bad += y[((n * 4 + h) * 5 + w) * 3 + ch] != x[((n * 3 + ch) * 4 + h) * 5 + w];
  CHECK_INT(bad, 0);
  CHECK_LT(oh_gradcheck(&c, CHECK0, 1e-3), 1e-3);
  oh_free(&c);
  /* default perm reverses the axes; a larger case exercises the tiled path */
  static float big[3 * 40 * 37];
  oh_fill(big, 3 * 40 * 37, 8);
  oh_init(&c, "Transpose", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(3, 40, 37), big);
  CHECK(run_ok(&c));
  CHECK_EQ(c.out_t[0].dims[0], 37);
  CHECK_EQ(c.out_t[0].dims[2], 3);
  y = oh_out_f(&c, 0);
  bad = 0;
  for (int a = 0; a < 3; a++)
    for (int b = 0; b < 40; b++)
      for (int d = 0; d < 37; d++) bad += y[(d * 40 + b) * 3 + a] != big[(a * 40 + b) * 37 + d];
  CHECK_INT(bad, 0);
  oh_free(&c);
  /* int64 data */
  oh_init(&c, "Transpose", 13);
  oh_input(&c, RC_DTYPE_INT64, 2, I64(2, 3), I64(1, 2, 3, 4, 5, 6));
  CHECK(run_ok(&c));
  CHECK_EQ(out_i64(&c, 0)[1], 4);
  CHECK_EQ(out_i64(&c, 0)[5], 6);
  oh_free(&c);
}

static void test_concat_split(void) {
  oh_case c;
  /* computed shape: Concat of int64 pieces, negative axis */
  oh_init(&c, "Concat", 13);
  oh_attr_int(&c, "axis", -1);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(1), I64(8));
  oh_input(&c, RC_DTYPE_INT64, 1, I64(0), NULL);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(-1, 64));
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dims[0], 3);
  CHECK_EQ(out_i64(&c, 0)[0], 8);
  CHECK_EQ(out_i64(&c, 0)[1], -1);
  CHECK_EQ(out_i64(&c, 0)[2], 64);
  oh_free(&c);
  float a[12], b[8];
  oh_fill(a, 12, 1);
  oh_fill(b, 8, 2);
  oh_init(&c, "Concat", 13);
  oh_attr_int(&c, "axis", 1);
  oh_input(&c, RC_DTYPE_FLOAT, 2, I64(4, 3), a);
  oh_input(&c, RC_DTYPE_FLOAT, 2, I64(4, 2), b);
  CHECK(run_ok(&c));
  CHECK_EQ(oh_out_f(&c, 0)[3], b[0]);
  CHECK_EQ(oh_out_f(&c, 0)[5], a[3]);
  CHECK_LT(oh_gradcheck(&c, (const int[]){0, 1, -1}, 1e-3), 1e-3);
  oh_free(&c);
  /* Split: opset 11 attribute, 13 input, 18 num_outputs (last piece smaller) */
  float x[10];
  for (int i = 0; i < 10; i++) x[i] = (float)i;
  oh_init(&c, "Split", 11);
  c.n_out = 2;
  oh_attr_ints(&c, "split", 2, I64(3, 7));
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(10), x);
  CHECK(run_ok(&c));
  CHECK_EQ(c.out_t[0].dims[0], 3);
  CHECK_EQ(c.out_t[1].dims[0], 7);
  CHECK_EQ(oh_out_f(&c, 1)[0], 3.0f);
  oh_free(&c);
  oh_init(&c, "Split", 13);
  c.n_out = 2;
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(10), x);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(6, 4));
  CHECK(run_ok(&c));
  CHECK_EQ(c.out_t[1].dims[0], 4);
  CHECK_EQ(oh_out_f(&c, 1)[0], 6.0f);
  oh_free(&c);
  oh_init(&c, "Split", 18);
  c.n_out = 3;
  oh_attr_int(&c, "num_outputs", 3);
  oh_input(&c, RC_DTYPE_FLOAT, 2, I64(2, 5), x);
  oh_attr_int(&c, "axis", -1);
  CHECK(run_ok(&c));
  CHECK_EQ(c.out_t[0].dims[1], 2);
  CHECK_EQ(c.out_t[2].dims[1], 1);
  CHECK_EQ(oh_out_f(&c, 2)[0], 4.0f);
  CHECK_EQ(oh_out_f(&c, 2)[1], 9.0f);
  CHECK_LT(oh_gradcheck(&c, CHECK0, 1e-3), 1e-3);
  oh_free(&c);
  oh_init(&c, "Split", 13); /* equal split that does not divide */
  c.n_out = 3;
  oh_input(&c, RC_DTYPE_FLOAT, 1, I64(10), x);
  rc_err e = {0};
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_SHAPE);
  oh_free(&c);
}

static void test_expand_tile(void) {
  oh_case c;
  /* spec Expand example: (3,1) expanded to [2,1,6] -> (2,3,6) */
  oh_init(&c, "Expand", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 2, I64(3, 1), F32(1, 2, 3));
  oh_input(&c, RC_DTYPE_INT64, 1, I64(3), I64(2, 1, 6));
  CHECK(run_ok(&c));
  CHECK_EQ(c.out_t[0].rank, 3);
  CHECK_EQ(c.out_t[0].dims[0], 2);
  CHECK_EQ(c.out_t[0].dims[1], 3);
  CHECK_EQ(c.out_t[0].dims[2], 6);
  CHECK_EQ(oh_out_f(&c, 0)[6], 2.0f);
  CHECK_EQ(oh_out_f(&c, 0)[35], 3.0f);
  CHECK_LT(oh_gradcheck(&c, CHECK0, 1e-3), 1e-3);
  oh_free(&c);
  /* the ConstantOfShape/Where -> Expand pattern on int64 with a shape of ones */
  oh_init(&c, "Expand", 13);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(3), I64(4, 5, 6));
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(2, 1));
  CHECK(run_ok(&c));
  CHECK_EQ(c.out_t[0].dims[0], 2);
  CHECK_EQ(c.out_t[0].dims[1], 3);
  CHECK_EQ(out_i64(&c, 0)[5], 6);
  oh_free(&c);
  /* spec Tile example: [[0,1],[2,3]] repeats [2,2] */
  oh_init(&c, "Tile", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 2, I64(2, 2), F32(0, 1, 2, 3));
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(2, 2));
  CHECK(run_ok(&c));
  check_floats(oh_out_f(&c, 0), F32(0, 1, 0, 1, 2, 3, 2, 3, 0, 1, 0, 1, 2, 3, 2, 3), 16);
  CHECK_LT(oh_gradcheck(&c, CHECK0, 1e-3), 1e-3);
  oh_free(&c);
  oh_init(&c, "Tile", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 2, I64(2, 2), F32(0, 1, 2, 3));
  oh_input(&c, RC_DTYPE_INT64, 1, I64(1), I64(2));
  rc_err e = {0};
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_SHAPE); /* repeats must match the rank */
  oh_free(&c);
}

/* Views big enough for the threaded paths, against direct loops. */
static void test_large_views(void) {
  enum { A = 64, B = 130, C = 70 };
  static float x[A * B * C], g[A * B * C];
  oh_fill(x, A * B * C, 51);
  oh_case c;
  oh_init(&c, "Transpose", 13); /* (A,B,C) -> (B,A,C): row copies */
  oh_attr_ints(&c, "perm", 3, I64(1, 0, 2));
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(A, B, C), x);
  CHECK(run_ok(&c));
  const float *y = oh_out_f(&c, 0);
  int bad = 0;
  for (int a = 0; a < A; a++)
    for (int b = 0; b < B; b++)
      for (int k = 0; k < C; k++) bad += y[(b * A + a) * C + k] != x[(a * B + b) * C + k];
  CHECK_INT(bad, 0);
  oh_fill(g, A * B * C, 52);
  run_backward(&c, g, (const int[]){0, -1});
  bad = 0;
  for (int a = 0; a < A; a++)
    for (int b = 0; b < B; b++)
      for (int k = 0; k < C; k++) bad += grad_of(&c, 0)[(a * B + b) * C + k] != g[(b * A + a) * C + k];
  CHECK_INT(bad, 0);
  oh_free(&c);
  /* Slice with steps (a one-to-one scatter in backward) */
  oh_init(&c, "Slice", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(A, B, C), x);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(-1, 1));
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(INT64_MIN, C));
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(1, 2));
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(-1, 2));
  CHECK(run_ok(&c));
  CHECK_EQ(c.out_t[0].dims[1], B);
  CHECK_EQ(c.out_t[0].dims[2], (C - 1 + 1) / 2);
  int64_t oc = c.out_t[0].dims[2];
  run_backward(&c, NULL, (const int[]){0, -1});
  bad = 0;
  for (int a = 0; a < A; a++)
    for (int b = 0; b < B; b++)
      for (int k = 0; k < C; k++) {
        float want = (k >= 1 && (k - 1) % 2 == 0 && (k - 1) / 2 < oc) ? 1.0f : 0.0f;
        bad += grad_of(&c, 0)[(a * B + b) * C + k] != want;
        if (k >= 1 && (k - 1) % 2 == 0) bad += oh_out_f(&c, 0)[(a * (int64_t)B + (B - 1 - b)) * oc + (k - 1) / 2] != x[(a * B + b) * C + k];
      }
  CHECK_INT(bad, 0);
  oh_free(&c);
  /* Expand backward sums over the broadcast axis */
  oh_init(&c, "Expand", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 3, I64(A, 1, C), x);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(3), I64(A, B, C));
  CHECK(run_ok(&c));
  run_backward(&c, g, (const int[]){0, -1});
  bad = 0;
  for (int a = 0; a < A; a++)
    for (int k = 0; k < C; k++) {
      double s = 0;
      for (int b = 0; b < B; b++) s += g[(a * B + b) * C + k];
      bad += fabs(grad_of(&c, 0)[a * C + k] - s) > 1e-4;
    }
  CHECK_INT(bad, 0);
  oh_free(&c);
}

/* The exported dynamic-shape chain: Shape -> Gather -> Unsqueeze -> Concat -> Reshape. */
static void test_shape_chain(void) {
  oh_case s, g, u, cc, r;
  float x[2 * 3 * 4];
  oh_fill(x, 24, 3);
  oh_init(&s, "Shape", 13);
  oh_input(&s, RC_DTYPE_FLOAT, 3, I64(2, 3, 4), x);
  CHECK(run_ok(&s));
  oh_init(&g, "Gather", 13);
  oh_input(&g, RC_DTYPE_INT64, 1, I64(3), s.out_t[0].data);
  oh_input(&g, RC_DTYPE_INT64, 0, NULL, I64(0));
  CHECK(run_ok(&g));
  oh_init(&u, "Unsqueeze", 13);
  oh_input(&u, RC_DTYPE_INT64, 0, NULL, g.out_t[0].data);
  oh_input(&u, RC_DTYPE_INT64, 1, I64(1), I64(0));
  CHECK(run_ok(&u));
  oh_init(&cc, "Concat", 13);
  oh_attr_int(&cc, "axis", 0);
  oh_input(&cc, RC_DTYPE_INT64, 1, I64(1), u.out_t[0].data);
  oh_input(&cc, RC_DTYPE_INT64, 1, I64(1), I64(-1));
  CHECK(run_ok(&cc));
  oh_init(&r, "Reshape", 13);
  oh_input(&r, RC_DTYPE_FLOAT, 3, I64(2, 3, 4), x);
  oh_input(&r, RC_DTYPE_INT64, 1, I64(2), cc.out_t[0].data);
  CHECK(run_ok(&r));
  CHECK_EQ(r.out_t[0].dims[0], 2);
  CHECK_EQ(r.out_t[0].dims[1], 12);
  oh_free(&s);
  oh_free(&g);
  oh_free(&u);
  oh_free(&cc);
  oh_free(&r);
}

int main(void) {
  RUN(test_reshape_zero_and_minus_one);
  RUN(test_reshape_allowzero);
  RUN(test_reshape_needs_plan_time_shape);
  RUN(test_slice_negative_steps);
  RUN(test_slice_clamped_ends);
  RUN(test_slice_opset9_attributes);
  RUN(test_slice_int64_and_grad);
  RUN(test_pad_spec_examples);
  RUN(test_pad_negative_and_attr_forms);
  RUN(test_pad_gradients);
  RUN(test_gather);
  RUN(test_shape_and_size);
  RUN(test_cast);
  RUN(test_constant_forms);
  RUN(test_constant_of_shape);
  RUN(test_squeeze_unsqueeze);
  RUN(test_flatten_identity_dropout);
  RUN(test_transpose);
  RUN(test_concat_split);
  RUN(test_expand_tile);
  RUN(test_large_views);
  RUN(test_shape_chain);
  return TEST_REPORT();
}
