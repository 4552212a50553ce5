/* Reading an ONNX model: unpack the ModelProto under a memory cap, check
 * versions, and build the graph IR (values, nodes, attributes, decoded
 * initializers) in the graph's arena. */
#define _POSIX_C_SOURCE 200809L
#define _DEFAULT_SOURCE

#include <limits.h>
#include <stdio.h>
#include <string.h>

#include "core/alloc.h"
#include "core/file.h"
#include "ir/tensor_proto.h"
#include "onnx/model.h"

void rc_load_limits_default(rc_load_limits *l) {
  l->max_file_bytes = (size_t)4 << 30;
  l->max_tensor_bytes = (size_t)2 << 30;
  l->max_total_bytes = (size_t)8 << 30;
  l->max_nodes = 1000000;
  l->max_rank = RC_MAX_RANK;
  l->max_string = (size_t)64 << 10;
}

void rc_model_free(rc_model *m) {
  if (!m) return;
  rc__arena_free(&m->graph.arena);
  if (m->proto) onnx__model_proto__free_unpacked(m->proto, rc__pb_free_allocator());
  rc__free(m->path);
  rc__free(m->dir);
  rc__free(m);
}

/* ---- name -> value index, open addressing ---- */

typedef struct name_map {
  const char **keys;
  int *vals;
  size_t mask;
} name_map;

static size_t hash_str(const char *s) {
  uint64_t h = 1469598103934665603ull; /* FNV-1a */
  for (; *s; s++) h = (h ^ (uint8_t)*s) * 1099511628211ull;
  return (size_t)h;
}

static int map_init(name_map *m, size_t n) {
  size_t cap = 16;
  while (cap < 2 * n) {
    if (cap > SIZE_MAX / 4) return 0;
    cap *= 2;
  }
  m->keys = rc__calloc(cap, sizeof(char *));
  m->vals = rc__malloc(cap * sizeof(int));
  m->mask = cap - 1;
  return m->keys && m->vals;
}

static void map_free(name_map *m) {
  rc__free(m->keys);
  rc__free(m->vals);
}

/* Slot for name: either holding it or the empty slot where it belongs. */
static size_t map_slot(const name_map *m, const char *name) {
  size_t i = hash_str(name) & m->mask;
  while (m->keys[i] && strcmp(m->keys[i], name)) i = (i + 1) & m->mask;
  return i;
}

/* ---- building ---- */

typedef struct builder {
  rc_model *m;
  rc_graph *g;
  const rc_load_limits *lim;
  name_map names;
  int cap_values;
  size_t total_bytes;
  rc__decode_ctx ctx;
  rc_err *e;
} builder;

static void *arena_cb(void *arena, size_t n) { return rc__arena_alloc(arena, n); }

static rc_status nomem(builder *b) {
  return rc__fail(b->e, RC_ERR_NOMEM, "%s: out of memory building the graph", b->m->path);
}

static rc_status check_name(builder *b, const char *s, const char *what) {
  if (strnlen(s, b->lim->max_string + 1) > b->lim->max_string)
    return rc__fail(b->e, RC_ERR_LIMIT, "%s: %s is longer than %zu bytes", b->m->path, what,
                    b->lim->max_string);
  return RC_OK;
}

static const char *str_or_empty(const char *s) { return s ? s : ""; }

/* Index of name, adding an activation value if it is new. */
static rc_status value_get(builder *b, const char *name, int *out) {
  RC_TRY(check_name(b, name, "a value name"));
  size_t slot = map_slot(&b->names, name);
  if (b->names.keys[slot]) {
    *out = b->names.vals[slot];
    return RC_OK;
  }
  if (b->g->n_values >= b->cap_values) return nomem(b); /* cannot happen: capacity counted */
  rc_value *v = &b->g->values[b->g->n_values];
  memset(v, 0, sizeof *v);
  v->name = rc__arena_strdup(&b->g->arena, name);
  if (!v->name) return nomem(b);
  v->kind = RC_VALUE_ACTIVATION;
  v->decl.rank = -1;
  v->producer = -1;
  v->init_index = -1;
  b->names.keys[slot] = v->name;
  b->names.vals[slot] = b->g->n_values;
  *out = b->g->n_values++;
  return RC_OK;
}

