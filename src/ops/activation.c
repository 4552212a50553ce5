/* Op family: activation. Forward and backward side by side.
 *
 * All float32, x -> y of the same shape (PRelu broadcasts its slope to x).
 * Formulas are the ONNX operator spec's; where a derivative is undefined
 * (kinks of Relu, Clip, HardSigmoid, HardSwish) we use PyTorch's autograd
 * convention, named at each op, so that gradients match the common reference. */
#include <float.h>
#include <math.h>
#include <string.h>

#include "ops/broadcast.h"
#include "ops/epilogue.h"
#include "ops/op.h"

static rc_status pw_params_alloc(rc_node *n, rc_arena *a, rc__pw_params **out, rc_err *e) {
  rc__pw_params *p = rc__arena_zalloc(a, sizeof *p);
  if (!p) return rc__fail(e, RC_ERR_NOMEM, "node '%s' (%s): out of memory", n->label, n->op_type);
  n->params = p;
  *out = p;
  return RC_OK;
}

/* Attribute alpha (and beta) with the spec's defaults for this op. */
static rc_status parse_alpha_beta(rc_node *n, rc_arena *a, float alpha, float beta, rc_err *e) {
  rc__pw_params *p = NULL;
  RC_TRY(pw_params_alloc(n, a, &p, e));
  p->alpha = rc__attr_float(n, "alpha", alpha);
  p->beta = rc__attr_float(n, "beta", beta);
  if (!isfinite(p->alpha) || !isfinite(p->beta))
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): attribute alpha/beta is not finite", n->label,
                    n->op_type);
  return RC_OK;
}
static rc_status leaky_relu_parse(rc_node *n, rc_arena *a, rc_err *e) { return parse_alpha_beta(n, a, 0.01f, 0, e); }
static rc_status elu_parse(rc_node *n, rc_arena *a, rc_err *e) { return parse_alpha_beta(n, a, 1.0f, 0, e); }
static rc_status hard_sigmoid_parse(rc_node *n, rc_arena *a, rc_err *e) { return parse_alpha_beta(n, a, 0.2f, 0.5f, e); }

static inline float sigmoid1(float x) {
  /* Stable on both sides: exp of a non-positive number only. */
  if (x >= 0) return 1.0f / (1.0f + expf(-x));
  float z = expf(x);
  return z / (1.0f + z);
}

/* x (any shape) -> y (same shape) for every op below. */
/* Relu: gradient passes where x > 0 (PyTorch: 0 at x = 0). */
RC__UNARY_FLOAT_OP(relu, x > 0.0f ? x : 0.0f, x > 0.0f ? d : 0.0f)
/* LeakyRelu: y = x (x >= 0), alpha*x otherwise; gradient d where x > 0 (PyTorch). */
RC__UNARY_FLOAT_OP(leaky_relu, x >= 0.0f ? x : p->alpha * x, x > 0.0f ? d : d * p->alpha)
/* Elu: y = x (x > 0), alpha*(e^x - 1) otherwise; dy/dx = y + alpha on x <= 0. */
RC__UNARY_FLOAT_OP(elu, x > 0.0f ? x : p->alpha * expm1f(x), x > 0.0f ? d : d * (o + p->alpha))
RC__UNARY_FLOAT_OP(sigmoid, sigmoid1(x), d *o *(1.0f - o))
RC__UNARY_FLOAT_OP(tanh, tanhf(x), d *(1.0f - o * o))
/* HardSigmoid: max(0, min(1, alpha*x + beta)); gradient alpha*d strictly
 * inside (0, 1), as PyTorch's hardsigmoid backward (open interval). */
RC__UNARY_FLOAT_OP(hard_sigmoid, fminf(1.0f, fmaxf(0.0f, p->alpha * x + p->beta)),
                   (p->alpha * x + p->beta > 0.0f && p->alpha * x + p->beta < 1.0f) ? d * p->alpha : 0.0f)
/* HardSwish: x * max(0, min(1, x/6 + 1/2)); gradient as PyTorch's:
 * 0 for x < -3, (x/3 + 1/2) for -3 <= x <= 3, 1 above. */
RC__UNARY_FLOAT_OP(hard_swish, x *fminf(1.0f, fmaxf(0.0f, x / 6.0f + 0.5f)),
                   x < -3.0f ? 0.0f : (x <= 3.0f ? d * (x / 3.0f + 0.5f) : d))
/* Softplus: log(1 + e^x), evaluated as max(x, 0) + log1p(e^-|x|) to avoid overflow. */
RC__UNARY_FLOAT_OP(softplus, fmaxf(x, 0.0f) + log1pf(expf(-fabsf(x))), d *sigmoid1(x))

