/* Pruning library: threshold and tie rules of magnitude pruning, N:M groups
 * (checked with rc__sparsity), channel removal through Conv -> BN -> Relu ->
 * Conv, a residual Add, a depthwise conv, Flatten/Reshape -> Gemm, and a
 * refused structure. Small models are built here with the protobuf-c structs
 * of ONNX's onnx.proto, written to a temp folder, pruned with
 * rc_prune_file and read back. Channel removal is checked two ways: the kept
 * slices are the expected ones, and the pruned model computes exactly what
 * the dense one does when the removed channels feed nothing (their weights
 * in the next layer are zero in the dense model). */
#define _POSIX_C_SOURCE 200809L
#define _DEFAULT_SOURCE

#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "core/alloc.h"
#include "graph/inspect.h"
#include "graph/plan.h"
#include "graph/prune.h"
#include "onnx/model.h"
#include "onnx/onnx.pb-c.h"
#include "test.h"

/* ---------------------------------------------------------------- model builder */

static void *heap[4096];
static int n_heap;

static void *hnew(size_t n) {
  void *p = calloc(1, n ? n : 1);
  heap[n_heap++] = p;
  return p;
}
static char *hstr(const char *s) { return strcpy(hnew(strlen(s) + 1), s); }
static void heap_free(void) {
  while (n_heap) free(heap[--n_heap]);
}

typedef struct mb {
  Onnx__ModelProto m;
  Onnx__GraphProto g;
  Onnx__OperatorSetIdProto op;
  Onnx__OperatorSetIdProto *ops[1];
  Onnx__NodeProto *nodes[32];
  Onnx__TensorProto *inits[64];
  Onnx__ValueInfoProto *ins[2], *outs[2], *vis[16];
} mb;

static mb *mb_new(void) {
  mb *b = hnew(sizeof *b);
  onnx__model_proto__init(&b->m);
  onnx__graph_proto__init(&b->g);
  onnx__operator_set_id_proto__init(&b->op);
  b->op.domain = hstr("");
  b->op.has_version = 1;
  b->op.version = 13;
  b->ops[0] = &b->op;
  b->m.n_opset_import = 1;
  b->m.opset_import = b->ops;
  b->m.has_ir_version = 1;
  b->m.ir_version = 7;
  b->m.graph = &b->g;
  b->g.name = hstr("test");
  b->g.node = b->nodes;
  b->g.initializer = b->inits;
  b->g.input = b->ins;
  b->g.output = b->outs;
  b->g.value_info = b->vis;
  return b;
}

static Onnx__ValueInfoProto *vinfo(const char *name, int rank, const int64_t *dims) {
  Onnx__ValueInfoProto *v = hnew(sizeof *v);
  onnx__value_info_proto__init(v);
  v->name = hstr(name);
  Onnx__TypeProto *tp = hnew(sizeof *tp);
  onnx__type_proto__init(tp);
  Onnx__TypeProto__Tensor *tt = hnew(sizeof *tt);
  onnx__type_proto__tensor__init(tt);
  tt->has_elem_type = 1;
  tt->elem_type = ONNX__TENSOR_PROTO__DATA_TYPE__FLOAT;
  Onnx__TensorShapeProto *sh = hnew(sizeof *sh);
  onnx__tensor_shape_proto__init(sh);
  sh->n_dim = (size_t)rank;
  sh->dim = hnew(sizeof(void *) * (size_t)(rank + 1));
  for (int i = 0; i < rank; i++) {
    Onnx__TensorShapeProto__Dimension *d = hnew(sizeof *d);
    onnx__tensor_shape_proto__dimension__init(d);
    d->value_case = ONNX__TENSOR_SHAPE_PROTO__DIMENSION__VALUE_DIM_VALUE;
    d->dim_value = dims[i];
    sh->dim[i] = d;
  }
  tt->shape = sh;
  tp->value_case = ONNX__TYPE_PROTO__VALUE_TENSOR_TYPE;
  tp->tensor_type = tt;
  v->type = tp;
  return v;
}

static void mb_input(mb *b, const char *name, int rank, const int64_t *dims) {
  b->ins[b->g.n_input++] = vinfo(name, rank, dims);
}
static void mb_output(mb *b, const char *name, int rank, const int64_t *dims) {
  b->outs[b->g.n_output++] = vinfo(name, rank, dims);
}
static void mb_value_info(mb *b, const char *name, int rank, const int64_t *dims) {
  b->vis[b->g.n_value_info++] = vinfo(name, rank, dims);
}