static int value_find(builder *b, const char *name) {
  size_t slot = map_slot(&b->names, name);
  return b->names.keys[slot] ? b->names.vals[slot] : -1;
}

static rc_status check_versions(builder *b, const Onnx__ModelProto *mp) {
  const char *path = b->m->path;
  if (!mp->has_ir_version || mp->ir_version < 3 || mp->ir_version > 10)
    return rc__fail(b->e, RC_ERR_UNSUPPORTED,
                    "%s: IR version %lld is not supported (recoup reads IR versions 3 to 10)", path,
                    mp->has_ir_version ? (long long)mp->ir_version : 0LL);
  int found = 0;
  int64_t opset = 0;
  for (size_t i = 0; i < mp->n_opset_import; i++) {
    const char *d = str_or_empty(mp->opset_import[i]->domain);
    if (!*d || !strcmp(d, "ai.onnx")) {
      found = 1;
      opset = mp->opset_import[i]->version;
    }
  }
  if (!found)
    return rc__fail(b->e, RC_ERR_UNSUPPORTED,
                    "%s: the file imports no opset for the default ONNX domain; recoup runs only "
                    "default-domain graphs", path);
  if (opset < 9 || opset > 21)
    return rc__fail(b->e, RC_ERR_UNSUPPORTED,
                    "%s: default-domain opset %lld is not supported (recoup reads opsets 9 to 21)",
                    path, (long long)opset);
  b->g->ir_version = mp->ir_version;
  b->g->opset = (int)opset;
  return RC_OK;
}

static int domain_opset(const Onnx__ModelProto *mp, const char *domain, int *found) {
  int is_default = !*domain || !strcmp(domain, "ai.onnx");
  for (size_t i = 0; i < mp->n_opset_import; i++) {
    const char *d = str_or_empty(mp->opset_import[i]->domain);
    int match = is_default ? (!*d || !strcmp(d, "ai.onnx")) : !strcmp(d, domain);
    if (match) {
      *found = 1;
      int64_t v = mp->opset_import[i]->version;
      return v > INT_MAX ? INT_MAX : v < 0 ? 0 : (int)v;
    }
  }
  *found = 0;
  return 0;
}

/* Count every name the graph mentions: an upper bound on distinct values. */
static rc_status count_names(builder *b, const Onnx__GraphProto *gp, size_t *n) {
  size_t c = gp->n_initializer + gp->n_input + gp->n_output;
  for (size_t i = 0; i < gp->n_node; i++) c += gp->node[i]->n_input + gp->node[i]->n_output;
  if (c > (size_t)INT_MAX / 2)
    return rc__fail(b->e, RC_ERR_LIMIT, "%s: the graph names too many values", b->m->path);
  *n = c;
  return RC_OK;
}

static rc_status add_initializers(builder *b, const Onnx__GraphProto *gp) {
  if (gp->n_sparse_initializer)
    return rc__fail(b->e, RC_ERR_UNSUPPORTED, "%s: sparse initializer '%s' is not supported",
                    b->m->path, str_or_empty(gp->sparse_initializer[0]->values
                                                 ? gp->sparse_initializer[0]->values->name
                                                 : NULL));
  for (size_t i = 0; i < gp->n_initializer; i++) {
    const Onnx__TensorProto *t = gp->initializer[i];
    const char *name = str_or_empty(t->name);
    if (!*name)
      return rc__fail(b->e, RC_ERR_FORMAT, "%s: initializer %zu has no name", b->m->path, i);
    RC_TRY(check_name(b, name, "an initializer name"));
    if (value_find(b, name) >= 0)
      return rc__fail(b->e, RC_ERR_FORMAT, "%s: initializer '%s' is given twice", b->m->path, name);
    int vi;
    RC_TRY(value_get(b, name, &vi));
    rc_value *v = &b->g->values[vi];
    char what[300];
    snprintf(what, sizeof what, "initializer '%.256s'", name);
    RC_TRY(rc__tensor_decode(t, what, &b->ctx, &v->decl, b->e));
    v->kind = RC_VALUE_INITIALIZER;
    v->init_index = (int)i;
  }
  return RC_OK;
}

