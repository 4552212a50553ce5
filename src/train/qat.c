#include "train/qat.h"

#include <math.h>
#include <stdio.h>
#include <string.h>

#include "core/alloc.h"
#include "plan/plan.h"
#include "ops/fakequant.h"
#include "ops/quant.h"

static int is_op(const rc_node *n, const char *op) { return !strcmp(n->op_type, op) && !(n->domain && n->domain[0] && strcmp(n->domain, "ai.onnx")); }

static int initializer_in(const rc_graph *g, const rc_node *n, int i) {
  return i < n->n_in && n->in[i] >= 0 && g->values[n->in[i]].kind == RC_VALUE_INITIALIZER ? n->in[i] : -1;
}

/* The initializer behind input i of n (scale, zero point), directly or
 * through Identity nodes; -1 when absent or not a constant. */
static int constant_in(const rc_graph *g, const rc_node *n, int i) {
  return i < n->n_in && n->in[i] >= 0 ? rc__constant_source(g, n->in[i], NULL, 0) : -1;
}

/* Refuse a grid whose scale or zero point is given but is not a constant. */
static rc_status check_constant_grid(const rc_graph *g, const rc_node *n, rc_err *e) {
  static const char *const slot[] = {"", "scale", "zero point"};
  for (int i = 1; i <= 2 && i < n->n_in; i++) {
    char why[600];
    if (n->in[i] < 0 || rc__constant_source(g, n->in[i], why, sizeof why) >= 0) continue;
    return rc__fail(e, RC_ERR_UNSUPPORTED, "%s: node '%s' (%s): cannot train on its grid: its %s (input %d) is not a "
                    "constant: %s", g->path, n->label, n->op_type, slot[i], i, why);
  }
  return RC_OK;
}

/* The dtype a QuantizeLinear produces: its zero point's, output_dtype
 * (opset 21), or uint8 by default, as the operator specification says. */
static rc_dtype quantize_output_dtype(const rc_graph *g, const rc_node *n) {
  int zv = constant_in(g, n, 2);
  if (zv >= 0) return g->values[zv].decl.dtype;
  int64_t od = rc__attr_int(n, "output_dtype", 0);
  return od ? (rc_dtype)od : RC_DTYPE_UINT8;
}

/* Layout of a tensor against its scale: (outer, channels, inner). */
static void layout(const rc_tensor *x, int64_t n_scale, int64_t axis, int64_t *channels, int64_t *inner) {
  *channels = 1;
  *inner = rc_tensor_numel(x);
  if (n_scale <= 1) return;
  int a = (int)(axis < 0 ? axis + x->rank : axis);
  *channels = n_scale;
  *inner = 1;
  for (int d = a + 1; d < x->rank; d++) *inner *= x->dims[d];
}

static int64_t zero_point_at(const rc_graph *g, const rc_node *n, int64_t c) {
  int zv = constant_in(g, n, 2);
  return zv >= 0 ? rc__int_at(&g->values[zv].decl, rc_tensor_numel(&g->values[zv].decl) > 1 ? c : 0) : 0;
}

static uint64_t fnv(uint64_t h, const void *p, size_t n) {
  const unsigned char *b = p;
  for (size_t i = 0; i < n; i++) h = (h ^ b[i]) * 1099511628211ull;
  return h;
}

/* Fingerprint of the grid a QDQ node quantizes on. */
static uint64_t grid_hash(const rc_graph *g, const rc_node *n) {
  uint64_t h = 1469598103934665603ull;
  for (int i = 1; i <= 2; i++) {
    int v = constant_in(g, n, i);
    if (v < 0) continue;
    const rc_tensor *t = &g->values[v].decl;
    h = fnv(h, &t->dtype, sizeof t->dtype);
    h = fnv(h, t->dims, sizeof(int64_t) * (size_t)t->rank);
    if (t->data) h = fnv(h, t->data, rc_tensor_nbytes(t));
  }
  int64_t axis = rc__attr_int(n, "axis", 1);
  return fnv(h, &axis, sizeof axis);
}