/* Gelu (opset 20): approximate = "none": x * Phi(x) with Phi the normal CDF
 * via erf; "tanh": 0.5 x (1 + tanh(sqrt(2/pi) (x + 0.044715 x^3))). */
#define GELU_SQRT1_2 0.70710678118654752f
#define GELU_INV_SQRT_2PI 0.39894228040143268f
#define GELU_SQRT_2_PI 0.79788456080286536f
#define GELU_CUBIC 0.044715f
static inline float gelu_tanh_inner(float x) { return GELU_SQRT_2_PI * (x + GELU_CUBIC * x * x * x); }
RC__UNARY_FLOAT_OP(gelu_erf, 0.5f * x * (1.0f + erff(x * GELU_SQRT1_2)),
                   d *(0.5f * (1.0f + erff(x * GELU_SQRT1_2)) + x * GELU_INV_SQRT_2PI * expf(-0.5f * x * x)))
static inline float gelu_tanh_grad(float x) {
  float t = tanhf(gelu_tanh_inner(x));
  return 0.5f * (1.0f + t) + 0.5f * x * (1.0f - t * t) * GELU_SQRT_2_PI * (1.0f + 3.0f * GELU_CUBIC * x * x);
}
RC__UNARY_FLOAT_OP(gelu_tanh, 0.5f * x * (1.0f + tanhf(gelu_tanh_inner(x))), d *gelu_tanh_grad(x))

static rc_status gelu_parse(rc_node *n, rc_arena *a, rc_err *e) {
  rc__pw_params *p = NULL;
  RC_TRY(pw_params_alloc(n, a, &p, e));
  const char *mode = rc__attr_string(n, "approximate", "none");
  if (!strcmp(mode, "none"))
    p->mode = 0;
  else if (!strcmp(mode, "tanh"))
    p->mode = 1;
  else
    return rc__fail(e, RC_ERR_UNSUPPORTED, "node '%s' (%s): approximate=\"%s\" (expected none or tanh)",
                    n->label, n->op_type, mode);
  return RC_OK;
}
static rc_status gelu_forward(const rc_kernel *k, rc_err *e) {
  const rc__pw_params *p = k->params;
  return p->mode ? gelu_tanh_forward(k, e) : gelu_erf_forward(k, e);
}
static void gelu_backward(const rc_kernel *k) {
  const rc__pw_params *p = k->params;
  if (p->mode)
    gelu_tanh_backward(k);
  else
    gelu_erf_backward(k);
}

/* ---- PRelu: x (shape S), slope (unidirectionally broadcast to S) -> y (S) ---- */
/* y = x for x >= 0, slope*x otherwise; gradient as PyTorch's: x > 0 selects
 * the identity branch. The slope's gradient is reduced over broadcast dims. */
RC__BINARY_FLOAT_OP(prelu, x >= 0.0f ? x : w * x, x > 0.0f ? d : d * w, x > 0.0f ? 0.0f : d * x)

static rc_status prelu_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__infer_broadcast(n, in, 0, 2, out, e));
  RC_TRY(rc__need_float(n, in[0], 0, e));
  RC_TRY(rc__need_float(n, in[1], 1, e));
  if (!rc_shape_equal(out, in[0])) {
    char sx[96], ss[96];
    return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): slope %s does not broadcast to X %s", n->label,
                    n->op_type, rc_shape_str(in[1], ss, sizeof ss), rc_shape_str(in[0], sx, sizeof sx));
  }
  return RC_OK;
}
static rc_status prelu_forward(const rc_kernel *k, rc_err *e) { return rc__binary_float_forward(k, prelu_row, e); }
static void prelu_backward(const rc_kernel *k) { rc__binary_float_backward(k, prelu_grad); }

/* ---- Clip: x, [min], [max] -> y ---- */
/* Opsets 6-10 take min/max as attributes, 11+ as optional scalar inputs; an
 * absent bound is the float32 lowest / max (spec: numeric_limits). The
 * result is min(max(x, lo), hi), so lo > hi gives hi everywhere (numpy's
 * clip). Gradient to x where lo <= x <= hi, bounds included, as PyTorch's
 * clamp backward; the bound that produced an output receives its gradient. */
static rc_status clip_parse(rc_node *n, rc_arena *a, rc_err *e) {
  rc__pw_params *p = NULL;
  RC_TRY(pw_params_alloc(n, a, &p, e));
  p->alpha = -FLT_MAX;
  p->beta = FLT_MAX;
  if (n->opset < 11) {
    p->alpha = rc__attr_float(n, "min", -FLT_MAX);
    p->beta = rc__attr_float(n, "max", FLT_MAX);
  } else if (n->n_in > 3) {
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): %d inputs (at most 3)", n->label, n->op_type,
                    n->n_in);
  }
  return RC_OK;
}

