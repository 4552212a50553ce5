/* Gemm and MatMul: hand-computed cases from the ONNX operator specification
 * (Operators.md: Gemm "Y = alpha * A' * B' + beta * C" with unidirectional
 * broadcasting of C; MatMul "behaves like numpy.matmul") and finite-difference
 * gradient checks. */
#include "op_harness.h"
#include "test.h"
#include "op_expect.h"

/* A = [[1,2,3],[4,5,6]], B = [[1,0],[0,1],[1,1]]: AB = [[4,5],[10,11]].
 * alpha 2, beta 0.5, C = [10,20] (shape (2,), broadcast over rows):
 * [[8+5, 10+10], [20+5, 22+10]]. The same with A and B given transposed. */
static void gemm_hand(void) {
  const float a[] = {1, 2, 3, 4, 5, 6}, at[] = {1, 4, 2, 5, 3, 6};
  const float b[] = {1, 0, 0, 1, 1, 1}, bt[] = {1, 0, 1, 0, 1, 1};
  const float want[] = {13, 20, 25, 32};
  for (int ta = 0; ta < 2; ta++)
    for (int tb = 0; tb < 2; tb++) {
      oh_case c;
      oh_init(&c, "Gemm", 13);
      oh_input(&c, RC_DTYPE_FLOAT, 2, ta ? (int64_t[]){3, 2} : (int64_t[]){2, 3}, ta ? at : a);
      oh_input(&c, RC_DTYPE_FLOAT, 2, tb ? (int64_t[]){2, 3} : (int64_t[]){3, 2}, tb ? bt : b);
      oh_input(&c, RC_DTYPE_FLOAT, 1, (int64_t[]){2}, (float[]){10, 20});
      oh_attr_int(&c, "transA", ta);
      oh_attr_int(&c, "transB", tb);
      oh_attr_float(&c, "alpha", 2.0f);
      oh_attr_float(&c, "beta", 0.5f);
      oe_expect_out(&c, (int64_t[]){2, 2}, 2, want);
      oh_free(&c);
    }
}

/* C of shape (2,1) broadcasts along columns; C absent (opset 11+) means 0. */
static void gemm_c_shapes(void) {
  const float a[] = {1, 2, 3, 4, 5, 6}, b[] = {1, 0, 0, 1, 1, 1};
  oh_case c;
  oh_init(&c, "Gemm", 11);
  oh_input(&c, RC_DTYPE_FLOAT, 2, (int64_t[]){2, 3}, a);
  oh_input(&c, RC_DTYPE_FLOAT, 2, (int64_t[]){3, 2}, b);
  oh_input(&c, RC_DTYPE_FLOAT, 2, (int64_t[]){2, 1}, (float[]){1, -1});
  oe_expect_out(&c, (int64_t[]){2, 2}, 2, (float[]){5, 6, 9, 10});
  oh_free(&c);
  oh_init(&c, "Gemm", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 2, (int64_t[]){2, 3}, a);
  oh_input(&c, RC_DTYPE_FLOAT, 2, (int64_t[]){3, 2}, b);
  oe_expect_out(&c, (int64_t[]){2, 2}, 2, (float[]){4, 5, 10, 11});
  oh_free(&c);
  /* scalar C */
  oh_init(&c, "Gemm", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 2, (int64_t[]){2, 3}, a);
  oh_input(&c, RC_DTYPE_FLOAT, 2, (int64_t[]){3, 2}, b);
  oh_input(&c, RC_DTYPE_FLOAT, 0, NULL, (float[]){100});
  oe_expect_out(&c, (int64_t[]){2, 2}, 2, (float[]){104, 105, 110, 111});
  oh_free(&c);
}

/* numpy.matmul: 1-D x 1-D is a dot product of rank 0; (2,3) x (3,) is a
 * matrix-vector product of shape (2,); (3,) x (3,2) a row vector result (2,). */