static rc_status grow_values(rc_graph *g, int extra, rc_err *e) {
  rc_value *nv = rc__arena_alloc(&g->arena, sizeof(rc_value) * (size_t)(g->n_values + extra));
  if (!nv) return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory preparing quantized training", g->path);
  memcpy(nv, g->values, sizeof(rc_value) * (size_t)g->n_values);
  g->values = nv;
  return RC_OK;
}

static rc_status add_site(rc_qat *q, const rc_qat_site *s, rc_err *e) {
  rc_qat_site *grown = rc__realloc(q->sites, sizeof *grown * (size_t)(q->n + 1));
  if (!grown) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  q->sites = grown;
  q->sites[q->n++] = *s;
  return RC_OK;
}

static rc_fake_quant_params *fq_params(rc_graph *g, const rc_node *dq, const rc_int_range *r, rc_err *e) {
  rc_fake_quant_params *p = rc__arena_zalloc(&g->arena, sizeof *p);
  if (!p) {
    rc__fail(e, RC_ERR_NOMEM, "out of memory");
    return NULL;
  }
  p->axis = rc__attr_int(dq, "axis", 1);
  p->qmin = r->lo;
  p->qmax = r->hi;
  return p;
}

/* The grid's integer range, with the node named when it has none. */
static rc_status site_range(const rc_graph *g, const rc_file_notes *notes, const rc_node *n, int value, rc_dtype dt,
                            const char *name, rc_int_range *r, rc_err *e) {
  if (rc__grid_range(g, notes, value, dt, name, r, e) != RC_OK)
    return rc__wrap(e, "node '%s': cannot train on its grid", n->label);
  return RC_OK;
}

static const rc_op_def *fake_quant_def(void) { return rc__op_find(RC_FAKE_QUANT_OP, RC_TRAINING_DOMAIN, 1); }

/* Integer initializer -> DequantizeLinear: a float shadow and FakeQuantLinear. */
static rc_status rewrite_int_weight(rc_graph *g, const rc_file_notes *notes, rc_mask_mode mask, rc_qat *q, int dqi,
                                    rc_err *e) {
  rc_node *dq = &g->nodes[dqi];
  int qv = dq->in[0], sv = constant_in(g, dq, 1), zv = constant_in(g, dq, 2);
  const rc_tensor *qt = &g->values[qv].decl, *st = &g->values[sv].decl;
  rc_int_range range;
  RC_TRY(site_range(g, notes, dq, qv, qt->dtype, g->values[qv].name, &range, e));
  rc_fake_quant_params *p = fq_params(g, dq, &range, e);
  if (!p) return e->code;
  int shadow = g->n_values++;
  rc_value *sh = &g->values[shadow];
  memset(sh, 0, sizeof *sh);
  char name[512];
  snprintf(name, sizeof name, "%s (float shadow)", g->values[qv].name);
  sh->name = rc__arena_strdup(&g->arena, name);
  sh->kind = RC_VALUE_INITIALIZER;
  sh->producer = -1;
  sh->init_index = -1;
  sh->decl = *qt;
  sh->decl.dtype = RC_DTYPE_FLOAT;
  int64_t n = rc_tensor_numel(qt), channels, inner;
  float *x = rc__arena_alloc(&g->arena, sizeof(float) * (size_t)(n ? n : 1));
  if (!sh->name || !x) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  layout(qt, rc_tensor_numel(st), p->axis, &channels, &inner);
  for (int64_t i = 0; i < n; i++) {
    int64_t c = (i / inner) % channels;
    x[i] = (float)((double)(rc__int_at(qt, i) - zero_point_at(g, dq, c)) * ((const float *)st->data)[c]);
  }
  sh->decl.data = x;
  rc_qat_site s = {dqi, -1, qv, shadow, -1, qt->dtype == RC_DTYPE_INT32, dq->def, NULL, dq->op_type, NULL,
                   dq->domain, NULL, dq->params, NULL, dq->in[0], dq->n_in, grid_hash(g, dq), range, {0}};
  if (!s.is_bias)
    rc__mask_choose(mask, notes, g->values[qv].name, qt, 1, zv >= 0 ? &g->values[zv].decl : NULL, channels, inner,
                    &s.mask);
  dq->op_type = RC_FAKE_QUANT_OP;
  dq->domain = RC_TRAINING_DOMAIN;
  dq->def = fake_quant_def();
  dq->params = p;
  dq->in[0] = shadow;
  return add_site(q, &s, e);
}

