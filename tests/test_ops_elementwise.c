/* Elementwise ops: Add, Sub, Mul, Div, Pow, Sqrt, Neg, Abs, Exp, Log, Erf,
 * Reciprocal, Equal, Where. Expected values follow the ONNX operator spec's
 * definitions (numpy broadcasting: "Broadcasting in ONNX", the spec's
 * Broadcasting.md), checked element by element against an index-by-index
 * evaluation of that rule written here. */
#include <omp.h>

#include "ops_check.h"

/* Flat index into an input of shape in_dims for output element `flat`, by the
 * numpy broadcasting rule (right-aligned dims; size-1 dims repeat). */
static int64_t bc_index(const int64_t *out_dims, int out_rank, const int64_t *in_dims, int in_rank,
                        int64_t flat) {
  int64_t idx = 0, stride = 1;
  for (int d = out_rank - 1; d >= 0; d--) {
    int64_t i = flat % out_dims[d];
    flat /= out_dims[d];
    int id = d - (out_rank - in_rank);
    if (id >= 0) {
      if (in_dims[id] != 1) idx += i * stride;
      stride *= in_dims[id];
    }
  }
  return idx;
}

static float ref_binary(const char *op, float a, float b) {
  if (!strcmp(op, "Add")) return a + b;
  if (!strcmp(op, "Sub")) return a - b;
  if (!strcmp(op, "Mul")) return a * b;
  if (!strcmp(op, "Div")) return a / b;
  return powf(a, b);
}

/* Run op on random inputs of the two shapes; compare every output element
 * with the broadcasting rule, then check gradients of both inputs. */
static void broadcast_case(const char *op, int ra, const int64_t *da, int rb, const int64_t *db,
                           int ry, const int64_t *dy, int gradcheck) {
  oh_case c;
  oh_init(&c, op, 14);
  oh_input(&c, RC_DTYPE_FLOAT, ra, da, NULL);
  oh_input(&c, RC_DTYPE_FLOAT, rb, db, NULL);
  int64_t na = rc_tensor_numel(&c.in_t[0]), nb = rc_tensor_numel(&c.in_t[1]);
  oh_fill(oh_in_f(&c, 0), na, 11);
  oh_fill(oh_in_f(&c, 1), nb, 29);
  /* Keep divisors and bases away from 0. */
  if (!strcmp(op, "Div") || !strcmp(op, "Pow"))
    for (int64_t i = 0; i < nb; i++) oh_in_f(&c, 1)[i] = 0.5f + fabsf(oh_in_f(&c, 1)[i]);
  if (!strcmp(op, "Pow"))
    for (int64_t i = 0; i < na; i++) oh_in_f(&c, 0)[i] = 0.5f + fabsf(oh_in_f(&c, 0)[i]);
  if (!run_ok(&c)) {
    CHECK(0);
    oh_free(&c);
    return;
  }
  CHECK_INT(c.out_t[0].rank, ry);
  for (int d = 0; d < ry; d++) CHECK_INT(c.out_t[0].dims[d], dy[d]);
  int64_t ny = rc_tensor_numel(&c.out_t[0]);
  int bad = 0;
  for (int64_t i = 0; i < ny && bad < 5; i++) {
    float a = oh_in_f(&c, 0)[bc_index(dy, ry, da, ra, i)];
    float b = oh_in_f(&c, 1)[bc_index(dy, ry, db, rb, i)];
    float want = ref_binary(op, a, b), got = oh_out_f(&c, 0)[i];
    if (!(fabsf(got - want) <= 1e-6f * (1 + fabsf(want)))) {
      fprintf(stderr, "%s element %lld: got %g want %g\n", op, (long long)i, got, want);
      bad++;
    }
  }
  CHECK_INT(bad, 0);
  if (gradcheck) CHECK_GRAD(&c, 5e-3, 0, 1);
  oh_free(&c);
}

