/* Op family: elementwise. Forward and backward side by side.
 *
 * Binary ops broadcast numpy-style (ONNX "multidirectional broadcasting");
 * see broadcast.h for how the loops are laid out. Float32 is computed with
 * gradients; Add/Sub/Mul/Div also accept int32/int64 (the shape arithmetic
 * exporters emit), forward only. Gradient conventions at points where the
 * derivative is undefined follow PyTorch's autograd, named at each op. */
#include <math.h>
#include <stdint.h>
#include <string.h>

#include "ops/broadcast.h"
#include "ops/op.h"

/* ---- Add, Sub, Mul, Div (float32 with gradients) ---- */
/* x (broadcast to y), w (broadcast to y) -> y */
RC__BINARY_FLOAT_OP(add, x + w, d, d)
RC__BINARY_FLOAT_OP(sub, x - w, d, -d)
RC__BINARY_FLOAT_OP(mul, x *w, d *w, d *x)
RC__BINARY_FLOAT_OP(div, x / w, d / w, -d * x / (w * w))

/* ---- integer forms: forward only ---- */
/* Wrapping arithmetic through unsigned types: signed overflow is undefined in C. */
#define INT_BINARY_ROW(fname, T, UT, EXPR)                                          \
  static int fname(void *y_, const void *const *in, const int *inner, int64_t n) { \
    T *y = y_;                                                                      \
    const T *a = in[0], *b = in[1];                                                 \
    int bad = 0;                                                                    \
    for (int64_t j = 0; j < n; j++) {                                               \
      T x = a[inner[0] ? j : 0], w = b[inner[1] ? j : 0];                           \
      EXPR;                                                                         \
    }                                                                               \
    return bad;                                                                     \
  }
/* Integer Div: the spec's text is silent on rounding and its only integer
 * example (test_div_uint8) is unsigned, where floor and truncation agree; we
 * truncate toward zero as C does, as onnxruntime does (from memory). Division
 * by zero is refused instead of producing an arbitrary value. */
#define INT_DIV_EXPR(T, UT)                 \
  if (w == 0) {                             \
    bad = 1;                                \
    y[j] = 0;                               \
  } else if (w == -1) {                     \
    y[j] = (T)(0 - (UT)x);                  \
  } else {                                  \
    y[j] = x / w;                           \
  }
#define INT_FAMILY(T, UT, sfx)                                                   \
  INT_BINARY_ROW(add_##sfx, T, UT, y[j] = (T)((UT)x + (UT)w))                    \
  INT_BINARY_ROW(sub_##sfx, T, UT, y[j] = (T)((UT)x - (UT)w))                    \
  INT_BINARY_ROW(mul_##sfx, T, UT, y[j] = (T)((UT)x * (UT)w))                    \
  INT_BINARY_ROW(div_##sfx, T, UT, INT_DIV_EXPR(T, UT))
INT_FAMILY(int32_t, uint32_t, i32)
INT_FAMILY(int64_t, uint64_t, i64)

typedef struct arith_rows {
  rc__bc_row_fn f32, i32, i64;
  rc__bc_grad_fn grad;
} arith_rows;

static const arith_rows *arith_of(const rc_node *n) {
  static const arith_rows add_r = {add_row, add_i32, add_i64, add_grad};
  static const arith_rows sub_r = {sub_row, sub_i32, sub_i64, sub_grad};
  static const arith_rows mul_r = {mul_row, mul_i32, mul_i64, mul_grad};
  static const arith_rows div_r = {div_row, div_i32, div_i64, div_grad};
  switch (n->op_type[0]) {
    case 'A': return &add_r;
    case 'S': return &sub_r;
    case 'M': return &mul_r;
    default: return &div_r;
  }
}

/* a, b (broadcast) -> y, same dtype: float32, int32 or int64. */
static rc_status arith_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__infer_broadcast(n, in, 0, 2, out, e));
  rc_dtype t = in[0]->dtype;
  if (t != in[1]->dtype)
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): inputs have different dtypes %s and %s",
                    n->label, n->op_type, rc_dtype_name(t), rc_dtype_name(in[1]->dtype));
  if (t != RC_DTYPE_FLOAT && t != RC_DTYPE_INT32 && t != RC_DTYPE_INT64)
    return rc__fail(e, RC_ERR_UNSUPPORTED,
                    "node '%s' (%s): dtype %s is not computed (float32, int32 and int64 are)",
                    n->label, n->op_type, rc_dtype_name(t));
  return RC_OK;
}

