/* Op family: reduce. ReduceSum, ReduceMean, ReduceMax; forward and backward
 * side by side.
 *
 * Axes are an attribute before opset 13 (ReduceSum) / 18 (ReduceMean,
 * ReduceMax) and an optional input after; with no axes every axis is reduced
 * unless noop_with_empty_axes=1, which makes the op an identity. float32 is
 * computed and differentiated; int32/int64 are computed (shape subgraphs). */
#include <math.h>
#include <string.h>

#include "ops/layout.h"

enum { RED_SUM, RED_MEAN, RED_MAX };

static int reduce_kind(const rc_node *n) {
  if (!strcmp(n->op_type, "ReduceSum")) return RED_SUM;
  if (!strcmp(n->op_type, "ReduceMean")) return RED_MEAN;
  return RED_MAX;
}

static int axes_are_input(const rc_node *n) { return n->opset >= (reduce_kind(n) == RED_SUM ? 13 : 18); }

/* mask[d] = 1 for every reduced axis of x (all zero for the identity case). */
static rc_status reduce_mask(const rc_node *n, const rc_tensor *const *in, int *mask, rc_err *e) {
  int rank = in[0]->rank, cnt = 0, norm[RC_MAX_RANK];
  int64_t axes[RC_MAX_RANK];
  if (axes_are_input(n) && rc__attr_find(n, "axes"))
    return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "attribute 'axes' is not allowed at opset %d (an input)", n->opset);
  if (!axes_are_input(n)) {
    const rc_attr *a = rc__attr_find(n, "axes");
    if (a) {
      if (a->type != RC_ATTR_INTS || a->n > RC_MAX_RANK)
        return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "attribute 'axes' must be at most %d ints", RC_MAX_RANK);
      memcpy(axes, a->ints, sizeof(int64_t) * (size_t)a->n);
      cnt = a->n;
    }
  } else if (n->n_in > 1 && in[1]) {
    RC_TRY(rc__need_const(n, in, 1, e));
    const rc_tensor *t = in[1];
    if (t->dtype != RC_DTYPE_INT64 || t->rank > 1 || rc_tensor_numel(t) > RC_MAX_RANK)
      return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "axes must be a 1-D int64 tensor of at most %d entries",
                          RC_MAX_RANK);
    cnt = (int)rc_tensor_numel(t);
    for (int i = 0; i < cnt; i++) axes[i] = ((const int64_t *)t->data)[i];
  }
  for (int d = 0; d < rank; d++) mask[d] = 0;
  if (cnt == 0) {
    int noop = axes_are_input(n) && rc__attr_int(n, "noop_with_empty_axes", 0) != 0;
    for (int d = 0; d < rank; d++) mask[d] = !noop;
    return RC_OK;
  }
  for (int i = 0; i < cnt; i++) {
    RC_TRY(rc__axis(n, axes[i], rank, &norm[i], e));
    if (mask[norm[i]])
      return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "axis %lld appears twice", (long long)axes[i]);
    mask[norm[i]] = 1;
  }
  return RC_OK;
}

static rc_status reduce_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  if (!in[0]) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "input %d is required", 0);
  const rc_tensor *x = in[0];
  if (x->dtype != RC_DTYPE_FLOAT && x->dtype != RC_DTYPE_INT64 && x->dtype != RC_DTYPE_INT32)
    return RC_NODE_FAIL(e, n, RC_ERR_UNSUPPORTED, "dtype %s is not supported (float32, int32, int64)",
                        rc_dtype_name(x->dtype));
  int mask[RC_MAX_RANK];
  RC_TRY(reduce_mask(n, in, mask, e));
  int keep = rc__attr_int(n, "keepdims", 1) != 0, r = 0;
  out[0].dtype = x->dtype;
  out[0].data = NULL;
  for (int d = 0; d < x->rank; d++) {
    if (!mask[d])
      out[0].dims[r++] = x->dims[d];
    else if (keep)
      out[0].dims[r++] = 1;
  }
  out[0].rank = r;
  return RC_OK;
}

/* Strides mapping every input index to its output element (0 on reduced
 * axes), and the number of input elements per output element. */
static int64_t reduce_view(const rc_kernel *k, int64_t *stride) {
  const rc_tensor *x = k->in[0];
  int mask[RC_MAX_RANK];
  rc_err e;
  reduce_mask(k->node, (const rc_tensor *const *)k->in, mask, &e);
  int64_t kept[RC_MAX_RANK], count = 1;
  for (int d = 0; d < x->rank; d++) {
    kept[d] = mask[d] ? 1 : x->dims[d];
    if (mask[d]) count *= x->dims[d];
  }
  rc__contig_strides(stride, x->rank, kept);
  for (int d = 0; d < x->rank; d++)
    if (mask[d]) stride[d] = 0;
  return count;
}

static size_t reduce_workspace(const rc_kernel *k, int backward) {
  size_t m = (size_t)rc_tensor_numel(k->out[0]);
  if (backward) return k->node && reduce_kind(k->node) == RED_MEAN ? m * sizeof(float) : 0;
  return k->in[0]->dtype == RC_DTYPE_FLOAT ? 0 : m * sizeof(int64_t);
}

/* ReduceMax keeps the flat index of each output's maximum for backward. */
static size_t reduce_saved(const rc_kernel *k) {
  return reduce_kind(k->node) == RED_MAX ? (size_t)rc_tensor_numel(k->out[0]) * sizeof(int64_t) : 0;
}

/* Output offset of each input element in row-major order, advanced by the
 * caller's loop. */
typedef struct walker {
  int rank;
  int64_t idx[RC_MAX_RANK], dims[RC_MAX_RANK], stride[RC_MAX_RANK], off;
} walker;

