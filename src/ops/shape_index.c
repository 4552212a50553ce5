/* Op family: shape (continued). Ops that select or place blocks of data:
 * Concat, Split, Slice, Gather, Pad. The family table is in shape.c. */
#include <string.h>

#include "ops/layout.h"
#include "ops/shape_ops.h"

static void set_shape(rc_tensor *t, rc_dtype dt, int rank, const int64_t *dims) {
  t->dtype = dt;
  t->rank = rank;
  for (int i = 0; i < rank; i++) t->dims[i] = dims[i];
  t->data = NULL;
}

/* Products of the dims before and after axis. */
static void outer_inner(const rc_tensor *t, int axis, int64_t *outer, int64_t *inner) {
  *outer = 1;
  *inner = 1;
  for (int d = 0; d < axis; d++) *outer *= t->dims[d];
  for (int d = axis + 1; d < t->rank; d++) *inner *= t->dims[d];
}

/* ---- Concat: inputs (.., a_i, ..) -> (.., sum a_i, ..) along axis ---- */

rc_status rc__concat_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  if (n->n_in < 1) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "needs at least one input%s", "");
  if (!rc__attr_find(n, "axis")) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "attribute 'axis' is required%s", "");
  for (int i = 0; i < n->n_in; i++) RC_TRY(rc__shape_need_numeric(n, in[i], i, e));
  const rc_tensor *x0 = in[0];
  int axis;
  RC_TRY(rc__axis(n, rc__attr_int(n, "axis", 0), x0->rank, &axis, e));
  int64_t dims[RC_MAX_RANK];
  memcpy(dims, x0->dims, sizeof dims);
  dims[axis] = 0;
  for (int i = 0; i < n->n_in; i++) {
    const rc_tensor *x = in[i];
    int same = x->dtype == x0->dtype && x->rank == x0->rank;
    for (int d = 0; same && d < x->rank; d++) same = d == axis || x->dims[d] == x0->dims[d];
    if (!same) {
      char s0[96], s1[96];
      return RC_NODE_FAIL(e, n, RC_ERR_SHAPE, "input %d (%s %s) does not fit input 0 (%s %s) along axis %d", i,
                          rc_dtype_name(x->dtype), rc_shape_str(x, s1, sizeof s1), rc_dtype_name(x0->dtype),
                          rc_shape_str(x0, s0, sizeof s0), axis);
    }
    dims[axis] += x->dims[axis];
  }
  set_shape(&out[0], x0->dtype, x0->rank, dims);
  return rc__check_shape(n, &out[0], e);
}

static int concat_axis(const rc_kernel *k) {
  int axis;
  rc_err e;
  rc__axis(k->node, rc__attr_int(k->node, "axis", 0), k->out[0]->rank, &axis, &e);
  return axis;
}

rc_status rc__concat_forward(const rc_kernel *k, rc_err *e) {
  (void)e;
  int axis = concat_axis(k);
  int64_t outer, inner;
  outer_inner(k->out[0], axis, &outer, &inner);
  size_t esz = rc_dtype_size(k->out[0]->dtype);
  char *y = k->out[0]->data;
  for (int64_t o = 0; o < outer; o++)
    for (int i = 0; i < k->n_in; i++) {
      size_t chunk = (size_t)(k->in[i]->dims[axis] * inner) * esz;
      memcpy(y, (const char *)k->in[i]->data + (size_t)o * chunk, chunk);
      y += chunk;
    }
  return RC_OK;
}

void rc__concat_backward(const rc_kernel *k) {
  if (!k->dout[0]) return;
  int axis = concat_axis(k);
  int64_t outer, inner;
  outer_inner(k->out[0], axis, &outer, &inner);
  const float *g = k->dout[0]->data;
  for (int64_t o = 0; o < outer; o++)
    for (int i = 0; i < k->n_in; i++) {
      int64_t chunk = k->in[i]->dims[axis] * inner;
      if (k->din[i]) rc__add_into((float *)k->din[i]->data + o * chunk, g, chunk);
      g += chunk;
    }
}

/* ---- Split: x -> n_out pieces along axis ----
 * Sizes: attribute 'split' before opset 13, input 1 from 13, attribute
 * num_outputs from 18 (last piece smaller), otherwise equal pieces. */