static rc_status arith_forward(const rc_kernel *k, rc_err *e) {
  const arith_rows *r = arith_of(k->node);
  rc_dtype t = k->in[0]->dtype;
  if (t == RC_DTYPE_FLOAT) return rc__binary_float_forward(k, r->f32, e);
  rc__bc p;
  const rc_tensor *in[2] = {k->in[0], k->in[1]};
  rc__bc_init(&p, k->out[0], in, 2);
  size_t es = rc_dtype_size(t);
  const void *x[2] = {in[0]->data, in[1]->data};
  const size_t xs[2] = {es, es};
  if (rc__bc_run(&p, k->out[0]->data, es, x, xs, t == RC_DTYPE_INT32 ? r->i32 : r->i64))
    return rc__fail(e, RC_ERR_NUMERIC, "node '%s' (%s): integer division by zero", k->node->label,
                    k->node->op_type);
  return RC_OK;
}

static void arith_backward(const rc_kernel *k) {
  if (k->in[0]->dtype != RC_DTYPE_FLOAT) return; /* integer shape arithmetic has no gradient */
  rc__binary_float_backward(k, arith_of(k->node)->grad);
}

/* ---- Pow ---- */
/* Gradients as PyTorch's pow backward: d/dx is 0 where the exponent is 0
 * (even at x = 0), d/dw is 0 where x == 0 and w >= 0; elsewhere the usual
 * w*x^(w-1) and x^w*log(x) (NaN for negative x, as in PyTorch). */
RC__BINARY_FLOAT_OP(pow, powf(x, w), w == 0.0f ? 0.0f : d * w * powf(x, w - 1.0f),
                    (x == 0.0f && w >= 0.0f) ? 0.0f : d * o * logf(x))

/* Exporters write Pow(x, 2) for squares and Pow(x, 0.5) for roots. */
static int pow_row_fast(void *y_, const void *const *in, const int *inner, int64_t n) {
  if (inner[0] && !inner[1]) {
    float *restrict y = y_;
    const float *restrict a = in[0];
    float w = ((const float *)in[1])[0];
    if (w == 2.0f) {
      for (int64_t j = 0; j < n; j++) y[j] = a[j] * a[j];
      return 0;
    }
    if (w == 1.0f) {
      for (int64_t j = 0; j < n; j++) y[j] = a[j];
      return 0;
    }
  }
  return pow_row(y_, in, inner, n);
}

/* x float32 (broadcast), exponent float32/int32/int64 (broadcast) -> y float32 */
static rc_status pow_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__infer_broadcast(n, in, 0, 2, out, e));
  RC_TRY(rc__need_float(n, in[0], 0, e));
  rc_dtype t = in[1]->dtype;
  if (t != RC_DTYPE_FLOAT && t != RC_DTYPE_INT32 && t != RC_DTYPE_INT64)
    return rc__fail(e, RC_ERR_UNSUPPORTED,
                    "node '%s' (%s): exponent dtype %s is not computed (float32, int32, int64 are)",
                    n->label, n->op_type, rc_dtype_name(t));
  return RC_OK;
}

/* An integer exponent is converted to float32 in the workspace. */
static size_t pow_workspace(const rc_kernel *k, int backward) {
  if (k->in[1]->dtype == RC_DTYPE_FLOAT) return 0;
  return (size_t)rc_tensor_numel(k->in[1]) * sizeof(float);
}

static const float *pow_exponent(const rc_kernel *k) {
  const rc_tensor *t = k->in[1];
  if (t->dtype == RC_DTYPE_FLOAT) return t->data;
  float *w = k->work;
  int64_t n = rc_tensor_numel(t);
  for (int64_t i = 0; i < n; i++) w[i] = (float)rc__int_at(t, i);
  return w;
}

static rc_status pow_forward(const rc_kernel *k, rc_err *e) {
  rc__bc p;
  const rc_tensor *in[2] = {k->in[0], k->in[1]};
  rc__bc_init(&p, k->out[0], in, 2);
  const void *x[2] = {in[0]->data, pow_exponent(k)};
  const size_t xs[2] = {sizeof(float), sizeof(float)};
  rc__bc_run(&p, k->out[0]->data, sizeof(float), x, xs, pow_row_fast);
  (void)e;
  return RC_OK;
}