/* QuantizeLinear -> DequantizeLinear: FakeQuantLinear -> Identity. */
static rc_status rewrite_pair(rc_graph *g, const rc_file_notes *notes, rc_mask_mode mask, rc_qat *q, int dqi, int qi,
                              rc_err *e) {
  rc_node *dq = &g->nodes[dqi], *qn = &g->nodes[qi];
  int fw = initializer_in(g, qn, 0);
  if (fw >= 0 && g->values[fw].decl.dtype != RC_DTYPE_FLOAT) fw = -1;
  rc_int_range range;
  RC_TRY(site_range(g, notes, qn, -1, quantize_output_dtype(g, qn), g->values[qn->out[0]].name, &range, e));
  if (fw >= 0 && range.source == RC_RANGE_DTYPE) rc__grid_range_of_float_weight(g, qi, &range);
  rc_fake_quant_params *p = fq_params(g, qn, &range, e);
  if (!p) return e->code;
  rc_qat_site s = {dqi, qi, -1, -1, fw, 0, dq->def, qn->def, dq->op_type, qn->op_type, dq->domain, qn->domain,
                   dq->params, qn->params, dq->in[0], dq->n_in, grid_hash(g, qn), range, {0}};
  if (fw >= 0) rc__mask_choose(mask, notes, g->values[fw].name, &g->values[fw].decl, 0, NULL, 1, 1, &s.mask);
  qn->op_type = RC_FAKE_QUANT_OP;
  qn->domain = RC_TRAINING_DOMAIN;
  qn->def = fake_quant_def();
  qn->params = p;
  dq->op_type = "Identity";
  dq->domain = "";
  dq->def = rc__op_find("Identity", "", 13);
  dq->params = NULL;
  dq->n_in = 1;
  return add_site(q, &s, e);
}

static int is_grid_node(const rc_node *n) { return is_op(n, "DequantizeLinear") || is_op(n, "QuantizeLinear"); }

static rc_status add_rewire(rc_qat *q, int node, int slot, int old_value, rc_err *e) {
  rc_qat_rewire *grown = rc__realloc(q->rewired, sizeof *grown * (size_t)(q->n_rewired + 1));
  if (!grown) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  q->rewired = grown;
  q->rewired[q->n_rewired++] = (rc_qat_rewire){node, slot, old_value};
  return RC_OK;
}

/* A folded copy of constant value v from plan p, as a value of g's own that
 * is never written to the file (init_index -1). */
static rc_status folded_copy(rc_graph *g, rc_plan *p, int v, int *out, rc_err *e) {
  const rc_tensor *t = rc_plan_tensor(p, v);
  size_t nb = rc_tensor_nbytes(t);
  void *data = rc__arena_alloc(&g->arena, nb ? nb : 1);
  char name[600];
  snprintf(name, sizeof name, "%s (folded)", g->values[v].name);
  rc_value *c = &g->values[g->n_values];
  memset(c, 0, sizeof *c);
  c->name = rc__arena_strdup(&g->arena, name);
  if (!data || !c->name) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  memcpy(data, t->data, nb);
  c->kind = RC_VALUE_INITIALIZER;
  c->producer = -1;
  c->init_index = -1;
  c->decl = *t;
  c->decl.data = data;
  *out = g->n_values++;
  return RC_OK;
}

/* Scales and zero points computed from constants (Constant nodes, Cast,
 * arithmetic on initializers) are folded by planning g once; each grid input
 * the plan knows as a constant then reads a folded copy. */
