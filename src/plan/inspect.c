#include "plan/inspect.h"

#include "plan/grid_range.h"

#include <math.h>
#include <string.h>

#include "core/alloc.h"
#include "ops/op.h"

static int is_op(const rc_node *n, const char *op) { return !strcmp(n->op_type, op); }

static int element_is(const rc_tensor *t, int64_t i, int64_t zero_value) {
  if (t->dtype == RC_DTYPE_FLOAT) return ((const float *)t->data)[i] == (float)zero_value;
  if (t->dtype == RC_DTYPE_DOUBLE) return ((const double *)t->data)[i] == (double)zero_value;
  return rc__int_at(t, i) == zero_value;
}

void rc__sparsity(const rc_tensor *t, int axis, int64_t zero_value, int64_t *zeros, int *nm_n, int *nm_m) {
  int64_t n = rc_tensor_numel(t), z = 0;
  *nm_n = *nm_m = 0;
  if (!t->data) {
    *zeros = 0;
    return;
  }
  for (int64_t i = 0; i < n; i++) z += element_is(t, i, zero_value);
  *zeros = z;
  if (axis < 0 || axis >= t->rank || z == 0) return;
  int64_t len = t->dims[axis], inner = 1, outer = 1;
  for (int d = axis + 1; d < t->rank; d++) inner *= t->dims[d];
  for (int d = 0; d < axis; d++) outer *= t->dims[d];
  static const int ms[] = {4, 8, 16};
  for (int mi = 0; mi < 3; mi++) {
    int m = ms[mi];
    if (len % m) continue;
    int worst = 0;
    for (int64_t o = 0; o < outer && worst <= m / 2; o++)
      for (int64_t in = 0; in < inner && worst <= m / 2; in++)
        for (int64_t g = 0; g < len; g += m) {
          int nz = 0;
          for (int k = 0; k < m; k++) nz += !element_is(t, (o * len + g + k) * inner + in, zero_value);
          if (nz > worst) worst = nz;
        }
    if (worst <= m / 2) {
      *nm_n = worst;
      *nm_m = m;
      return;
    }
  }
}

/* The initializer behind a node input, looking through DequantizeLinear. */
static int source_initializer(const rc_graph *g, int v, int *quantized, int64_t *zero_point) {
  *quantized = 0;
  *zero_point = 0;
  if (v < 0) return -1;
  const rc_value *val = &g->values[v];
  if (val->kind == RC_VALUE_INITIALIZER) return v;
  if (val->producer < 0) return -1;
  const rc_node *p = &g->nodes[val->producer];
  if (!is_op(p, "DequantizeLinear") || p->in[0] < 0) return -1;
  const rc_value *q = &g->values[p->in[0]];
  if (q->kind != RC_VALUE_INITIALIZER) {
    /* float weight -> QuantizeLinear -> DequantizeLinear */
    if (q->producer < 0) return -1;
    const rc_node *qn = &g->nodes[q->producer];
    if (!is_op(qn, "QuantizeLinear") || qn->in[0] < 0 ||
        g->values[qn->in[0]].kind != RC_VALUE_INITIALIZER)
      return -1;
    *quantized = 1;
    return qn->in[0];
  }
  *quantized = 1;
  if (p->n_in > 2 && p->in[2] >= 0 && g->values[p->in[2]].kind == RC_VALUE_INITIALIZER) {
    const rc_tensor *zp = &g->values[p->in[2]].decl;
    /* Per-axis zero points differ per channel; sparsity then counts entries
     * equal to the first, which is exact for the symmetric grids we meet. */
    if (rc_tensor_numel(zp) >= 1 && zp->data) *zero_point = rc__int_at(zp, 0);
  }
  return q->kind == RC_VALUE_INITIALIZER ? p->in[0] : -1;
}

static int weight_in_axis(const rc_graph *g, const rc_node *n, int input, int rank) {
  if (input != 1 && !(is_op(n, "MatMul") && input == 0)) return -1;
  if (is_op(n, "Conv")) return rank >= 2 ? 1 : -1;
  if (is_op(n, "ConvTranspose")) return rank >= 1 ? 0 : -1;
  if (is_op(n, "Gemm")) return rc__attr_int(n, "transB", 0) ? 1 : 0;
  if (is_op(n, "MatMul")) return input == 1 ? (rank >= 2 ? rank - 2 : 0) : rank - 1;
  (void)g;
  return -1;
}

static int role_of(const rc_node *n, int input, rc_weight_role *role) {
  if (is_op(n, "Conv") || is_op(n, "ConvTranspose")) {
    if (input > 2) return 0;
    *role = input == 2 ? RC_ROLE_BIAS : RC_ROLE_WEIGHT;
    return input >= 1;
  }
  if (is_op(n, "Gemm")) {
    if (input == 0 || input > 2) return 0;
    *role = input == 2 ? RC_ROLE_BIAS : RC_ROLE_WEIGHT;
    return 1;
  }
  if (is_op(n, "MatMul")) {
    *role = RC_ROLE_WEIGHT;
    return input <= 1;
  }
  if (is_op(n, "PRelu")) {
    *role = RC_ROLE_WEIGHT;
    return input == 1;
  }
  if (is_op(n, "BatchNormalization")) {
    *role = RC_ROLE_NORM;
    return input == 1 || input == 2;
  }
  if (is_op(n, "LayerNormalization")) {
    *role = RC_ROLE_NORM;
    return input == 1 || input == 2;
  }
  return 0;
}