static rc_status split_sizes(const rc_node *n, const rc_tensor *const *in, int64_t dim, int64_t *sizes,
                             rc_err *e) {
  int cnt = 0, given = 0;
  int64_t v[64];
  RC_TRY(rc__shape_moved_attr(n, "split", 13, e));
  if (n->n_out > 64) return RC_NODE_FAIL(e, n, RC_ERR_LIMIT, "more than %d outputs", 64);
  if (n->opset < 13) {
    const rc_attr *a = rc__attr_find(n, "split");
    if (a) {
      if (a->type != RC_ATTR_INTS || a->n > 64)
        return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "attribute 'split' must be at most %d ints", 64);
      memcpy(v, a->ints, sizeof(int64_t) * (size_t)a->n);
      cnt = a->n;
      given = 1;
    }
  } else if (n->n_in > 1 && in[1]) {
    RC_TRY(rc__shape_read_ints(n, in, 1, v, 64, &cnt, e));
    given = 1;
  }
  const rc_attr *num = n->opset >= 18 ? rc__attr_find(n, "num_outputs") : NULL;
  if (given && num)
    return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "both 'split' and 'num_outputs' are given%s", "");
  if (given) {
    if (cnt != n->n_out)
      return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "split has %d entries for %d outputs", cnt, n->n_out);
    int64_t sum = 0;
    for (int i = 0; i < cnt; i++) {
      if (v[i] < 0 || v[i] > dim)
        return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "split[%d] is %lld", i, (long long)v[i]);
      sizes[i] = v[i];
      sum += v[i];
    }
    if (sum != dim)
      return RC_NODE_FAIL(e, n, RC_ERR_SHAPE, "split sums to %lld, the axis has %lld", (long long)sum,
                          (long long)dim);
    return RC_OK;
  }
  if (num) {
    if (num->i != n->n_out || num->i < 1)
      return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "num_outputs is %lld but the node has %d outputs",
                          (long long)num->i, n->n_out);
    int64_t chunk = (dim + num->i - 1) / num->i;
    int64_t last = dim - chunk * (num->i - 1);
    if (last < 0)
      return RC_NODE_FAIL(e, n, RC_ERR_SHAPE, "an axis of %lld cannot be split into %lld pieces of %lld",
                          (long long)dim, (long long)num->i, (long long)chunk);
    for (int i = 0; i < n->n_out; i++) sizes[i] = i + 1 < n->n_out ? chunk : last;
    return RC_OK;
  }
  if (n->n_out < 1 || dim % n->n_out)
    return RC_NODE_FAIL(e, n, RC_ERR_SHAPE, "an axis of %lld does not split evenly into %d outputs",
                        (long long)dim, n->n_out);
  for (int i = 0; i < n->n_out; i++) sizes[i] = dim / n->n_out;
  return RC_OK;
}

rc_status rc__split_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__shape_need_numeric(n, in[0], 0, e));
  int axis;
  RC_TRY(rc__axis(n, rc__attr_int(n, "axis", 0), in[0]->rank, &axis, e));
  int64_t sizes[64];
  RC_TRY(split_sizes(n, in, in[0]->dims[axis], sizes, e));
  for (int i = 0; i < n->n_out; i++) {
    set_shape(&out[i], in[0]->dtype, in[0]->rank, in[0]->dims);
    out[i].dims[axis] = sizes[i];
  }
  return RC_OK;
}

/* Axis and piece sizes again (validated by infer, cannot fail here). */
static int split_layout(const rc_kernel *k, int64_t *sizes) {
  int axis;
  rc_err e;
  rc__axis(k->node, rc__attr_int(k->node, "axis", 0), k->in[0]->rank, &axis, &e);
  split_sizes(k->node, (const rc_tensor *const *)k->in, k->in[0]->dims[axis], sizes, &e);
  return axis;
}

rc_status rc__split_forward(const rc_kernel *k, rc_err *e) {
  (void)e;
  int64_t sizes[64], outer, inner;
  int axis = split_layout(k, sizes);
  outer_inner(k->in[0], axis, &outer, &inner);
  size_t esz = rc_dtype_size(k->in[0]->dtype);
  const char *x = k->in[0]->data;
  for (int64_t o = 0; o < outer; o++)
    for (int i = 0; i < k->n_out; i++) {
      size_t chunk = (size_t)(sizes[i] * inner) * esz;
      if (k->out[i]) memcpy((char *)k->out[i]->data + (size_t)o * chunk, x, chunk);
      x += chunk;
    }
  return RC_OK;
}

