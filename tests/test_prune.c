/* Pruning library: threshold and tie rules of magnitude pruning, N:M groups
 * (checked with rc__sparsity), channel removal through Conv -> BN -> Relu ->
 * Conv, a residual Add, a depthwise conv, Flatten/Reshape -> Gemm, and a
 * refused structure. Small models are built here with onnx_build.h,
 * written to a temp folder, pruned with rc_prune_file and read back. Channel removal is checked two ways: the kept
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

#include "compress/prune.h"
#include "core/alloc.h"
#include "onnx/model.h"
#include "onnx/onnx.pb-c.h"
#include "plan/inspect.h"
#include "plan/load.h"
#include "plan/plan.h"
#include "onnx_build.h"
#include "test.h"

/* ---------------------------------------------------------------- temp files */

static char tmpdir[512];

static const char *tpath(const char *name) {
  static char buf[4][700];
  static int k;
  char *p = buf[k++ & 3];
  snprintf(p, sizeof buf[0], "%s/%s", tmpdir, name);
  return p;
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
  int ok = rc_plan_init(&p, &m->graph, &in, NULL, &e) == RC_OK;
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
  CHECK_LE(ny, 64);
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
  Onnx__ModelProto *mp = ob_model(7, 13, "test");
  int64_t x[] = {1, 4}, w[] = {4, 4};
  ob_input(mp, "x", RC_DTYPE_FLOAT, 2, x);
  ob_output(mp, "y", RC_DTYPE_FLOAT, 2, x);
  ob_init_float(mp, "A", 2, w, a);
  ob_init_float(mp, "B", 2, w, b2);
  ob_init_float(mp, "C", 2, w, c3);
  ob_node(mp, "MatMul", "mA", "x A", "h1");
  ob_node(mp, "MatMul", "mB", "h1 B", "h2");
  ob_node(mp, "MatMul", "mC", "h2 C", "y");
  ob_save(mp, tpath("mm.onnx"));
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
    CHECK_EQ(at(A, i), (i < 10 ? 0.0f : 1.0f));
    CHECK_EQ(at(B, i), (i < 8 ? 0.0f : 3.0f));
    CHECK_EQ(at(C, i), c3[i]);
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
  for (int i = 0; i < 16; i++) CHECK_EQ(at(B, i), (i >= 8 ? 0.0f : b2[i])); /* the 8 smallest are the last */
  CHECK_INT(zeros_of(init_of(m, "A")), 0);
  rc_model_free(m);
  /* Never over the input; the input is untouched. */
  CHECK_FAILS(rc_prune_file(tpath("mm.onnx"), tpath("mm.onnx"), &o, &r, &e));
  CHECK_STR_CONTAINS(e.msg, "never overwrites its input");
  CHECK_INT(rc_model_load(&m, tpath("mm.onnx"), NULL, &e), RC_OK);
  CHECK_INT(zeros_of(init_of(m, "B")), 0);
  rc_model_free(m);
}

/* ---------------------------------------------------------------- N:M */

static void test_n_of_m(void) {
  Onnx__ModelProto *mp = ob_model(7, 13, "test");
  int64_t x[] = {1, 8, 3, 3}, w1[] = {4, 8, 1, 1}, w2[] = {6, 4, 1, 1}, w3[] = {2, 6, 1, 1}, y[] = {1, 2, 3, 3};
  float d1[32], d2[24], d3[12];
  uint32_t s = 12345;
  for (int i = 0; i < 32; i++) d1[i] = (float)((s = s * 1664525u + 1013904223u) >> 8) / 16777216.0f - 0.5f;
  for (int i = 0; i < 24; i++) d2[i] = (float)(i % 5) - 2.0f;
  for (int i = 0; i < 12; i++) d3[i] = 1.0f;
  ob_input(mp, "x", RC_DTYPE_FLOAT, 4, x);
  ob_output(mp, "y", RC_DTYPE_FLOAT, 4, y);
  ob_init_float(mp, "W1", 4, w1, d1);
  ob_init_float(mp, "W2", 4, w2, d2);
  ob_init_float(mp, "W3", 4, w3, d3);
  ob_node(mp, "Conv", "c1", "x W1", "h1");
  ob_node(mp, "Conv", "c2", "h1 W2", "h2");
  ob_node(mp, "Conv", "c3", "h2 W3", "y");
  ob_save(mp, tpath("nm.onnx"));
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
      CHECK_EQ(at(W1, g * 4 + k), (beaten < 2 ? d1[g * 4 + k] : 0.0f));
    }
  }
  /* W2 groups hold ties (values -2..2 repeating): the lower index stays. */
  rc__sparsity(W2, 1, 0, &zeros, &n, &mm);
  CHECK_INT(mm, 4);
  CHECK_LE(n, 2);
  rc_model_free(m);
}

