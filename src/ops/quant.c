/* Op family: quant. QuantizeLinear and DequantizeLinear (opsets 10..21),
 * per-tensor and per-axis, and the fake-quant helpers of quant.h.
 *
 * QuantizeLinear: y = saturate(round(x / y_scale) + y_zero_point), rounding
 * half to even as the spec requires (rintf under the default rounding mode).
 * DequantizeLinear: y = (x - x_zero_point) * x_scale.
 * Integer types: uint8/int8 (all opsets), int32 input of DequantizeLinear,
 * and from opset 21 uint16/int16 and uint4/int4 (held one byte per element).
 * Float8 types and blocked quantization (block_size) are refused. Neither op
 * has a gradient here: the training side fake-quantizes with quant.h. */
#include "ops/quant.h"

#include <math.h>
#include <string.h>

#include "ops/layout.h"

int rc__quant_range(rc_dtype dt, int32_t *lo, int32_t *hi) {
  switch (dt) {
    case RC_DTYPE_UINT8: *lo = 0; *hi = 255; return 1;
    case RC_DTYPE_INT8: *lo = -128; *hi = 127; return 1;
    case RC_DTYPE_UINT16: *lo = 0; *hi = 65535; return 1;
    case RC_DTYPE_INT16: *lo = -32768; *hi = 32767; return 1;
    case RC_DTYPE_UINT4: *lo = 0; *hi = 15; return 1;
    case RC_DTYPE_INT4: *lo = -8; *hi = 7; return 1;
    default: return 0;
  }
}

/* Integer types an opset allows on the quantized side. */
static int quant_dtype_ok(const rc_node *n, rc_dtype dt) {
  if (dt == RC_DTYPE_UINT8 || dt == RC_DTYPE_INT8) return 1;
  return n->opset >= 21 && (dt == RC_DTYPE_UINT16 || dt == RC_DTYPE_INT16 || dt == RC_DTYPE_UINT4 ||
                            dt == RC_DTYPE_INT4);
}

static int is_quantize(const rc_node *n) { return !strcmp(n->op_type, "QuantizeLinear"); }

static rc_status quant_parse(rc_node *n, rc_arena *a, rc_err *e) {
  (void)a;
  if (n->opset >= 21 && rc__attr_int(n, "block_size", 0) != 0)
    return RC_NODE_FAIL(e, n, RC_ERR_UNSUPPORTED, "blocked quantization (block_size=%lld) is not supported",
                        (long long)rc__attr_int(n, "block_size", 0));
  if (is_quantize(n) && n->opset >= 21) {
    int64_t od = rc__attr_int(n, "output_dtype", 0);
    if (od && !quant_dtype_ok(n, (rc_dtype)od))
      return RC_NODE_FAIL(e, n, RC_ERR_UNSUPPORTED, "output_dtype %s is not supported", rc_dtype_name((rc_dtype)od));
  }
  return RC_OK;
}

/* The layout of scale against x: channels == 1 for per-tensor. */
typedef struct quant_layout {
  int64_t channels, inner, n;
} quant_layout;

static rc_status quant_shape(const rc_node *n, const rc_tensor *const *in, quant_layout *L, rc_err *e) {
  const rc_tensor *x = in[0], *s = n->n_in > 1 ? in[1] : NULL;
  const rc_tensor *z = n->n_in > 2 ? in[2] : NULL;
  if (!x || !s) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "inputs x and scale are required%s", "");
  if (s->dtype != RC_DTYPE_FLOAT)
    return RC_NODE_FAIL(e, n, RC_ERR_UNSUPPORTED, "scale is %s, only float32 is supported", rc_dtype_name(s->dtype));
  int64_t ns = rc_tensor_numel(s);
  L->n = rc_tensor_numel(x);
  L->channels = 1;
  L->inner = L->n;
  if (s->rank > 1 || ns < 1)
    return RC_NODE_FAIL(e, n, RC_ERR_SHAPE, "scale must be a scalar or a 1-D tensor, rank %d given", s->rank);
  if (s->rank == 1 && ns > 1) {
    if (n->opset < 13)
      return RC_NODE_FAIL(e, n, RC_ERR_SHAPE, "per-axis scale needs opset 13, the model has %d", n->opset);
    int axis;
    RC_TRY(rc__axis(n, rc__attr_int(n, "axis", 1), x->rank, &axis, e));
    if (x->dims[axis] != ns)
      return RC_NODE_FAIL(e, n, RC_ERR_SHAPE, "scale has %lld entries, axis %d of x has %lld", (long long)ns, axis,
                          (long long)x->dims[axis]);
    L->channels = ns;
    L->inner = 1;
    for (int d = axis + 1; d < x->rank; d++) L->inner *= x->dims[d];
  }
  if (z && (rc_tensor_numel(z) != ns || z->rank > 1))
    return RC_NODE_FAIL(e, n, RC_ERR_SHAPE, "zero point has %lld entries, scale has %lld",
                        (long long)rc_tensor_numel(z), (long long)ns);
  return RC_OK;
}