void rc__split_backward(const rc_kernel *k) {
  if (!k->din[0]) return;
  int64_t sizes[64], outer, inner;
  int axis = split_layout(k, sizes);
  outer_inner(k->in[0], axis, &outer, &inner);
  float *g = k->din[0]->data;
  for (int64_t o = 0; o < outer; o++)
    for (int i = 0; i < k->n_out; i++) {
      int64_t chunk = sizes[i] * inner;
      if (k->dout[i]) rc__add_into(g, (const float *)k->dout[i]->data + o * chunk, chunk);
      g += chunk;
    }
}

/* ---- Slice: y = x[start:end:step] per axis ----
 * Attributes starts/ends/axes before opset 10, inputs (with steps) from 10.
 * Clamping as the spec states: negative start/end count from the end, then
 * start is clamped to [0, dim] (step > 0) or [0, dim-1] (step < 0) and end to
 * [0, dim] or [-1, dim-1]. */

typedef struct slice_lists {
  int64_t starts[RC_MAX_RANK], ends[RC_MAX_RANK], axes[RC_MAX_RANK], steps[RC_MAX_RANK];
  int n, has_axes, has_steps;
} slice_lists;

static rc_status attr_list(const rc_node *n, const char *name, int64_t *v, int *cnt, int required, rc_err *e) {
  const rc_attr *a = rc__attr_find(n, name);
  if (!a) {
    if (required) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "attribute '%s' is required", name);
    *cnt = -1;
    return RC_OK;
  }
  if (a->type != RC_ATTR_INTS || a->n > RC_MAX_RANK)
    return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "attribute '%s' must be at most %d ints", name, RC_MAX_RANK);
  memcpy(v, a->ints, sizeof(int64_t) * (size_t)a->n);
  *cnt = a->n;
  return RC_OK;
}

static rc_status slice_read(const rc_node *n, const rc_tensor *const *in, slice_lists *L, rc_err *e) {
  int cs, ce, ca = -1, cp = -1;
  RC_TRY(rc__shape_moved_attr(n, "starts", 10, e));
  RC_TRY(rc__shape_moved_attr(n, "ends", 10, e));
  RC_TRY(rc__shape_moved_attr(n, "axes", 10, e));
  if (n->opset < 10) {
    RC_TRY(attr_list(n, "starts", L->starts, &cs, 1, e));
    RC_TRY(attr_list(n, "ends", L->ends, &ce, 1, e));
    RC_TRY(attr_list(n, "axes", L->axes, &ca, 0, e));
  } else {
    RC_TRY(rc__shape_read_ints(n, in, 1, L->starts, RC_MAX_RANK, &cs, e));
    RC_TRY(rc__shape_read_ints(n, in, 2, L->ends, RC_MAX_RANK, &ce, e));
    if (n->n_in > 3 && in[3]) RC_TRY(rc__shape_read_ints(n, in, 3, L->axes, RC_MAX_RANK, &ca, e));
    if (n->n_in > 4 && in[4]) RC_TRY(rc__shape_read_ints(n, in, 4, L->steps, RC_MAX_RANK, &cp, e));
  }
  if (ce != cs || (ca >= 0 && ca != cs) || (cp >= 0 && cp != cs))
    return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "starts, ends, axes and steps differ in length (%d, %d, %d, %d)",
                        cs, ce, ca, cp);
  L->n = cs;
  L->has_axes = ca >= 0;
  L->has_steps = cp >= 0;
  return RC_OK;
}