static void test_add_values(void) {
  /* 1+10, 2+20, 3+30: arithmetic. */
  oh_case c;
  oh_init(&c, "Add", 13);
  const int64_t d[] = {3};
  oh_input(&c, RC_DTYPE_FLOAT, 1, d, (float[]){1, 2, 3});
  oh_input(&c, RC_DTYPE_FLOAT, 1, d, (float[]){10, 20, 30});
  CHECK(run_ok(&c));
  CHECK_NEAR(oh_out_f(&c, 0)[0], 11, 0, 0);
  CHECK_NEAR(oh_out_f(&c, 0)[2], 33, 0, 0);
  oh_free(&c);
}

static void test_broadcast_shapes(void) {
  const int64_t x4[] = {2, 3, 2, 2}, bias[] = {1, 3, 1, 1}, b3[] = {3, 1, 1};
  broadcast_case("Add", 4, x4, 4, bias, 4, x4, 1);  /* per-channel bias */
  broadcast_case("Mul", 4, x4, 3, b3, 4, x4, 1);    /* per-channel scale, lower rank */
  broadcast_case("Sub", 3, b3, 4, x4, 4, x4, 1);    /* broadcast first operand */
  const int64_t a[] = {2, 1, 4}, b[] = {3, 1}, y[] = {2, 3, 4};
  broadcast_case("Mul", 3, a, 2, b, 3, y, 1);       /* both sides broadcast */
  broadcast_case("Div", 3, a, 2, b, 3, y, 1);
  broadcast_case("Pow", 3, a, 2, b, 3, y, 1);
  const int64_t m[] = {2, 3};
  broadcast_case("Div", 2, m, 0, NULL, 2, m, 1);    /* scalar divisor */
  broadcast_case("Sub", 0, NULL, 2, m, 2, m, 1);    /* scalar minuend */
  const int64_t r[] = {1, 4}, col[] = {5, 1}, ry[] = {5, 4};
  broadcast_case("Add", 2, r, 2, col, 2, ry, 1);    /* outer sum */
  /* Large enough for the threaded and chunked paths (no gradcheck: size). */
  const int64_t big[] = {4, 64, 32, 32}, cb[] = {1, 64, 1, 1}, flat[] = {70000};
  broadcast_case("Add", 4, big, 4, cb, 4, big, 0);
  broadcast_case("Mul", 1, flat, 1, flat, 1, flat, 0);
  broadcast_case("Div", 1, flat, 0, NULL, 1, flat, 0);
}

/* Bias gradient on a large per-channel case equals the sum over N, H, W. */
static void test_bias_gradient_large(void) {
  oh_case c;
  oh_init(&c, "Add", 14);
  const int64_t x[] = {4, 64, 32, 32}, b[] = {1, 64, 1, 1};
  oh_input(&c, RC_DTYPE_FLOAT, 4, x, NULL);
  oh_input(&c, RC_DTYPE_FLOAT, 4, b, NULL);
  CHECK(run_ok(&c));
  int64_t n = rc_tensor_numel(&c.in_t[0]);
  float *g = rc__arena_alloc(&c.arena, sizeof(float) * (size_t)n);
  oh_fill(g, n, 5);
  run_backward(&c, g, (const int[]){0, 1, -1});
  int bad = 0;
  for (int ch = 0; ch < 64; ch++) {
    double s = 0;
    for (int i = 0; i < 4; i++)
      for (int j = 0; j < 1024; j++) s += g[(i * 64 + ch) * 1024 + j];
    if (fabs(grad_of(&c, 1)[ch] - s) > 1e-3 * (1 + fabs(s))) bad++;
  }
  CHECK_INT(bad, 0);
  CHECK_NEAR(grad_of(&c, 0)[12345], g[12345], 0, 0);
  oh_free(&c);
}

/* Sums over broadcast dims are owned by one thread each and taken in a fixed
 * order, so the bias gradient is bit-identical for 1 and 2 threads. */
