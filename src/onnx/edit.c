/* Structural edits of the kept ModelProto (declared in model.h): add
 * initializers and nodes, rename node inputs and outputs, remove nodes and
 * what no node uses any more, and restore topological order before saving.
 *
 * Everything added to the message is allocated the way the reader's
 * allocator does (rc__pb_alloc: a size header in front of each block), so
 * rc_model_free releases edited and loaded parts alike with one
 * free_unpacked. */
#define _POSIX_C_SOURCE 200809L

#include <stdint.h>
#include <stdio.h>
#include <string.h>

#include "core/alloc.h"
#include "ir/tensor_proto.h"
#include "onnx/model.h"

/* ---- memory in the message's own format ---- */

static void *pb_new(size_t n) {
  rc__pb_alloc a;
  rc__pb_alloc_init(&a, SIZE_MAX);
  void *p = a.base.alloc(a.base.allocator_data, n ? n : 1);
  if (p) memset(p, 0, n ? n : 1);
  return p;
}

static void pb_delete(void *p) {
  ProtobufCAllocator *f = rc__pb_free_allocator();
  f->free(f->allocator_data, p);
}

static char *pb_strdup(const char *s) {
  size_t n = strlen(s) + 1;
  char *p = pb_new(n);
  if (p) memcpy(p, s, n);
  return p;
}

/* Grow a repeated pointer field by one slot; the old array is freed. */
static int pb_append(void ***arr, size_t *n, void *item) {
  void **grown = pb_new(sizeof(void *) * (*n + 1));
  if (!grown) return 0;
  if (*n) memcpy(grown, *arr, sizeof(void *) * *n);
  grown[*n] = item;
  pb_delete(*arr);
  *arr = grown;
  (*n)++;
  return 1;
}

static Onnx__GraphProto *graph_of(rc_model *m) { return ((Onnx__ModelProto *)m->proto)->graph; }
static const Onnx__GraphProto *cgraph_of(const rc_model *m) {
  return ((const Onnx__ModelProto *)m->proto)->graph;
}

static rc_status nomem(const rc_model *m, rc_err *e) {
  return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory while editing the model", m->path);
}

static int is_name(const char *a, const char *b) { return a && b && !strcmp(a, b); }

/* ---- lookups ---- */

int rc_model_edit_producer(const rc_model *m, const char *value) {
  const Onnx__GraphProto *gp = cgraph_of(m);
  for (size_t i = 0; i < gp->n_node; i++)
    for (size_t k = 0; k < gp->node[i]->n_output; k++)
      if (is_name(gp->node[i]->output[k], value)) return (int)i;
  return -1;
}

int rc_model_edit_name_used(const rc_model *m, const char *name) {
  const Onnx__GraphProto *gp = cgraph_of(m);
  for (size_t i = 0; i < gp->n_initializer; i++)
    if (is_name(gp->initializer[i]->name, name)) return 1;
  for (size_t i = 0; i < gp->n_input; i++)
    if (is_name(gp->input[i]->name, name)) return 1;
  for (size_t i = 0; i < gp->n_output; i++)
    if (is_name(gp->output[i]->name, name)) return 1;
  for (size_t i = 0; i < gp->n_node; i++) {
    const Onnx__NodeProto *n = gp->node[i];
    if (is_name(n->name, name)) return 1;
    for (size_t k = 0; k < n->n_input; k++)
      if (is_name(n->input[k], name)) return 1;
    for (size_t k = 0; k < n->n_output; k++)
      if (is_name(n->output[k], name)) return 1;
  }
  return 0;
}

rc_status rc_model_edit_unique_name(const rc_model *m, const char *base, char *buf, size_t n, rc_err *e) {
  for (int i = 0; i < 1000000; i++) {
    int w = i ? snprintf(buf, n, "%s_%d", base, i) : snprintf(buf, n, "%s", base);
    if (w < 0 || (size_t)w >= n)
      return rc__fail(e, RC_ERR_LIMIT, "%s: name '%.64s...' is too long for a new tensor", m->path, base);
    if (!rc_model_edit_name_used(m, buf)) return RC_OK;
  }
  return rc__fail(e, RC_ERR_LIMIT, "%s: no free name derived from '%.64s'", m->path, base);
}

/* ---- initializers ---- */

