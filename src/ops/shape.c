/* Op family: shape. Ops that move or relabel data without arithmetic, plus
 * the small integer ops of run-time shape computations (Shape, Size, Cast,
 * ConstantOfShape). Forward and backward side by side; Concat, Split, Slice,
 * Gather and Pad live in shape_index.c.
 *
 * Every op here works on any numeric dtype (float32 and the int64/int32/bool
 * tensors of exported shape subgraphs, which the planner evaluates once by
 * calling forward on constant inputs); gradients are float32. */
#include <math.h>
#include <string.h>

#include "ops/layout.h"
#include "ops/shape_ops.h"

/* ---- helpers shared by this family ---- */

rc_status rc__shape_copy_forward(const rc_kernel *k, rc_err *e) {
  (void)e;
  memcpy(k->out[0]->data, k->in[0]->data, rc_tensor_nbytes(k->in[0]));
  return RC_OK;
}

void rc__shape_copy_backward(const rc_kernel *k) {
  if (k->din[0] && k->dout[0])
    rc__add_into(k->din[0]->data, k->dout[0]->data, rc_tensor_numel(k->din[0]));
}

/* Dtypes these ops move: every numeric type except the 16-bit floats, whose
 * gradients (float32 buffers) and consumers recoup does not have. */
static int movable(rc_dtype dt) {
  return rc_dtype_size(dt) != 0 && dt != RC_DTYPE_FLOAT16 && dt != RC_DTYPE_BFLOAT16;
}

rc_status rc__shape_need_numeric(const rc_node *n, const rc_tensor *t, int idx, rc_err *e) {
  if (!t) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "input %d is required", idx);
  if (!movable(t->dtype))
    return RC_NODE_FAIL(e, n, RC_ERR_UNSUPPORTED, "input %d has dtype %s, which recoup does not compute with",
                        idx, rc_dtype_name(t->dtype));
  return RC_OK;
}

/* A 1-D integer tensor known at plan time: its values into v (at most max). */
rc_status rc__shape_read_ints(const rc_node *n, const rc_tensor *const *in, int idx, int64_t *v, int max,
                              int *count, rc_err *e) {
  RC_TRY(rc__need_const(n, in, idx, e));
  const rc_tensor *t = in[idx];
  if (!rc_dtype_is_integer(t->dtype) || t->rank > 1)
    return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "input %d must be a 1-D integer tensor, got %s of rank %d",
                        idx, rc_dtype_name(t->dtype), t->rank);
  int64_t cnt = rc_tensor_numel(t);
  if (cnt > max)
    return RC_NODE_FAIL(e, n, RC_ERR_LIMIT, "input %d has %lld entries, more than %d", idx, (long long)cnt,
                        max);
  for (int64_t i = 0; i < cnt; i++) v[i] = rc__int_at(t, i);
  *count = (int)cnt;
  return RC_OK;
}

rc_status rc__shape_moved_attr(const rc_node *n, const char *name, int since, rc_err *e) {
  if (n->opset >= since && rc__attr_find(n, name))
    return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "attribute '%s' is not allowed at opset %d (an input since opset %d)",
                        name, n->opset, since);
  return RC_OK;
}

/* Normalises a list of axes against rank, refusing duplicates. */
rc_status rc__shape_axes(const rc_node *n, const int64_t *axes, int count, int rank, int *out, rc_err *e) {
  for (int i = 0; i < count; i++) {
    RC_TRY(rc__axis(n, axes[i], rank, &out[i], e));
    for (int j = 0; j < i; j++)
      if (out[j] == out[i])
        return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "axis %lld appears twice", (long long)axes[i]);
  }
  return RC_OK;
}

static void set_shape(rc_tensor *t, rc_dtype dt, int rank, const int64_t *dims) {
  t->dtype = dt;
  t->rank = rank;
  for (int i = 0; i < rank; i++) t->dims[i] = dims[i];
  t->data = NULL;
}

/* ---- Identity ---- */

static rc_status identity_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__shape_need_numeric(n, in[0], 0, e));
  set_shape(&out[0], in[0]->dtype, in[0]->rank, in[0]->dims);
  return RC_OK;
}

/* ---- Flatten: x (d0..dn) -> (d0*..*d{axis-1}, d{axis}*..*dn) ---- */

