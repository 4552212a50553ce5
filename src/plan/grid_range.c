#include "plan/grid_range.h"

#include <cJSON.h>
#include <limits.h>
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "ops/op.h"
#include "ops/quant.h"

const char *rc_range_source_name(rc_range_source s) {
  static const char *const names[] = {"dtype", "recorded", "observed"};
  return s >= RC_RANGE_DTYPE && s <= RC_RANGE_OBSERVED ? names[s] : "?";
}

static rc_status parse_one(const char *json, const char *path, const char *key, int want_array, cJSON **root,
                           void **tensors, rc_err *e) {
  *root = NULL;
  *tensors = NULL;
  if (!json) return RC_OK;
  *root = cJSON_Parse(json);
  const cJSON *schema = cJSON_GetObjectItemCaseSensitive(*root, "schema");
  cJSON *t = cJSON_GetObjectItemCaseSensitive(*root, "tensors");
  if (!cJSON_IsObject(*root) || !cJSON_IsNumber(schema) || schema->valuedouble != 1 ||
      !(want_array ? cJSON_IsArray(t) : cJSON_IsObject(t)))
    return rc__fail(e, RC_ERR_INVALID, "%s: metadata '%s' is not schema 1 JSON with a \"tensors\" %s", path, key,
                    want_array ? "array" : "object");
  *tensors = t;
  return RC_OK;
}

rc_status rc__file_notes_parse(rc_file_notes *n, const char *ranges_json, const char *pruned_json, const char *path,
                               rc_err *e) {
  memset(n, 0, sizeof *n);
  cJSON *r0, *r1;
  rc_status s = parse_one(ranges_json, path, RC_RANGES_METADATA, 0, &r0, &n->ranges, e);
  n->roots[0] = r0;
  if (s == RC_OK) {
    s = parse_one(pruned_json, path, RC_PRUNED_METADATA, 1, &r1, &n->pruned, e);
    n->roots[1] = r1;
  }
  if (s != RC_OK) rc__file_notes_free(n);
  return s;
}

void rc__file_notes_free(rc_file_notes *n) {
  cJSON_Delete(n->roots[0]);
  cJSON_Delete(n->roots[1]);
  memset(n, 0, sizeof *n);
}

static const cJSON *recorded_entry(const rc_file_notes *n, const char *tensor) {
  return n && n->ranges && tensor ? cJSON_GetObjectItemCaseSensitive((const cJSON *)n->ranges, tensor) : NULL;
}

const char *rc__file_notes_source(const rc_file_notes *n, const char *tensor) {
  const cJSON *from = cJSON_GetObjectItemCaseSensitive(recorded_entry(n, tensor), "from");
  return cJSON_IsString(from) ? from->valuestring : NULL;
}

int rc__file_notes_pruned(const rc_file_notes *n, const char *tensor) {
  if (!n || !n->pruned || !tensor) return 0;
  const char *from = rc__file_notes_source(n, tensor);
  const cJSON *it;
  cJSON_ArrayForEach(it, (const cJSON *)n->pruned) {
    if (!cJSON_IsString(it)) continue;
    if (!strcmp(it->valuestring, tensor) || (from && !strcmp(it->valuestring, from))) return 1;
  }
  return 0;
}

static int dtype_range(rc_dtype dt, int32_t *lo, int32_t *hi) {
  if (dt == RC_DTYPE_INT32) {
    *lo = INT32_MIN;
    *hi = INT32_MAX;
    return 1;
  }
  return rc__quant_range(dt, lo, hi);
}

void rc__range_observed(rc_dtype dt, int64_t used_lo, int64_t used_hi, int32_t *lo, int32_t *hi) {
  int32_t dlo, dhi;
  if (!dtype_range(dt, &dlo, &dhi)) {
    *lo = *hi = 0;
    return;
  }
  int is_signed = dlo < 0;
  for (int b = 2; b <= 31; b++) {
    int64_t top = is_signed ? ((int64_t)1 << (b - 1)) - 1 : ((int64_t)1 << b) - 1;
    int64_t bottom = is_signed ? -top - 1 : 0;
    if (bottom < dlo || top > dhi) break;
    if (used_lo >= bottom && used_hi <= top) {
      *lo = (int32_t)(is_signed && used_lo > bottom ? bottom + 1 : bottom);
      *hi = (int32_t)top;
      return;
    }
  }
  *lo = dlo;
  *hi = dhi;
  if (is_signed && used_lo > dlo) *lo = dlo + 1;
}

