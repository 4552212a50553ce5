/* Structural edits of a loaded model (see reshape.h): an initializer that
 * changes shape, an integer attribute, value_info that went stale. Unlike the
 * data replaced by rc_model_save's `changed` list, these edits go into the
 * kept message itself, so every later save writes them.
 *
 * Memory in the kept message is owned by the protobuf-c allocator of
 * ir/pb_alloc.c (each block carries a size header), so everything put into
 * it here comes from that allocator and everything taken out goes back to
 * it. */
#include <stdint.h>
#include <stdio.h>
#include <string.h>

#include "core/alloc.h"
#include "ir/tensor_proto.h"
#include "onnx/model.h"
#include "onnx/reshape.h"

static void *pb_new(size_t n) {
  rc__pb_alloc a;
  rc__pb_alloc_init(&a, SIZE_MAX);
  return a.base.alloc(a.base.allocator_data, n ? n : 1);
}

static void pb_drop(void *p) {
  ProtobufCAllocator *f = rc__pb_free_allocator();
  f->free(f->allocator_data, p);
}

/* Free every data field of t (typed, raw, external) and leave it empty. */
static void clear_tensor_data(Onnx__TensorProto *t) {
  pb_drop(t->float_data);
  pb_drop(t->int32_data);
  pb_drop(t->int64_data);
  pb_drop(t->double_data);
  pb_drop(t->uint64_data);
  for (size_t i = 0; i < t->n_string_data; i++) pb_drop(t->string_data[i].data);
  pb_drop(t->string_data);
  for (size_t i = 0; i < t->n_external_data; i++)
    onnx__string_string_entry_proto__free_unpacked(t->external_data[i], rc__pb_free_allocator());
  pb_drop(t->external_data);
  if (t->has_raw_data) pb_drop(t->raw_data.data);
  t->float_data = NULL;
  t->int32_data = NULL;
  t->int64_data = NULL;
  t->double_data = NULL;
  t->uint64_data = NULL;
  t->string_data = NULL;
  t->external_data = NULL;
  t->n_float_data = t->n_int32_data = t->n_int64_data = t->n_double_data = t->n_uint64_data = 0;
  t->n_string_data = t->n_external_data = 0;
  t->has_data_location = 0;
  t->data_location = ONNX__TENSOR_PROTO__DATA_LOCATION__DEFAULT;
  t->has_raw_data = 0;
  t->raw_data.data = NULL;
  t->raw_data.len = 0;
}

rc_status rc_model_resize_initializer(rc_model *m, int value, const rc_tensor *t, rc_err *e) {
  rc_graph *g = &m->graph;
  Onnx__GraphProto *gp = ((Onnx__ModelProto *)m->proto)->graph;
  if (value < 0 || value >= g->n_values)
    return rc__fail(e, RC_ERR_INVALID, "%s: value index %d is out of range", m->path, value);
  rc_value *v = &g->values[value];
  if (v->kind != RC_VALUE_INITIALIZER || v->init_index < 0 || (size_t)v->init_index >= gp->n_initializer)
    return rc__fail(e, RC_ERR_INVALID, "%s: value '%s' is not an initializer", m->path, v->name);
  Onnx__TensorProto *tp = gp->initializer[v->init_index];
  if (t->rank != v->decl.rank || (size_t)t->rank != tp->n_dims || t->dtype != v->decl.dtype)
    return rc__fail(e, RC_ERR_SHAPE, "%s: initializer '%s': a resize keeps rank and dtype", m->path,
                    v->name);
  for (int d = 0; d < t->rank; d++)
    if (t->dims[d] < 0)
      return rc__fail(e, RC_ERR_SHAPE, "%s: initializer '%s': negative dimension", m->path, v->name);
  char what[320];
  snprintf(what, sizeof what, "%s: initializer '%.256s'", m->path, v->name);
  uint8_t *raw;
  size_t n;
  RC_TRY(rc__tensor_encode_raw(t, (rc_dtype)tp->data_type, what, &raw, &n, e));
  size_t mem = (size_t)rc_tensor_numel(t) * rc_dtype_size(t->dtype);
  uint8_t *in_file = pb_new(n);
  void *in_graph = rc__arena_alloc(&g->arena, mem ? mem : 1);
  if (!in_file || !in_graph) {
    rc__free(raw);
    pb_drop(in_file);
    return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory", what);
  }
  if (n) memcpy(in_file, raw, n);
  if (mem) memcpy(in_graph, t->data, mem);
  rc__free(raw);
  clear_tensor_data(tp);
  for (int d = 0; d < t->rank; d++) tp->dims[d] = t->dims[d];
  tp->has_raw_data = 1;
  tp->raw_data.data = in_file;
  tp->raw_data.len = n;
  for (int d = 0; d < t->rank; d++) v->decl.dims[d] = t->dims[d];
  v->decl.data = in_graph;
  return RC_OK;
}