static void mb_init(mb *b, const char *name, int rank, const int64_t *dims, const float *data) {
  Onnx__TensorProto *t = hnew(sizeof *t);
  onnx__tensor_proto__init(t);
  t->name = hstr(name);
  t->has_data_type = 1;
  t->data_type = ONNX__TENSOR_PROTO__DATA_TYPE__FLOAT;
  t->n_dims = (size_t)rank;
  t->dims = hnew(sizeof(int64_t) * (size_t)(rank + 1));
  int64_t n = 1;
  for (int i = 0; i < rank; i++) n *= (t->dims[i] = dims[i]);
  t->has_raw_data = 1;
  t->raw_data.len = (size_t)n * 4;
  t->raw_data.data = memcpy(hnew((size_t)n * 4), data, (size_t)n * 4);
  b->inits[b->g.n_initializer++] = t;
}

static void mb_init_i64(mb *b, const char *name, int n, const int64_t *data) {
  Onnx__TensorProto *t = hnew(sizeof *t);
  onnx__tensor_proto__init(t);
  t->name = hstr(name);
  t->has_data_type = 1;
  t->data_type = ONNX__TENSOR_PROTO__DATA_TYPE__INT64;
  t->n_dims = 1;
  t->dims = hnew(sizeof(int64_t));
  t->dims[0] = n;
  t->has_raw_data = 1;
  t->raw_data.len = (size_t)n * 8;
  t->raw_data.data = memcpy(hnew((size_t)n * 8), data, (size_t)n * 8);
  b->inits[b->g.n_initializer++] = t;
}

/* ins, outs: space-separated names ("-" for an absent optional input). */
static Onnx__NodeProto *mb_node(mb *b, const char *op, const char *name, const char *ins, const char *outs) {
  Onnx__NodeProto *n = hnew(sizeof *n);
  onnx__node_proto__init(n);
  n->op_type = hstr(op);
  n->name = hstr(name);
  n->input = hnew(sizeof(char *) * 8);
  n->output = hnew(sizeof(char *) * 4);
  n->attribute = hnew(sizeof(void *) * 8);
  char buf[256];
  snprintf(buf, sizeof buf, "%s", ins);
  for (char *s = strtok(buf, " "); s; s = strtok(NULL, " ")) n->input[n->n_input++] = hstr(strcmp(s, "-") ? s : "");
  snprintf(buf, sizeof buf, "%s", outs);
  for (char *s = strtok(buf, " "); s; s = strtok(NULL, " ")) n->output[n->n_output++] = hstr(s);
  b->nodes[b->g.n_node++] = n;
  return n;
}

static void attr_int(Onnx__NodeProto *n, const char *name, int64_t v) {
  Onnx__AttributeProto *a = hnew(sizeof *a);
  onnx__attribute_proto__init(a);
  a->name = hstr(name);
  a->has_type = 1;
  a->type = ONNX__ATTRIBUTE_PROTO__ATTRIBUTE_TYPE__INT;
  a->has_i = 1;
  a->i = v;
  n->attribute[n->n_attribute++] = a;
}

static char tmpdir[512];

static const char *tpath(const char *name) {
  static char buf[4][700];
  static int k;
  char *p = buf[k++ & 3];
  snprintf(p, sizeof buf[0], "%s/%s", tmpdir, name);
  return p;
}

static void mb_save(mb *b, const char *path) {
  size_t n = onnx__model_proto__get_packed_size(&b->m);
  uint8_t *buf = malloc(n + 1);
  onnx__model_proto__pack(&b->m, buf);
  FILE *f = fopen(path, "wb");
  fwrite(buf, 1, n, f);
  fclose(f);
  free(buf);
}

/* ---------------------------------------------------------------- helpers */

static const rc_tensor *init_of(rc_model *m, const char *name) {
  int v = rc__graph_find_value(&m->graph, name);
  return v >= 0 ? &m->graph.values[v].decl : NULL;
}

static float at(const rc_tensor *t, int64_t i) { return ((const float *)t->data)[i]; }