static void test_thread_count_invariance(void) {
  float first[64];
  for (int threads = 1; threads <= 2; threads++) {
    omp_set_num_threads(threads);
    oh_case c;
    oh_init(&c, "Mul", 14);
    const int64_t x[] = {8, 64, 24, 24}, b[] = {1, 64, 1, 1};
    oh_input(&c, RC_DTYPE_FLOAT, 4, x, NULL);
    oh_input(&c, RC_DTYPE_FLOAT, 4, b, NULL);
    oh_fill(oh_in_f(&c, 0), rc_tensor_numel(&c.in_t[0]), 21);
    oh_fill(oh_in_f(&c, 1), 64, 22);
    CHECK(run_ok(&c));
    run_backward(&c, NULL, (const int[]){1, -1});
    if (threads == 1)
      memcpy(first, grad_of(&c, 1), sizeof first);
    else
      CHECK_MEM_EQ(first, grad_of(&c, 1), sizeof first);
    oh_free(&c);
  }
  omp_set_num_threads(omp_get_num_procs());
}

static void test_broadcast_refused(void) {
  oh_case c;
  oh_init(&c, "Add", 14);
  const int64_t a[] = {2, 3}, b[] = {4};
  oh_input(&c, RC_DTYPE_FLOAT, 2, a, NULL);
  oh_input(&c, RC_DTYPE_FLOAT, 1, b, NULL);
  CHECK_REFUSED(&c, RC_ERR_SHAPE, "do not broadcast");
  oh_free(&c);
  oh_init(&c, "Mul", 14);
  oh_input(&c, RC_DTYPE_DOUBLE, 2, a, NULL);
  oh_input(&c, RC_DTYPE_DOUBLE, 2, a, NULL);
  CHECK_REFUSED(&c, RC_ERR_UNSUPPORTED, "float64");
  oh_free(&c);
  oh_init(&c, "Add", 14);
  oh_input(&c, RC_DTYPE_FLOAT, 2, a, NULL);
  oh_input(&c, RC_DTYPE_INT64, 2, a, NULL);
  CHECK_REFUSED(&c, RC_ERR_INVALID, "different dtypes");
  oh_free(&c);
}

/* Integer forms used by shape arithmetic. Div truncates toward zero (C
 * semantics; see elementwise.c for why). */
static void test_integer_forms(void) {
  oh_case c;
  oh_init(&c, "Div", 14);
  const int64_t d[] = {4}, s[] = {1};
  oh_input(&c, RC_DTYPE_INT64, 1, d, (int64_t[]){7, -7, 7, -7});
  oh_input(&c, RC_DTYPE_INT64, 1, d, (int64_t[]){2, 2, -2, -2});
  CHECK(run_ok(&c));
  const int64_t *y = c.out_t[0].data;
  CHECK_INT(c.out_t[0].dtype, RC_DTYPE_INT64);
  CHECK_INT(y[0], 3);
  CHECK_INT(y[1], -3);
  CHECK_INT(y[2], -3);
  CHECK_INT(y[3], 3);
  oh_free(&c);

  oh_init(&c, "Div", 14);
  oh_input(&c, RC_DTYPE_INT32, 1, d, (int32_t[]){1, 2, 3, 4});
  oh_input(&c, RC_DTYPE_INT32, 1, s, (int32_t[]){0});
  CHECK_REFUSED(&c, RC_ERR_NUMERIC, "division by zero");
  oh_free(&c);

  /* Shape arithmetic: (N*C) from Mul of two gathered dims, then Add / Sub. */
  const char *ops[] = {"Mul", "Add", "Sub"};
  const int64_t want[] = {96, 35, -29};
  for (int i = 0; i < 3; i++) {
    oh_init(&c, ops[i], 13);
    oh_input(&c, RC_DTYPE_INT64, 1, s, (int64_t[]){3});
    oh_input(&c, RC_DTYPE_INT64, 0, NULL, (int64_t[]){32});
    CHECK(run_ok(&c));
    CHECK_INT(((int64_t *)c.out_t[0].data)[0], want[i]);
    oh_free(&c);
  }
  oh_init(&c, "Neg", 13);
  oh_input(&c, RC_DTYPE_INT32, 1, s, (int32_t[]){5});
  CHECK(run_ok(&c));
  CHECK_INT(((int32_t *)c.out_t[0].data)[0], -5);
  oh_free(&c);
}