static void matmul_one_d(void) {
  oh_case c;
  oh_init(&c, "MatMul", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 1, (int64_t[]){3}, (float[]){1, 2, 3});
  oh_input(&c, RC_DTYPE_FLOAT, 1, (int64_t[]){3}, (float[]){4, 5, 6});
  oe_expect_out(&c, NULL, 0, (float[]){32});
  oh_free(&c);
  oh_init(&c, "MatMul", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 2, (int64_t[]){2, 3}, (float[]){1, 2, 3, 4, 5, 6});
  oh_input(&c, RC_DTYPE_FLOAT, 1, (int64_t[]){3}, (float[]){1, 0, -1});
  oe_expect_out(&c, (int64_t[]){2}, 1, (float[]){-2, -2});
  oh_free(&c);
  oh_init(&c, "MatMul", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 1, (int64_t[]){3}, (float[]){1, 0, -1});
  oh_input(&c, RC_DTYPE_FLOAT, 2, (int64_t[]){3, 2}, (float[]){1, 2, 3, 4, 5, 6});
  oe_expect_out(&c, (int64_t[]){2}, 1, (float[]){-4, -4});
  oh_free(&c);
}

/* numpy.matmul broadcasting of batch axes: A (2,1,2,2) x B (3,2,2) ->
 * (2,3,2,2) with out[i][j] = A[i][0] . B[j]. Compared with products written
 * out by hand from the 2x2 formula. */
static void matmul_broadcast_batch(void) {
  float a[8], b[12];
  oh_fill(a, 8, 1);
  oh_fill(b, 12, 2);
  oh_case c;
  oh_init(&c, "MatMul", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 4, (int64_t[]){2, 1, 2, 2}, a);
  oh_input(&c, RC_DTYPE_FLOAT, 3, (int64_t[]){3, 2, 2}, b);
  float want[24];
  for (int i = 0; i < 2; i++)
    for (int j = 0; j < 3; j++) {
      const float *p = a + 4 * i, *q = b + 4 * j;
      float *o = want + (i * 3 + j) * 4;
      o[0] = p[0] * q[0] + p[1] * q[2];
      o[1] = p[0] * q[1] + p[1] * q[3];
      o[2] = p[2] * q[0] + p[3] * q[2];
      o[3] = p[2] * q[1] + p[3] * q[3];
    }
  oe_expect_out(&c, (int64_t[]){2, 3, 2, 2}, 4, want);
  oh_free(&c);
}

/* ---- gradient checks ---- */

static void gemm_grad(int ta, int tb, float alpha, float beta, int crank, const int64_t *cdims) {
  const int64_t M = 3, K = 4, N = 5;
  float a[12], b[20], cv[15];
  oh_fill(a, 12, 3);
  oh_fill(b, 20, 4);
  oh_fill(cv, 15, 5);
  oh_case c;
  oh_init(&c, "Gemm", 13);
  oh_input(&c, RC_DTYPE_FLOAT, 2, ta ? (int64_t[]){K, M} : (int64_t[]){M, K}, a);
  oh_input(&c, RC_DTYPE_FLOAT, 2, tb ? (int64_t[]){N, K} : (int64_t[]){K, N}, b);
  if (crank >= 0) oh_input(&c, RC_DTYPE_FLOAT, crank, cdims, cv);
  oh_attr_int(&c, "transA", ta);
  oh_attr_int(&c, "transB", tb);
  oh_attr_float(&c, "alpha", alpha);
  oh_attr_float(&c, "beta", beta);
  const int with_c[] = {0, 1, 2, -1}, without_c[] = {0, 1, -1};
  double err = oh_gradcheck(&c, crank >= 0 ? with_c : without_c, 1e-2);
  if (!(err < 2e-3))
    fprintf(stderr, "gradcheck Gemm transA %d transB %d C rank %d: worst %.3g\n", ta, tb, crank, err);
  CHECK_LT(err, 2e-3);
  oh_free(&c);
}

static void gemm_gradients(void) {
  gemm_grad(0, 0, 1.0f, 1.0f, 2, (int64_t[]){3, 5});
  gemm_grad(1, 0, 0.5f, 2.0f, 1, (int64_t[]){5});
  gemm_grad(0, 1, -1.5f, 0.25f, 2, (int64_t[]){3, 1});
  gemm_grad(1, 1, 2.0f, -1.0f, 2, (int64_t[]){1, 5});
  gemm_grad(1, 1, 1.0f, 3.0f, 0, NULL);
  gemm_grad(0, 1, 1.0f, 1.0f, -1, NULL);
}