static rc_status flatten_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__shape_need_numeric(n, in[0], 0, e));
  int r = in[0]->rank;
  int64_t axis = rc__attr_int(n, "axis", 1);
  if (axis < 0) axis += r;
  if (axis < 0 || axis > r)
    return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "axis %lld out of range for rank %d",
                        (long long)rc__attr_int(n, "axis", 1), r);
  int64_t dims[2] = {1, 1};
  for (int d = 0; d < r; d++) dims[d < axis ? 0 : 1] *= in[0]->dims[d];
  set_shape(&out[0], in[0]->dtype, 2, dims);
  return rc__check_shape(n, &out[0], e);
}

/* ---- Reshape: shape from a plan-time input; 0 copies, -1 infers ---- */

static rc_status reshape_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__shape_need_numeric(n, in[0], 0, e));
  int64_t shape[RC_MAX_RANK];
  int cnt;
  RC_TRY(rc__shape_read_ints(n, in, 1, shape, RC_MAX_RANK, &cnt, e));
  int allowzero = n->opset >= 14 && rc__attr_int(n, "allowzero", 0) != 0;
  const rc_tensor *x = in[0];
  int infer_at = -1, has_zero = 0;
  int64_t known = 1, dims[RC_MAX_RANK];
  for (int i = 0; i < cnt; i++) {
    int64_t v = shape[i];
    if (v == -1) {
      if (infer_at >= 0) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "shape has more than one -1%s", "");
      infer_at = i;
      continue;
    }
    if (v < -1) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "shape entry %d is %lld", i, (long long)v);
    if (v == 0) {
      has_zero = 1;
      if (!allowzero) {
        if (i >= x->rank)
          return RC_NODE_FAIL(e, n, RC_ERR_SHAPE, "shape entry %d is 0 (copy) but the input has rank %d", i,
                              x->rank);
        v = x->dims[i];
      }
    }
    dims[i] = v;
    if (v > 0 && known > RC_MAX_ELEMENTS / v)
      return RC_NODE_FAIL(e, n, RC_ERR_LIMIT, "shape has more than %lld elements", (long long)RC_MAX_ELEMENTS);
    known *= v;
  }
  if (allowzero && has_zero && infer_at >= 0)
    return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "allowzero=1 with both 0 and -1 in the shape%s", "");
  int64_t total = rc_tensor_numel(x);
  if (infer_at >= 0) {
    if (known == 0 || total % known)
      return RC_NODE_FAIL(e, n, RC_ERR_SHAPE, "cannot infer the -1 entry: %lld elements into blocks of %lld",
                          (long long)total, (long long)known);
    dims[infer_at] = total / known;
  } else if (known != total) {
    char sb[96];
    return RC_NODE_FAIL(e, n, RC_ERR_SHAPE, "input %s has %lld elements, the shape asks for %lld",
                        rc_shape_str(x, sb, sizeof sb), (long long)total, (long long)known);
  }
  set_shape(&out[0], x->dtype, cnt, dims);
  return rc__check_shape(n, &out[0], e);
}

/* ---- Squeeze / Unsqueeze: axes attribute before opset 13, input after ---- */

static rc_status axes_of(const rc_node *n, const rc_tensor *const *in, int64_t *axes, int *cnt, int *given,
                         rc_err *e) {
  *cnt = 0;
  *given = 0;
  RC_TRY(rc__shape_moved_attr(n, "axes", 13, e));
  if (n->opset < 13) {
    const rc_attr *a = rc__attr_find(n, "axes");
    if (!a) return RC_OK;
    if (a->type != RC_ATTR_INTS || a->n > RC_MAX_RANK)
      return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "attribute 'axes' must be at most %d ints", RC_MAX_RANK);
    for (int i = 0; i < a->n; i++) axes[i] = a->ints[i];
    *cnt = a->n;
    *given = 1;
    return RC_OK;
  }
  if (n->n_in < 2 || !in[1]) return RC_OK;
  RC_TRY(rc__shape_read_ints(n, in, 1, axes, RC_MAX_RANK, cnt, e));
  *given = 1;
  return RC_OK;
}