static void test_pow(void) {
  /* 2^3 = 8, 3^2 = 9, 4^0.5 = 2: arithmetic. */
  oh_case c;
  oh_init(&c, "Pow", 15);
  const int64_t d[] = {3};
  oh_input(&c, RC_DTYPE_FLOAT, 1, d, (float[]){2, 3, 4});
  oh_input(&c, RC_DTYPE_FLOAT, 1, d, (float[]){3, 2, 0.5f});
  CHECK(run_ok(&c));
  CHECK_NEAR(oh_out_f(&c, 0)[0], 8, 1e-6, 0);
  CHECK_NEAR(oh_out_f(&c, 0)[1], 9, 1e-6, 0);
  CHECK_NEAR(oh_out_f(&c, 0)[2], 2, 1e-6, 0);
  CHECK_GRAD(&c, 5e-3, 0, 1);
  oh_free(&c);

  /* Integer exponent (opset 12+ allows it): x^2 with an int64 scalar. */
  oh_init(&c, "Pow", 15);
  const int64_t x[] = {2, 3};
  oh_input(&c, RC_DTYPE_FLOAT, 2, x, (float[]){-1.5f, 2, 0.25f, 3, -2, 1});
  oh_input(&c, RC_DTYPE_INT64, 0, NULL, (int64_t[]){3});
  CHECK(run_ok(&c));
  CHECK_NEAR(oh_out_f(&c, 0)[0], -3.375, 1e-6, 0);
  CHECK_NEAR(oh_out_f(&c, 0)[3], 27, 1e-5, 0);
  CHECK_GRAD(&c, 5e-3, 0);
  oh_free(&c);

  /* Scalar float exponent 2 (the squaring fast path) and its gradient. */
  oh_init(&c, "Pow", 15);
  oh_input(&c, RC_DTYPE_FLOAT, 2, x, (float[]){-1.5f, 2, 0.25f, 3, -2, 1});
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, (float[]){2});
  CHECK(run_ok(&c));
  CHECK_NEAR(oh_out_f(&c, 0)[0], 2.25, 1e-6, 0);
  CHECK_GRAD(&c, 5e-3, 0);
  oh_free(&c);
}

typedef struct unary_case {
  const char *op;
  float x, y; /* y = op(x) */
  const char *source;
} unary_case;