rc_status rc_model_edit_add_initializer(rc_model *m, const char *name, const rc_tensor *t, rc_err *e) {
  Onnx__GraphProto *gp = graph_of(m);
  if (!name || !*name) return rc__fail(e, RC_ERR_INVALID, "%s: a new initializer needs a name", m->path);
  if (m->graph.ir_version < 4)
    return rc__fail(e, RC_ERR_UNSUPPORTED,
                    "%s: IR version %lld lists initializers as graph inputs; adding '%s' needs IR version 4 or later",
                    m->path, (long long)m->graph.ir_version, name);
  if (rc_model_edit_name_used(m, name))
    return rc__fail(e, RC_ERR_INVALID, "%s: cannot add initializer '%s': the name is in use", m->path, name);
  char what[320];
  snprintf(what, sizeof what, "%s: new initializer '%.256s'", m->path, name);
  uint8_t *raw;
  size_t n;
  RC_TRY(rc__tensor_encode_raw(t, t->dtype, what, &raw, &n, e));
  Onnx__TensorProto *tp = pb_new(sizeof *tp);
  uint8_t *bytes = pb_new(n);
  int64_t *dims = pb_new(sizeof(int64_t) * (size_t)(t->rank > 0 ? t->rank : 1));
  char *nm = pb_strdup(name);
  if (!tp || !bytes || !dims || !nm) {
    rc__free(raw);
    pb_delete(tp);
    pb_delete(bytes);
    pb_delete(dims);
    pb_delete(nm);
    return nomem(m, e);
  }
  onnx__tensor_proto__init(tp);
  if (n) memcpy(bytes, raw, n);
  rc__free(raw);
  for (int d = 0; d < t->rank; d++) dims[d] = t->dims[d];
  tp->name = nm;
  tp->has_data_type = 1;
  tp->data_type = (int32_t)t->dtype;
  tp->n_dims = (size_t)t->rank;
  tp->dims = dims;
  tp->has_raw_data = 1;
  tp->raw_data.len = n;
  tp->raw_data.data = bytes;
  if (!pb_append((void ***)&gp->initializer, &gp->n_initializer, tp)) {
    onnx__tensor_proto__free_unpacked(tp, rc__pb_free_allocator());
    return nomem(m, e);
  }
  return RC_OK;
}

/* ---- nodes ---- */

static Onnx__AttributeProto *attr_new(const rc_attr *a) {
  Onnx__AttributeProto *ap = pb_new(sizeof *ap);
  if (!ap) return NULL;
  onnx__attribute_proto__init(ap);
  ap->name = pb_strdup(a->name);
  ap->has_type = 1;
  ap->type = (Onnx__AttributeProto__AttributeType)a->type;
  int ok = ap->name != NULL;
  switch (a->type) {
    case RC_ATTR_INT: ap->has_i = 1; ap->i = a->i; break;
    case RC_ATTR_FLOAT: ap->has_f = 1; ap->f = a->f; break;
    case RC_ATTR_STRING:
      ap->has_s = 1;
      ap->s.len = strlen(a->s);
      ap->s.data = (uint8_t *)pb_strdup(a->s);
      ok = ok && ap->s.data;
      break;
    case RC_ATTR_INTS:
      ap->ints = pb_new(sizeof(int64_t) * (size_t)(a->n > 0 ? a->n : 1));
      ok = ok && ap->ints;
      if (ap->ints) {
        for (int i = 0; i < a->n; i++) ap->ints[i] = a->ints[i];
        ap->n_ints = (size_t)a->n;
      }
      break;
    default: ok = 0;
  }
  if (!ok) {
    onnx__attribute_proto__free_unpacked(ap, rc__pb_free_allocator());
    return NULL;
  }
  return ap;
}

static int attr_type_ok(rc_attr_type t) {
  return t == RC_ATTR_INT || t == RC_ATTR_FLOAT || t == RC_ATTR_STRING || t == RC_ATTR_INTS;
}

/* Copies of names; a failed copy leaves a NULL slot, which free_unpacked skips. */
static char **names_new(const char *const *names, int n) {
  char **arr = pb_new(sizeof(char *) * (size_t)(n > 0 ? n : 1));
  if (!arr) return NULL;
  for (int i = 0; i < n; i++)
    if (!(arr[i] = pb_strdup(names[i] ? names[i] : ""))) return arr;
  return arr;
}