/* Output 0 of the model for input x (batch 1). */
static int run_model(const char *path, const float *x, float *y, int64_t ny) {
  rc_model *m;
  rc_err e = {0};
  if (rc_model_load(&m, path, NULL, &e) != RC_OK) {
    fprintf(stderr, "load %s: %s\n", path, e.msg);
    return 0;
  }
  rc_tensor in = m->graph.values[m->graph.inputs[0]].decl;
  rc_plan *p;
  int ok = rc_plan_create(&p, &m->graph, &in, NULL, &e) == RC_OK;
  if (ok) {
    rc_tensor *ti = rc_plan_tensor(p, m->graph.inputs[0]);
    memcpy(ti->data, x, sizeof(float) * (size_t)rc_tensor_numel(ti));
    ok = rc_plan_forward(p, &e) == RC_OK;
    const rc_tensor *to = rc_plan_tensor(p, m->graph.outputs[0]);
    ok = ok && rc_tensor_numel(to) == ny;
    if (ok) memcpy(y, to->data, sizeof(float) * (size_t)ny);
    rc_plan_free(p);
  }
  if (!ok) fprintf(stderr, "run %s: %s\n", path, e.msg);
  rc_model_free(m);
  return ok;
}

static void check_same_outputs(const char *a, const char *b, const float *x, int64_t ny) {
  float ya[64], yb[64];
  CHECK(ny <= 64);
  CHECK(run_model(a, x, ya, ny));
  CHECK(run_model(b, x, yb, ny));
  for (int64_t i = 0; i < ny; i++) CHECK_NEAR(yb[i], ya[i], 1e-5, 1e-5);
}

static int value_info_count(const char *path, const char *name) {
  FILE *f = fopen(path, "rb");
  if (!f) return -1;
  static uint8_t buf[1 << 16];
  size_t n = fread(buf, 1, sizeof buf, f);
  fclose(f);
  Onnx__ModelProto *m = onnx__model_proto__unpack(NULL, n, buf);
  if (!m) return -1;
  int c = 0;
  for (size_t i = 0; i < m->graph->n_value_info; i++) c += !strcmp(m->graph->value_info[i]->name, name);
  onnx__model_proto__free_unpacked(m, NULL);
  return c;
}

static int64_t int_attr_of(const char *path, const char *node, const char *attr) {
  rc_model *m;
  rc_err e = {0};
  if (rc_model_load(&m, path, NULL, &e) != RC_OK) return -1;
  int64_t v = -1;
  for (int i = 0; i < m->graph.n_nodes; i++)
    if (!strcmp(m->graph.nodes[i].name, node)) v = rc__attr_int(&m->graph.nodes[i], attr, -1);
  rc_model_free(m);
  return v;
}

/* ---------------------------------------------------------------- magnitude */

/* x (1,4) -> MatMul A (4,4) -> MatMul B (4,4) -> MatMul C (4,4) -> y */
static void three_matmuls(const float *a, const float *b2, const float *c3) {
  mb *b = mb_new();
  int64_t x[] = {1, 4}, w[] = {4, 4};
  mb_input(b, "x", 2, x);
  mb_output(b, "y", 2, x);
  mb_init(b, "A", 2, w, a);
  mb_init(b, "B", 2, w, b2);
  mb_init(b, "C", 2, w, c3);
  mb_node(b, "MatMul", "mA", "x A", "h1");
  mb_node(b, "MatMul", "mB", "h1 B", "h2");
  mb_node(b, "MatMul", "mC", "h2 C", "y");
  mb_save(b, tpath("mm.onnx"));
}

static int64_t zeros_of(const rc_tensor *t) {
  int64_t z = 0;
  for (int64_t i = 0; i < rc_tensor_numel(t); i++) z += at(t, i) == 0.0f;
  return z;
}

static void test_global_threshold_and_ties(void) {
  float a[16], b2[16], c3[16];
  for (int i = 0; i < 16; i++) {
    a[i] = 1.0f;          /* all tied */
    b2[i] = i < 8 ? -0.5f : 3.0f;
    c3[i] = 2.0f + (float)i;
  }
  three_matmuls(a, b2, c3);
  rc_prune_opts o = {.sparsity = 0.375, .scope = RC_PRUNE_GLOBAL, .include_first_last = 1};
  rc_prune_report r;
  rc_err e = {0};
  CHECK_INT(rc_prune_file(tpath("mm.onnx"), tpath("mm_g.onnx"), &o, &r, &e), RC_OK);
  /* 0.375 * 48 = 18: the eight |-0.5| of B, then ten of the tied 1.0 of A in
   * index order. */
  CHECK_INT(r.weights_zero, 18);
  CHECK_INT(r.weights_total, 48);
  rc_prune_report_free(&r);
  rc_model *m;
  CHECK_INT(rc_model_load(&m, tpath("mm_g.onnx"), NULL, &e), RC_OK);
  const rc_tensor *A = init_of(m, "A"), *B = init_of(m, "B"), *C = init_of(m, "C");
  for (int i = 0; i < 16; i++) {
    CHECK(at(A, i) == (i < 10 ? 0.0f : 1.0f));
    CHECK(at(B, i) == (i < 8 ? 0.0f : 3.0f));
    CHECK(at(C, i) == c3[i]);
  }
  rc_model_free(m);
}

