/* Building small ONNX models by hand for tests, with the protobuf-c structs
 * generated from ONNX's own onnx.proto (so fixtures need no binary files and
 * no Python).
 *
 * Everything a builder allocates comes from one pool that ob_free_all()
 * releases at once: protobuf-c's generated free functions only work on
 * messages it unpacked itself, and tests want to poke any field of a built
 * message (hostile cases) without tracking who owns what.
 *
 *   Onnx__ModelProto *m = ob_model(8, 13, "g");
 *   ob_input(m, "x", RC_DTYPE_FLOAT, 2, (int64_t[]){1, 4});
 *   ob_init_float(m, "W", 2, (int64_t[]){4, 4}, w);
 *   ob_attr_int(ob_node(m, "Gemm", "fc", "x W", "y"), "transB", 1);
 *   ob_output(m, "y", RC_DTYPE_FLOAT, 2, (int64_t[]){1, 4});
 *   ob_save(m, path);
 *   ob_free_all();
 *
 * dtype arguments are ONNX TensorProto data type codes (RC_DTYPE_* hold the
 * same numbers). The pool uses plain calloc, not rc__malloc, so a test's
 * out-of-memory injection hits only the library under test. */
#ifndef RC_TEST_ONNX_BUILD_H
#define RC_TEST_ONNX_BUILD_H

#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "onnx/onnx.pb-c.h"

/* Room for each graph list and each node's attributes: ample for test
 * graphs, and a fixed size lets tests index the arrays directly. */
#define OB_LIST_CAP 64
#define OB_ATTR_CAP 16

/* ---- the pool ---- */

static void **ob_pool_;
static size_t ob_pool_n_, ob_pool_cap_;

/* A builder that cannot allocate cannot build the fixture: stop the test. */
static inline void ob_die_(const char *what) {
  fprintf(stderr, "onnx_build: %s\n", what);
  abort();
}

/* n zeroed bytes (at least one, so an empty array is still a distinct pointer). */
static inline void *ob_alloc(size_t n) {
  if (ob_pool_n_ == ob_pool_cap_) {
    size_t cap = ob_pool_cap_ ? 2 * ob_pool_cap_ : 256;
    void **grown = realloc(ob_pool_, cap * sizeof *grown);
    if (!grown) ob_die_("out of memory");
    ob_pool_ = grown;
    ob_pool_cap_ = cap;
  }
  void *p = calloc(1, n ? n : 1);
  if (!p) ob_die_("out of memory");
  return ob_pool_[ob_pool_n_++] = p;
}

static inline void *ob_dup(const void *p, size_t n) { return memcpy(ob_alloc(n), p, n); }
static inline char *ob_str(const char *s) { return ob_dup(s, strlen(s) + 1); }

/* Frees every message built so far; pointers into them are dead after this. */
static inline void ob_free_all(void) {
  while (ob_pool_n_) free(ob_pool_[--ob_pool_n_]);
  free(ob_pool_);
  ob_pool_ = NULL;
  ob_pool_cap_ = 0;
}

/* Appends x; a full list stops the test rather than writing past the end. */
#define OB_PUSH_(arr, n, x, cap) ((n) < (cap) ? (void)((arr)[(n)++] = (x)) : ob_die_("list full: raise " #cap))

/* ---- model and graph ---- */

/* An empty model importing the default domain at `opset`. */
static inline Onnx__ModelProto *ob_model(int64_t ir_version, int64_t opset, const char *graph_name) {
  Onnx__ModelProto *m = ob_alloc(sizeof *m);
  onnx__model_proto__init(m);
  m->has_ir_version = 1;
  m->ir_version = ir_version;
  Onnx__OperatorSetIdProto *op = ob_alloc(sizeof *op);
  onnx__operator_set_id_proto__init(op);
  op->domain = ob_str("");
  op->has_version = 1;
  op->version = opset;
  m->opset_import = ob_alloc(sizeof *m->opset_import);
  m->opset_import[m->n_opset_import++] = op;
  Onnx__GraphProto *g = ob_alloc(sizeof *g);
  onnx__graph_proto__init(g);
  g->name = ob_str(graph_name);
  g->node = ob_alloc(OB_LIST_CAP * sizeof *g->node);
  g->initializer = ob_alloc(OB_LIST_CAP * sizeof *g->initializer);
  g->input = ob_alloc(OB_LIST_CAP * sizeof *g->input);
  g->output = ob_alloc(OB_LIST_CAP * sizeof *g->output);
  g->value_info = ob_alloc(OB_LIST_CAP * sizeof *g->value_info);
  m->graph = g;
  return m;
}