static void matmul_grad(int ra, const int64_t *da, int rb, const int64_t *db) {
  int64_t na = 1, nb = 1;
  for (int i = 0; i < ra; i++) na *= da[i];
  for (int i = 0; i < rb; i++) nb *= db[i];
  float *a = malloc(sizeof(float) * (size_t)na), *b = malloc(sizeof(float) * (size_t)nb);
  oh_fill(a, na, 8);
  oh_fill(b, nb, 9);
  oh_case c;
  oh_init(&c, "MatMul", 13);
  oh_input(&c, RC_DTYPE_FLOAT, ra, da, a);
  oh_input(&c, RC_DTYPE_FLOAT, rb, db, b);
  const int check[] = {0, 1, -1};
  double err = oh_gradcheck(&c, check, 1e-2);
  if (!(err < 2e-3)) fprintf(stderr, "gradcheck MatMul ranks %d x %d: worst %.3g\n", ra, rb, err);
  CHECK_LT(err, 2e-3);
  free(a);
  free(b);
  oh_free(&c);
}

static void matmul_gradients(void) {
  matmul_grad(2, (int64_t[]){3, 4}, 2, (int64_t[]){4, 5});
  matmul_grad(3, (int64_t[]){2, 3, 4}, 2, (int64_t[]){4, 5});          /* one big GEMM */
  matmul_grad(2, (int64_t[]){3, 4}, 3, (int64_t[]){2, 4, 5});          /* A broadcast over batch */
  matmul_grad(4, (int64_t[]){2, 1, 3, 4}, 3, (int64_t[]){3, 4, 2});    /* both broadcast */
  matmul_grad(3, (int64_t[]){1, 3, 4}, 3, (int64_t[]){2, 4, 5});
  matmul_grad(1, (int64_t[]){4}, 3, (int64_t[]){2, 4, 3});             /* 1-D left */
  matmul_grad(3, (int64_t[]){2, 3, 4}, 1, (int64_t[]){4});             /* 1-D right */
  matmul_grad(1, (int64_t[]){4}, 1, (int64_t[]){4});                   /* dot */
}

/* ---- refusals ---- */

static void matmul_refusals(void) {
  oh_case c;
  float z[24] = {0};
  oh_init(&c, "Gemm", 9); /* C was required before opset 11 */
  oh_input(&c, RC_DTYPE_FLOAT, 2, (int64_t[]){2, 3}, z);
  oh_input(&c, RC_DTYPE_FLOAT, 2, (int64_t[]){3, 2}, z);
  CHECK_REFUSED(&c, RC_ERR_INVALID, "C is required");
  oh_free(&c);
  oh_init(&c, "Gemm", 13); /* C (3,) does not broadcast to (2,2) */
  oh_input(&c, RC_DTYPE_FLOAT, 2, (int64_t[]){2, 3}, z);
  oh_input(&c, RC_DTYPE_FLOAT, 2, (int64_t[]){3, 2}, z);
  oh_input(&c, RC_DTYPE_FLOAT, 1, (int64_t[]){3}, z);
  CHECK_REFUSED(&c, RC_ERR_SHAPE, "broadcast");
  oh_free(&c);
  oh_init(&c, "MatMul", 13); /* inner dimensions */
  oh_input(&c, RC_DTYPE_FLOAT, 2, (int64_t[]){2, 3}, z);
  oh_input(&c, RC_DTYPE_FLOAT, 2, (int64_t[]){2, 3}, z);
  CHECK_REFUSED(&c, RC_ERR_SHAPE, "inner");
  oh_free(&c);
  oh_init(&c, "MatMul", 13); /* batch axes 2 vs 3 */
  oh_input(&c, RC_DTYPE_FLOAT, 3, (int64_t[]){2, 2, 3}, z);
  oh_input(&c, RC_DTYPE_FLOAT, 3, (int64_t[]){3, 3, 2}, z);
  CHECK_REFUSED(&c, RC_ERR_SHAPE, "do not broadcast");
  oh_free(&c);
  oh_init(&c, "MatMul", 13); /* integer matmul is not computed */
  oh_input(&c, RC_DTYPE_INT32, 2, (int64_t[]){2, 3}, NULL);
  oh_input(&c, RC_DTYPE_INT32, 2, (int64_t[]){3, 2}, NULL);
  CHECK_REFUSED(&c, RC_ERR_UNSUPPORTED, "only float");
  oh_free(&c);
}

int main(void) {
  RUN(gemm_hand);
  RUN(gemm_c_shapes);
  RUN(matmul_one_d);
  RUN(matmul_broadcast_batch);
  RUN(gemm_gradients);
  RUN(matmul_gradients);
  RUN(matmul_refusals);
  return TEST_REPORT();
}