/* Per axis of x: first index, step and output length. */
static rc_status slice_plan(const rc_node *n, const rc_tensor *const *in, int64_t *start, int64_t *step,
                            int64_t *len, rc_err *e) {
  const rc_tensor *x = in[0];
  slice_lists L;
  RC_TRY(slice_read(n, in, &L, e));
  for (int d = 0; d < x->rank; d++) {
    start[d] = 0;
    step[d] = 1;
    len[d] = x->dims[d];
  }
  int axes[RC_MAX_RANK];
  if (!L.has_axes)
    for (int i = 0; i < L.n; i++) L.axes[i] = i;
  RC_TRY(rc__shape_axes(n, L.axes, L.n, x->rank, axes, e));
  for (int i = 0; i < L.n; i++) {
    int d = axes[i];
    int64_t dim = x->dims[d], st = L.starts[i], en = L.ends[i], sp = L.has_steps ? L.steps[i] : 1;
    if (sp == 0) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "step for axis %d is 0", d);
    if (st < 0) st += dim;
    if (en < 0) en += dim;
    int64_t cnt;
    if (sp > 0) {
      st = st < 0 ? 0 : st > dim ? dim : st;
      en = en < 0 ? 0 : en > dim ? dim : en;
      cnt = en > st ? (en - st - 1) / sp + 1 : 0;
    } else {
      st = st < 0 ? 0 : st > dim - 1 ? dim - 1 : st;
      en = en < -1 ? -1 : en > dim - 1 ? dim - 1 : en;
      int64_t neg = sp == INT64_MIN ? INT64_MAX : -sp;
      cnt = st > en ? (st - en - 1) / neg + 1 : 0;
    }
    start[d] = cnt ? st : 0;
    step[d] = sp;
    len[d] = cnt;
  }
  return RC_OK;
}

rc_status rc__slice_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__shape_need_numeric(n, in[0], 0, e));
  int64_t start[RC_MAX_RANK], step[RC_MAX_RANK], len[RC_MAX_RANK];
  RC_TRY(slice_plan(n, in, start, step, len, e));
  set_shape(&out[0], in[0]->dtype, in[0]->rank, len);
  return RC_OK;
}

/* The output as a view of x. */
static int64_t slice_view(const rc_kernel *k, int64_t *stride) {
  int64_t start[RC_MAX_RANK], step[RC_MAX_RANK], len[RC_MAX_RANK], xs[RC_MAX_RANK], base = 0;
  rc_err e;
  slice_plan(k->node, (const rc_tensor *const *)k->in, start, step, len, &e);
  rc__contig_strides(xs, k->in[0]->rank, k->in[0]->dims);
  for (int d = 0; d < k->in[0]->rank; d++) {
    base += start[d] * xs[d];
    stride[d] = step[d] * xs[d];
  }
  return base;
}

rc_status rc__slice_forward(const rc_kernel *k, rc_err *e) {
  (void)e;
  int64_t stride[RC_MAX_RANK];
  int64_t base = slice_view(k, stride);
  rc__view_copy(k->out[0]->data, k->in[0]->data, base, k->out[0]->rank, k->out[0]->dims, stride,
                rc_dtype_size(k->in[0]->dtype));
  return RC_OK;
}

void rc__slice_backward(const rc_kernel *k) {
  if (!k->din[0] || !k->dout[0]) return;
  int64_t stride[RC_MAX_RANK];
  int64_t base = slice_view(k, stride);
  rc__view_scatter_add(k->din[0]->data, base, k->dout[0]->data, k->out[0]->rank, k->out[0]->dims, stride);
}

/* ---- Gather: data (a.., D, b..), indices (q..) -> (a.., q.., b..) ---- */

rc_status rc__gather_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__shape_need_numeric(n, in[0], 0, e));
  if (n->n_in < 2 || !in[1]) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "input %d is required", 1);
  const rc_tensor *x = in[0], *idx = in[1];
  if (idx->dtype != RC_DTYPE_INT64 && idx->dtype != RC_DTYPE_INT32)
    return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "indices must be int32 or int64, got %s", rc_dtype_name(idx->dtype));
  if (x->rank < 1) return RC_NODE_FAIL(e, n, RC_ERR_SHAPE, "data must have rank >= 1%s", "");
  int axis;
  RC_TRY(rc__axis(n, rc__attr_int(n, "axis", 0), x->rank, &axis, e));
  int r = x->rank - 1 + idx->rank;
  if (r > RC_MAX_RANK) return RC_NODE_FAIL(e, n, RC_ERR_LIMIT, "output rank %d exceeds %d", r, RC_MAX_RANK);
  int64_t dims[RC_MAX_RANK];
  int o = 0;
  for (int d = 0; d < axis; d++) dims[o++] = x->dims[d];
  for (int d = 0; d < idx->rank; d++) dims[o++] = idx->dims[d];
  for (int d = axis + 1; d < x->rank; d++) dims[o++] = x->dims[d];
  set_shape(&out[0], x->dtype, r, dims);
  return rc__check_shape(n, &out[0], e);
}

static int gather_axis(const rc_kernel *k) {
  int axis;
  rc_err e;
  rc__axis(k->node, rc__attr_int(k->node, "axis", 0), k->in[0]->rank, &axis, &e);
  return axis;
}