/* ---- tensors ---- */

/* A tensor with a shape and no data yet: tests fill raw_data or one of the
 * typed fields (float_data, int32_data...) themselves. name may be NULL (an
 * attribute's tensor has none). */
static inline Onnx__TensorProto *ob_tensor(const char *name, int dtype, int rank, const int64_t *dims) {
  Onnx__TensorProto *t = ob_alloc(sizeof *t);
  onnx__tensor_proto__init(t);
  if (name) t->name = ob_str(name);
  t->has_data_type = 1;
  t->data_type = dtype;
  t->n_dims = (size_t)rank;
  t->dims = ob_alloc(sizeof(int64_t) * (size_t)(rank + 1));
  if (rank) memcpy(t->dims, dims, sizeof(int64_t) * (size_t)rank);
  return t;
}

/* nbytes is taken as given, not derived from the shape, so tests can write
 * raw_data that disagrees with it. */
static inline Onnx__TensorProto *ob_tensor_raw(const char *name, int dtype, int rank, const int64_t *dims,
                                               const void *data, size_t nbytes) {
  Onnx__TensorProto *t = ob_tensor(name, dtype, rank, dims);
  t->has_raw_data = 1;
  t->raw_data.len = nbytes;
  t->raw_data.data = ob_dup(data, nbytes);
  return t;
}

static inline Onnx__TensorProto *ob_init(Onnx__ModelProto *m, Onnx__TensorProto *t) {
  OB_PUSH_(m->graph->initializer, m->graph->n_initializer, t, OB_LIST_CAP);
  return t;
}

/* The common case: a float initializer, its byte count from its shape. */
static inline Onnx__TensorProto *ob_init_float(Onnx__ModelProto *m, const char *name, int rank, const int64_t *dims,
                                               const float *data) {
  size_t n = 1;
  for (int i = 0; i < rank; i++) n *= (size_t)dims[i];
  return ob_init(m, ob_tensor_raw(name, ONNX__TENSOR_PROTO__DATA_TYPE__FLOAT, rank, dims, data, n * sizeof(float)));
}

/* ---- graph inputs, outputs, value_info ---- */

/* A tensor type; rank < 0 leaves the shape out, a negative dimension becomes
 * the symbolic "batch". */
static inline Onnx__ValueInfoProto *ob_value_info_new_(const char *name, int dtype, int rank, const int64_t *dims) {
  Onnx__ValueInfoProto *v = ob_alloc(sizeof *v);
  onnx__value_info_proto__init(v);
  v->name = ob_str(name);
  Onnx__TypeProto *tp = ob_alloc(sizeof *tp);
  onnx__type_proto__init(tp);
  Onnx__TypeProto__Tensor *tt = ob_alloc(sizeof *tt);
  onnx__type_proto__tensor__init(tt);
  tt->has_elem_type = 1;
  tt->elem_type = dtype;
  tp->value_case = ONNX__TYPE_PROTO__VALUE_TENSOR_TYPE;
  tp->tensor_type = tt;
  v->type = tp;
  if (rank < 0) return v;
  Onnx__TensorShapeProto *sh = ob_alloc(sizeof *sh);
  onnx__tensor_shape_proto__init(sh);
  sh->n_dim = (size_t)rank;
  sh->dim = ob_alloc(sizeof *sh->dim * (size_t)(rank + 1));
  for (int i = 0; i < rank; i++) {
    Onnx__TensorShapeProto__Dimension *d = ob_alloc(sizeof *d);
    onnx__tensor_shape_proto__dimension__init(d);
    if (dims[i] >= 0) {
      d->value_case = ONNX__TENSOR_SHAPE_PROTO__DIMENSION__VALUE_DIM_VALUE;
      d->dim_value = dims[i];
    } else {
      d->value_case = ONNX__TENSOR_SHAPE_PROTO__DIMENSION__VALUE_DIM_PARAM;
      d->dim_param = ob_str("batch");
    }
    sh->dim[i] = d;
  }
  tt->shape = sh;
  return v;
}

static inline Onnx__ValueInfoProto *ob_declare_(Onnx__ValueInfoProto **list, size_t *n, const char *name, int dtype,
                                                int rank, const int64_t *dims) {
  Onnx__ValueInfoProto *v = ob_value_info_new_(name, dtype, rank, dims);
  OB_PUSH_(list, *n, v, OB_LIST_CAP);
  return v;
}