static rc_status squeeze_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__shape_need_numeric(n, in[0], 0, e));
  const rc_tensor *x = in[0];
  int64_t axes[RC_MAX_RANK];
  int cnt, given, norm[RC_MAX_RANK], drop[RC_MAX_RANK] = {0};
  RC_TRY(axes_of(n, in, axes, &cnt, &given, e));
  RC_TRY(rc__shape_axes(n, axes, cnt, x->rank, norm, e));
  for (int i = 0; i < cnt; i++) {
    if (x->dims[norm[i]] != 1)
      return RC_NODE_FAIL(e, n, RC_ERR_SHAPE, "cannot squeeze axis %d of size %lld", norm[i],
                          (long long)x->dims[norm[i]]);
    drop[norm[i]] = 1;
  }
  if (!cnt)
    for (int d = 0; d < x->rank; d++) drop[d] = x->dims[d] == 1;
  int64_t dims[RC_MAX_RANK];
  int r = 0;
  for (int d = 0; d < x->rank; d++)
    if (!drop[d]) dims[r++] = x->dims[d];
  set_shape(&out[0], x->dtype, r, dims);
  return RC_OK;
}

static rc_status unsqueeze_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__shape_need_numeric(n, in[0], 0, e));
  const rc_tensor *x = in[0];
  int64_t axes[RC_MAX_RANK];
  int cnt, given, norm[RC_MAX_RANK], ins[RC_MAX_RANK] = {0};
  RC_TRY(axes_of(n, in, axes, &cnt, &given, e));
  if (!given) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "axes are required%s", "");
  int r = x->rank + cnt;
  if (r > RC_MAX_RANK) return RC_NODE_FAIL(e, n, RC_ERR_LIMIT, "output rank %d exceeds %d", r, RC_MAX_RANK);
  RC_TRY(rc__shape_axes(n, axes, cnt, r, norm, e));
  for (int i = 0; i < cnt; i++) ins[norm[i]] = 1;
  int64_t dims[RC_MAX_RANK];
  for (int d = 0, s = 0; d < r; d++) dims[d] = ins[d] ? 1 : x->dims[s++];
  set_shape(&out[0], x->dtype, r, dims);
  return RC_OK;
}

/* ---- Dropout: always the inference form (identity) ----
 * recoup runs Dropout as identity: distillation compares deterministic
 * outputs, and a file that asks for training-mode dropout (a constant true
 * training_mode) would give a different answer, so it is refused. */

static rc_status dropout_check_mode(const rc_node *n, const rc_tensor *const *in, rc_err *e) {
  /* A mode that varies per batch cannot be honoured by an identity: refuse
   * it when planning rather than on the first batch. */
  if (n->opset >= 12 && n->n_in >= 3 && in[2]) RC_TRY(rc__need_const(n, in, 2, e));
  if (n->opset >= 12 && n->n_in >= 3 && in[2] && in[2]->data && rc_tensor_numel(in[2]) > 0 &&
      rc__load_f64(in[2]->data, in[2]->dtype, 0) != 0)
    return RC_NODE_FAIL(e, n, RC_ERR_UNSUPPORTED,
                        "training_mode is true; recoup runs Dropout only as identity (inference form)%s", "");
  return RC_OK;
}

static rc_status dropout_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(identity_infer(n, in, out, e));
  RC_TRY(dropout_check_mode(n, in, e));
  if (n->n_out > 1) /* mask: input dtype before opset 10, bool after */
    set_shape(&out[1], n->opset < 10 ? in[0]->dtype : RC_DTYPE_BOOL, in[0]->rank, in[0]->dims);
  return RC_OK;
}

static rc_status dropout_forward(const rc_kernel *k, rc_err *e) {
  RC_TRY(dropout_check_mode(k->node, (const rc_tensor *const *)k->in, e));
  RC_TRY(rc__shape_copy_forward(k, e));
  if (k->n_out > 1 && k->out[1]) {
    rc_tensor *m = k->out[1];
    int64_t cnt = rc_tensor_numel(m);
    for (int64_t i = 0; i < cnt; i++) rc__store_f64(m->data, m->dtype, i, 1.0);
  }
  return RC_OK;
}

/* ---- Transpose: y = x permuted by perm (default: reversed axes) ---- */

static rc_status transpose_perm(const rc_node *n, int rank, int *perm, rc_err *e) {
  const rc_attr *a = rc__attr_find(n, "perm");
  if (!a) {
    for (int d = 0; d < rank; d++) perm[d] = rank - 1 - d;
    return RC_OK;
  }
  if (a->type != RC_ATTR_INTS || a->n != rank)
    return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "perm has %d entries for an input of rank %d", a->n, rank);
  int seen[RC_MAX_RANK] = {0};
  for (int d = 0; d < rank; d++) {
    int64_t p = a->ints[d];
    if (p < 0) p += rank; /* negative entries are accepted by runtimes; harmless */
    if (p < 0 || p >= rank || seen[p])
      return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "perm is not a permutation of 0..%d", rank - 1);
    seen[p] = 1;
    perm[d] = (int)p;
  }
  return RC_OK;
}