static void test_unary(void) {
  /* Values: elementary identities; erf(0.5) = 0.5204998778 from standard
   * tables (from memory). */
  const unary_case cases[] = {
      {"Sqrt", 6.25f, 2.5f, "arithmetic"},           {"Exp", 1.0f, 2.718281828f, "e"},
      {"Log", 2.718281828f, 1.0f, "ln e = 1"},       {"Erf", 0.5f, 0.5204998778f, "erf table"},
      {"Reciprocal", 4.0f, 0.25f, "arithmetic"},     {"Neg", 1.5f, -1.5f, "arithmetic"},
      {"Abs", -1.5f, 1.5f, "arithmetic"},
  };
  for (size_t i = 0; i < sizeof cases / sizeof cases[0]; i++) {
    oh_case c;
    oh_init(&c, cases[i].op, 13);
    const int64_t d[] = {1};
    oh_input(&c, RC_DTYPE_FLOAT, 1, d, &cases[i].x);
    CHECK(run_ok(&c));
    CHECK_NEAR(oh_out_f(&c, 0)[0], cases[i].y, 1e-6, 1e-6);
    oh_free(&c);
    /* Gradient on positive inputs away from 0 (Log, Sqrt, Reciprocal, Abs). */
    oh_init(&c, cases[i].op, 13);
    const int64_t s[] = {3, 4};
    oh_input(&c, RC_DTYPE_FLOAT, 2, s, NULL);
    oh_fill(oh_in_f(&c, 0), 12, 77);
    int positive = !strcmp(cases[i].op, "Log") || !strcmp(cases[i].op, "Sqrt") ||
                   !strcmp(cases[i].op, "Reciprocal");
    for (int j = 0; j < 12; j++) {
      float v = 0.3f + fabsf(oh_in_f(&c, 0)[j]);
      oh_in_f(&c, 0)[j] = positive || j % 2 ? v : -v;
    }
    CHECK_GRAD(&c, 5e-3, 0);
    oh_free(&c);
  }
  /* Abs'(0) = 0, as PyTorch's abs backward. */
  oh_case c;
  oh_init(&c, "Abs", 13);
  const int64_t d[] = {2};
  oh_input(&c, RC_DTYPE_FLOAT, 1, d, (float[]){0.0f, -2.0f});
  CHECK(run_ok(&c));
  run_backward(&c, NULL, (const int[]){0, -1});
  CHECK_NEAR(grad_of(&c, 0)[0], 0, 0, 0);
  CHECK_NEAR(grad_of(&c, 0)[1], -1, 0, 0);
  oh_free(&c);
}

static void test_equal(void) {
  oh_case c;
  oh_init(&c, "Equal", 13);
  const int64_t a[] = {2, 3}, b[] = {3};
  oh_input(&c, RC_DTYPE_FLOAT, 2, a, (float[]){1, 2, 3, 1, 0, 6});
  oh_input(&c, RC_DTYPE_FLOAT, 1, b, (float[]){1, 0, 3});
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dtype, RC_DTYPE_BOOL);
  const uint8_t *y = c.out_t[0].data;
  const uint8_t want[] = {1, 0, 1, 1, 1, 0};
  for (int i = 0; i < 6; i++) CHECK_INT(y[i], want[i]);
  oh_free(&c);
  /* -0 == +0 for floats (IEEE 754). */
  oh_init(&c, "Equal", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, (float[]){-0.0f});
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, (float[]){0.0f});
  CHECK(run_ok(&c));
  CHECK_INT(((uint8_t *)c.out_t[0].data)[0], 1);
  oh_free(&c);
  oh_init(&c, "Equal", 11);
  oh_input(&c, RC_DTYPE_INT64, 1, b, (int64_t[]){4, -1, 7});
  oh_input(&c, RC_DTYPE_INT64, 0, NULL, (int64_t[]){-1});
  CHECK(run_ok(&c));
  CHECK_INT(((uint8_t *)c.out_t[0].data)[0], 0);
  CHECK_INT(((uint8_t *)c.out_t[0].data)[1], 1);
  oh_free(&c);
  oh_init(&c, "Equal", 13);
  oh_input(&c, RC_DTYPE_BOOL, 1, b, (uint8_t[]){1, 0, 1});
  oh_input(&c, RC_DTYPE_BOOL, 1, b, (uint8_t[]){1, 1, 0});
  CHECK(run_ok(&c));
  CHECK_INT(((uint8_t *)c.out_t[0].data)[0], 1);
  CHECK_INT(((uint8_t *)c.out_t[0].data)[1], 0);
  oh_free(&c);
}