static void pow_backward(const rc_kernel *k) {
  if (!k->dout[0]) return;
  rc__bc p;
  const rc_tensor *in[2] = {k->in[0], k->in[1]};
  rc__bc_init(&p, k->out[0], in, 2);
  const void *x[2] = {in[0]->data, pow_exponent(k)};
  const size_t xs[2] = {sizeof(float), sizeof(float)};
  if (k->din[0]) rc__bc_grad(&p, 0, k->din[0]->data, k->dout[0]->data, x, xs, k->out[0]->data, pow_grad);
  if (k->din[1] && k->in[1]->dtype == RC_DTYPE_FLOAT)
    rc__bc_grad(&p, 1, k->din[1]->data, k->dout[0]->data, x, xs, k->out[0]->data, pow_grad);
}

/* ---- unary float ops: x -> y, same shape ---- */
#define ERF_SLOPE 1.1283791670955126f /* 2/sqrt(pi) */
RC__UNARY_FLOAT_OP(sqrt, sqrtf(x), d * 0.5f / o)
RC__UNARY_FLOAT_OP(exp, expf(x), d *o)
RC__UNARY_FLOAT_OP(log, logf(x), d / x)
RC__UNARY_FLOAT_OP(erf, erff(x), d *ERF_SLOPE *expf(-x * x))
RC__UNARY_FLOAT_OP(reciprocal, 1.0f / x, -d * o * o)
RC__UNARY_FLOAT_OP(neg, -x, -d)
/* |x|' = sign(x), 0 at x = 0 as PyTorch's abs backward. */
RC__UNARY_FLOAT_OP(abs, fabsf(x), x > 0.0f ? d : (x < 0.0f ? -d : 0.0f))

/* Neg and Abs also run on int32/int64 (shape arithmetic), forward only. */
static rc_status sign_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  if (n->n_in >= 1 && in[0] && (in[0]->dtype == RC_DTYPE_INT32 || in[0]->dtype == RC_DTYPE_INT64)) {
    *out = *in[0];
    out->data = NULL;
    return rc__check_shape(n, out, e);
  }
  return rc__infer_unary_float(n, in, out, e);
}

#define INT_SIGN_LOOP(T, UT, absolute)                                   \
  do {                                                                   \
    const T *x = k->in[0]->data;                                         \
    T *y = k->out[0]->data;                                              \
    for (int64_t i = 0; i < n; i++)                                      \
      y[i] = (absolute && x[i] >= 0) ? x[i] : (T)(0 - (UT)x[i]);         \
  } while (0)

static void int_sign_forward(const rc_kernel *k, int absolute) {
  int64_t n = rc_tensor_numel(k->in[0]);
  if (k->in[0]->dtype == RC_DTYPE_INT32)
    INT_SIGN_LOOP(int32_t, uint32_t, absolute);
  else
    INT_SIGN_LOOP(int64_t, uint64_t, absolute);
}

static rc_status neg_any_forward(const rc_kernel *k, rc_err *e) {
  if (k->in[0]->dtype == RC_DTYPE_FLOAT) return neg_forward(k, e);
  int_sign_forward(k, 0);
  return RC_OK;
}
static rc_status abs_any_forward(const rc_kernel *k, rc_err *e) {
  if (k->in[0]->dtype == RC_DTYPE_FLOAT) return abs_forward(k, e);
  int_sign_forward(k, 1);
  return RC_OK;
}
static void neg_any_backward(const rc_kernel *k) {
  if (k->in[0]->dtype == RC_DTYPE_FLOAT) neg_backward(k);
}
static void abs_any_backward(const rc_kernel *k) {
  if (k->in[0]->dtype == RC_DTYPE_FLOAT) abs_backward(k);
}