/* A graph input or output must be a dense tensor of a dtype we hold;
 * *dtype is 0 when the file does not say. */
static rc_status check_tensor_type(builder *b, const char *role, const char *name,
                                   const Onnx__TypeProto *tp, int32_t *dtype) {
  *dtype = 0;
  if (!tp) return RC_OK;
  if (tp->value_case != ONNX__TYPE_PROTO__VALUE_TENSOR_TYPE || !tp->tensor_type)
    return rc__fail(b->e, RC_ERR_UNSUPPORTED,
                    "%s: %s '%s' is not a dense tensor (sequence, map, optional or sparse values "
                    "are not supported)", b->m->path, role, name);
  int32_t dt = tp->tensor_type->has_elem_type ? tp->tensor_type->elem_type : 0;
  if (dt && !rc__onnx_dtype_supported(dt))
    return rc__fail(b->e, RC_ERR_UNSUPPORTED, "%s: %s '%s' has data type %d (%s), which is not "
                    "supported", b->m->path, role, name, (int)dt, rc__onnx_dtype_label(dt));
  *dtype = dt;
  return RC_OK;
}

static rc_status decl_from_type(builder *b, const char *name, const Onnx__TypeProto *tp,
                                rc_tensor *decl) {
  memset(decl, 0, sizeof *decl);
  decl->rank = -1;
  int32_t dt;
  RC_TRY(check_tensor_type(b, "graph input", name, tp, &dt));
  if (!tp) return RC_OK;
  const Onnx__TypeProto__Tensor *tt = tp->tensor_type;
  decl->dtype = (rc_dtype)dt;
  if (!tt->shape) return RC_OK;
  int max_rank = b->lim->max_rank > 0 && b->lim->max_rank < RC_MAX_RANK ? b->lim->max_rank
                                                                        : RC_MAX_RANK;
  if (tt->shape->n_dim > (size_t)max_rank)
    return rc__fail(b->e, RC_ERR_LIMIT, "%s: graph input '%s' has rank %zu, over the limit of %d",
                    b->m->path, name, tt->shape->n_dim, max_rank);
  decl->rank = (int)tt->shape->n_dim;
  for (size_t d = 0; d < tt->shape->n_dim; d++) {
    const Onnx__TensorShapeProto__Dimension *dim = tt->shape->dim[d];
    if (dim->value_case == ONNX__TENSOR_SHAPE_PROTO__DIMENSION__VALUE_DIM_VALUE) {
      if (dim->dim_value < 0)
        return rc__fail(b->e, RC_ERR_FORMAT, "%s: graph input '%s': dimension %zu is negative (%lld)",
                        b->m->path, name, d, (long long)dim->dim_value);
      decl->dims[d] = dim->dim_value;
    } else {
      decl->dims[d] = -1; /* dim_param or unknown */
    }
  }
  return RC_OK;
}