static rc_status transpose_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__shape_need_numeric(n, in[0], 0, e));
  int perm[RC_MAX_RANK];
  RC_TRY(transpose_perm(n, in[0]->rank, perm, e));
  int64_t dims[RC_MAX_RANK];
  for (int d = 0; d < in[0]->rank; d++) dims[d] = in[0]->dims[perm[d]];
  set_shape(&out[0], in[0]->dtype, in[0]->rank, dims);
  return RC_OK;
}

/* y (dims permuted) as a view of x: y[i] = x[sum i_d * xstride[perm[d]]]. */
static void transpose_view(const rc_kernel *k, int64_t *stride) {
  const rc_tensor *x = k->in[0];
  int perm[RC_MAX_RANK];
  rc_err e;
  transpose_perm(k->node, x->rank, perm, &e); /* validated by infer */
  int64_t xs[RC_MAX_RANK];
  rc__contig_strides(xs, x->rank, x->dims);
  for (int d = 0; d < x->rank; d++) stride[d] = xs[perm[d]];
}

static rc_status transpose_forward(const rc_kernel *k, rc_err *e) {
  (void)e;
  int64_t stride[RC_MAX_RANK];
  transpose_view(k, stride);
  rc__view_copy(k->out[0]->data, k->in[0]->data, 0, k->out[0]->rank, k->out[0]->dims, stride,
                rc_dtype_size(k->in[0]->dtype));
  return RC_OK;
}

static void transpose_backward(const rc_kernel *k) {
  if (!k->din[0] || !k->dout[0]) return;
  int64_t stride[RC_MAX_RANK];
  transpose_view(k, stride);
  rc__view_scatter_add(k->din[0]->data, 0, k->dout[0]->data, k->out[0]->rank, k->out[0]->dims, stride);
}

/* ---- Expand: x broadcast (both ways) against a plan-time shape ---- */

static rc_status expand_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__shape_need_numeric(n, in[0], 0, e));
  rc_tensor want = {0};
  int cnt;
  RC_TRY(rc__shape_read_ints(n, in, 1, want.dims, RC_MAX_RANK, &cnt, e));
  want.rank = cnt;
  for (int i = 0; i < cnt; i++)
    if (want.dims[i] < 0)
      return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "shape entry %d is %lld", i, (long long)want.dims[i]);
  out[0].dtype = in[0]->dtype;
  out[0].data = NULL;
  RC_TRY(rc__broadcast_shape(n, in[0], &want, &out[0], e));
  return rc__check_shape(n, &out[0], e);
}

/* The output as a view of x: stride 0 where x is broadcast. */
static void broadcast_view(const rc_tensor *x, const rc_tensor *y, int64_t *stride) {
  int64_t xs[RC_MAX_RANK];
  rc__contig_strides(xs, x->rank, x->dims);
  int lead = y->rank - x->rank;
  for (int d = 0; d < y->rank; d++) {
    int xd = d - lead;
    stride[d] = (xd < 0 || x->dims[xd] == 1) ? 0 : xs[xd];
  }
}

static rc_status expand_forward(const rc_kernel *k, rc_err *e) {
  (void)e;
  int64_t stride[RC_MAX_RANK];
  broadcast_view(k->in[0], k->out[0], stride);
  rc__view_copy(k->out[0]->data, k->in[0]->data, 0, k->out[0]->rank, k->out[0]->dims, stride,
                rc_dtype_size(k->in[0]->dtype));
  return RC_OK;
}

static void expand_backward(const rc_kernel *k) {
  if (!k->din[0] || !k->dout[0]) return;
  int64_t stride[RC_MAX_RANK];
  broadcast_view(k->in[0], k->out[0], stride);
  rc__view_scatter_add(k->din[0]->data, 0, k->dout[0]->data, k->out[0]->rank, k->out[0]->dims, stride);
}

/* ---- Tile: y (d_i * repeats_i) ---- */