static int dtype_is_the_range(rc_dtype dt) {
  return dt == RC_DTYPE_INT4 || dt == RC_DTYPE_UINT4 || dt == RC_DTYPE_INT32;
}

static void used_range(const rc_tensor *t, int64_t *lo, int64_t *hi) {
  int64_t n = rc_tensor_numel(t);
  *lo = *hi = n ? rc__int_at(t, 0) : 0;
  for (int64_t i = 1; i < n; i++) {
    int64_t v = rc__int_at(t, i);
    if (v < *lo) *lo = v;
    if (v > *hi) *hi = v;
  }
}

static rc_status read_recorded(const rc_graph *g, const cJSON *rec, const char *name, int32_t dlo, int32_t dhi,
                               rc_int_range *r, rc_err *e) {
  const cJSON *mn = cJSON_GetObjectItemCaseSensitive(rec, "min"), *mx = cJSON_GetObjectItemCaseSensitive(rec, "max");
  /* Bounds first: only then may the values be cast to integers. */
  if (!cJSON_IsNumber(mn) || !cJSON_IsNumber(mx) || !(mn->valuedouble >= dlo) || !(mx->valuedouble <= dhi) ||
      mn->valuedouble > mx->valuedouble || mn->valuedouble != (double)(int64_t)mn->valuedouble ||
      mx->valuedouble != (double)(int64_t)mx->valuedouble)
    return rc__fail(e, RC_ERR_INVALID, "%s: metadata '%s': tensor '%s' needs integer \"min\" <= \"max\" within "
                    "[%d, %d]", g->path, RC_RANGES_METADATA, name, dlo, dhi);
  r->lo = (int32_t)mn->valuedouble;
  r->hi = (int32_t)mx->valuedouble;
  r->source = RC_RANGE_RECORDED;
  return RC_OK;
}

rc_status rc__grid_range(const rc_graph *g, const rc_file_notes *notes, int value, rc_dtype dt, const char *name,
                         rc_int_range *r, rc_err *e) {
  memset(r, 0, sizeof *r);
  int32_t dlo, dhi;
  if (!dtype_range(dt, &dlo, &dhi))
    return rc__fail(e, RC_ERR_UNSUPPORTED, "%s: tensor '%s': no integer range for a %s grid", g->path,
                    name ? name : "?", rc_dtype_name(dt));
  r->lo = dlo;
  r->hi = dhi;
  r->source = RC_RANGE_DTYPE;
  const rc_tensor *t = value >= 0 ? &g->values[value].decl : NULL;
  if (t && t->data) {
    r->has_used = 1;
    used_range(t, &r->used_lo, &r->used_hi);
  }
  const cJSON *rec = recorded_entry(notes, name);
  if (rec) {
    RC_TRY(read_recorded(g, rec, name, dlo, dhi, r, e));
    if (r->has_used && (r->used_lo < r->lo || r->used_hi > r->hi))
      return rc__fail(e, RC_ERR_INVALID, "%s: tensor '%s' holds integers in [%lld, %lld], outside the range [%d, %d] "
                      "its metadata '%s' records", g->path, name, (long long)r->used_lo, (long long)r->used_hi,
                      r->lo, r->hi, RC_RANGES_METADATA);
    return RC_OK;
  }
  if (r->has_used && !dtype_is_the_range(dt)) {
    rc__range_observed(dt, r->used_lo, r->used_hi, &r->lo, &r->hi);
    r->source = RC_RANGE_OBSERVED;
  }
  return RC_OK;
}