static rc_status add_inputs(builder *b, const Onnx__GraphProto *gp) {
  b->g->inputs = rc__arena_alloc(&b->g->arena, sizeof(int) * (gp->n_input + 1));
  if (!b->g->inputs) return nomem(b);
  for (size_t i = 0; i < gp->n_input; i++) {
    const char *name = str_or_empty(gp->input[i]->name);
    if (!*name) return rc__fail(b->e, RC_ERR_FORMAT, "%s: graph input %zu has no name", b->m->path, i);
    int vi = value_find(b, name);
    if (vi >= 0 && b->g->values[vi].kind == RC_VALUE_INITIALIZER) continue; /* IR < 4 style */
    if (vi >= 0)
      return rc__fail(b->e, RC_ERR_FORMAT, "%s: graph input '%s' is listed twice", b->m->path, name);
    RC_TRY(value_get(b, name, &vi));
    rc_value *v = &b->g->values[vi];
    RC_TRY(decl_from_type(b, name, gp->input[i]->type, &v->decl));
    v->kind = RC_VALUE_INPUT;
    b->g->inputs[b->g->n_inputs++] = vi;
  }
  return RC_OK;
}

static rc_status attr_fail(builder *b, const rc_node *n, const char *attr, rc_status code,
                           const char *why) {
  return rc__fail(b->e, code, "%s: node '%s' (%s): attribute '%s' %s", b->m->path, n->label,
                  n->op_type, attr, why);
}

/* Attribute type, inferred from the field set when the file leaves it out. */
static int attr_type(const Onnx__AttributeProto *a) {
  if (a->has_type && a->type != ONNX__ATTRIBUTE_PROTO__ATTRIBUTE_TYPE__UNDEFINED) return (int)a->type;
  if (a->has_f) return RC_ATTR_FLOAT;
  if (a->has_i) return RC_ATTR_INT;
  if (a->has_s) return RC_ATTR_STRING;
  if (a->t) return RC_ATTR_TENSOR;
  if (a->g) return RC_ATTR_GRAPH;
  if (a->n_floats) return RC_ATTR_FLOATS;
  if (a->n_ints) return RC_ATTR_INTS;
  if (a->n_strings) return RC_ATTR_STRINGS;
  return 0;
}

static rc_status copy_bytes_string(builder *b, const rc_node *n, const char *attr,
                                   const ProtobufCBinaryData *s, const char **out) {
  if (s->len > b->lim->max_string)
    return attr_fail(b, n, attr, RC_ERR_LIMIT, "holds a string over the length limit");
  char *c = rc__arena_alloc(&b->g->arena, s->len + 1);
  if (!c) return nomem(b);
  if (s->len) memcpy(c, s->data, s->len);
  c[s->len] = '\0';
  *out = c;
  return RC_OK;
}