static void test_layer_scope_and_edges(void) {
  float a[16], b2[16], c3[16];
  for (int i = 0; i < 16; i++) {
    a[i] = (float)(i + 1);
    b2[i] = (float)(16 - i);
    c3[i] = 1.0f;
  }
  three_matmuls(a, b2, c3);
  rc_prune_opts o = {.sparsity = 0.5, .scope = RC_PRUNE_LAYER};
  rc_prune_report r;
  rc_err e = {0};
  CHECK_INT(rc_prune_file(tpath("mm.onnx"), tpath("mm_l.onnx"), &o, &r, &e), RC_OK);
  CHECK_INT(r.n_layers, 3);
  if (r.n_layers == 3) {
    CHECK_STR_CONTAINS(r.layers[0].note, "first layer kept dense");
    CHECK_STR_CONTAINS(r.layers[2].note, "last layer kept dense");
    CHECK_INT(r.layers[0].zeros, 0);
    CHECK_INT(r.layers[1].zeros, 8);
    CHECK_INT(r.layers[2].zeros, 0);
  }
  rc_prune_report_free(&r);
  rc_model *m;
  CHECK_INT(rc_model_load(&m, tpath("mm_l.onnx"), NULL, &e), RC_OK);
  const rc_tensor *B = init_of(m, "B");
  for (int i = 0; i < 16; i++) CHECK(at(B, i) == (i >= 8 ? 0.0f : b2[i])); /* the 8 smallest are the last */
  CHECK_INT(zeros_of(init_of(m, "A")), 0);
  rc_model_free(m);
  /* Never over the input; the input is untouched. */
  CHECK(rc_prune_file(tpath("mm.onnx"), tpath("mm.onnx"), &o, &r, &e) != RC_OK);
  CHECK_STR_CONTAINS(e.msg, "never overwrites its input");
  CHECK_INT(rc_model_load(&m, tpath("mm.onnx"), NULL, &e), RC_OK);
  CHECK_INT(zeros_of(init_of(m, "B")), 0);
  rc_model_free(m);
}

/* ---------------------------------------------------------------- N:M */

static void test_n_of_m(void) {
  mb *b = mb_new();
  int64_t x[] = {1, 8, 3, 3}, w1[] = {4, 8, 1, 1}, w2[] = {6, 4, 1, 1}, w3[] = {2, 6, 1, 1}, y[] = {1, 2, 3, 3};
  float d1[32], d2[24], d3[12];
  uint32_t s = 12345;
  for (int i = 0; i < 32; i++) d1[i] = (float)((s = s * 1664525u + 1013904223u) >> 8) / 16777216.0f - 0.5f;
  for (int i = 0; i < 24; i++) d2[i] = (float)(i % 5) - 2.0f;
  for (int i = 0; i < 12; i++) d3[i] = 1.0f;
  mb_input(b, "x", 4, x);
  mb_output(b, "y", 4, y);
  mb_init(b, "W1", 4, w1, d1);
  mb_init(b, "W2", 4, w2, d2);
  mb_init(b, "W3", 4, w3, d3);
  mb_node(b, "Conv", "c1", "x W1", "h1");
  mb_node(b, "Conv", "c2", "h1 W2", "h2");
  mb_node(b, "Conv", "c3", "h2 W3", "y");
  mb_save(b, tpath("nm.onnx"));
  rc_prune_opts o = {.nm_n = 2, .nm_m = 4, .include_first_last = 1};
  rc_prune_report r;
  rc_err e = {0};
  CHECK_INT(rc_prune_file(tpath("nm.onnx"), tpath("nm_out.onnx"), &o, &r, &e), RC_OK);
  if (r.n_layers == 3) {
    CHECK_INT(r.layers[0].nm_n, 2);
    CHECK_INT(r.layers[0].nm_m, 4);
    CHECK_STR_CONTAINS(r.layers[2].note, "6 input channels are not a multiple of 4");
    CHECK_INT(r.layers[2].zeros, 0);
  }
  rc_prune_report_free(&r);
  rc_model *m;
  CHECK_INT(rc_model_load(&m, tpath("nm_out.onnx"), NULL, &e), RC_OK);
  const rc_tensor *W1 = init_of(m, "W1"), *W2 = init_of(m, "W2");
  int64_t zeros;
  int n, mm;
  rc__sparsity(W1, 1, 0, &zeros, &n, &mm);
  CHECK_INT(zeros, 16);
  CHECK_INT(n, 2);
  CHECK_INT(mm, 4);
  /* The two kept in each group are the two largest |w| of the dense group. */
  for (int g = 0; g < 8; g++) {
    for (int k = 0; k < 4; k++) {
      int beaten = 0;
      float a = fabsf(d1[g * 4 + k]);
      for (int j = 0; j < 4; j++) beaten += fabsf(d1[g * 4 + j]) > a;
      CHECK(at(W1, g * 4 + k) == (beaten < 2 ? d1[g * 4 + k] : 0.0f));
    }
  }
  /* W2 groups hold ties (values -2..2 repeating): the lower index stays. */
  rc__sparsity(W2, 1, 0, &zeros, &n, &mm);
  CHECK_INT(mm, 4);
  CHECK(n <= 2);
  rc_model_free(m);
}