static int names_complete(char **arr, size_t n) {
  if (!arr) return 0;
  for (size_t i = 0; i < n; i++)
    if (!arr[i]) return 0;
  return 1;
}

rc_status rc_model_edit_add_node(rc_model *m, const char *op_type, const char *name, const char *const *inputs,
                                 int n_in, const char *const *outputs, int n_out, const rc_attr *attrs,
                                 int n_attrs, rc_err *e) {
  Onnx__GraphProto *gp = graph_of(m);
  if (!op_type || !*op_type || n_in < 0 || n_out < 1 || n_attrs < 0)
    return rc__fail(e, RC_ERR_INVALID, "%s: a new node needs an op type and at least one output", m->path);
  for (int i = 0; i < n_out; i++)
    if (!outputs[i] || !*outputs[i] || rc_model_edit_producer(m, outputs[i]) >= 0)
      return rc__fail(e, RC_ERR_INVALID, "%s: new %s node: output '%s' is empty or already produced", m->path,
                      op_type, outputs[i] ? outputs[i] : "");
  for (int i = 0; i < n_attrs; i++)
    if (!attrs[i].name || !attr_type_ok(attrs[i].type) || (attrs[i].type == RC_ATTR_STRING && !attrs[i].s))
      return rc__fail(e, RC_ERR_UNSUPPORTED, "%s: new %s node: attribute %d must be an int, float, string or ints",
                      m->path, op_type, i);
  Onnx__NodeProto *np = pb_new(sizeof *np);
  if (!np) return nomem(m, e);
  onnx__node_proto__init(np);
  int ok = (np->op_type = pb_strdup(op_type)) != NULL;
  if (ok && name && *name) ok = (np->name = pb_strdup(name)) != NULL;
  if (ok && n_in) {
    np->input = names_new(inputs, n_in);
    np->n_input = np->input ? (size_t)n_in : 0;
    ok = names_complete(np->input, np->n_input);
  }
  if (ok) {
    np->output = names_new(outputs, n_out);
    np->n_output = np->output ? (size_t)n_out : 0;
    ok = names_complete(np->output, np->n_output);
  }
  if (ok && n_attrs) {
    np->attribute = pb_new(sizeof(Onnx__AttributeProto *) * (size_t)n_attrs);
    ok = np->attribute != NULL;
    for (int i = 0; ok && i < n_attrs; i++) {
      np->attribute[i] = attr_new(&attrs[i]);
      if (np->attribute[i]) np->n_attribute = (size_t)i + 1;
      else ok = 0;
    }
  }
  if (!ok || !pb_append((void ***)&gp->node, &gp->n_node, np)) {
    onnx__node_proto__free_unpacked(np, rc__pb_free_allocator());
    return nomem(m, e);
  }
  return RC_OK;
}

static rc_status check_node(const rc_model *m, int node, rc_err *e) {
  if (node < 0 || (size_t)node >= cgraph_of(m)->n_node)
    return rc__fail(e, RC_ERR_INVALID, "%s: node index %d is out of range", m->path, node);
  return RC_OK;
}

static rc_status set_name(const rc_model *m, char **slot, const char *name, rc_err *e) {
  char *s = pb_strdup(name);
  if (!s) return nomem(m, e);
  pb_delete(*slot);
  *slot = s;
  return RC_OK;
}

rc_status rc_model_edit_set_input(rc_model *m, int node, int slot, const char *name, rc_err *e) {
  RC_TRY(check_node(m, node, e));
  Onnx__NodeProto *np = graph_of(m)->node[node];
  if (slot < 0 || (size_t)slot > np->n_input)
    return rc__fail(e, RC_ERR_INVALID, "%s: node %d (%s) has no input %d", m->path, node, np->op_type, slot);
  if ((size_t)slot == np->n_input) { /* append an optional input the node did not have */
    char *s = pb_strdup(name);
    if (!s || !pb_append((void ***)&np->input, &np->n_input, s)) {
      pb_delete(s);
      return nomem(m, e);
    }
    return RC_OK;
  }
  return set_name(m, &np->input[slot], name, e);
}

rc_status rc_model_edit_set_output(rc_model *m, int node, int slot, const char *name, rc_err *e) {
  RC_TRY(check_node(m, node, e));
  Onnx__NodeProto *np = graph_of(m)->node[node];
  if (slot < 0 || (size_t)slot >= np->n_output)
    return rc__fail(e, RC_ERR_INVALID, "%s: node %d (%s) has no output %d", m->path, node, np->op_type, slot);
  if (rc_model_edit_producer(m, name) >= 0)
    return rc__fail(e, RC_ERR_INVALID, "%s: '%s' is already produced by another node", m->path, name);
  return set_name(m, &np->output[slot], name, e);
}