/* The message's node for graph node n: nodes are reordered by
 * rc__graph_order, so match on the first named output. */
static Onnx__NodeProto *proto_node(rc_model *m, const rc_node *n) {
  Onnx__GraphProto *gp = ((Onnx__ModelProto *)m->proto)->graph;
  for (int k = 0; k < n->n_out; k++) {
    if (n->out[k] < 0) continue;
    const char *name = m->graph.values[n->out[k]].name;
    for (size_t i = 0; i < gp->n_node; i++)
      if ((size_t)k < gp->node[i]->n_output && gp->node[i]->output[k] &&
          !strcmp(gp->node[i]->output[k], name))
        return gp->node[i];
    return NULL;
  }
  return NULL;
}

rc_status rc_model_set_attr_int(rc_model *m, int node, const char *name, int64_t value, rc_err *e) {
  rc_graph *g = &m->graph;
  if (node < 0 || node >= g->n_nodes)
    return rc__fail(e, RC_ERR_INVALID, "%s: node index %d is out of range", m->path, node);
  rc_node *n = &g->nodes[node];
  Onnx__NodeProto *np = proto_node(m, n);
  if (!np) return rc__fail(e, RC_ERR_INVALID, "%s: node '%s' has no named output to find it by", m->path, n->label);
  Onnx__AttributeProto *a = NULL;
  for (size_t i = 0; i < np->n_attribute; i++)
    if (np->attribute[i]->name && !strcmp(np->attribute[i]->name, name)) a = np->attribute[i];
  if (a && !(a->has_type && a->type == ONNX__ATTRIBUTE_PROTO__ATTRIBUTE_TYPE__INT))
    return rc__fail(e, RC_ERR_INVALID, "%s: node '%s': attribute '%s' is not an integer", m->path,
                    n->label, name);
  if (!a) {
    a = pb_new(sizeof *a);
    char *nm = pb_new(strlen(name) + 1);
    Onnx__AttributeProto **list = pb_new(sizeof *list * (np->n_attribute + 1));
    if (!a || !nm || !list) {
      pb_drop(a);
      pb_drop(nm);
      pb_drop(list);
      return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory", m->path);
    }
    onnx__attribute_proto__init(a);
    a->name = strcpy(nm, name);
    a->has_type = 1;
    a->type = ONNX__ATTRIBUTE_PROTO__ATTRIBUTE_TYPE__INT;
    if (np->n_attribute) memcpy(list, np->attribute, sizeof *list * np->n_attribute);
    list[np->n_attribute] = a;
    pb_drop(np->attribute);
    np->attribute = list;
    np->n_attribute++;
  }
  a->has_i = 1;
  a->i = value;
  for (int i = 0; i < n->n_attrs; i++)
    if (!strcmp(n->attrs[i].name, name)) n->attrs[i].i = value;
  return RC_OK;
}

rc_status rc_model_forget_value_info(rc_model *m, int value, rc_err *e) {
  if (value < 0 || value >= m->graph.n_values)
    return rc__fail(e, RC_ERR_INVALID, "%s: value index %d is out of range", m->path, value);
  Onnx__GraphProto *gp = ((Onnx__ModelProto *)m->proto)->graph;
  const char *name = m->graph.values[value].name;
  size_t kept = 0;
  for (size_t i = 0; i < gp->n_value_info; i++) {
    Onnx__ValueInfoProto *vi = gp->value_info[i];
    if (vi->name && !strcmp(vi->name, name))
      onnx__value_info_proto__free_unpacked(vi, rc__pb_free_allocator());
    else
      gp->value_info[kept++] = vi;
  }
  gp->n_value_info = kept;
  return RC_OK;
}
