/* Op family: softmax. Forward and backward side by side.
 *
 * Axis meaning by opset (ONNX spec): before 13 the input is coerced to 2-D
 * at `axis` (default 1): rows = prod(dims[:axis]), each row of
 * prod(dims[axis:]) elements is normalised as one. From 13 the op works
 * along the single dim `axis` (default -1). Both become (outer, len, inner)
 * loops here: inner = 1 for the old form. */
#include <math.h>
#include <string.h>

#include "ops/broadcast.h"
#include "ops/op.h"

typedef struct softmax_params {
  int64_t axis;
  int log; /* LogSoftmax */
} softmax_params;

static rc_status softmax_parse(rc_node *n, rc_arena *a, rc_err *e) {
  softmax_params *p = rc__arena_zalloc(a, sizeof *p);
  if (!p) return rc__fail(e, RC_ERR_NOMEM, "node '%s' (%s): out of memory", n->label, n->op_type);
  p->axis = rc__attr_int(n, "axis", n->opset >= 13 ? -1 : 1);
  p->log = !strcmp(n->op_type, "LogSoftmax");
  n->params = p;
  return RC_OK;
}

static rc_status softmax_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__infer_unary_float(n, in, out, e));
  const softmax_params *p = n->params;
  int ax;
  if (in[0]->rank == 0)
    return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): input is a scalar", n->label, n->op_type);
  return rc__axis(n, p->axis, in[0]->rank, &ax, e);
}

typedef struct layout {
  int64_t outer, len, inner;
} layout;

static layout softmax_layout(const rc_kernel *k) {
  const softmax_params *p = k->params;
  const rc_tensor *x = k->in[0];
  int ax = (int)(p->axis < 0 ? p->axis + x->rank : p->axis);
  layout l = {1, 1, 1};
  for (int d = 0; d < x->rank; d++) {
    if (d < ax)
      l.outer *= x->dims[d];
    else if (d == ax || k->node->opset < 13)
      l.len *= x->dims[d];
    else
      l.inner *= x->dims[d];
  }
  return l;
}

/* One softmax line of len elements at stride s: subtract the max, then
 * exp / sum (or x - max - log(sum) for LogSoftmax) — stable for large logits. */
static void softmax_line(float *restrict y, const float *restrict x, int64_t len, int64_t s, int log_form) {
  float m = -INFINITY;
  for (int64_t j = 0; j < len; j++) m = fmaxf(m, x[j * s]);
  double sum = 0;
  if (log_form) {
    for (int64_t j = 0; j < len; j++) sum += expf(x[j * s] - m);
    float lse = m + (float)log(sum);
    for (int64_t j = 0; j < len; j++) y[j * s] = x[j * s] - lse;
  } else {
    for (int64_t j = 0; j < len; j++) {
      float v = expf(x[j * s] - m);
      y[j * s] = v;
      sum += v;
    }
    float inv = (float)(1.0 / sum);
    for (int64_t j = 0; j < len; j++) y[j * s] *= inv;
  }
}

/* x (outer, len, inner) -> y (same) */
static rc_status softmax_forward(const rc_kernel *k, rc_err *e) {
  const softmax_params *p = k->params;
  layout l = softmax_layout(k);
  const float *x = k->in[0]->data;
  float *y = k->out[0]->data;
  int64_t lines = l.outer * l.inner;
#pragma omp parallel for schedule(static) if (lines * l.len > RC__PAR_MIN)
  for (int64_t t = 0; t < lines; t++) {
    int64_t o = t / l.inner, i = t % l.inner;
    size_t base = (size_t)(o * l.len * l.inner + i);
    softmax_line(y + base, x + base, l.len, l.inner, p->log);
  }
  (void)e;
  return RC_OK;
}

/* Softmax: dx = y * (dy - sum(dy * y)); LogSoftmax: dx = dy - exp(y) * sum(dy). */
static void softmax_backward(const rc_kernel *k) {
  if (!k->din[0] || !k->dout[0]) return;
  const softmax_params *p = k->params;
  layout l = softmax_layout(k);
  const float *y = k->out[0]->data, *dy = k->dout[0]->data;
  float *g = k->din[0]->data;
  int64_t lines = l.outer * l.inner, s = l.inner;
#pragma omp parallel for schedule(static) if (lines * l.len > RC__PAR_MIN)
  for (int64_t t = 0; t < lines; t++) {
    int64_t o = t / l.inner, i = t % l.inner;
    size_t base = (size_t)(o * l.len * l.inner + i);
    const float *yy = y + base, *dd = dy + base;
    float *gg = g + base;
    double acc = 0;
    if (p->log) {
      for (int64_t j = 0; j < l.len; j++) acc += dd[j * s];
      float sum = (float)acc;
      for (int64_t j = 0; j < l.len; j++) gg[j * s] += dd[j * s] - expf(yy[j * s]) * sum;
    } else {
      for (int64_t j = 0; j < l.len; j++) acc += (double)dd[j * s] * yy[j * s];
      float dot = (float)acc;
      for (int64_t j = 0; j < l.len; j++) gg[j * s] += yy[j * s] * (dd[j * s] - dot);
    }
  }
}

/* Opsets 1-12: coerced 2-D form; 13+: single axis. */
const rc_op_def rc__ops_softmax[] = {
    {"Softmax", "", 1, 21, 0, softmax_parse, softmax_infer, NULL, NULL, softmax_forward, softmax_backward},
    {"LogSoftmax", "", 1, 21, 0, softmax_parse, softmax_infer, NULL, NULL, softmax_forward, softmax_backward},
};
const int rc__ops_softmax_count = (int)(sizeof rc__ops_softmax / sizeof rc__ops_softmax[0]);