static rc_status convert_attr(builder *b, const rc_node *n, const Onnx__AttributeProto *a,
                              rc_attr *out) {
  const char *name = str_or_empty(a->name);
  memset(out, 0, sizeof *out);
  if (!*name) return attr_fail(b, n, "", RC_ERR_FORMAT, "has no name");
  RC_TRY(check_name(b, name, "an attribute name"));
  if (a->ref_attr_name && *a->ref_attr_name)
    return attr_fail(b, n, name, RC_ERR_UNSUPPORTED,
                     "refers to a function attribute; functions are not supported");
  out->name = rc__arena_strdup(&b->g->arena, name);
  if (!out->name) return nomem(b);
  int type = attr_type(a);
  out->type = (rc_attr_type)type;
  switch (type) {
    case RC_ATTR_FLOAT: out->f = a->f; return RC_OK;
    case RC_ATTR_INT: out->i = a->i; return RC_OK;
    case RC_ATTR_STRING: return copy_bytes_string(b, n, name, &a->s, &out->s);
    case RC_ATTR_TENSOR: {
      if (!a->t) return attr_fail(b, n, name, RC_ERR_FORMAT, "is of type TENSOR but holds none");
      char what[400];
      snprintf(what, sizeof what, "node '%.200s' (%.64s): attribute '%.64s'", n->label, n->op_type,
               name);
      return rc__tensor_decode(a->t, what, &b->ctx, &out->t, b->e);
    }
    case RC_ATTR_FLOATS:
    case RC_ATTR_INTS:
    case RC_ATTR_STRINGS: {
      size_t cnt = type == RC_ATTR_FLOATS ? a->n_floats : type == RC_ATTR_INTS ? a->n_ints
                                                                                : a->n_strings;
      if (cnt > INT_MAX) return attr_fail(b, n, name, RC_ERR_LIMIT, "has too many elements");
      out->n = (int)cnt;
      if (type == RC_ATTR_FLOATS) {
        out->floats = rc__arena_memdup(&b->g->arena, a->floats, cnt * sizeof(float));
        return out->floats ? RC_OK : nomem(b);
      }
      if (type == RC_ATTR_INTS) {
        out->ints = rc__arena_memdup(&b->g->arena, a->ints, cnt * sizeof(int64_t));
        return out->ints ? RC_OK : nomem(b);
      }
      out->strings = rc__arena_alloc(&b->g->arena, (cnt + 1) * sizeof(char *));
      if (!out->strings) return nomem(b);
      for (size_t k = 0; k < cnt; k++)
        RC_TRY(copy_bytes_string(b, n, name, &a->strings[k], &out->strings[k]));
      return RC_OK;
    }
    case RC_ATTR_GRAPH:
    case 10: /* GRAPHS */
      return attr_fail(b, n, name, RC_ERR_UNSUPPORTED,
                       "holds a subgraph; control flow (If, Loop, Scan) is not supported");
    case 11: /* SPARSE_TENSOR */
    case 12: /* SPARSE_TENSORS */
      return attr_fail(b, n, name, RC_ERR_UNSUPPORTED, "holds a sparse tensor, which is not supported");
    case 9: /* TENSORS */
      return attr_fail(b, n, name, RC_ERR_UNSUPPORTED, "holds a list of tensors, which is not supported");
    case 13: /* TYPE_PROTO */
    case 14: /* TYPE_PROTOS */
      return attr_fail(b, n, name, RC_ERR_UNSUPPORTED, "holds a type, which is not supported");
    default:
      return attr_fail(b, n, name, RC_ERR_FORMAT, "has no or an unknown type");
  }
}

static rc_status node_fail(builder *b, const rc_node *n, rc_status code, const char *fmt,
                           const char *arg) {
  char why[400];
  snprintf(why, sizeof why, fmt, arg);
  return rc__fail(b->e, code, "%s: node '%s' (%s): %s", b->m->path, n->label, n->op_type, why);
}