/* ---------------------------------------------------------------- channels */

/* x (1,3,2,2) -> c1 (4 out) -> BN -> Relu -> c2 (2 out) -> y. Channels 1 and
 * 3 of c1 have the smallest L1 norm; c2 reads nothing from them. */
static void build_conv_bn_relu_conv(const char *path) {
  Onnx__ModelProto *mp = ob_model(7, 13, "test");
  int64_t x[] = {1, 3, 2, 2}, w1[] = {4, 3, 1, 1}, c4[] = {4}, w2[] = {2, 4, 1, 1}, y[] = {1, 2, 2, 2};
  int64_t h[] = {1, 4, 2, 2};
  float d1[12], b1[4] = {0.1f, 0.2f, 0.3f, 0.4f}, sc[4] = {1.0f, 2.0f, 0.5f, 1.5f},
        bi[4] = {0.3f, -0.1f, 0.2f, 0.05f}, mean[4] = {0.01f, 0.02f, -0.03f, 0.04f},
        var[4] = {1.0f, 0.5f, 2.0f, 1.5f}, d2[8];
  for (int o = 0; o < 4; o++)
    for (int i = 0; i < 3; i++) d1[o * 3 + i] = (o % 2 ? 0.01f : 1.0f) * (float)(i + 1) * (o == 2 ? -1.0f : 1.0f);
  for (int o = 0; o < 2; o++)
    for (int i = 0; i < 4; i++) d2[o * 4 + i] = i % 2 ? 0.0f : (float)(o + 1) * 0.5f + (float)i;
  ob_input(mp, "x", RC_DTYPE_FLOAT, 4, x);
  ob_output(mp, "y", RC_DTYPE_FLOAT, 4, y);
  ob_init_float(mp, "W1", 4, w1, d1);
  ob_init_float(mp, "B1", 1, c4, b1);
  ob_init_float(mp, "scale", 1, c4, sc);
  ob_init_float(mp, "bias", 1, c4, bi);
  ob_init_float(mp, "mean", 1, c4, mean);
  ob_init_float(mp, "var", 1, c4, var);
  ob_init_float(mp, "W2", 4, w2, d2);
  ob_node(mp, "Conv", "c1", "x W1 B1", "h1");
  ob_node(mp, "BatchNormalization", "bn", "h1 scale bias mean var", "h2");
  ob_node(mp, "Relu", "relu", "h2", "h3");
  ob_node(mp, "Conv", "c2", "h3 W2", "y");
  ob_value_info(mp, "h1", RC_DTYPE_FLOAT, 4, h);
  ob_value_info(mp, "h3", RC_DTYPE_FLOAT, 4, h);
  ob_save(mp, path);
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
  CHECK_LT(r.params_after, r.params_before);
  CHECK_LT(r.macs_after, r.macs_before);
  rc_prune_report_free(&r);
  rc_model *m;
  CHECK_INT(rc_model_load(&m, tpath("cbrc_out.onnx"), NULL, &e), RC_OK);
  const rc_tensor *W1 = init_of(m, "W1"), *W2 = init_of(m, "W2"), *var = init_of(m, "var");
  CHECK_INT(W1->dims[0], 2);
  CHECK_INT(W2->dims[1], 2);
  CHECK_INT(var->dims[0], 2);
  CHECK_EQ(at(var, 0), 1.0f);
  CHECK_EQ(at(var, 1), 2.0f);     /* channels 0 and 2 kept */
  CHECK_EQ(at(init_of(m, "B1"), 1), 0.3f);
  CHECK_EQ(at(W1, 3), -1.0f);                           /* row of channel 2 */
  CHECK_EQ(at(W2, 1), 2.5f);
  CHECK_EQ(at(W2, 3), 3.0f);       /* c2 columns 0 and 2 */
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
  Onnx__ModelProto *mp = ob_model(7, 13, "test");
  int64_t x[] = {1, 2, 2, 2}, wa[] = {4, 2, 1, 1}, wb[] = {4, 4, 1, 1}, wc[] = {2, 4, 1, 1}, y[] = {1, 2, 2, 2};
  float da[8] = {0.1f, 0.1f, 2.0f, 1.0f, 1.0f, 2.0f, 0.5f, 0.5f}; /* L1: .2 3 3 1 */
  float db[16], dc[8];
  for (int o = 0; o < 4; o++)
    for (int i = 0; i < 4; i++)
      db[o * 4 + i] = o == 0 || o == 3 ? 0.05f : i == 0 || i == 3 ? 0.0f : 0.5f * (i % 2 ? 1.0f : -1.0f);
  for (int o = 0; o < 2; o++)
    for (int i = 0; i < 4; i++) dc[o * 4 + i] = i == 0 || i == 3 ? 0.0f : (float)(o + i);
  ob_input(mp, "x", RC_DTYPE_FLOAT, 4, x);
  ob_output(mp, "y", RC_DTYPE_FLOAT, 4, y);
  ob_init_float(mp, "WA", 4, wa, da);
  ob_init_float(mp, "WB", 4, wb, db);
  ob_init_float(mp, "WC", 4, wc, dc);
  ob_node(mp, "Conv", "cA", "x WA", "a0");
  ob_node(mp, "Relu", "rA", "a0", "a");
  ob_node(mp, "Conv", "cB", "a WB", "bo");
  ob_node(mp, "Add", "add", "a bo", "s");
  ob_node(mp, "Conv", "cC", "s WC", "y");
  ob_save(mp, tpath("res.onnx"));
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
  CHECK_EQ(at(WA, 0), 2.0f);
  CHECK_EQ(at(WA, 2), 1.0f);  /* rows 1 and 2 of WA */
  CHECK_EQ(at(WB, 0), 0.5f);
  CHECK_EQ(at(WB, 1), -0.5f); /* WB[1][1], WB[1][2] */
  rc_model_free(m);
  check_same_outputs(tpath("res.onnx"), tpath("res_out.onnx"), x12, 8);
}