static rc_status tile_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__shape_need_numeric(n, in[0], 0, e));
  int64_t rep[RC_MAX_RANK], dims[RC_MAX_RANK];
  int cnt;
  RC_TRY(rc__shape_read_ints(n, in, 1, rep, RC_MAX_RANK, &cnt, e));
  if (cnt != in[0]->rank)
    return RC_NODE_FAIL(e, n, RC_ERR_SHAPE, "repeats has %d entries for an input of rank %d", cnt,
                        in[0]->rank);
  for (int d = 0; d < cnt; d++) {
    if (rep[d] < 0) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "repeats[%d] is %lld", d, (long long)rep[d]);
    if (in[0]->dims[d] && rep[d] > RC_MAX_ELEMENTS / in[0]->dims[d])
      return RC_NODE_FAIL(e, n, RC_ERR_LIMIT, "repeats[%d] is too large", d);
    dims[d] = in[0]->dims[d] * rep[d];
  }
  set_shape(&out[0], in[0]->dtype, cnt, dims);
  return rc__check_shape(n, &out[0], e);
}

/* The output seen as (r0, d0, r1, d1, ...) over x with stride 0 on r_i. */
static int tile_view(const rc_tensor *x, const rc_tensor *y, int64_t *dims, int64_t *stride) {
  int64_t xs[RC_MAX_RANK];
  rc__contig_strides(xs, x->rank, x->dims);
  for (int d = 0; d < x->rank; d++) {
    dims[2 * d] = x->dims[d] ? y->dims[d] / x->dims[d] : 0;
    stride[2 * d] = 0;
    dims[2 * d + 1] = x->dims[d];
    stride[2 * d + 1] = xs[d];
  }
  return 2 * x->rank;
}

static rc_status tile_forward(const rc_kernel *k, rc_err *e) {
  (void)e;
  int64_t dims[RC_VIEW_MAX_RANK], stride[RC_VIEW_MAX_RANK];
  if (rc_tensor_numel(k->out[0]) == 0) return RC_OK;
  int r = tile_view(k->in[0], k->out[0], dims, stride);
  rc__view_copy(k->out[0]->data, k->in[0]->data, 0, r, dims, stride, rc_dtype_size(k->in[0]->dtype));
  return RC_OK;
}

static void tile_backward(const rc_kernel *k) {
  if (!k->din[0] || !k->dout[0] || rc_tensor_numel(k->out[0]) == 0) return;
  int64_t dims[RC_VIEW_MAX_RANK], stride[RC_VIEW_MAX_RANK];
  int r = tile_view(k->in[0], k->out[0], dims, stride);
  rc__view_scatter_add(k->din[0]->data, 0, k->dout[0]->data, r, dims, stride);
}

/* ---- Shape (start/end from opset 15) and Size: from input shapes only ---- */

static void shape_range(const rc_node *n, int rank, int *start, int *end) {
  int64_t s = n->opset >= 15 ? rc__attr_int(n, "start", 0) : 0;
  int64_t t = n->opset >= 15 ? rc__attr_int(n, "end", rank) : rank;
  if (s < 0) s += rank;
  if (t < 0) t += rank;
  s = s < 0 ? 0 : s > rank ? rank : s;
  t = t < 0 ? 0 : t > rank ? rank : t;
  *start = (int)s;
  *end = (int)(t > s ? t : s);
}

static rc_status shape_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  if (!in[0]) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "input %d is required", 0);
  int s, t;
  shape_range(n, in[0]->rank, &s, &t);
  int64_t len = t - s;
  set_shape(&out[0], RC_DTYPE_INT64, 1, &len);
  return RC_OK;
}

static rc_status shape_forward(const rc_kernel *k, rc_err *e) {
  (void)e;
  int s, t;
  shape_range(k->node, k->in[0]->rank, &s, &t);
  int64_t *y = k->out[0]->data;
  for (int d = s; d < t; d++) y[d - s] = k->in[0]->dims[d];
  return RC_OK;
}

static rc_status size_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  if (!in[0]) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "input %d is required", 0);
  set_shape(&out[0], RC_DTYPE_INT64, 0, NULL);
  return RC_OK;
}

static rc_status size_forward(const rc_kernel *k, rc_err *e) {
  (void)e;
  *(int64_t *)k->out[0]->data = rc_tensor_numel(k->in[0]);
  return RC_OK;
}