static rc_status clip_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__infer_unary_float(n, in, out, e));
  for (int i = 1; i < n->n_in && i < 3; i++) {
    if (!in[i]) continue;
    RC_TRY(rc__need_float(n, in[i], i, e));
    if (rc_tensor_numel(in[i]) != 1 || in[i]->rank > 1)
      return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): %s must be a scalar", n->label, n->op_type,
                      i == 1 ? "min" : "max");
  }
  return RC_OK;
}

void rc__clip_bounds(const rc_kernel *k, float *lo, float *hi) {
  const rc__pw_params *p = k->params;
  *lo = p->alpha;
  *hi = p->beta;
  if (k->n_in > 1 && k->in[1]) *lo = *(const float *)k->in[1]->data;
  if (k->n_in > 2 && k->in[2]) *hi = *(const float *)k->in[2]->data;
}

static rc_status clip_forward(const rc_kernel *k, rc_err *e) {
  float lo, hi;
  rc__clip_bounds(k, &lo, &hi);
  const float *restrict x = k->in[0]->data;
  float *restrict y = k->out[0]->data;
  int64_t n = rc_tensor_numel(k->in[0]);
  /* fminf(fmaxf(x, lo), hi) written as selects, which the compiler turns
   * into vector code instead of two library calls per element: a NaN x
   * gives lo as fmaxf does, and a NaN bound is ignored as fmaxf/fminf
   * ignore it (a NaN x against a NaN lo gives -inf, not NaN). */
  if (isnan(lo)) lo = -INFINITY;
  if (isnan(hi)) hi = INFINITY;
#pragma omp parallel for schedule(static) if (n > RC__PAR_MIN)
  for (int64_t i = 0; i < n; i++) {
    float v = x[i] >= lo ? x[i] : lo;
    y[i] = hi < v ? hi : v;
  }
  (void)e;
  return RC_OK;
}

static void clip_backward(const rc_kernel *k) {
  if (!k->dout[0]) return;
  float lo, hi;
  rc__clip_bounds(k, &lo, &hi);
  const float *restrict x = k->in[0]->data, *restrict d = k->dout[0]->data;
  int64_t n = rc_tensor_numel(k->in[0]);
  if (k->din[0]) {
    float *restrict g = k->din[0]->data;
    /* Private bounds, a non-short-circuit test and an unconditional load of
     * d: with shared bounds, `&&` and d read only inside, the loop compiled
     * to scalar branches and cost three times the forward pass. */
    const float l = lo, h = hi;
#pragma omp parallel for schedule(static) firstprivate(l, h) if (n > RC__PAR_MIN)
    for (int64_t i = 0; i < n; i++) {
      float xi = x[i], di = d[i];
      g[i] += (xi >= l) & (xi <= h) ? di : 0.0f;
    }
  }
  rc_tensor *dlo = k->n_in > 1 ? k->din[1] : NULL, *dhi = k->n_in > 2 ? k->din[2] : NULL;
  if (dlo || dhi) {
    /* Serial sums: a fixed order keeps the result deterministic. */
    double slo = 0, shi = 0;
    for (int64_t i = 0; i < n; i++) {
      if (x[i] > hi || (x[i] < lo && lo > hi))
        shi += d[i];
      else if (x[i] < lo)
        slo += d[i];
    }
    if (dlo) *(float *)dlo->data += (float)slo;
    if (dhi) *(float *)dhi->data += (float)shi;
  }
}

#define ACT(name, lo, fn, parse) \
  {name, "", lo, 21, 0, parse, rc__infer_unary_float, NULL, NULL, fn##_forward, fn##_backward}

const rc_op_def rc__ops_activation[] = {
    ACT("Relu", 6, relu, NULL),
    ACT("LeakyRelu", 6, leaky_relu, leaky_relu_parse),
    ACT("Elu", 6, elu, elu_parse),
    ACT("Sigmoid", 6, sigmoid, NULL),
    ACT("Tanh", 6, tanh, NULL),
    ACT("HardSigmoid", 6, hard_sigmoid, hard_sigmoid_parse),
    ACT("HardSwish", 14, hard_swish, NULL),
    ACT("Softplus", 1, softplus, NULL),
    ACT("Gelu", 20, gelu, gelu_parse),
    {"PRelu", "", 7, 21, 0, NULL, prelu_infer, NULL, NULL, prelu_forward, prelu_backward},
    {"Clip", "", 6, 21, 0, clip_parse, clip_infer, NULL, NULL, clip_forward, clip_backward},
};
const int rc__ops_activation_count = (int)(sizeof rc__ops_activation / sizeof rc__ops_activation[0]);