static rc_status fold_grid_inputs(rc_graph *g, const rc_tensor *shapes, rc_qat *q, rc_err *e) {
  int want = 0;
  for (int i = 0; i < g->n_nodes; i++)
    for (int k = 1; k <= 2 && is_grid_node(&g->nodes[i]) && k < g->nodes[i].n_in; k++)
      want += g->nodes[i].in[k] >= 0 && constant_in(g, &g->nodes[i], k) < 0;
  if (!want) return RC_OK;
  rc_plan *p = NULL;
  if (rc_plan_init(&p, g, shapes, NULL, e) != RC_OK) return rc__wrap(e, "planning the student to read its grids");
  rc_status s = grow_values(g, want, e);
  for (int i = 0; s == RC_OK && i < g->n_nodes; i++) {
    rc_node *n = &g->nodes[i];
    for (int k = 1; s == RC_OK && k <= 2 && is_grid_node(n) && k < n->n_in; k++) {
      int v = n->in[k], c;
      if (v < 0 || constant_in(g, n, k) >= 0 || !rc_plan_is_const(p, v) || !rc_plan_tensor(p, v)->data) continue;
      if ((s = folded_copy(g, p, v, &c, e)) == RC_OK && (s = add_rewire(q, i, k, v, e)) == RC_OK) n->in[k] = c;
    }
  }
  rc_plan_free(p);
  return s;
}

rc_status rc__qat_prepare(rc_graph *g, const rc_tensor *shapes, const rc_file_notes *notes, rc_mask_mode mask,
                          rc_qat *q, rc_err *e) {
  memset(q, 0, sizeof *q);
  q->rewritten = 1;
  if (shapes) RC_TRY(fold_grid_inputs(g, shapes, q, e));
  int shadows = 0;
  for (int i = 0; i < g->n_nodes; i++) {
    const rc_node *n = &g->nodes[i];
    if (is_op(n, "DequantizeLinear") && initializer_in(g, n, 0) >= 0 &&
        rc_dtype_is_integer(g->values[n->in[0]].decl.dtype))
      shadows++;
  }
  if (shadows) RC_TRY(grow_values(g, shadows, e));
  for (int i = 0; i < g->n_nodes; i++) {
    const rc_node *n = &g->nodes[i];
    if (!is_op(n, "DequantizeLinear") || n->in[0] < 0) continue;
    const rc_value *x = &g->values[n->in[0]];
    if (x->kind == RC_VALUE_INITIALIZER) {
      if (!rc_dtype_is_integer(x->decl.dtype)) continue;
      RC_TRY(check_constant_grid(g, n, e));
      RC_TRY(rewrite_int_weight(g, notes, mask, q, i, e));
      continue;
    }
    if (x->producer < 0 || !is_op(&g->nodes[x->producer], "QuantizeLinear")) continue;
    RC_TRY(check_constant_grid(g, &g->nodes[x->producer], e));
    RC_TRY(check_constant_grid(g, n, e));
    RC_TRY(rewrite_pair(g, notes, mask, q, i, x->producer, e));
  }
  q->rewritten = 1;
  return RC_OK;
}

/* q = clamp(round_half_even(x / s) + z, qmin, qmax), in double so that int32
 * biases do not lose their low bits. */
static int64_t quantize_value(float x, float s, int64_t z, int32_t lo, int32_t hi) {
  double r = rint((double)(x / s)) + (double)z;
  if (r != r) return z;
  return r < lo ? lo : r > hi ? hi : (int64_t)r;
}

static void store_int(rc_tensor *t, int64_t i, int64_t v) {
  switch (t->dtype) {
    case RC_DTYPE_INT8: case RC_DTYPE_INT4: ((int8_t *)t->data)[i] = (int8_t)v; break;
    case RC_DTYPE_UINT8: case RC_DTYPE_UINT4: ((uint8_t *)t->data)[i] = (uint8_t)v; break;
    case RC_DTYPE_INT16: ((int16_t *)t->data)[i] = (int16_t)v; break;
    case RC_DTYPE_UINT16: ((uint16_t *)t->data)[i] = (uint16_t)v; break;
    case RC_DTYPE_INT32: ((int32_t *)t->data)[i] = (int32_t)v; break;
    default: break;
  }
}

