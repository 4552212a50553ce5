#include <stdio.h>
#include <string.h>

#include "ops/op.h"

rc_status rc__axis(const rc_node *n, int64_t axis, int rank, int *out, rc_err *e) {
  int64_t a = axis < 0 ? axis + rank : axis;
  if (a < 0 || a >= rank)
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): axis %lld out of range for rank %d", n->label,
                    n->op_type, (long long)axis, rank);
  *out = (int)a;
  return RC_OK;
}

rc_status rc__need_const(const rc_node *n, const rc_tensor *const *in, int idx, rc_err *e) {
  if (idx >= n->n_in || !in[idx])
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): input %d is required", n->label, n->op_type,
                    idx);
  if (!in[idx]->data)
    return rc__fail(e, RC_ERR_UNSUPPORTED,
                    "node '%s' (%s): input %d must be computable before the first batch "
                    "(it depends on data, not only on shapes)",
                    n->label, n->op_type, idx);
  return RC_OK;
}

int64_t rc__int_at(const rc_tensor *t, int64_t i) {
  switch (t->dtype) {
    case RC_DTYPE_INT64: return ((const int64_t *)t->data)[i];
    case RC_DTYPE_INT32: return ((const int32_t *)t->data)[i];
    case RC_DTYPE_UINT32: return ((const uint32_t *)t->data)[i];
    case RC_DTYPE_INT16: return ((const int16_t *)t->data)[i];
    case RC_DTYPE_UINT16: return ((const uint16_t *)t->data)[i];
    case RC_DTYPE_INT8: case RC_DTYPE_INT4: return ((const int8_t *)t->data)[i];
    case RC_DTYPE_UINT8: case RC_DTYPE_BOOL: case RC_DTYPE_UINT4: return ((const uint8_t *)t->data)[i];
    case RC_DTYPE_UINT64: return (int64_t)((const uint64_t *)t->data)[i];
    case RC_DTYPE_FLOAT: return (int64_t)((const float *)t->data)[i];
    case RC_DTYPE_DOUBLE: return (int64_t)((const double *)t->data)[i];
    default: return 0;
  }
}

rc_status rc__broadcast_shape(const rc_node *n, const rc_tensor *a, const rc_tensor *b, rc_tensor *out,
                              rc_err *e) {
  int rank = a->rank > b->rank ? a->rank : b->rank;
  for (int i = 0; i < rank; i++) {
    int ia = i - (rank - a->rank), ib = i - (rank - b->rank);
    int64_t da = ia >= 0 ? a->dims[ia] : 1, db = ib >= 0 ? b->dims[ib] : 1;
    if (da != db && da != 1 && db != 1) {
      char sa[96], sb[96];
      return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): shapes %s and %s do not broadcast", n->label,
                      n->op_type, rc_shape_str(a, sa, sizeof sa), rc_shape_str(b, sb, sizeof sb));
    }
    out->dims[i] = da == 1 ? db : da;
  }
  out->rank = rank;
  return RC_OK;
}

rc_status rc__check_shape(const rc_node *n, const rc_tensor *t, rc_err *e) {
  int64_t total = 1;
  for (int i = 0; i < t->rank; i++) {
    if (t->dims[i] < 0)
      return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): negative dimension %lld", n->label,
                      n->op_type, (long long)t->dims[i]);
    if (t->dims[i] > 0 && total > RC_MAX_ELEMENTS / t->dims[i])
      return rc__fail(e, RC_ERR_LIMIT, "node '%s' (%s): tensor of more than %lld elements", n->label,
                      n->op_type, (long long)RC_MAX_ELEMENTS);
    total *= t->dims[i];
  }
  return RC_OK;
}