/* ---------------------------------------------------------------- channels */

/* x (1,3,2,2) -> c1 (4 out) -> BN -> Relu -> c2 (2 out) -> y. Channels 1 and
 * 3 of c1 have the smallest L1 norm; c2 reads nothing from them. */
static void build_conv_bn_relu_conv(const char *path) {
  mb *b = mb_new();
  int64_t x[] = {1, 3, 2, 2}, w1[] = {4, 3, 1, 1}, c4[] = {4}, w2[] = {2, 4, 1, 1}, y[] = {1, 2, 2, 2};
  int64_t h[] = {1, 4, 2, 2};
  float d1[12], b1[4] = {0.1f, 0.2f, 0.3f, 0.4f}, sc[4] = {1.0f, 2.0f, 0.5f, 1.5f},
        bi[4] = {0.3f, -0.1f, 0.2f, 0.05f}, mean[4] = {0.01f, 0.02f, -0.03f, 0.04f},
        var[4] = {1.0f, 0.5f, 2.0f, 1.5f}, d2[8];
  for (int o = 0; o < 4; o++)
    for (int i = 0; i < 3; i++) d1[o * 3 + i] = (o % 2 ? 0.01f : 1.0f) * (float)(i + 1) * (o == 2 ? -1.0f : 1.0f);
  for (int o = 0; o < 2; o++)
    for (int i = 0; i < 4; i++) d2[o * 4 + i] = i % 2 ? 0.0f : (float)(o + 1) * 0.5f + (float)i;
  mb_input(b, "x", 4, x);
  mb_output(b, "y", 4, y);
  mb_init(b, "W1", 4, w1, d1);
  mb_init(b, "B1", 1, c4, b1);
  mb_init(b, "scale", 1, c4, sc);
  mb_init(b, "bias", 1, c4, bi);
  mb_init(b, "mean", 1, c4, mean);
  mb_init(b, "var", 1, c4, var);
  mb_init(b, "W2", 4, w2, d2);
  mb_node(b, "Conv", "c1", "x W1 B1", "h1");
  mb_node(b, "BatchNormalization", "bn", "h1 scale bias mean var", "h2");
  mb_node(b, "Relu", "relu", "h2", "h3");
  mb_node(b, "Conv", "c2", "h3 W2", "y");
  mb_value_info(b, "h1", 4, h);
  mb_value_info(b, "h3", 4, h);
  mb_save(b, path);
}

static const float x12[12] = {0.5f, -1.0f, 2.0f, 0.25f, 1.5f, -0.5f, 0.75f, 1.0f, -2.0f, 0.3f, 0.6f, -0.9f};

static void test_channels_conv_bn_relu_conv(void) {
  build_conv_bn_relu_conv(tpath("cbrc.onnx"));
  rc_prune_opts o = {.channels = 0.5};
  rc_prune_report r;
  rc_err e = {0};
  CHECK_INT(rc_prune_file(tpath("cbrc.onnx"), tpath("cbrc_out.onnx"), &o, &r, &e), RC_OK);
  if (e.msg[0]) fprintf(stderr, "%s\n", e.msg);
  CHECK_INT(r.channels_removed, 2);
  CHECK(r.params_after < r.params_before);
  CHECK(r.macs_after < r.macs_before);
  rc_prune_report_free(&r);
  rc_model *m;
  CHECK_INT(rc_model_load(&m, tpath("cbrc_out.onnx"), NULL, &e), RC_OK);
  const rc_tensor *W1 = init_of(m, "W1"), *W2 = init_of(m, "W2"), *var = init_of(m, "var");
  CHECK_INT(W1->dims[0], 2);
  CHECK_INT(W2->dims[1], 2);
  CHECK_INT(var->dims[0], 2);
  CHECK(at(var, 0) == 1.0f && at(var, 1) == 2.0f);     /* channels 0 and 2 kept */
  CHECK(at(init_of(m, "B1"), 1) == 0.3f);
  CHECK(at(W1, 3) == -1.0f);                           /* row of channel 2 */
  CHECK(at(W2, 1) == 2.5f && at(W2, 3) == 3.0f);       /* c2 columns 0 and 2 */
  rc_model_free(m);
  check_same_outputs(tpath("cbrc.onnx"), tpath("cbrc_out.onnx"), x12, 8);
  CHECK_INT(value_info_count(tpath("cbrc.onnx"), "h1"), 1);
  CHECK_INT(value_info_count(tpath("cbrc_out.onnx"), "h1"), 0); /* stale shape dropped */
  CHECK_INT(value_info_count(tpath("cbrc_out.onnx"), "h3"), 0);
}