/* Why value v is not a constant, following the first non-constant input. */
static void explain(const rc_graph *g, int v, char *why, size_t n) {
  const rc_value *x = &g->values[v];
  if (x->kind == RC_VALUE_INPUT) {
    snprintf(why, n, "'%s' is a graph input", x->name);
    return;
  }
  if (x->producer < 0) {
    snprintf(why, n, "'%s' has no producer and no data", x->name);
    return;
  }
  const rc_node *p = &g->nodes[x->producer];
  const char *from = "computed from other tensors";
  char tail[300] = "";
  for (int i = 0; i < p->n_in; i++) {
    int u = p->in[i];
    if (u < 0 || g->values[u].kind == RC_VALUE_INITIALIZER) continue;
    if (g->values[u].kind == RC_VALUE_INPUT) {
      snprintf(tail, sizeof tail, "from graph input '%s'", g->values[u].name);
      break;
    }
    snprintf(tail, sizeof tail, "from '%s', an output of a node that is not constant", g->values[u].name);
  }
  snprintf(why, n, "'%s' is produced by node '%s' (op %s) %s", x->name, p->label, p->op_type, tail[0] ? tail : from);
}

int rc__constant_source(const rc_graph *g, int v, char *why, size_t n) {
  for (int hops = 0; v >= 0 && hops <= g->n_nodes; hops++) {
    const rc_value *x = &g->values[v];
    if (x->kind == RC_VALUE_INITIALIZER) return v;
    const rc_node *p = x->producer >= 0 ? &g->nodes[x->producer] : NULL;
    int identity = p && !strcmp(p->op_type, "Identity") && !(p->domain && p->domain[0] && strcmp(p->domain, "ai.onnx"));
    if (!identity || p->n_in < 1) {
      if (why) explain(g, v, why, n);
      return -1;
    }
    v = p->in[0];
  }
  if (why) snprintf(why, n, "it is not a constant");
  return -1;
}

void rc__grid_range_of_float_weight(const rc_graph *g, int q, rc_int_range *r) {
  const rc_node *n = &g->nodes[q];
  int wv = n->n_in > 0 ? n->in[0] : -1, sv = n->n_in > 1 && n->in[1] >= 0 ? rc__constant_source(g, n->in[1], NULL, 0) : -1;
  int zv = n->n_in > 2 && n->in[2] >= 0 ? rc__constant_source(g, n->in[2], NULL, 0) : -1;
  if (wv < 0 || sv < 0 || g->values[wv].kind != RC_VALUE_INITIALIZER) return;
  const rc_tensor *w = &g->values[wv].decl, *s = &g->values[sv].decl, *z = zv >= 0 ? &g->values[zv].decl : NULL;
  int64_t n_w = rc_tensor_numel(w), n_s = rc_tensor_numel(s), inner = 1;
  if (w->dtype != RC_DTYPE_FLOAT || s->dtype != RC_DTYPE_FLOAT || !w->data || !s->data || !n_w || !n_s) return;
  if (n_s > 1) {
    int64_t axis = rc__attr_int(n, "axis", 1);
    if (axis < 0) axis += w->rank;
    if (axis < 0 || axis >= w->rank || w->dims[axis] != n_s) return;
    for (int d = (int)axis + 1; d < w->rank; d++) inner *= w->dims[d];
  }
  const float *x = w->data, *sc = s->data;
  for (int64_t i = 0; i < n_w; i++) {
    int64_t c = n_s > 1 ? (i / inner) % n_s : 0;
    double zp = z && z->data ? (double)rc__int_at(z, rc_tensor_numel(z) > 1 ? c : 0) : 0.0;
    double v = rint((double)(x[i] / sc[c])) + zp;
    if (v != v) v = zp;
    int64_t k = v < r->lo ? r->lo : v > r->hi ? r->hi : (int64_t)v;
    if (!r->has_used || k < r->used_lo) r->used_lo = k;
    if (!r->has_used || k > r->used_hi) r->used_hi = k;
    r->has_used = 1;
  }
  rc_dtype dt = z ? z->dtype : (rc_dtype)rc__attr_int(n, "output_dtype", RC_DTYPE_UINT8);
  if (dtype_is_the_range(dt)) return;
  rc__range_observed(dt, r->used_lo, r->used_hi, &r->lo, &r->hi);
  r->source = RC_RANGE_OBSERVED;
}