/* ---- Cast ----
 * float -> integer truncates toward zero (the spec's rule); values outside
 * the target range are left undefined by the spec, we saturate them and map
 * NaN to 0 so results stay deterministic. integer -> narrower integer wraps
 * (two's complement, as NumPy's astype). Anything -> bool is x != 0. */

static int cast_dtype_ok(int64_t dt) {
  switch (dt) {
    case RC_DTYPE_FLOAT: case RC_DTYPE_DOUBLE: case RC_DTYPE_INT8: case RC_DTYPE_UINT8:
    case RC_DTYPE_INT16: case RC_DTYPE_INT32: case RC_DTYPE_INT64: case RC_DTYPE_BOOL: return 1;
    default: return 0;
  }
}

static rc_status cast_parse(rc_node *n, rc_arena *a, rc_err *e) {
  (void)a;
  const rc_attr *to = rc__attr_find(n, "to");
  if (!to || to->type != RC_ATTR_INT)
    return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "attribute 'to' is required%s", "");
  if (!cast_dtype_ok(to->i))
    return RC_NODE_FAIL(e, n, RC_ERR_UNSUPPORTED,
                        "cast to %s (%lld) is not supported (float32/64, int8/16/32/64, uint8, bool)",
                        rc_dtype_name((rc_dtype)to->i), (long long)to->i);
  return RC_OK;
}

static rc_status cast_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__shape_need_numeric(n, in[0], 0, e));
  if (!cast_dtype_ok(in[0]->dtype))
    return RC_NODE_FAIL(e, n, RC_ERR_UNSUPPORTED, "cast from %s is not supported", rc_dtype_name(in[0]->dtype));
  set_shape(&out[0], (rc_dtype)rc__attr_int(n, "to", RC_DTYPE_FLOAT), in[0]->rank, in[0]->dims);
  return RC_OK;
}

static int64_t saturate_int(double v, rc_dtype to) {
  double lo, hi;
  switch (to) {
    case RC_DTYPE_INT8: lo = -128; hi = 127; break;
    case RC_DTYPE_UINT8: lo = 0; hi = 255; break;
    case RC_DTYPE_INT16: lo = -32768; hi = 32767; break;
    case RC_DTYPE_INT32: lo = -2147483648.0; hi = 2147483647.0; break;
    default: lo = -9223372036854775808.0; hi = 9223372036854774784.0; break; /* largest double < 2^63 */
  }
  if (v != v) return 0;
  v = trunc(v);
  return (int64_t)(v < lo ? lo : v > hi ? hi : v);
}

static void store_int(void *y, rc_dtype to, int64_t i, int64_t q) {
  switch (to) {
    case RC_DTYPE_INT8: ((int8_t *)y)[i] = (int8_t)(uint8_t)q; break;
    case RC_DTYPE_UINT8: ((uint8_t *)y)[i] = (uint8_t)q; break;
    case RC_DTYPE_INT16: ((int16_t *)y)[i] = (int16_t)(uint16_t)q; break;
    case RC_DTYPE_INT32: ((int32_t *)y)[i] = (int32_t)(uint32_t)q; break;
    case RC_DTYPE_INT64: ((int64_t *)y)[i] = q; break;
    default: break;
  }
}

static rc_status cast_forward(const rc_kernel *k, rc_err *e) {
  (void)e;
  const rc_tensor *x = k->in[0];
  rc_tensor *y = k->out[0];
  rc_dtype from = x->dtype, to = y->dtype;
  int64_t cnt = rc_tensor_numel(x);
  if (from == to) {
    memcpy(y->data, x->data, rc_tensor_nbytes(x));
    return RC_OK;
  }
  if (from == RC_DTYPE_FLOAT && to == RC_DTYPE_INT64) { /* the common shape-subgraph case */
    const float *xs = x->data;
    int64_t *ys = y->data;
    for (int64_t i = 0; i < cnt; i++) ys[i] = saturate_int(xs[i], to);
    return RC_OK;
  }
  int from_float = rc_dtype_is_float(from);
  for (int64_t i = 0; i < cnt; i++) {
    if (to == RC_DTYPE_FLOAT || to == RC_DTYPE_DOUBLE || to == RC_DTYPE_BOOL) {
      double v = from == RC_DTYPE_INT64 ? (double)((const int64_t *)x->data)[i] : rc__load_f64(x->data, from, i);
      if (to == RC_DTYPE_BOOL)
        ((uint8_t *)y->data)[i] = v != 0 || v != v; /* NaN is true, as in NumPy */
      else
        rc__store_f64(y->data, to, i, v);
    } else if (from_float) {
      store_int(y->data, to, i, saturate_int(rc__load_f64(x->data, from, i), to));
    } else {
      store_int(y->data, to, i, rc__int_at(x, i));
    }
  }
  return RC_OK;
}