/* ---- Equal: a, b (broadcast, same dtype) -> bool ---- */
static int equal_f32(void *y_, const void *const *in, const int *inner, int64_t n) {
  uint8_t *y = y_;
  const float *a = in[0], *b = in[1];
  for (int64_t j = 0; j < n; j++) y[j] = a[inner[0] ? j : 0] == b[inner[1] ? j : 0];
  return 0;
}
static int equal_f64(void *y_, const void *const *in, const int *inner, int64_t n) {
  uint8_t *y = y_;
  const double *a = in[0], *b = in[1];
  for (int64_t j = 0; j < n; j++) y[j] = a[inner[0] ? j : 0] == b[inner[1] ? j : 0];
  return 0;
}
/* Integers and bool compare as bit patterns of their width. */
#define EQUAL_BITS(fname, T)                                                                  \
  static int fname(void *y_, const void *const *in, const int *inner, int64_t n) {           \
    uint8_t *y = y_;                                                                          \
    const T *a = in[0], *b = in[1];                                                           \
    for (int64_t j = 0; j < n; j++) y[j] = a[inner[0] ? j : 0] == b[inner[1] ? j : 0];        \
    return 0;                                                                                 \
  }
EQUAL_BITS(equal_b8, uint8_t)
EQUAL_BITS(equal_b16, uint16_t)
EQUAL_BITS(equal_b32, uint32_t)
EQUAL_BITS(equal_b64, uint64_t)

static rc__bc_row_fn equal_row_for(rc_dtype t) {
  if (t == RC_DTYPE_FLOAT) return equal_f32;
  if (t == RC_DTYPE_DOUBLE) return equal_f64;
  if (t == RC_DTYPE_FLOAT16 || t == RC_DTYPE_BFLOAT16) return NULL; /* -0 == +0 needs decoding */
  if (!rc_dtype_is_integer(t) && t != RC_DTYPE_BOOL) return NULL;
  switch (rc_dtype_size(t)) {
    case 1: return equal_b8;
    case 2: return equal_b16;
    case 4: return equal_b32;
    case 8: return equal_b64;
    default: return NULL;
  }
}

static rc_status equal_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__infer_broadcast(n, in, 0, 2, out, e));
  if (in[0]->dtype != in[1]->dtype)
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): inputs have different dtypes %s and %s",
                    n->label, n->op_type, rc_dtype_name(in[0]->dtype), rc_dtype_name(in[1]->dtype));
  if (!equal_row_for(in[0]->dtype))
    return rc__fail(e, RC_ERR_UNSUPPORTED, "node '%s' (%s): dtype %s is not compared", n->label,
                    n->op_type, rc_dtype_name(in[0]->dtype));
  out->dtype = RC_DTYPE_BOOL;
  return RC_OK;
}

static rc_status equal_forward(const rc_kernel *k, rc_err *e) {
  rc__bc p;
  const rc_tensor *in[2] = {k->in[0], k->in[1]};
  rc__bc_init(&p, k->out[0], in, 2);
  size_t es = rc_dtype_size(in[0]->dtype);
  const void *x[2] = {in[0]->data, in[1]->data};
  const size_t xs[2] = {es, es};
  rc__bc_run(&p, k->out[0]->data, 1, x, xs, equal_row_for(in[0]->dtype));
  (void)e;
  return RC_OK;
}

/* ---- Where: cond (bool), x, y (broadcast, any dtype of width 1/2/4/8) -> out ---- */
#define WHERE_ROW(fname, T)                                                          \
  static int fname(void *y_, const void *const *in, const int *inner, int64_t n) {  \
    T *y = y_;                                                                       \
    const uint8_t *c = in[0];                                                        \
    const T *a = in[1], *b = in[2];                                                  \
    if (inner[0] && inner[1] && inner[2]) {                                          \
      for (int64_t j = 0; j < n; j++) y[j] = c[j] ? a[j] : b[j];                     \
    } else {                                                                         \
      for (int64_t j = 0; j < n; j++)                                                \
        y[j] = c[inner[0] ? j : 0] ? a[inner[1] ? j : 0] : b[inner[2] ? j : 0];     \
    }                                                                                \
    return 0;                                                                        \
  }
WHERE_ROW(where_b8, uint8_t)
WHERE_ROW(where_b16, uint16_t)
WHERE_ROW(where_b32, uint32_t)
WHERE_ROW(where_b64, uint64_t)