/* Every integer about to be written lies in its grid's range. */
static rc_status check_ranges(const rc_graph *g, const rc_qat *q, rc_err *e) {
  for (int k = 0; k < q->n; k++) {
    const rc_qat_site *s = &q->sites[k];
    if (s->int_value < 0) continue;
    const rc_tensor *qt = &g->values[s->int_value].decl;
    int64_t n = rc_tensor_numel(qt);
    for (int64_t i = 0; i < n; i++) {
      int64_t v = rc__int_at(qt, i);
      if (v < s->range.lo || v > s->range.hi)
        return rc__fail(e, RC_ERR_NUMERIC, "%s: tensor '%s' entry %lld is %lld, outside its grid's range [%d, %d] "
                        "(%s); refusing to write", g->path, g->values[s->int_value].name, (long long)i,
                        (long long)v, s->range.lo, s->range.hi, rc_range_source_name(s->range.source));
    }
  }
  return RC_OK;
}

rc_status rc__qat_write_back(rc_graph *g, const rc_qat *q, rc_err *e) {
  for (int k = 0; k < q->n; k++) {
    const rc_qat_site *s = &q->sites[k];
    const rc_node *grid = &g->nodes[s->q >= 0 ? s->q : s->dq];
    if (grid_hash(g, grid) != s->grid_hash)
      return rc__fail(e, RC_ERR_NUMERIC, "%s: node '%s': its quantization grid changed during training; refusing to "
                      "write", g->path, grid->label);
  }
  for (int k = 0; k < q->n; k++) {
    const rc_qat_site *s = &q->sites[k];
    const rc_node *grid = &g->nodes[s->q >= 0 ? s->q : s->dq];
    const rc_fake_quant_params *p = grid->params;
    int sv = constant_in(g, grid, 1);
    const rc_tensor *st = &g->values[sv].decl;
    if (s->int_value >= 0) {
      rc_tensor *qt = &g->values[s->int_value].decl;
      const float *x = g->values[s->shadow].decl.data;
      int64_t n = rc_tensor_numel(qt), channels, inner;
      layout(qt, rc_tensor_numel(st), p->axis, &channels, &inner);
      for (int64_t i = 0; i < n; i++) {
        int64_t c = (i / inner) % channels;
        store_int(qt, i, quantize_value(x[i], ((const float *)st->data)[c], zero_point_at(g, grid, c), p->qmin, p->qmax));
      }
    } else if (s->float_weight >= 0) {
      rc_tensor *wt = &g->values[s->float_weight].decl;
      int64_t n = rc_tensor_numel(wt), channels, inner;
      layout(wt, rc_tensor_numel(st), p->axis, &channels, &inner);
      float *w = wt->data;
      for (int64_t i = 0; i < n; i++) {
        int64_t c = (i / inner) % channels;
        float sc = ((const float *)st->data)[c];
        int64_t z = zero_point_at(g, grid, c);
        w[i] = (float)((double)(quantize_value(w[i], sc, z, p->qmin, p->qmax) - z) * sc);
      }
    }
  }
  return check_ranges(g, q, e);
}

void rc__qat_restore(rc_graph *g, rc_qat *q) {
  if (!q->rewritten) return;
  for (int k = 0; k < q->n_rewired; k++) g->nodes[q->rewired[k].node].in[q->rewired[k].slot] = q->rewired[k].old_value;
  for (int k = 0; k < q->n; k++) {
    const rc_qat_site *s = &q->sites[k];
    rc_node *dq = &g->nodes[s->dq];
    dq->def = s->dq_def;
    dq->op_type = s->dq_op;
    dq->domain = s->dq_domain;
    dq->params = s->dq_params;
    dq->in[0] = s->dq_in0;
    dq->n_in = s->dq_n_in;
    if (s->q >= 0) {
      rc_node *qn = &g->nodes[s->q];
      qn->def = s->q_def;
      qn->op_type = s->q_op;
      qn->domain = s->q_domain;
      qn->params = s->q_params;
    }
  }
  q->rewritten = 0;
}

void rc__qat_free(rc_qat *q) {
  rc__free(q->sites);
  rc__free(q->rewired);
  memset(q, 0, sizeof *q);
}