/* x (1,2,2,2) -> cA (4) -> Relu = a; a -> cB (4) = b; Add(a, b) -> cC (2) -> y.
 * cA and cB share channels through the Add; their joint scores make
 * channels 0 and 3 the weakest. */
static void test_channels_residual(void) {
  mb *b = mb_new();
  int64_t x[] = {1, 2, 2, 2}, wa[] = {4, 2, 1, 1}, wb[] = {4, 4, 1, 1}, wc[] = {2, 4, 1, 1}, y[] = {1, 2, 2, 2};
  float da[8] = {0.1f, 0.1f, 2.0f, 1.0f, 1.0f, 2.0f, 0.5f, 0.5f}; /* L1: .2 3 3 1 */
  float db[16], dc[8];
  for (int o = 0; o < 4; o++)
    for (int i = 0; i < 4; i++)
      db[o * 4 + i] = o == 0 || o == 3 ? 0.05f : i == 0 || i == 3 ? 0.0f : 0.5f * (i % 2 ? 1.0f : -1.0f);
  for (int o = 0; o < 2; o++)
    for (int i = 0; i < 4; i++) dc[o * 4 + i] = i == 0 || i == 3 ? 0.0f : (float)(o + i);
  mb_input(b, "x", 4, x);
  mb_output(b, "y", 4, y);
  mb_init(b, "WA", 4, wa, da);
  mb_init(b, "WB", 4, wb, db);
  mb_init(b, "WC", 4, wc, dc);
  mb_node(b, "Conv", "cA", "x WA", "a0");
  mb_node(b, "Relu", "rA", "a0", "a");
  mb_node(b, "Conv", "cB", "a WB", "bo");
  mb_node(b, "Add", "add", "a bo", "s");
  mb_node(b, "Conv", "cC", "s WC", "y");
  mb_save(b, tpath("res.onnx"));
  rc_prune_opts o = {.channels = 0.5};
  rc_prune_report r;
  rc_err e = {0};
  CHECK_INT(rc_prune_file(tpath("res.onnx"), tpath("res_out.onnx"), &o, &r, &e), RC_OK);
  if (e.msg[0]) fprintf(stderr, "%s\n", e.msg);
  CHECK_INT(r.channels_removed, 4); /* two classes, each a channel of cA and of cB */
  rc_prune_report_free(&r);
  rc_model *m;
  CHECK_INT(rc_model_load(&m, tpath("res_out.onnx"), NULL, &e), RC_OK);
  const rc_tensor *WA = init_of(m, "WA"), *WB = init_of(m, "WB"), *WC = init_of(m, "WC");
  CHECK_INT(WA->dims[0], 2);
  CHECK_INT(WB->dims[0], 2);
  CHECK_INT(WB->dims[1], 2);
  CHECK_INT(WC->dims[1], 2);
  CHECK(at(WA, 0) == 2.0f && at(WA, 2) == 1.0f);  /* rows 1 and 2 of WA */
  CHECK(at(WB, 0) == 0.5f && at(WB, 1) == -0.5f); /* WB[1][1], WB[1][2] */
  rc_model_free(m);
  check_same_outputs(tpath("res.onnx"), tpath("res_out.onnx"), x12, 8);
}