rc_status rc_model_edit_rewire(rc_model *m, const char *from, const char *to, int *count, rc_err *e) {
  Onnx__GraphProto *gp = graph_of(m);
  int c = 0;
  for (size_t i = 0; i < gp->n_node; i++) {
    Onnx__NodeProto *np = gp->node[i];
    for (size_t k = 0; k < np->n_input; k++)
      if (is_name(np->input[k], from)) {
        RC_TRY(set_name(m, &np->input[k], to, e));
        c++;
      }
  }
  if (count) *count = c;
  return RC_OK;
}

rc_status rc_model_edit_remove_node(rc_model *m, int node, rc_err *e) {
  RC_TRY(check_node(m, node, e));
  Onnx__GraphProto *gp = graph_of(m);
  onnx__node_proto__free_unpacked(gp->node[node], rc__pb_free_allocator());
  memmove(&gp->node[node], &gp->node[node + 1], sizeof(gp->node[0]) * (gp->n_node - (size_t)node - 1));
  gp->n_node--;
  return RC_OK;
}

/* ---- clean-up ---- */

static int node_uses(const Onnx__GraphProto *gp, const char *name) {
  for (size_t i = 0; i < gp->n_node; i++)
    for (size_t k = 0; k < gp->node[i]->n_input; k++)
      if (is_name(gp->node[i]->input[k], name)) return 1;
  for (size_t i = 0; i < gp->n_output; i++)
    if (is_name(gp->output[i]->name, name)) return 1;
  return 0;
}

static int value_exists(const Onnx__GraphProto *gp, const char *name) {
  for (size_t i = 0; i < gp->n_node; i++)
    for (size_t k = 0; k < gp->node[i]->n_output; k++)
      if (is_name(gp->node[i]->output[k], name)) return 1;
  for (size_t i = 0; i < gp->n_input; i++)
    if (is_name(gp->input[i]->name, name)) return 1;
  for (size_t i = 0; i < gp->n_initializer; i++)
    if (is_name(gp->initializer[i]->name, name)) return 1;
  return 0;
}

/* Keep the graph IR's init_index pointing at the same TensorProtos. */
static void forget_initializer(rc_model *m, int index) {
  rc_graph *g = &m->graph;
  for (int v = 0; v < g->n_values; v++) {
    if (g->values[v].init_index == index) g->values[v].init_index = -1;
    else if (g->values[v].init_index > index) g->values[v].init_index--;
  }
}

static void remove_graph_input(Onnx__GraphProto *gp, const char *name) {
  for (size_t i = 0; i < gp->n_input; i++)
    if (is_name(gp->input[i]->name, name)) {
      onnx__value_info_proto__free_unpacked(gp->input[i], rc__pb_free_allocator());
      memmove(&gp->input[i], &gp->input[i + 1], sizeof(gp->input[0]) * (gp->n_input - i - 1));
      gp->n_input--;
      return;
    }
}

int rc_model_edit_drop_unused(rc_model *m) {
  Onnx__GraphProto *gp = graph_of(m);
  int dropped = 0;
  for (size_t i = gp->n_initializer; i-- > 0;) {
    Onnx__TensorProto *t = gp->initializer[i];
    if (!t->name || node_uses(gp, t->name)) continue;
    remove_graph_input(gp, t->name); /* an initializer also listed as an input (IR < 4 style) */
    onnx__tensor_proto__free_unpacked(t, rc__pb_free_allocator());
    memmove(&gp->initializer[i], &gp->initializer[i + 1], sizeof(gp->initializer[0]) * (gp->n_initializer - i - 1));
    gp->n_initializer--;
    forget_initializer(m, (int)i);
    dropped++;
  }
  for (size_t i = gp->n_value_info; i-- > 0;) {
    Onnx__ValueInfoProto *vi = gp->value_info[i];
    if (vi->name && value_exists(gp, vi->name)) continue;
    onnx__value_info_proto__free_unpacked(vi, rc__pb_free_allocator());
    memmove(&gp->value_info[i], &gp->value_info[i + 1], sizeof(gp->value_info[0]) * (gp->n_value_info - i - 1));
    gp->n_value_info--;
  }
  return dropped;
}