/* Gradient passes through float -> float casts only (identity). */
static void cast_backward(const rc_kernel *k) {
  const rc_tensor *gi = k->din[0], *go = k->dout[0];
  if (!gi || !go || !rc_dtype_is_float(gi->dtype) || !rc_dtype_is_float(go->dtype)) return;
  int64_t cnt = rc_tensor_numel(gi);
  for (int64_t i = 0; i < cnt; i++)
    rc__store_f64(gi->data, gi->dtype, i,
                  rc__load_f64(gi->data, gi->dtype, i) + rc__load_f64(go->data, go->dtype, i));
}

/* ---- Constant: every attribute form; the tensor is built at load time ---- */

static rc_status constant_parse(rc_node *n, rc_arena *a, rc_err *e) {
  static const char *refused[] = {"sparse_value", "value_string", "value_strings"};
  for (int i = 0; i < 3; i++)
    if (rc__attr_find(n, refused[i]))
      return RC_NODE_FAIL(e, n, RC_ERR_UNSUPPORTED, "attribute '%s' is not supported", refused[i]);
  rc_tensor *t = rc__arena_zalloc(a, sizeof *t);
  if (!t) return rc__fail(e, RC_ERR_NOMEM, "node '%s' (%s): out of memory", n->label, n->op_type);
  int forms = 0;
  for (int i = 0; i < n->n_attrs; i++) {
    const rc_attr *at = &n->attrs[i];
    const char *nm = at->name;
    if (!strcmp(nm, "value") && at->type == RC_ATTR_TENSOR) {
      *t = at->t;
      if (!movable(t->dtype))
        return RC_NODE_FAIL(e, n, RC_ERR_UNSUPPORTED, "value has dtype %s", rc_dtype_name(t->dtype));
      if (!t->data && rc_tensor_numel(t) > 0)
        return RC_NODE_FAIL(e, n, RC_ERR_FORMAT, "value holds no data%s", "");
    } else if (!strcmp(nm, "value_float") && at->type == RC_ATTR_FLOAT) {
      t->dtype = RC_DTYPE_FLOAT;
      t->rank = 0;
      t->data = rc__arena_memdup(a, &at->f, sizeof(float));
    } else if (!strcmp(nm, "value_int") && at->type == RC_ATTR_INT) {
      t->dtype = RC_DTYPE_INT64;
      t->rank = 0;
      t->data = rc__arena_memdup(a, &at->i, sizeof(int64_t));
    } else if (!strcmp(nm, "value_floats") && at->type == RC_ATTR_FLOATS) {
      t->dtype = RC_DTYPE_FLOAT;
      t->rank = 1;
      t->dims[0] = at->n;
      t->data = rc__arena_memdup(a, at->floats, sizeof(float) * (size_t)(at->n ? at->n : 1));
    } else if (!strcmp(nm, "value_ints") && at->type == RC_ATTR_INTS) {
      t->dtype = RC_DTYPE_INT64;
      t->rank = 1;
      t->dims[0] = at->n;
      t->data = rc__arena_memdup(a, at->ints, sizeof(int64_t) * (size_t)(at->n ? at->n : 1));
    } else {
      continue;
    }
    if (!t->data && rc_tensor_numel(t) > 0)
      return rc__fail(e, RC_ERR_NOMEM, "node '%s' (%s): out of memory", n->label, n->op_type);
    forms++;
  }
  if (forms != 1)
    return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "needs exactly one value attribute, found %d", forms);
  n->params = t;
  return RC_OK;
}

static rc_status constant_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  (void)in;
  const rc_tensor *t = n->params;
  set_shape(&out[0], t->dtype, t->rank, t->dims);
  return rc__check_shape(n, &out[0], e);
}

static rc_status constant_forward(const rc_kernel *k, rc_err *e) {
  (void)e;
  const rc_tensor *t = k->params;
  size_t nb = rc_tensor_nbytes(t);
  if (nb) memcpy(k->out[0]->data, t->data, nb);
  return RC_OK;
}

/* ---- ConstantOfShape: y (shape) filled with value (default float 0) ---- */