/* Add or Mul of an activation and a float initializer of more than one
 * entry (scalars there are constants such as epsilon, not parameters). */
static int is_affine(const rc_graph *g, const rc_node *n, int input, rc_weight_role *role) {
  if ((!is_op(n, "Add") && !is_op(n, "Mul")) || n->n_in != 2 || n->in[0] < 0 || n->in[1] < 0) return 0;
  const rc_value *p = &g->values[n->in[input]], *other = &g->values[n->in[1 - input]];
  if (p->kind != RC_VALUE_INITIALIZER || other->kind == RC_VALUE_INITIALIZER || !rc_dtype_is_float(p->decl.dtype) ||
      rc_tensor_numel(&p->decl) < 2)
    return 0;
  *role = RC_ROLE_AFFINE;
  return 1;
}

rc_status rc__weights_collect(const rc_graph *g, rc_weight_info **out, int *count, rc_err *e) {
  *out = NULL;
  *count = 0;
  int cap = 0;
  rc_weight_info *list = NULL;
  unsigned char *seen = rc__calloc((size_t)g->n_values + 1, 1);
  if (!seen) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  for (int ni = 0; ni < g->n_nodes; ni++) {
    const rc_node *n = &g->nodes[ni];
    for (int i = 0; i < n->n_in; i++) {
      rc_weight_role role;
      if (!role_of(n, i, &role) && !is_affine(g, n, i, &role)) continue;
      int quantized;
      int64_t zp;
      int v = source_initializer(g, n->in[i], &quantized, &zp);
      if (v < 0 || seen[v]) continue;
      const rc_tensor *t = &g->values[v].decl;
      if (!rc_dtype_is_float(t->dtype) && !rc_dtype_is_integer(t->dtype)) continue;
      seen[v] = 1;
      if (*count == cap) {
        cap = cap ? cap * 2 : 32;
        rc_weight_info *grown = rc__realloc(list, sizeof *list * (size_t)cap);
        if (!grown) {
          rc__free(list);
          rc__free(seen);
          return rc__fail(e, RC_ERR_NOMEM, "out of memory");
        }
        list = grown;
      }
      rc_weight_info *w = &list[(*count)++];
      memset(w, 0, sizeof *w);
      w->value = v;
      w->node = ni;
      w->role = role;
      w->quantized = quantized;
      w->numel = rc_tensor_numel(t);
      w->in_axis = role == RC_ROLE_WEIGHT ? weight_in_axis(g, n, i, t->rank) : -1;
      rc__sparsity(t, w->in_axis, zp, &w->zeros, &w->nm_n, &w->nm_m);
    }
  }
  rc__free(seen);
  *out = list;
  return RC_OK;
}

/* Scale and zero point: initializers, directly or through Identity nodes. */
static int initializer_of(const rc_graph *g, const rc_node *n, int i) {
  return i < n->n_in && n->in[i] >= 0 ? rc__constant_source(g, n->in[i], NULL, 0) : -1;
}

rc_status rc__grids_collect(const rc_graph *g, rc_grid_info **out, int *count, rc_err *e) {
  *out = NULL;
  *count = 0;
  int cap = 0;
  rc_grid_info *list = NULL;
  for (int ni = 0; ni < g->n_nodes; ni++) {
    const rc_node *n = &g->nodes[ni];
    if (!is_op(n, "DequantizeLinear")) continue;
    int sv = initializer_of(g, n, 1);
    if (sv < 0 || n->in[0] < 0) continue;
    const rc_tensor *scale = &g->values[sv].decl;
    if (scale->dtype != RC_DTYPE_FLOAT) continue;
    if (*count == cap) {
      cap = cap ? cap * 2 : 32;
      rc_grid_info *grown = rc__realloc(list, sizeof *list * (size_t)cap);
      if (!grown) {
        rc__free(list);
        return rc__fail(e, RC_ERR_NOMEM, "out of memory");
      }
      list = grown;
    }
    rc_grid_info *gi = &list[(*count)++];
    memset(gi, 0, sizeof *gi);
    gi->node = ni;
    gi->value = n->in[0];
    const rc_value *q = &g->values[n->in[0]];
    gi->is_weight = q->kind == RC_VALUE_INITIALIZER;
    int zv = initializer_of(g, n, 2);
    gi->zero_point = zv >= 0 ? &g->values[zv].decl : NULL;
    gi->dtype = q->kind == RC_VALUE_INITIALIZER ? q->decl.dtype
                : gi->zero_point                ? gi->zero_point->dtype
                                                : RC_DTYPE_UINT8;
    gi->n_scale = rc_tensor_numel(scale);
    gi->scale = scale->data;
    gi->axis = scale->rank == 0 || gi->n_scale == 1 ? -1 : (int)rc__attr_int(n, "axis", 1);
  }
  *out = list;
  return RC_OK;
}