static rc_status add_node(builder *b, const Onnx__ModelProto *mp, const Onnx__NodeProto *np,
                          int idx) {
  rc_graph *g = b->g;
  rc_node *n = &g->nodes[idx];
  memset(n, 0, sizeof *n);
  const char *op = str_or_empty(np->op_type), *name = str_or_empty(np->name);
  const char *domain = str_or_empty(np->domain);
  RC_TRY(check_name(b, op, "an op type"));
  RC_TRY(check_name(b, name, "a node name"));
  RC_TRY(check_name(b, domain, "a node domain"));
  n->op_type = rc__arena_strdup(&g->arena, op);
  n->name = rc__arena_strdup(&g->arena, name);
  n->domain = rc__arena_strdup(&g->arena, domain);
  char label[96];
  snprintf(label, sizeof label, "%.64s#%d", op, idx);
  n->label = *name ? n->name : rc__arena_strdup(&g->arena, label);
  if (!n->op_type || !n->name || !n->domain || !n->label) return nomem(b);
  if (!*op) return node_fail(b, n, RC_ERR_FORMAT, "%shas no op_type", "");
  int found;
  n->opset = domain_opset(mp, domain, &found);
  if (!found)
    return node_fail(b, n, RC_ERR_FORMAT, "its domain '%s' is not in the file's opset imports",
                     domain);
  if (np->n_input > INT_MAX || np->n_output > INT_MAX || np->n_attribute > INT_MAX)
    return node_fail(b, n, RC_ERR_LIMIT, "%shas too many inputs, outputs or attributes", "");
  n->n_in = (int)np->n_input;
  n->n_out = (int)np->n_output;
  n->n_attrs = (int)np->n_attribute;
  n->in = rc__arena_alloc(&g->arena, sizeof(int) * (np->n_input + 1));
  n->out = rc__arena_alloc(&g->arena, sizeof(int) * (np->n_output + 1));
  n->attrs = rc__arena_alloc(&g->arena, sizeof(rc_attr) * (np->n_attribute + 1));
  if (!n->in || !n->out || !n->attrs) return nomem(b);
  for (size_t k = 0; k < np->n_input; k++) {
    const char *vn = str_or_empty(np->input[k]);
    n->in[k] = -1;
    if (*vn) RC_TRY(value_get(b, vn, &n->in[k]));
  }
  for (size_t k = 0; k < np->n_output; k++) {
    const char *vn = str_or_empty(np->output[k]);
    n->out[k] = -1;
    if (!*vn) continue;
    int vi;
    RC_TRY(value_get(b, vn, &vi));
    rc_value *v = &g->values[vi];
    if (v->kind == RC_VALUE_INITIALIZER)
      return node_fail(b, n, RC_ERR_FORMAT, "output '%s' is also an initializer", vn);
    if (v->kind == RC_VALUE_INPUT)
      return node_fail(b, n, RC_ERR_FORMAT, "output '%s' is also a graph input", vn);
    if (v->producer >= 0) {
      char why[400];
      snprintf(why, sizeof why, "output '%.150s' is already produced by node '%.150s'", vn,
               g->nodes[v->producer].label);
      return node_fail(b, n, RC_ERR_FORMAT, "%s", why);
    }
    v->producer = idx;
    n->out[k] = vi;
  }
  for (size_t k = 0; k < np->n_attribute; k++) {
    RC_TRY(convert_attr(b, n, np->attribute[k], &n->attrs[k]));
    for (size_t j = 0; j < k; j++)
      if (!strcmp(n->attrs[j].name, n->attrs[k].name))
        return node_fail(b, n, RC_ERR_FORMAT, "attribute '%s' is given twice", n->attrs[k].name);
  }
  return RC_OK;
}

static rc_status add_outputs(builder *b, const Onnx__GraphProto *gp) {
  b->g->outputs = rc__arena_alloc(&b->g->arena, sizeof(int) * (gp->n_output + 1));
  if (!b->g->outputs) return nomem(b);
  for (size_t i = 0; i < gp->n_output; i++) {
    const char *name = str_or_empty(gp->output[i]->name);
    if (!*name) return rc__fail(b->e, RC_ERR_FORMAT, "%s: graph output %zu has no name", b->m->path, i);
    int32_t dt;
    RC_TRY(check_tensor_type(b, "graph output", name, gp->output[i]->type, &dt));
    RC_TRY(value_get(b, name, &b->g->outputs[i]));
  }
  b->g->n_outputs = (int)gp->n_output;
  return RC_OK;
}

static rc_status build_graph(builder *b, const Onnx__ModelProto *mp) {
  const Onnx__GraphProto *gp = mp->graph;
  rc_graph *g = b->g;
  if (!gp) return rc__fail(b->e, RC_ERR_FORMAT, "%s: the file holds no graph", b->m->path);
  RC_TRY(check_versions(b, mp));
  if (gp->n_node > (size_t)(b->lim->max_nodes > 0 ? b->lim->max_nodes : 0))
    return rc__fail(b->e, RC_ERR_LIMIT, "%s: %zu nodes are over the limit of %d", b->m->path,
                    gp->n_node, b->lim->max_nodes);
  size_t n_names = 0;
  RC_TRY(count_names(b, gp, &n_names));
  if (!map_init(&b->names, n_names)) return nomem(b);
  b->cap_values = (int)n_names;
  g->values = rc__arena_alloc(&g->arena, sizeof(rc_value) * (n_names + 1));
  g->nodes = rc__arena_alloc(&g->arena, sizeof(rc_node) * (gp->n_node + 1));
  if (!g->values || !g->nodes) return nomem(b);
  RC_TRY(add_initializers(b, gp));
  RC_TRY(add_inputs(b, gp));
  g->n_nodes = (int)gp->n_node;
  for (size_t i = 0; i < gp->n_node; i++) RC_TRY(add_node(b, mp, gp->node[i], (int)i));
  return add_outputs(b, gp);
}