/* x (1,2,3,3) -> c1 (4) -> depthwise (group 4, 3x3, pad 1) -> c3 (2) -> y */
static void test_channels_depthwise(void) {
  mb *b = mb_new();
  int64_t x[] = {1, 2, 3, 3}, w1[] = {4, 2, 1, 1}, wd[] = {4, 1, 3, 3}, c4[] = {4}, w3[] = {2, 4, 1, 1},
          y[] = {1, 2, 3, 3};
  float d1[8] = {1, 1, 0.01f, 0.01f, 2, -1, 0.02f, 0.0f}, dd[36], bd[4] = {0.1f, 0.2f, 0.3f, 0.4f}, d3[8];
  for (int i = 0; i < 36; i++) dd[i] = (float)(i % 7) * 0.1f - 0.2f;
  for (int o = 0; o < 2; o++)
    for (int i = 0; i < 4; i++) d3[o * 4 + i] = i % 2 ? 0.0f : 1.0f + (float)o;
  mb_input(b, "x", 4, x);
  mb_output(b, "y", 4, y);
  mb_init(b, "W1", 4, w1, d1);
  mb_init(b, "WD", 4, wd, dd);
  mb_init(b, "BD", 1, c4, bd);
  mb_init(b, "W3", 4, w3, d3);
  mb_node(b, "Conv", "c1", "x W1", "h1");
  Onnx__NodeProto *dw = mb_node(b, "Conv", "dw", "h1 WD BD", "h2");
  attr_int(dw, "group", 4);
  Onnx__AttributeProto *pads = hnew(sizeof *pads);
  onnx__attribute_proto__init(pads);
  pads->name = hstr("pads");
  pads->has_type = 1;
  pads->type = ONNX__ATTRIBUTE_PROTO__ATTRIBUTE_TYPE__INTS;
  pads->n_ints = 4;
  pads->ints = hnew(4 * sizeof(int64_t));
  for (int i = 0; i < 4; i++) pads->ints[i] = 1;
  dw->attribute[dw->n_attribute++] = pads;
  mb_node(b, "Conv", "c3", "h2 W3", "y");
  mb_save(b, tpath("dw.onnx"));
  rc_prune_opts o = {.channels = 0.5};
  rc_prune_report r;
  rc_err e = {0};
  CHECK_INT(rc_prune_file(tpath("dw.onnx"), tpath("dw_out.onnx"), &o, &r, &e), RC_OK);
  if (e.msg[0]) fprintf(stderr, "%s\n", e.msg);
  if (r.n_layers == 3) CHECK_STR_CONTAINS(r.layers[1].note, "depthwise");
  rc_prune_report_free(&r);
  CHECK_INT(int_attr_of(tpath("dw_out.onnx"), "dw", "group"), 2);
  rc_model *m;
  CHECK_INT(rc_model_load(&m, tpath("dw_out.onnx"), NULL, &e), RC_OK);
  CHECK_INT(init_of(m, "WD")->dims[0], 2);
  CHECK(at(init_of(m, "BD"), 1) == 0.3f);
  rc_model_free(m);
  float xin[18];
  for (int i = 0; i < 18; i++) xin[i] = (float)i * 0.1f - 0.7f;
  check_same_outputs(tpath("dw.onnx"), tpath("dw_out.onnx"), xin, 18);
}

/* x (1,1,2,2) -> c1 (4 out, 2x2 spatial) -> Flatten | Reshape [1,16] -> Gemm (3). */
static void flatten_case(int use_reshape) {
  mb *b = mb_new();
  int64_t x[] = {1, 1, 2, 2}, w1[] = {4, 1, 1, 1}, wg[] = {3, 16}, bg[] = {3}, y[] = {1, 3};
  float d1[4] = {1.0f, 0.01f, -2.0f, 0.02f}, dg[48], dbg[3] = {0.1f, 0.2f, 0.3f};
  for (int o = 0; o < 3; o++)
    for (int f = 0; f < 16; f++) dg[o * 16 + f] = (f / 4) % 2 ? 0.0f : (float)(o + 1) + (float)f * 0.1f;
  mb_input(b, "x", 4, x);
  mb_output(b, "y", 2, y);
  mb_init(b, "W1", 4, w1, d1);
  mb_init(b, "WG", 2, wg, dg);
  mb_init(b, "BG", 1, bg, dbg);
  mb_node(b, "Conv", "c1", "x W1", "h1");
  if (use_reshape) {
    int64_t target[] = {1, 16};
    mb_init_i64(b, "target", 2, target);
    mb_node(b, "Reshape", "flat", "h1 target", "f");
  } else {
    mb_node(b, "Flatten", "flat", "h1", "f");
  }
  attr_int(mb_node(b, "Gemm", "fc", "f WG BG", "y"), "transB", 1);
  const char *in = use_reshape ? tpath("rs.onnx") : tpath("fl.onnx");
  const char *out = use_reshape ? tpath("rs_out.onnx") : tpath("fl_out.onnx");
  mb_save(b, in);
  rc_prune_opts o = {.channels = 0.5};
  rc_prune_report r;
  rc_err e = {0};
  CHECK_INT(rc_prune_file(in, out, &o, &r, &e), RC_OK);
  if (e.msg[0]) fprintf(stderr, "%s\n", e.msg);
  rc_prune_report_free(&r);
  rc_model *m;
  CHECK_INT(rc_model_load(&m, out, NULL, &e), RC_OK);
  const rc_tensor *WG = init_of(m, "WG");
  CHECK_INT(WG->dims[1], 8);
  CHECK(at(WG, 4) == 1.0f + 0.8f); /* feature 8 = channel 2, position 0 */
  if (use_reshape) CHECK_INT(((const int64_t *)init_of(m, "target")->data)[1], 8);
  rc_model_free(m);
  float xin[4] = {0.5f, -1.0f, 2.0f, 0.25f};
  check_same_outputs(in, out, xin, 3);
}