rc_status rc__gather_forward(const rc_kernel *k, rc_err *e) {
  const rc_tensor *x = k->in[0], *idx = k->in[1];
  int axis = gather_axis(k);
  int64_t outer, inner, dim = x->dims[axis], ni = rc_tensor_numel(idx);
  outer_inner(x, axis, &outer, &inner);
  for (int64_t j = 0; j < ni; j++) {
    int64_t v = rc__int_at(idx, j);
    if (v < -dim || v >= dim)
      return RC_NODE_FAIL(e, k->node, RC_ERR_INVALID, "index %lld (entry %lld) is out of range for axis %d of size %lld",
                          (long long)v, (long long)j, axis, (long long)dim);
  }
  size_t esz = rc_dtype_size(x->dtype), row = (size_t)inner * esz;
  char *y = k->out[0]->data;
  const char *xs = x->data;
  for (int64_t o = 0; o < outer; o++)
    for (int64_t j = 0; j < ni; j++) {
      int64_t v = rc__int_at(idx, j);
      if (v < 0) v += dim;
      memcpy(y, xs + (size_t)(o * dim + v) * row, row);
      y += row;
    }
  return RC_OK;
}

/* Scatter-add in index order: repeated indices accumulate deterministically. */
void rc__gather_backward(const rc_kernel *k) {
  if (!k->din[0] || !k->dout[0]) return;
  const rc_tensor *x = k->in[0], *idx = k->in[1];
  int axis = gather_axis(k);
  int64_t outer, inner, dim = x->dims[axis], ni = rc_tensor_numel(idx);
  outer_inner(x, axis, &outer, &inner);
  float *gx = k->din[0]->data;
  const float *gy = k->dout[0]->data;
  for (int64_t o = 0; o < outer; o++)
    for (int64_t j = 0; j < ni; j++) {
      int64_t v = rc__int_at(idx, j);
      if (v < 0) v += dim;
      rc__add_into(gx + (o * dim + v) * inner, gy, inner);
      gy += inner;
    }
}

/* ---- Pad: modes constant, reflect, edge (and wrap from opset 19) ----
 * Pads come from the attribute before opset 11 and from input 1 after
 * (with the constant in input 2 and, from opset 18, axes in input 3).
 * Negative pads crop: the input is first cut, then padded, and reflect/edge/
 * wrap read from the cut region. */

enum { PAD_CONSTANT, PAD_REFLECT, PAD_EDGE, PAD_WRAP };

rc_status rc__pad_parse(rc_node *n, rc_arena *a, rc_err *e) {
  const char *m = rc__attr_string(n, "mode", "constant");
  int mode;
  if (!strcmp(m, "constant"))
    mode = PAD_CONSTANT;
  else if (!strcmp(m, "reflect"))
    mode = PAD_REFLECT;
  else if (!strcmp(m, "edge"))
    mode = PAD_EDGE;
  else if (!strcmp(m, "wrap") && n->opset >= 19)
    mode = PAD_WRAP;
  else
    return RC_NODE_FAIL(e, n, RC_ERR_UNSUPPORTED, "mode '%s' is not supported at opset %d", m, n->opset);
  int *p = rc__arena_alloc(a, sizeof *p);
  if (!p) return rc__fail(e, RC_ERR_NOMEM, "node '%s' (%s): out of memory", n->label, n->op_type);
  *p = mode;
  n->params = p;
  RC_TRY(rc__shape_moved_attr(n, "pads", 11, e));
  RC_TRY(rc__shape_moved_attr(n, "value", 11, e));
  if (n->opset < 11 && !rc__attr_find(n, "pads"))
    return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "attribute 'pads' is required%s", "");
  return RC_OK;
}