static rc_status where_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__infer_broadcast(n, in, 0, 3, out, e));
  if (in[0]->dtype != RC_DTYPE_BOOL)
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): condition has dtype %s, expected bool",
                    n->label, n->op_type, rc_dtype_name(in[0]->dtype));
  if (in[1]->dtype != in[2]->dtype)
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): X and Y have different dtypes %s and %s",
                    n->label, n->op_type, rc_dtype_name(in[1]->dtype), rc_dtype_name(in[2]->dtype));
  size_t es = rc_dtype_size(in[1]->dtype);
  if (es != 1 && es != 2 && es != 4 && es != 8)
    return rc__fail(e, RC_ERR_UNSUPPORTED, "node '%s' (%s): dtype %s is not supported", n->label,
                    n->op_type, rc_dtype_name(in[1]->dtype));
  out->dtype = in[1]->dtype;
  return RC_OK;
}

static rc_status where_forward(const rc_kernel *k, rc_err *e) {
  rc__bc p;
  const rc_tensor *in[3] = {k->in[0], k->in[1], k->in[2]};
  rc__bc_init(&p, k->out[0], in, 3);
  size_t es = rc_dtype_size(in[1]->dtype);
  const void *x[3] = {in[0]->data, in[1]->data, in[2]->data};
  const size_t xs[3] = {1, es, es};
  rc__bc_row_fn fn = es == 1 ? where_b8 : es == 2 ? where_b16 : es == 4 ? where_b32 : where_b64;
  rc__bc_run(&p, k->out[0]->data, es, x, xs, fn);
  (void)e;
  return RC_OK;
}

/* The gradient goes to X where the condition holds and to Y elsewhere. */
static void where_grad(float *g, int gs, int which, const float *dy, const void *const *in,
                       const int *inner, const float *y, int64_t n) {
  const uint8_t *c = in[0];
  const int ic = inner[0];
  const uint8_t want = which == 1;
  if (gs) {
    for (int64_t j = 0; j < n; j++)
      if ((c[ic ? j : 0] != 0) == want) g[j] += dy[j];
  } else {
    double s = 0;
    for (int64_t j = 0; j < n; j++)
      if ((c[ic ? j : 0] != 0) == want) s += dy[j];
    g[0] += (float)s;
  }
}

static void where_backward(const rc_kernel *k) {
  if (!k->dout[0] || k->in[1]->dtype != RC_DTYPE_FLOAT) return;
  rc__bc p;
  const rc_tensor *in[3] = {k->in[0], k->in[1], k->in[2]};
  rc__bc_init(&p, k->out[0], in, 3);
  const void *x[3] = {in[0]->data, in[1]->data, in[2]->data};
  const size_t xs[3] = {1, sizeof(float), sizeof(float)};
  for (int i = 1; i <= 2; i++)
    if (k->din[i]) rc__bc_grad(&p, i, k->din[i]->data, k->dout[0]->data, x, xs, NULL, where_grad);
}

/* Opset ranges: broadcasting binary forms exist from opset 7; unary forms
 * are unchanged (apart from added dtypes) from opset 6; Erf and Where from 9. */
#define BINARY(name) {name, "", 7, 21, 0, NULL, arith_infer, NULL, NULL, arith_forward, arith_backward}
#define UNARY(name, fn) \
  {name, "", 6, 21, 0, NULL, rc__infer_unary_float, NULL, NULL, fn##_forward, fn##_backward}

const rc_op_def rc__ops_elementwise[] = {
    BINARY("Add"),
    BINARY("Sub"),
    BINARY("Mul"),
    BINARY("Div"),
    {"Pow", "", 7, 21, 0, NULL, pow_infer, pow_workspace, NULL, pow_forward, pow_backward},
    UNARY("Sqrt", sqrt),
    UNARY("Exp", exp),
    UNARY("Log", log),
    UNARY("Reciprocal", reciprocal),
    {"Erf", "", 9, 21, 0, NULL, rc__infer_unary_float, NULL, NULL, erf_forward, erf_backward},
    {"Neg", "", 6, 21, 0, NULL, sign_infer, NULL, NULL, neg_any_forward, neg_any_backward},
    {"Abs", "", 6, 21, 0, NULL, sign_infer, NULL, NULL, abs_any_forward, abs_any_backward},
    {"Equal", "", 7, 21, RC_OP_NO_GRAD, NULL, equal_infer, NULL, NULL, equal_forward, NULL},
    {"Where", "", 9, 21, 0, NULL, where_infer, NULL, NULL, where_forward, where_backward},
};
const int rc__ops_elementwise_count = (int)(sizeof rc__ops_elementwise / sizeof rc__ops_elementwise[0]);