/* Unpack and build from bytes in memory. Without a folder (with_dir 0)
 * external data is refused. `owned` (buf or NULL) is freed as soon as the
 * message is unpacked, which copies what it keeps. */
static rc_status load_bytes(rc_model **out, const uint8_t *buf, size_t n, uint8_t *owned,
                            const char *path, int with_dir, const rc_load_limits *lim, rc_err *e) {
  rc_model *m = rc__calloc(1, sizeof *m);
  if (!m) {
    rc__free(owned);
    return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory", path);
  }
  rc__arena_init(&m->graph.arena, 0);
  m->file_bytes = n;
  m->path = rc__strdup(path);
  m->dir = with_dir ? rc__path_dir(path) : NULL;
  if (!m->path || (with_dir && !m->dir)) {
    rc__free(owned);
    rc_model_free(m);
    return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory", path);
  }
  rc__pb_alloc pa;
  rc__pb_alloc_init(&pa, rc__pb_alloc_cap(n));
  Onnx__ModelProto *mp = onnx__model_proto__unpack(&pa.base, n, buf);
  rc__free(owned);
  if (!mp) {
    rc_model_free(m);
    if (pa.out_of_memory) return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory reading the model", path);
    if (pa.hit_cap)
      return rc__fail(e, RC_ERR_LIMIT, "%s: the file needs more memory to read than its size allows",
                      path);
    return rc__fail(e, RC_ERR_FORMAT, "%s: not an ONNX file (the ModelProto message does not parse)",
                    path);
  }
  m->proto = mp;
  m->graph.path = m->path;
  builder b = {0};
  b.m = m;
  b.g = &m->graph;
  b.lim = lim;
  b.e = e;
  b.ctx.file = m->path;
  b.ctx.dir = m->dir;
  b.ctx.max_tensor_bytes = lim->max_tensor_bytes;
  b.ctx.total_bytes = &b.total_bytes;
  b.ctx.max_total_bytes = lim->max_total_bytes;
  b.ctx.max_rank = lim->max_rank;
  b.ctx.alloc = arena_cb;
  b.ctx.alloc_data = &m->graph.arena;
  rc_status st = build_graph(&b, mp);
  map_free(&b.names);
  if (st != RC_OK) {
    rc_model_free(m);
    return st;
  }
  *out = m;
  return RC_OK;
}

rc_status rc__model_load_unbound(rc_model **out, const char *path, const rc_load_limits *limits,
                                 rc_err *e) {
  *out = NULL;
  if (!path || !*path) return rc__fail(e, RC_ERR_INVALID, "no model path given");
  rc_load_limits lim;
  if (limits) lim = *limits;
  else rc_load_limits_default(&lim);
  uint8_t *buf;
  size_t n;
  RC_TRY(rc__file_read_all(path, lim.max_file_bytes, &buf, &n, e));
  return load_bytes(out, buf, n, buf, path, 1, &lim, e);
}

rc_status rc__model_load_mem_unbound(rc_model **out, const void *buf, size_t n, const char *name,
                                     const rc_load_limits *limits, rc_err *e) {
  *out = NULL;
  if (!name || !*name) name = "(memory)";
  rc_load_limits lim;
  if (limits) lim = *limits;
  else rc_load_limits_default(&lim);
  if (n > lim.max_file_bytes)
    return rc__fail(e, RC_ERR_LIMIT, "%s: %zu bytes are over the limit of %zu", name, n,
                    lim.max_file_bytes);
  return load_bytes(out, buf, n, NULL, name, 0, &lim, e);
}