/* ---- order ---- */

/* Index of the node producing name, or -1 (graph input, initializer, empty). */
static int producer_index(const Onnx__GraphProto *gp, const char *name) {
  if (!name || !*name) return -1;
  for (size_t i = 0; i < gp->n_node; i++)
    for (size_t k = 0; k < gp->node[i]->n_output; k++)
      if (is_name(gp->node[i]->output[k], name)) return (int)i;
  return -1;
}

rc_status rc_model_edit_sort(rc_model *m, rc_err *e) {
  Onnx__GraphProto *gp = graph_of(m);
  size_t n = gp->n_node, n_edges = 0;
  if (!n) return RC_OK;
  for (size_t i = 0; i < n; i++) n_edges += gp->node[i]->n_input;
  Onnx__NodeProto **order = rc__malloc(sizeof *order * n);
  int *pending = rc__calloc(n, sizeof(int)); /* inputs whose producer is not placed yet */
  int *src = rc__malloc(sizeof(int) * (n_edges ? n_edges : 1));
  unsigned char *done = rc__calloc(n, 1);
  if (!order || !pending || !src || !done) {
    rc__free(order);
    rc__free(pending);
    rc__free(src);
    rc__free(done);
    return nomem(m, e);
  }
  size_t ei = 0;
  for (size_t i = 0; i < n; i++)
    for (size_t k = 0; k < gp->node[i]->n_input; k++) {
      src[ei] = producer_index(gp, gp->node[i]->input[k]);
      if (src[ei] >= 0) pending[i]++;
      ei++;
    }
  /* Place the first ready node in file order each time, so an already
   * sorted list stays exactly as it is. Quadratic: fine for one rewrite. */
  size_t placed = 0;
  rc_status st = RC_OK;
  while (placed < n) {
    size_t pick = n;
    for (size_t i = 0; i < n && pick == n; i++)
      if (!done[i] && pending[i] == 0) pick = i;
    if (pick == n) {
      size_t first = 0;
      while (done[first]) first++;
      st = rc__fail(e, RC_ERR_FORMAT, "%s: node %zu (%s) and the nodes it reads from form a cycle", m->path, first,
                    gp->node[first]->op_type ? gp->node[first]->op_type : "?");
      break;
    }
    done[pick] = 1;
    order[placed++] = gp->node[pick];
    ei = 0;
    for (size_t i = 0; i < n; i++)
      for (size_t k = 0; k < gp->node[i]->n_input; k++, ei++)
        if (src[ei] == (int)pick) pending[i]--;
  }
  if (st == RC_OK) memcpy(gp->node, order, sizeof *order * n);
  rc__free(order);
  rc__free(pending);
  rc__free(src);
  rc__free(done);
  return st;
}

/* ---- metadata of our own ---- */

const char *rc_model_metadata(const rc_model *m, const char *key) {
  const Onnx__ModelProto *mp = m->proto;
  for (size_t i = 0; i < mp->n_metadata_props; i++)
    if (is_name(mp->metadata_props[i]->key, key)) return mp->metadata_props[i]->value ? mp->metadata_props[i]->value : "";
  return NULL;
}

rc_status rc_model_edit_set_metadata(rc_model *m, const char *key, const char *value, rc_err *e) {
  Onnx__ModelProto *mp = m->proto;
  char *v = pb_strdup(value);
  if (!v) return nomem(m, e);
  for (size_t i = 0; i < mp->n_metadata_props; i++)
    if (is_name(mp->metadata_props[i]->key, key)) {
      pb_delete(mp->metadata_props[i]->value);
      mp->metadata_props[i]->value = v;
      return RC_OK;
    }
  Onnx__StringStringEntryProto *kv = pb_new(sizeof *kv);
  char *k = pb_strdup(key);
  if (!kv || !k) {
    pb_delete(kv);
    pb_delete(k);
    pb_delete(v);
    return nomem(m, e);
  }
  onnx__string_string_entry_proto__init(kv);
  kv->key = k;
  kv->value = v;
  if (!pb_append((void ***)&mp->metadata_props, &mp->n_metadata_props, kv)) {
    pb_delete(kv);
    pb_delete(k);
    pb_delete(v);
    return nomem(m, e);
  }
  return RC_OK;
}