/* x (1,2,3,3) -> c1 (4) -> depthwise (group 4, 3x3, pad 1) -> c3 (2) -> y */
static void test_channels_depthwise(void) {
  Onnx__ModelProto *mp = ob_model(7, 13, "test");
  int64_t x[] = {1, 2, 3, 3}, w1[] = {4, 2, 1, 1}, wd[] = {4, 1, 3, 3}, c4[] = {4}, w3[] = {2, 4, 1, 1},
          y[] = {1, 2, 3, 3};
  float d1[8] = {1, 1, 0.01f, 0.01f, 2, -1, 0.02f, 0.0f}, dd[36], bd[4] = {0.1f, 0.2f, 0.3f, 0.4f}, d3[8];
  for (int i = 0; i < 36; i++) dd[i] = (float)(i % 7) * 0.1f - 0.2f;
  for (int o = 0; o < 2; o++)
    for (int i = 0; i < 4; i++) d3[o * 4 + i] = i % 2 ? 0.0f : 1.0f + (float)o;
  ob_input(mp, "x", RC_DTYPE_FLOAT, 4, x);
  ob_output(mp, "y", RC_DTYPE_FLOAT, 4, y);
  ob_init_float(mp, "W1", 4, w1, d1);
  ob_init_float(mp, "WD", 4, wd, dd);
  ob_init_float(mp, "BD", 1, c4, bd);
  ob_init_float(mp, "W3", 4, w3, d3);
  ob_node(mp, "Conv", "c1", "x W1", "h1");
  Onnx__NodeProto *dw = ob_node(mp, "Conv", "dw", "h1 WD BD", "h2");
  ob_attr_int(dw, "group", 4);
  ob_attr_ints(dw, "pads", 4, (const int64_t[]){1, 1, 1, 1});
  ob_node(mp, "Conv", "c3", "h2 W3", "y");
  ob_save(mp, tpath("dw.onnx"));
  rc_prune_opts o = {.channels = 0.5};
  rc_prune_report r;
  rc_err e = {0};
  CHECK_INT(rc_prune_file(tpath("dw.onnx"), tpath("dw_out.onnx"), &o, &r, &e), RC_OK);
  if (e.msg[0]) fprintf(stderr, "%s\n", e.msg);
  CHECK_INT(r.n_layers, 3);
  if (r.n_layers == 3) CHECK_STR_CONTAINS(r.layers[1].note, "depthwise");
  rc_prune_report_free(&r);
  CHECK_INT(int_attr_of(tpath("dw_out.onnx"), "dw", "group"), 2);
  rc_model *m;
  CHECK_INT(rc_model_load(&m, tpath("dw_out.onnx"), NULL, &e), RC_OK);
  CHECK_INT(init_of(m, "WD")->dims[0], 2);
  CHECK_EQ(at(init_of(m, "BD"), 1), 0.3f);
  rc_model_free(m);
  float xin[18];
  for (int i = 0; i < 18; i++) xin[i] = (float)i * 0.1f - 0.7f;
  check_same_outputs(tpath("dw.onnx"), tpath("dw_out.onnx"), xin, 18);
}