static inline Onnx__ValueInfoProto *ob_input(Onnx__ModelProto *m, const char *name, int dtype, int rank,
                                             const int64_t *dims) {
  return ob_declare_(m->graph->input, &m->graph->n_input, name, dtype, rank, dims);
}

static inline Onnx__ValueInfoProto *ob_output(Onnx__ModelProto *m, const char *name, int dtype, int rank,
                                              const int64_t *dims) {
  return ob_declare_(m->graph->output, &m->graph->n_output, name, dtype, rank, dims);
}

/* A declared shape for an inner value (graph.value_info). */
static inline Onnx__ValueInfoProto *ob_value_info(Onnx__ModelProto *m, const char *name, int dtype, int rank,
                                                  const int64_t *dims) {
  return ob_declare_(m->graph->value_info, &m->graph->n_value_info, name, dtype, rank, dims);
}

/* ---- nodes and attributes ---- */

/* Splits a space-separated list of value names into a pooled array; "-"
 * stands for an absent optional ("" in the file), which a space-separated
 * list could not otherwise show. */
static inline char **ob_names_(const char *list, size_t *n) {
  size_t words = 0;
  for (const char *s = list; s && *s; s++) words += *s != ' ' && (s == list || s[-1] == ' ');
  char **v = ob_alloc(sizeof *v * (words + 1));
  *n = 0;
  for (const char *s = list; s && *s;) {
    s += strspn(s, " ");
    size_t len = strcspn(s, " ");
    if (!len) break;
    char *w = ob_alloc(len + 1);
    if (!(len == 1 && *s == '-')) memcpy(w, s, len);
    v[(*n)++] = w;
    s += len;
  }
  return v;
}

/* Appends a node. ins and outs are space-separated names, "-" for an absent
 * optional input or output; name may be NULL (left out of the file). */
static inline Onnx__NodeProto *ob_node(Onnx__ModelProto *m, const char *op, const char *name, const char *ins,
                                       const char *outs) {
  Onnx__NodeProto *n = ob_alloc(sizeof *n);
  onnx__node_proto__init(n);
  n->op_type = ob_str(op);
  if (name) n->name = ob_str(name);
  n->input = ob_names_(ins, &n->n_input);
  n->output = ob_names_(outs, &n->n_output);
  n->attribute = ob_alloc(OB_ATTR_CAP * sizeof *n->attribute);
  OB_PUSH_(m->graph->node, m->graph->n_node, n, OB_LIST_CAP);
  return n;
}

/* An attribute with its name and type set and no value: the caller fills the
 * field that goes with the type (or, for a hostile case, another one). type
 * is an AttributeProto.AttributeType code. */
static inline Onnx__AttributeProto *ob_attr(Onnx__NodeProto *n, const char *name, int type) {
  Onnx__AttributeProto *a = ob_alloc(sizeof *a);
  onnx__attribute_proto__init(a);
  a->name = ob_str(name);
  a->has_type = 1;
  a->type = (Onnx__AttributeProto__AttributeType)type;
  OB_PUSH_(n->attribute, n->n_attribute, a, OB_ATTR_CAP);
  return a;
}

static inline void ob_attr_int(Onnx__NodeProto *n, const char *name, int64_t v) {
  Onnx__AttributeProto *a = ob_attr(n, name, ONNX__ATTRIBUTE_PROTO__ATTRIBUTE_TYPE__INT);
  a->has_i = 1;
  a->i = v;
}

static inline void ob_attr_ints(Onnx__NodeProto *n, const char *name, int count, const int64_t *v) {
  Onnx__AttributeProto *a = ob_attr(n, name, ONNX__ATTRIBUTE_PROTO__ATTRIBUTE_TYPE__INTS);
  a->n_ints = (size_t)count;
  a->ints = ob_dup(v, sizeof(int64_t) * (size_t)count);
}

/* ---- writing ---- */

/* The serialized model in a malloc'd buffer (the caller frees it), for tests
 * that damage the bytes before writing them. */
static inline uint8_t *ob_pack(const Onnx__ModelProto *m, size_t *n) {
  *n = onnx__model_proto__get_packed_size(m);
  uint8_t *b = malloc(*n + 1);
  if (!b) ob_die_("out of memory");
  onnx__model_proto__pack(m, b);
  return b;
}

/* 1 when the whole file was written and closed. */
static inline int ob_save(const Onnx__ModelProto *m, const char *path) {
  size_t n;
  uint8_t *b = ob_pack(m, &n);
  FILE *f = fopen(path, "wb");
  int ok = f && fwrite(b, 1, n, f) == n;
  if (f && fclose(f) != 0) ok = 0;
  free(b);
  return ok;
}

#endif