/* Values of scale and zero point: scales positive and finite, zero points
 * inside their type's range (int4/uint4 are held in a byte, so check). */
static rc_status quant_check_values(const rc_node *n, const rc_tensor *s, const rc_tensor *z, rc_err *e) {
  int64_t ns = rc_tensor_numel(s);
  const float *sv = s->data;
  for (int64_t i = 0; i < ns; i++)
    if (!(sv[i] > 0) || !isfinite(sv[i]))
      return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "scale[%lld] is %g; scales must be positive and finite",
                          (long long)i, sv[i]);
  int32_t lo, hi;
  if (z && z->data && rc__quant_range(z->dtype, &lo, &hi))
    for (int64_t i = 0; i < ns; i++) {
      int64_t v = rc__int_at(z, i);
      if (v < lo || v > hi)
        return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "zero point[%lld] is %lld, outside %s's range [%d, %d]",
                            (long long)i, (long long)v, rc_dtype_name(z->dtype), lo, hi);
    }
  return RC_OK;
}

static rc_status quantize_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  quant_layout L;
  RC_TRY(quant_shape(n, in, &L, e));
  const rc_tensor *x = in[0], *z = n->n_in > 2 ? in[2] : NULL;
  if (x->dtype != RC_DTYPE_FLOAT && x->dtype != RC_DTYPE_INT32)
    return RC_NODE_FAIL(e, n, RC_ERR_UNSUPPORTED, "x is %s, float32 or int32 expected", rc_dtype_name(x->dtype));
  rc_dtype od = RC_DTYPE_UINT8;
  int64_t attr = n->opset >= 21 ? rc__attr_int(n, "output_dtype", 0) : 0;
  if (z) {
    od = z->dtype;
    if (attr && attr != od)
      return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "output_dtype %s differs from the zero point's %s",
                          rc_dtype_name((rc_dtype)attr), rc_dtype_name(od));
  } else if (attr) {
    od = (rc_dtype)attr;
  }
  if (!quant_dtype_ok(n, od))
    return RC_NODE_FAIL(e, n, RC_ERR_UNSUPPORTED, "output type %s is not supported at opset %d", rc_dtype_name(od),
                        n->opset);
  if (in[1]->data) RC_TRY(quant_check_values(n, in[1], z, e));
  out[0].dtype = od;
  out[0].rank = x->rank;
  memcpy(out[0].dims, x->dims, sizeof out[0].dims);
  out[0].data = NULL;
  return RC_OK;
}

static void store_q(void *y, rc_dtype dt, int64_t i, int32_t q) {
  switch (dt) {
    case RC_DTYPE_UINT8: case RC_DTYPE_UINT4: ((uint8_t *)y)[i] = (uint8_t)q; break;
    case RC_DTYPE_INT8: case RC_DTYPE_INT4: ((int8_t *)y)[i] = (int8_t)q; break;
    case RC_DTYPE_UINT16: ((uint16_t *)y)[i] = (uint16_t)q; break;
    default: ((int16_t *)y)[i] = (int16_t)q; break;
  }
}

/* round half to even, add the zero point, saturate; NaN maps to the zero point. */
static int32_t quantize_one(float v, float s, int32_t z, int32_t lo, int32_t hi) {
  float q = rintf(v / s);
  if (q != q) return z;
  float r = q + (float)z;
  return r < (float)lo ? lo : r > (float)hi ? hi : (int32_t)r;
}