static void test_channels_flatten_gemm(void) { flatten_case(0); }
static void test_channels_reshape_gemm(void) { flatten_case(1); }

/* A Softmax over channels cannot be narrowed: c1 keeps its channels, says
 * why, and the written model is still valid. */
static void test_channels_refused(void) {
  mb *b = mb_new();
  int64_t x[] = {1, 2, 1, 1}, w1[] = {4, 2, 1, 1}, w2[] = {2, 4, 1, 1}, y[] = {1, 2, 1, 1};
  float d1[8] = {1, 2, 3, 4, 5, 6, 7, 8}, d2[8] = {1, 1, 1, 1, 2, 2, 2, 2};
  mb_input(b, "x", 4, x);
  mb_output(b, "y", 4, y);
  mb_init(b, "W1", 4, w1, d1);
  mb_init(b, "W2", 4, w2, d2);
  mb_node(b, "Conv", "c1", "x W1", "h1");
  attr_int(mb_node(b, "Softmax", "sm", "h1", "h2"), "axis", 1);
  mb_node(b, "Conv", "c2", "h2 W2", "y");
  mb_save(b, tpath("sm.onnx"));
  rc_prune_opts o = {.channels = 0.5};
  rc_prune_report r;
  rc_err e = {0};
  CHECK_INT(rc_prune_file(tpath("sm.onnx"), tpath("sm_out.onnx"), &o, &r, &e), RC_OK);
  CHECK_INT(r.channels_removed, 0);
  if (r.n_layers == 2) CHECK_STR_CONTAINS(r.layers[0].note, "'sm' (Softmax)");
  rc_prune_report_free(&r);
  float xin[2] = {0.3f, -0.4f};
  check_same_outputs(tpath("sm.onnx"), tpath("sm_out.onnx"), xin, 2);
}

static void test_bad_options(void) {
  build_conv_bn_relu_conv(tpath("opt.onnx"));
  rc_prune_report r;
  rc_err e = {0};
  rc_prune_opts o = {.sparsity = 1.0};
  CHECK_INT(rc_prune_file(tpath("opt.onnx"), tpath("opt_out.onnx"), &o, &r, &e), RC_ERR_INVALID);
  rc_prune_opts o2 = {.nm_n = 4, .nm_m = 4};
  CHECK_INT(rc_prune_file(tpath("opt.onnx"), tpath("opt_out.onnx"), &o2, &r, &e), RC_ERR_INVALID);
  CHECK(access(tpath("opt_out.onnx"), F_OK) != 0); /* nothing written */
}

int main(void) {
  const char *bin = getenv("RECOUP_BINARY_DIR");
  snprintf(tmpdir, sizeof tmpdir, "%s/test_prune.XXXXXX", bin && *bin ? bin : "/tmp");
  if (!mkdtemp(tmpdir)) {
    perror("mkdtemp");
    return 1;
  }
  RUN(test_global_threshold_and_ties);
  RUN(test_layer_scope_and_edges);
  RUN(test_n_of_m);
  RUN(test_channels_conv_bn_relu_conv);
  RUN(test_channels_residual);
  RUN(test_channels_depthwise);
  RUN(test_channels_flatten_gemm);
  RUN(test_channels_reshape_gemm);
  RUN(test_channels_refused);
  RUN(test_bad_options);
  heap_free();
  char cmd[700];
  snprintf(cmd, sizeof cmd, "rm -rf '%s'", tmpdir);
  if (system(cmd) != 0) fprintf(stderr, "could not remove %s\n", tmpdir);
  return TEST_REPORT();
}