/* x (1,1,2,2) -> c1 (4 out, 2x2 spatial) -> Flatten | Reshape [1,16] -> Gemm (3). */
static void flatten_case(int use_reshape) {
  Onnx__ModelProto *mp = ob_model(7, 13, "test");
  int64_t x[] = {1, 1, 2, 2}, w1[] = {4, 1, 1, 1}, wg[] = {3, 16}, bg[] = {3}, y[] = {1, 3};
  float d1[4] = {1.0f, 0.01f, -2.0f, 0.02f}, dg[48], dbg[3] = {0.1f, 0.2f, 0.3f};
  for (int o = 0; o < 3; o++)
    for (int f = 0; f < 16; f++) dg[o * 16 + f] = (f / 4) % 2 ? 0.0f : (float)(o + 1) + (float)f * 0.1f;
  ob_input(mp, "x", RC_DTYPE_FLOAT, 4, x);
  ob_output(mp, "y", RC_DTYPE_FLOAT, 2, y);
  ob_init_float(mp, "W1", 4, w1, d1);
  ob_init_float(mp, "WG", 2, wg, dg);
  ob_init_float(mp, "BG", 1, bg, dbg);
  ob_node(mp, "Conv", "c1", "x W1", "h1");
  if (use_reshape) {
    int64_t target[] = {1, 16};
    ob_init(mp, ob_tensor_raw("target", RC_DTYPE_INT64, 1, (const int64_t[]){2}, target, sizeof target));
    ob_node(mp, "Reshape", "flat", "h1 target", "f");
  } else {
    ob_node(mp, "Flatten", "flat", "h1", "f");
  }
  ob_attr_int(ob_node(mp, "Gemm", "fc", "f WG BG", "y"), "transB", 1);
  const char *in = use_reshape ? tpath("rs.onnx") : tpath("fl.onnx");
  const char *out = use_reshape ? tpath("rs_out.onnx") : tpath("fl_out.onnx");
  ob_save(mp, in);
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
  CHECK_EQ(at(WG, 4), 1.0f + 0.8f); /* feature 8 = channel 2, position 0 */
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
  Onnx__ModelProto *mp = ob_model(7, 13, "test");
  int64_t x[] = {1, 2, 1, 1}, w1[] = {4, 2, 1, 1}, w2[] = {2, 4, 1, 1}, y[] = {1, 2, 1, 1};
  float d1[8] = {1, 2, 3, 4, 5, 6, 7, 8}, d2[8] = {1, 1, 1, 1, 2, 2, 2, 2};
  ob_input(mp, "x", RC_DTYPE_FLOAT, 4, x);
  ob_output(mp, "y", RC_DTYPE_FLOAT, 4, y);
  ob_init_float(mp, "W1", 4, w1, d1);
  ob_init_float(mp, "W2", 4, w2, d2);
  ob_node(mp, "Conv", "c1", "x W1", "h1");
  ob_attr_int(ob_node(mp, "Softmax", "sm", "h1", "h2"), "axis", 1);
  ob_node(mp, "Conv", "c2", "h2 W2", "y");
  ob_save(mp, tpath("sm.onnx"));
  rc_prune_opts o = {.channels = 0.5};
  rc_prune_report r;
  rc_err e = {0};
  CHECK_INT(rc_prune_file(tpath("sm.onnx"), tpath("sm_out.onnx"), &o, &r, &e), RC_OK);
  CHECK_INT(r.channels_removed, 0);
  CHECK_INT(r.n_layers, 2);
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
  CHECK_NE(access(tpath("opt_out.onnx"), F_OK), 0); /* nothing written */
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
  ob_free_all();
  char cmd[700];
  snprintf(cmd, sizeof cmd, "rm -rf '%s'", tmpdir);
  if (system(cmd) != 0) fprintf(stderr, "could not remove %s\n", tmpdir);
  return TEST_REPORT();
}