/* Where with all three inputs broadcast: cond (3,1), X (1,4), Y scalar -> (3,4). */
static void test_where(void) {
  oh_case c;
  oh_init(&c, "Where", 16);
  const int64_t dc[] = {3, 1}, dx[] = {1, 4};
  oh_input(&c, RC_DTYPE_BOOL, 2, dc, (uint8_t[]){1, 0, 1});
  oh_input(&c, RC_DTYPE_FLOAT, 2, dx, (float[]){1, 2, 3, 4});
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, (float[]){-9});
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].rank, 2);
  CHECK_INT(c.out_t[0].dims[0], 3);
  CHECK_INT(c.out_t[0].dims[1], 4);
  const float want[] = {1, 2, 3, 4, -9, -9, -9, -9, 1, 2, 3, 4};
  for (int i = 0; i < 12; i++) CHECK_NEAR(oh_out_f(&c, 0)[i], want[i], 0, 0);
  run_backward(&c, NULL, (const int[]){1, 2, -1});
  for (int i = 0; i < 4; i++) CHECK_NEAR(grad_of(&c, 1)[i], 2, 0, 0); /* two rows chose X */
  CHECK_NEAR(grad_of(&c, 2)[0], 4, 0, 0);                            /* one row of 4 chose Y */
  CHECK_GRAD(&c, 5e-3, 1, 2);
  oh_free(&c);

  /* Condition broadcast over a full X and a (3,)-shaped Y. */
  oh_init(&c, "Where", 9);
  const int64_t full[] = {2, 3}, row[] = {3};
  oh_input(&c, RC_DTYPE_BOOL, 1, row, (uint8_t[]){0, 1, 0});
  oh_input(&c, RC_DTYPE_FLOAT, 2, full, NULL);
  oh_input(&c, RC_DTYPE_FLOAT, 1, row, NULL);
  oh_fill(oh_in_f(&c, 1), 6, 3);
  oh_fill(oh_in_f(&c, 2), 3, 4);
  CHECK(run_ok(&c));
  CHECK_NEAR(oh_out_f(&c, 0)[4], oh_in_f(&c, 1)[4], 0, 0);
  CHECK_NEAR(oh_out_f(&c, 0)[3], oh_in_f(&c, 2)[0], 0, 0);
  CHECK_GRAD(&c, 5e-3, 1, 2);
  oh_free(&c);

  /* int64 values (shape subgraphs). */
  oh_init(&c, "Where", 16);
  oh_input(&c, RC_DTYPE_BOOL, 1, row, (uint8_t[]){1, 0, 1});
  oh_input(&c, RC_DTYPE_INT64, 1, row, (int64_t[]){10, 20, 30});
  oh_input(&c, RC_DTYPE_INT64, 0, NULL, (int64_t[]){-1});
  CHECK(run_ok(&c));
  CHECK_INT(((int64_t *)c.out_t[0].data)[1], -1);
  CHECK_INT(((int64_t *)c.out_t[0].data)[2], 30);
  oh_free(&c);

  oh_init(&c, "Where", 16);
  oh_input(&c, RC_DTYPE_FLOAT, 1, row, NULL);
  oh_input(&c, RC_DTYPE_FLOAT, 1, row, NULL);
  oh_input(&c, RC_DTYPE_FLOAT, 1, row, NULL);
  CHECK_REFUSED(&c, RC_ERR_INVALID, "bool");
  oh_free(&c);
}

static void test_opset_ranges(void) {
  CHECK_NOT_NULL(rc__op_find("Add", "", 9));
  CHECK_NOT_NULL(rc__op_find("Add", "", 21));
  CHECK_NULL(rc__op_find("Erf", "", 8)); /* Erf is new in opset 9 */
  CHECK_NOT_NULL(rc__op_find("Where", "", 9));
}

int main(void) {
  RUN(test_add_values);
  RUN(test_broadcast_shapes);
  RUN(test_bias_gradient_large);
  RUN(test_thread_count_invariance);
  RUN(test_broadcast_refused);
  RUN(test_integer_forms);
  RUN(test_pow);
  RUN(test_unary);
  RUN(test_equal);
  RUN(test_where);
  RUN(test_opset_ranges);
  return TEST_REPORT();
}