static rc_status cos_parse(rc_node *n, rc_arena *a, rc_err *e) {
  (void)a;
  const rc_attr *v = rc__attr_find(n, "value");
  if (!v) return RC_OK;
  if (v->type != RC_ATTR_TENSOR || rc_tensor_numel(&v->t) != 1 || !v->t.data)
    return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "value must be a one-element tensor%s", "");
  if (!movable(v->t.dtype))
    return RC_NODE_FAIL(e, n, RC_ERR_UNSUPPORTED, "value has dtype %s", rc_dtype_name(v->t.dtype));
  n->params = (void *)&v->t;
  return RC_OK;
}

static rc_status cos_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  int64_t dims[RC_MAX_RANK];
  int cnt;
  RC_TRY(rc__shape_read_ints(n, in, 0, dims, RC_MAX_RANK, &cnt, e));
  const rc_tensor *v = n->params;
  set_shape(&out[0], v ? v->dtype : RC_DTYPE_FLOAT, cnt, dims);
  return rc__check_shape(n, &out[0], e);
}

static rc_status cos_forward(const rc_kernel *k, rc_err *e) {
  (void)e;
  const rc_tensor *v = k->params;
  rc_tensor *y = k->out[0];
  int64_t cnt = rc_tensor_numel(y);
  if (!v) {
    memset(y->data, 0, rc_tensor_nbytes(y));
    return RC_OK;
  }
  size_t esz = rc_dtype_size(y->dtype);
  for (int64_t i = 0; i < cnt; i++) memcpy((char *)y->data + (size_t)i * esz, v->data, esz);
  return RC_OK;
}

/* ---- the family table ---- */

#define COPY_OP(name, infer) \
  {name, "", 9, 21, 0, NULL, infer, NULL, NULL, rc__shape_copy_forward, rc__shape_copy_backward}

const rc_op_def rc__ops_shape[] = {
    COPY_OP("Identity", identity_infer),
    COPY_OP("Flatten", flatten_infer),
    COPY_OP("Reshape", reshape_infer),
    COPY_OP("Squeeze", squeeze_infer),
    COPY_OP("Unsqueeze", unsqueeze_infer),
    {"Dropout", "", 9, 21, 0, NULL, dropout_infer, NULL, NULL, dropout_forward, rc__shape_copy_backward},
    {"Transpose", "", 9, 21, 0, NULL, transpose_infer, NULL, NULL, transpose_forward, transpose_backward},
    {"Expand", "", 9, 21, 0, NULL, expand_infer, NULL, NULL, expand_forward, expand_backward},
    {"Tile", "", 9, 21, 0, NULL, tile_infer, NULL, NULL, tile_forward, tile_backward},
    {"Shape", "", 9, 21, RC_OP_SHAPE_ONLY | RC_OP_NO_GRAD, NULL, shape_infer, NULL, NULL, shape_forward, NULL},
    {"Size", "", 9, 21, RC_OP_SHAPE_ONLY | RC_OP_NO_GRAD, NULL, size_infer, NULL, NULL, size_forward, NULL},
    {"Cast", "", 9, 21, 0, cast_parse, cast_infer, NULL, NULL, cast_forward, cast_backward},
    {"Constant", "", 9, 21, RC_OP_NO_GRAD, constant_parse, constant_infer, NULL, NULL, constant_forward, NULL},
    {"ConstantOfShape", "", 9, 21, RC_OP_NO_GRAD, cos_parse, cos_infer, NULL, NULL, cos_forward, NULL},
    {"Concat", "", 9, 21, 0, NULL, rc__concat_infer, NULL, NULL, rc__concat_forward, rc__concat_backward},
    {"Split", "", 9, 21, 0, NULL, rc__split_infer, NULL, NULL, rc__split_forward, rc__split_backward},
    {"Slice", "", 9, 21, 0, NULL, rc__slice_infer, NULL, NULL, rc__slice_forward, rc__slice_backward},
    {"Gather", "", 9, 21, 0, NULL, rc__gather_infer, NULL, NULL, rc__gather_forward, rc__gather_backward},
    {"Pad", "", 9, 21, 0, rc__pad_parse, rc__pad_infer, rc__pad_workspace, NULL, rc__pad_forward,
     rc__pad_backward},
};
const int rc__ops_shape_count = (int)(sizeof rc__ops_shape / sizeof rc__ops_shape[0]);