/* x (..), scale (C) over axis -> y (..) integer */
static rc_status quantize_forward(const rc_kernel *k, rc_err *e) {
  const rc_node *n = k->node;
  const rc_tensor *x = k->in[0], *s = k->in[1], *z = k->n_in > 2 ? k->in[2] : NULL;
  rc_tensor *y = k->out[0];
  quant_layout L;
  RC_TRY(quant_shape(n, (const rc_tensor *const *)k->in, &L, e));
  RC_TRY(quant_check_values(n, s, z, e));
  int32_t lo = 0, hi = 0; /* set for every integer dtype; -O3 cannot see that */
  rc__quant_range(y->dtype, &lo, &hi);
  const float *sv = s->data;
  for (int64_t i = 0; i < L.n; i++) {
    int64_t c = (i / L.inner) % L.channels;
    float v = x->dtype == RC_DTYPE_FLOAT ? ((const float *)x->data)[i] : (float)((const int32_t *)x->data)[i];
    int32_t zp = z ? (int32_t)rc__int_at(z, c) : 0;
    store_q(y->data, y->dtype, i, quantize_one(v, sv[c], zp, lo, hi));
  }
  return RC_OK;
}

static rc_status dequantize_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  quant_layout L;
  RC_TRY(quant_shape(n, in, &L, e));
  const rc_tensor *x = in[0], *z = n->n_in > 2 ? in[2] : NULL;
  if (x->dtype != RC_DTYPE_INT32 && !quant_dtype_ok(n, x->dtype))
    return RC_NODE_FAIL(e, n, RC_ERR_UNSUPPORTED, "x type %s is not supported at opset %d", rc_dtype_name(x->dtype),
                        n->opset);
  if (z && z->dtype != x->dtype)
    return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "zero point is %s, x is %s", rc_dtype_name(z->dtype),
                        rc_dtype_name(x->dtype));
  if (in[1]->data) RC_TRY(quant_check_values(n, in[1], z, e));
  out[0].dtype = RC_DTYPE_FLOAT;
  out[0].rank = x->rank;
  memcpy(out[0].dims, x->dims, sizeof out[0].dims);
  out[0].data = NULL;
  return RC_OK;
}

/* x (..) integer, scale (C) over axis -> y (..) float32 */
static rc_status dequantize_forward(const rc_kernel *k, rc_err *e) {
  const rc_node *n = k->node;
  const rc_tensor *x = k->in[0], *s = k->in[1], *z = k->n_in > 2 ? k->in[2] : NULL;
  quant_layout L;
  RC_TRY(quant_shape(n, (const rc_tensor *const *)k->in, &L, e));
  RC_TRY(quant_check_values(n, s, z, e));
  const float *sv = s->data;
  float *y = k->out[0]->data;
  for (int64_t i = 0; i < L.n; i++) {
    int64_t c = (i / L.inner) % L.channels;
    float zp = z ? (float)rc__int_at(z, c) : 0.0f;
    y[i] = ((float)rc__int_at(x, i) - zp) * sv[c];
  }
  return RC_OK;
}

void rc__fake_quant_forward(float *y, const float *x, int64_t n, const float *scale, const int32_t *zero_point,
                            int64_t channels, int64_t inner, int32_t qmin, int32_t qmax) {
  for (int64_t i = 0; i < n; i++) {
    int64_t c = (i / inner) % channels;
    int32_t z = zero_point ? zero_point[c] : 0;
    y[i] = (float)(quantize_one(x[i], scale[c], z, qmin, qmax) - z) * scale[c];
  }
}

void rc__fake_quant_backward(float *dx, const float *dy, const float *x, int64_t n, const float *scale,
                             const int32_t *zero_point, int64_t channels, int64_t inner, int32_t qmin,
                             int32_t qmax) {
  for (int64_t i = 0; i < n; i++) {
    int64_t c = (i / inner) % channels;
    float q = rintf(x[i] / scale[c]) + (float)(zero_point ? zero_point[c] : 0);
    if (q >= (float)qmin && q <= (float)qmax) dx[i] += dy[i];
  }
}

const rc_op_def rc__ops_quant[] = {
    {"QuantizeLinear", "", 10, 21, RC_OP_NO_GRAD, quant_parse, quantize_infer, NULL, NULL, quantize_forward, NULL},
    {"DequantizeLinear", "", 10, 21, RC_OP_NO_GRAD, quant_parse, dequantize_infer, NULL, NULL, dequantize_forward,
     NULL},
};
const int rc__ops_quant_count = (int)(sizeof rc__ops_quant / sizeof rc__ops_quant[0]);
