/* Op family: fake quantization for training on fixed integer grids.
 *
 * FakeQuantLinear never appears in files. distill rewrites a student's QDQ
 * nodes into it for training (src/train/qat.c): forward is QuantizeLinear
 * followed by DequantizeLinear on a float tensor, exactly as the exported
 * graph computes it; backward is the clipped straight-through estimator
 * (Bengio, Leonard and Courville 2013): the gradient passes where the value
 * lies inside the representable range and is zero outside.
 *
 * Inputs: x float (any shape), scale float (scalar or per-axis), optional
 * zero point (any integer type). Params: rc_fake_quant_params. */
#include <string.h>

#include "ops/fakequant.h"
#include "ops/quant.h"

typedef struct fq_layout {
  int64_t channels, inner;
} fq_layout;

static rc_status fq_layout_of(const rc_node *n, const rc_tensor *x, const rc_tensor *s, fq_layout *L, rc_err *e) {
  const rc_fake_quant_params *p = n->params;
  int64_t ns = rc_tensor_numel(s);
  L->channels = 1;
  L->inner = rc_tensor_numel(x);
  if (ns == 1) return RC_OK;
  int axis;
  RC_TRY(rc__axis(n, p->axis, x->rank, &axis, e));
  if (x->dims[axis] != ns)
    return rc__fail(e, RC_ERR_SHAPE, "node '%s': %lld scales for axis %d of size %lld", n->label, (long long)ns, axis,
                    (long long)x->dims[axis]);
  L->channels = ns;
  L->inner = 1;
  for (int d = axis + 1; d < x->rank; d++) L->inner *= x->dims[d];
  return RC_OK;
}

static rc_status fq_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  if (!in[0] || in[0]->dtype != RC_DTYPE_FLOAT || !in[1] || in[1]->dtype != RC_DTYPE_FLOAT)
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (FakeQuantLinear): float input and scale required", n->label);
  fq_layout L;
  RC_TRY(fq_layout_of(n, in[0], in[1], &L, e));
  out[0] = *in[0];
  out[0].data = NULL;
  return RC_OK;
}

static size_t fq_workspace(const rc_kernel *k, int backward) {
  return sizeof(int32_t) * (size_t)rc_tensor_numel(k->in[1]);
}

/* Zero points widened to int32 in the workspace; NULL when absent. */
static const int32_t *zero_points(const rc_kernel *k) {
  const rc_tensor *z = k->n_in > 2 ? k->in[2] : NULL;
  if (!z) return NULL;
  int32_t *zp = k->work;
  int64_t n = rc_tensor_numel(z);
  for (int64_t i = 0; i < n; i++) zp[i] = (int32_t)rc__int_at(z, i);
  return zp;
}

/* y (any) = fake_quant(x (same shape)) */
static rc_status fq_forward(const rc_kernel *k, rc_err *e) {
  const rc_fake_quant_params *p = k->node->params;
  fq_layout L;
  RC_TRY(fq_layout_of(k->node, k->in[0], k->in[1], &L, e));
  rc__fake_quant_forward(k->out[0]->data, k->in[0]->data, rc_tensor_numel(k->in[0]), k->in[1]->data,
                         zero_points(k), L.channels, L.inner, p->qmin, p->qmax);
  return RC_OK;
}

static void fq_backward(const rc_kernel *k) {
  if (!k->din[0] || !k->dout[0]) return;
  const rc_fake_quant_params *p = k->node->params;
  fq_layout L;
  if (fq_layout_of(k->node, k->in[0], k->in[1], &L, NULL) != RC_OK) return;
  rc__fake_quant_backward(k->din[0]->data, k->dout[0]->data, k->in[0]->data, rc_tensor_numel(k->in[0]),
                          k->in[1]->data, zero_points(k), L.channels, L.inner, p->qmin, p->qmax);
}

const rc_op_def rc__ops_fakequant[] = {
    {RC_FAKE_QUANT_OP, RC_TRAINING_DOMAIN, 1, 1, 0, NULL, fq_infer, fq_workspace, NULL, fq_forward, fq_backward},
};
const int rc__ops_fakequant_count = 1;