/* Begin and end pads per axis of x. */
static rc_status pad_amounts(const rc_node *n, const rc_tensor *const *in, int64_t *pb, int64_t *pe, rc_err *e) {
  int rank = in[0]->rank;
  int64_t pads[2 * RC_MAX_RANK], axes_v[RC_MAX_RANK];
  int cnt, naxes = rank, axes[RC_MAX_RANK];
  if (n->opset < 11) {
    const rc_attr *a = rc__attr_find(n, "pads");
    if (!a || a->type != RC_ATTR_INTS || a->n > 2 * RC_MAX_RANK)
      return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "attribute 'pads' must be ints%s", "");
    memcpy(pads, a->ints, sizeof(int64_t) * (size_t)a->n);
    cnt = a->n;
  } else {
    RC_TRY(rc__shape_read_ints(n, in, 1, pads, 2 * RC_MAX_RANK, &cnt, e));
  }
  if (n->opset >= 18 && n->n_in > 3 && in[3]) {
    RC_TRY(rc__shape_read_ints(n, in, 3, axes_v, RC_MAX_RANK, &naxes, e));
    RC_TRY(rc__shape_axes(n, axes_v, naxes, rank, axes, e));
  } else {
    for (int d = 0; d < rank; d++) axes[d] = d;
  }
  if (cnt != 2 * naxes)
    return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "pads has %d entries, expected %d", cnt, 2 * naxes);
  for (int d = 0; d < rank; d++) pb[d] = pe[d] = 0;
  for (int i = 0; i < naxes; i++) {
    pb[axes[i]] = pads[i];
    pe[axes[i]] = pads[naxes + i];
  }
  return RC_OK;
}

rc_status rc__pad_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__shape_need_numeric(n, in[0], 0, e));
  const rc_tensor *x = in[0];
  int64_t pb[RC_MAX_RANK], pe[RC_MAX_RANK], dims[RC_MAX_RANK];
  RC_TRY(pad_amounts(n, in, pb, pe, e));
  int mode = *(const int *)n->params;
  for (int d = 0; d < x->rank; d++) {
    int64_t lim = RC_MAX_ELEMENTS;
    if (pb[d] > lim || pe[d] > lim || pb[d] < -lim || pe[d] < -lim)
      return RC_NODE_FAIL(e, n, RC_ERR_LIMIT, "pads for axis %d are too large", d);
    int64_t kept = x->dims[d] - (pb[d] < 0 ? -pb[d] : 0) - (pe[d] < 0 ? -pe[d] : 0);
    dims[d] = x->dims[d] + pb[d] + pe[d];
    if (dims[d] < 0 || kept < 0)
      return RC_NODE_FAIL(e, n, RC_ERR_SHAPE, "pads %lld, %lld crop more than axis %d holds (%lld)",
                          (long long)pb[d], (long long)pe[d], d, (long long)x->dims[d]);
    if (mode != PAD_CONSTANT && kept == 0 && dims[d] > 0)
      return RC_NODE_FAIL(e, n, RC_ERR_SHAPE, "cannot pad an empty axis %d in mode '%s'", d,
                          rc__attr_string(n, "mode", "constant"));
  }
  if (n->opset >= 11 && n->n_in > 2 && in[2] && in[2]->dtype != x->dtype)
    return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "constant_value is %s, data is %s", rc_dtype_name(in[2]->dtype),
                        rc_dtype_name(x->dtype));
  set_shape(&out[0], x->dtype, x->rank, dims);
  return rc__check_shape(n, &out[0], e);
}

size_t rc__pad_workspace(const rc_kernel *k, int backward) {
  (void)backward;
  size_t s = 0;
  for (int d = 0; d < k->out[0]->rank; d++) s += (size_t)k->out[0]->dims[d];
  return s * sizeof(int64_t);
}

/* For every output position of every axis, the input index it reads, or -1
 * for the constant. maps[d] points into k->work. */
static void pad_maps(const rc_kernel *k, int64_t **maps) {
  const rc_tensor *x = k->in[0], *y = k->out[0];
  int64_t pb[RC_MAX_RANK], pe[RC_MAX_RANK];
  rc_err e;
  pad_amounts(k->node, (const rc_tensor *const *)k->in, pb, pe, &e);
  int mode = *(const int *)k->params;
  int64_t *w = k->work;
  for (int d = 0; d < x->rank; d++) {
    maps[d] = w;
    w += y->dims[d];
    int64_t lo = pb[d] < 0 ? -pb[d] : 0, keep = x->dims[d] - lo - (pe[d] < 0 ? -pe[d] : 0);
    int64_t before = pb[d] > 0 ? pb[d] : 0;
    for (int64_t o = 0; o < y->dims[d]; o++) {
      int64_t i = o - before, m;
      if (i >= 0 && i < keep)
        m = i;
      else if (mode == PAD_CONSTANT)
        m = -1 - lo;
      else if (mode == PAD_EDGE)
        m = i < 0 ? 0 : keep - 1;
      else if (mode == PAD_WRAP)
        m = ((i % keep) + keep) % keep;
      else if (keep == 1)
        m = 0;
      else { /* reflect without repeating the edge: period 2*(keep-1) */
        int64_t p = 2 * (keep - 1);
        m = ((i % p) + p) % p;
        if (m >= keep) m = p - m;
      }
      maps[d][o] = m + lo;
    }
  }
}