static void walker_next(walker *w) {
  for (int d = w->rank - 1; d >= 0; d--) {
    w->off += w->stride[d];
    if (++w->idx[d] < w->dims[d]) return;
    w->off -= w->stride[d] * w->dims[d];
    w->idx[d] = 0;
  }
}

/* x (..) -> y (kept dims): max with the first maximal element's index; NaN wins. */
static void max_float(const rc_kernel *k, const int64_t *stride) {
  const rc_tensor *x = k->in[0];
  float *y = k->out[0]->data;
  const float *xs = x->data;
  int64_t m = rc_tensor_numel(k->out[0]), n = rc_tensor_numel(x), *arg = k->saved;
  for (int64_t i = 0; i < m; i++) {
    y[i] = -INFINITY;
    if (arg) arg[i] = -1;
  }
  walker w = {x->rank, {0}, {0}, {0}, 0};
  memcpy(w.dims, x->dims, sizeof w.dims);
  memcpy(w.stride, stride, sizeof(int64_t) * (size_t)x->rank);
  for (int64_t i = 0; i < n; i++, walker_next(&w)) {
    float v = xs[i], *cur = &y[w.off];
    if (v > *cur || (v != v && *cur == *cur) || (arg && arg[w.off] < 0)) {
      *cur = v;
      if (arg) arg[w.off] = i;
    }
  }
}

static void reduce_int(const rc_kernel *k, int kind, const int64_t *stride, int64_t count) {
  const rc_tensor *x = k->in[0];
  rc_tensor *y = k->out[0];
  int64_t m = rc_tensor_numel(y), n = rc_tensor_numel(x), *acc = k->work;
  int64_t init = kind == RED_MAX ? (x->dtype == RC_DTYPE_INT32 ? INT32_MIN : INT64_MIN) : 0;
  for (int64_t i = 0; i < m; i++) acc[i] = init;
  walker w = {x->rank, {0}, {0}, {0}, 0};
  memcpy(w.dims, x->dims, sizeof w.dims);
  memcpy(w.stride, stride, sizeof(int64_t) * (size_t)x->rank);
  for (int64_t i = 0; i < n; i++, walker_next(&w)) {
    int64_t v = rc__int_at(x, i);
    if (kind == RED_MAX)
      acc[w.off] = v > acc[w.off] ? v : acc[w.off];
    else
      acc[w.off] = (int64_t)((uint64_t)acc[w.off] + (uint64_t)v); /* wraps like the integer type */
  }
  for (int64_t i = 0; i < m; i++) {
    int64_t v = acc[i];
    if (kind == RED_MEAN) v = count ? v / count : 0; /* integer mean truncates toward zero */
    if (y->dtype == RC_DTYPE_INT32)
      ((int32_t *)y->data)[i] = (int32_t)(uint32_t)v;
    else
      ((int64_t *)y->data)[i] = v;
  }
}

static rc_status reduce_forward(const rc_kernel *k, rc_err *e) {
  (void)e;
  const rc_tensor *x = k->in[0];
  rc_tensor *y = k->out[0];
  int kind = reduce_kind(k->node);
  int64_t stride[RC_MAX_RANK];
  int64_t count = reduce_view(k, stride), m = rc_tensor_numel(y);
  if (x->dtype != RC_DTYPE_FLOAT) {
    reduce_int(k, kind, stride, count);
    return RC_OK;
  }
  if (kind == RED_MAX) {
    max_float(k, stride);
    return RC_OK;
  }
  float *ys = y->data;
  memset(ys, 0, sizeof(float) * (size_t)m);
  rc__view_scatter_add(ys, 0, x->data, x->rank, x->dims, stride);
  if (kind == RED_MEAN) {
    float c = (float)count; /* an empty reduction gives 0/0 = NaN, like NumPy's mean */
    for (int64_t i = 0; i < m; i++) ys[i] /= c;
  }
  return RC_OK;
}

/* Sum: every input element receives its output's gradient; Mean: divided by
 * the count; Max: the whole gradient goes to the first maximal element (a
 * choice: PyTorch's amax splits it evenly among ties, max(dim) picks one). */
static void reduce_backward(const rc_kernel *k) {
  if (!k->din[0] || !k->dout[0]) return;
  const rc_tensor *x = k->in[0];
  int kind = reduce_kind(k->node);
  int64_t m = rc_tensor_numel(k->out[0]);
  float *gx = k->din[0]->data;
  const float *gy = k->dout[0]->data;
  if (kind == RED_MAX) {
    const int64_t *arg = k->saved;
    for (int64_t i = 0; i < m; i++)
      if (arg[i] >= 0) gx[arg[i]] += gy[i];
    return;
  }
  int64_t stride[RC_MAX_RANK];
  int64_t count = reduce_view(k, stride);
  if (kind == RED_MEAN) {
    float *scaled = k->work, inv = count ? 1.0f / (float)count : 0.0f;
    for (int64_t i = 0; i < m; i++) scaled[i] = gy[i] * inv;
    gy = scaled;
  }
  rc__view_gather_add(gx, gy, 0, x->rank, x->dims, stride);
}

#define REDUCE_OP(name)                                                                         \
  {name, "", 9, 21, 0, NULL, reduce_infer, reduce_workspace, reduce_saved, reduce_forward, \
   reduce_backward}

const rc_op_def rc__ops_reduce[] = {REDUCE_OP("ReduceSum"), REDUCE_OP("ReduceMean"), REDUCE_OP("ReduceMax")};
const int rc__ops_reduce_count = (int)(sizeof rc__ops_reduce / sizeof rc__ops_reduce[0]);