#define PAD_ROWS(T)                                                              \
  do {                                                                           \
    T *yy = (T *)y->data;                                                        \
    const T *xx = (const T *)x->data;                                            \
    T cv;                                                                        \
    memcpy(&cv, cbytes, sizeof cv);                                              \
    for (int64_t row = 0; row < rows; row++, yy += width) {                      \
      int64_t src = 0;                                                           \
      int is_const = 0;                                                          \
      for (int d = 0; d < r - 1; d++) {                                          \
        int64_t m = maps[d][idx[d]];                                             \
        if (m < 0) is_const = 1;                                                 \
        src += m * xs[d];                                                        \
      }                                                                          \
      for (int64_t j = 0; j < width; j++) {                                      \
        int64_t m = maps[r - 1][j];                                              \
        yy[j] = (is_const || m < 0) ? cv : xx[src + m];                          \
      }                                                                          \
      for (int d = r - 2; d >= 0; d--) {                                         \
        if (++idx[d] < y->dims[d]) break;                                        \
        idx[d] = 0;                                                              \
      }                                                                          \
    }                                                                            \
  } while (0)

rc_status rc__pad_forward(const rc_kernel *k, rc_err *e) {
  (void)e;
  const rc_tensor *x = k->in[0];
  rc_tensor *y = k->out[0];
  int r = x->rank;
  size_t esz = rc_dtype_size(x->dtype);
  if (r == 0 || rc_tensor_numel(y) == 0) {
    if (r == 0) memcpy(y->data, x->data, esz);
    return RC_OK;
  }
  unsigned char cbytes[8] = {0};
  const rc_node *n = k->node;
  if (n->opset < 11)
    rc__store_f64(cbytes, x->dtype, 0, rc__attr_float(n, "value", 0.0f));
  else if (k->n_in > 2 && k->in[2] && rc_tensor_numel(k->in[2]) > 0)
    memcpy(cbytes, k->in[2]->data, esz);
  int64_t *maps[RC_MAX_RANK], xs[RC_MAX_RANK], idx[RC_MAX_RANK] = {0};
  pad_maps(k, maps);
  rc__contig_strides(xs, r, x->dims);
  int64_t width = y->dims[r - 1], rows = rc_tensor_numel(y) / width;
  switch (esz) {
    case 1: PAD_ROWS(uint8_t); break;
    case 2: PAD_ROWS(uint16_t); break;
    case 4: PAD_ROWS(uint32_t); break;
    default: PAD_ROWS(uint64_t); break;
  }
  return RC_OK;
}

/* Each output element adds its gradient to the input element it read. */
void rc__pad_backward(const rc_kernel *k) {
  if (!k->din[0] || !k->dout[0]) return;
  const rc_tensor *y = k->out[0];
  int r = y->rank;
  if (r == 0) {
    rc__add_into(k->din[0]->data, k->dout[0]->data, 1);
    return;
  }
  if (rc_tensor_numel(y) == 0) return;
  int64_t *maps[RC_MAX_RANK], xs[RC_MAX_RANK], idx[RC_MAX_RANK] = {0};
  pad_maps(k, maps);
  rc__contig_strides(xs, r, k->in[0]->dims);
  float *gx = k->din[0]->data;
  const float *gy = k->dout[0]->data;
  int64_t width = y->dims[r - 1], rows = rc_tensor_numel(y) / width;
  for (int64_t row = 0; row < rows; row++, gy += width) {
    int64_t src = 0;
    int is_const = 0;
    for (int d = 0; d < r - 1; d++) {
      int64_t m = maps[d][idx[d]];
      if (m < 0) is_const = 1;
      src += m * xs[d];
    }
    if (!is_const)
      for (int64_t j = 0; j < width; j++) {
        int64_t m = maps[r - 1][j];
        if (m >= 0) gx[src + m] += gy[j];
      }
    for (int d = r - 2; d >= 0; d--) {
      if (++idx[d] < y->dims[d]) break;
      idx[d] = 0;
    }
  }
}
