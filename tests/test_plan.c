/* The planner: folding of shape subgraphs, memory reuse in inference plans,
 * the reverse pass against finite differences, and clear errors. Graphs are
 * built by hand in the IR, without files. */
#define _POSIX_C_SOURCE 200809L /* setenv */
#include <math.h>
#include <stdint.h>
#include <stdlib.h>

#include "core/alloc.h"
#include "ops/kernel_choice.h"
#include "ops/sparse.h"
#include "plan/load.h"
#include "plan/plan.h"
#include "recoup/alloc.h"
#include "test.h"

typedef struct builder {
  rc_graph g;
  int cap_v, cap_n;
} builder;

static void b_init(builder *b) {
  memset(b, 0, sizeof *b);
  rc__arena_init(&b->g.arena, 1 << 14);
  b->cap_v = 64;
  b->cap_n = 32;
  b->g.values = rc__arena_zalloc(&b->g.arena, sizeof(rc_value) * (size_t)b->cap_v);
  b->g.nodes = rc__arena_zalloc(&b->g.arena, sizeof(rc_node) * (size_t)b->cap_n);
  b->g.inputs = rc__arena_zalloc(&b->g.arena, sizeof(int) * 8);
  b->g.outputs = rc__arena_zalloc(&b->g.arena, sizeof(int) * 8);
  b->g.opset = 17;
  b->g.ir_version = 8;
  b->g.path = "handmade.onnx";
}

static int b_value(builder *b, const char *name) {
  int v = b->g.n_values++;
  b->g.values[v].name = name;
  b->g.values[v].producer = -1;
  b->g.values[v].init_index = -1;
  return v;
}

static int b_input(builder *b, const char *name, int rank, const int64_t *dims) {
  int v = b_value(b, name);
  rc_value *val = &b->g.values[v];
  val->kind = RC_VALUE_INPUT;
  val->decl.dtype = RC_DTYPE_FLOAT;
  val->decl.rank = rank;
  for (int i = 0; i < rank; i++) val->decl.dims[i] = dims[i];
  b->g.inputs[b->g.n_inputs++] = v;
  return v;
}

static int b_init_tensor(builder *b, const char *name, rc_dtype dt, int rank, const int64_t *dims, const void *data) {
  int v = b_value(b, name);
  rc_value *val = &b->g.values[v];
  val->kind = RC_VALUE_INITIALIZER;
  val->decl.dtype = dt;
  val->decl.rank = rank;
  for (int i = 0; i < rank; i++) val->decl.dims[i] = dims[i];
  val->decl.data = rc__arena_memdup(&b->g.arena, data, rc_tensor_nbytes(&val->decl));
  return v;
}

/* A node with inputs (value indices) and fresh outputs named after it. */
static int b_node(builder *b, const char *op, const char *name, int n_in, const int *in, int n_out) {
  int ni = b->g.n_nodes++;
  rc_node *n = &b->g.nodes[ni];
  n->name = n->label = name;
  n->op_type = op;
  n->domain = "";
  n->opset = b->g.opset;
  n->n_in = n_in;
  n->in = rc__arena_memdup(&b->g.arena, in, sizeof(int) * (size_t)(n_in ? n_in : 1));
  n->n_out = n_out;
  n->out = rc__arena_alloc(&b->g.arena, sizeof(int) * (size_t)n_out);
  for (int j = 0; j < n_out; j++) {
    n->out[j] = b_value(b, name);
    b->g.values[n->out[j]].producer = ni;
  }
  return n->out[0];
}

static void b_output(builder *b, int v) { b->g.outputs[b->g.n_outputs++] = v; }

/* x (N, 2, 3) -> Reshape to (N, 6) with the target computed from Shape at
 * run time, as exporters write it -> MatMul W (6, 4) -> Relu. */
static void build_reshape_chain(builder *b, float *w) {
  int64_t xd[3] = {-1, 2, 3};
  int x = b_input(b, "x", 3, xd);
  int shape = b_node(b, "Shape", "shape", 1, &x, 1);
  int64_t zero = 0, minus_one = -1, one = 1;
  int idx = b_init_tensor(b, "idx0", RC_DTYPE_INT64, 0, NULL, &zero);
  int gin[2] = {shape, idx};
  int batch = b_node(b, "Gather", "gather", 2, gin, 1);
  int axes = b_init_tensor(b, "axes", RC_DTYPE_INT64, 1, &one, &zero);
  int uin[2] = {batch, axes};
  int batch1 = b_node(b, "Unsqueeze", "unsq", 2, uin, 1);
  int rest = b_init_tensor(b, "rest", RC_DTYPE_INT64, 1, &one, &minus_one);
  int cin[2] = {batch1, rest};
  int target = b_node(b, "Concat", "concat", 2, cin, 1);
  b->g.nodes[b->g.n_nodes - 1].attrs = rc__arena_zalloc(&b->g.arena, sizeof(rc_attr));
  b->g.nodes[b->g.n_nodes - 1].n_attrs = 1;
  b->g.nodes[b->g.n_nodes - 1].attrs[0] = (rc_attr){.name = "axis", .type = RC_ATTR_INT, .i = 0};
  int rin[2] = {x, target};
  int flat = b_node(b, "Reshape", "reshape", 2, rin, 1);
  int64_t wd[2] = {6, 4};
  int wv = b_init_tensor(b, "w", RC_DTYPE_FLOAT, 2, wd, w);
  int min[2] = {flat, wv};
  int y = b_node(b, "MatMul", "matmul", 2, min, 1);
  int z = b_node(b, "Relu", "relu", 1, &y, 1);
  b_output(b, z);
}

static void fill(float *x, int n, uint32_t s) {
  for (int i = 0; i < n; i++) {
    s = s * 1664525u + 1013904223u;
    x[i] = (float)((s >> 8) / 8388608.0 - 1.0);
  }
}

static void shape_subgraph_is_folded(void) {
  builder b;
  b_init(&b);
  float w[24];
  fill(w, 24, 7);
  build_reshape_chain(&b, w);
  rc_err e = {0};
  CHECK_INT(rc__graph_finalize(&b.g, &e), RC_OK);
  for (int64_t batch = 1; batch <= 5; batch += 4) {
    rc_tensor in = {RC_DTYPE_FLOAT, 3, {batch, 2, 3}, NULL};
    rc_plan *p = NULL;
    CHECK_INT(rc_plan_init(&p, &b.g, &in, NULL, &e), RC_OK);
    if (!p) return;
    int concat = rc__graph_find_value(&b.g, "concat");
    CHECK(rc_plan_is_const(p, concat));
    const rc_tensor *t = rc_plan_tensor(p, concat);
    CHECK_INT(((int64_t *)t->data)[0], batch);
    CHECK_INT(((int64_t *)t->data)[1], -1);
    int out = b.g.outputs[0];
    CHECK_INT(rc_plan_tensor(p, out)->dims[0], batch);
    CHECK_INT(rc_plan_tensor(p, out)->dims[1], 4);
    /* Values: y = relu(x_flat @ w), computed by hand. */
    float *x = rc_plan_tensor(p, b.g.inputs[0])->data;
    fill(x, (int)(batch * 6), 99);
    CHECK_INT(rc_plan_forward(p, &e), RC_OK);
    const float *y = rc_plan_tensor(p, out)->data;
    for (int n = 0; n < batch; n++)
      for (int j = 0; j < 4; j++) {
        double s = 0;
        for (int k = 0; k < 6; k++) s += x[n * 6 + k] * w[k * 4 + j];
        CHECK_NEAR(y[n * 4 + j], s > 0 ? s : 0, 1e-6, 1e-5);
      }
    rc_plan_free(p);
  }
  rc__arena_free(&b.g.arena);
}

static void reverse_pass_matches_finite_differences(void) {
  builder b;
  b_init(&b);
  float w[24];
  fill(w, 24, 3);
  build_reshape_chain(&b, w);
  rc_err e = {0};
  CHECK_INT(rc__graph_finalize(&b.g, &e), RC_OK);
  int wv = rc__graph_find_value(&b.g, "w");
  unsigned char *trainable = rc__calloc((size_t)b.g.n_values, 1);
  trainable[wv] = 1;
  rc_tensor in = {RC_DTYPE_FLOAT, 3, {3, 2, 3}, NULL};
  rc_plan_opts o = {.training = 1, .trainable = trainable, .keep = NULL, .bn_batch_stats = 0};
  rc_plan *p = NULL;
  CHECK_INT(rc_plan_init(&p, &b.g, &in, &o, &e), RC_OK);
  if (!p) return;
  fill(rc_plan_tensor(p, b.g.inputs[0])->data, 18, 5);
  float r[12];
  fill(r, 12, 11);
  /* L = sum(out * r) */
  CHECK_INT(rc_plan_forward(p, &e), RC_OK);
  rc_plan_zero_grad(p);
  memcpy(rc_plan_grad(p, b.g.outputs[0])->data, r, sizeof r);
  CHECK_INT(rc_plan_backward(p, &e), RC_OK);
  float *gw = rc_plan_grad(p, wv)->data;
  float *wd = b.g.values[wv].decl.data;
  CHECK_NULL(rc_plan_grad(p, b.g.inputs[0])); /* the input needs no gradient */
  for (int i = 0; i < 24; i++) {
    double l[2];
    for (int s = 0; s < 2; s++) {
      float keep = wd[i];
      wd[i] = keep + (s ? -1e-3f : 1e-3f);
      rc_plan_forward(p, &e);
      const float *y = rc_plan_tensor(p, b.g.outputs[0])->data;
      l[s] = 0;
      for (int k = 0; k < 12; k++) l[s] += (double)y[k] * r[k];
      wd[i] = keep;
    }
    CHECK_NEAR(gw[i], (l[0] - l[1]) / 2e-3, 2e-3, 2e-3);
  }
  rc_plan_free(p);
  rc__free(trainable);
  rc__arena_free(&b.g.arena);
}

/* A chain of Relus: an inference plan reuses buffers, a training plan keeps all. */
static void inference_plans_reuse_memory(void) {
  builder b;
  b_init(&b);
  int64_t d[2] = {-1, 1000};
  int v = b_input(&b, "x", 2, d);
  static const char *names[] = {"r0", "r1", "r2", "r3", "r4", "r5", "r6", "r7"};
  for (int i = 0; i < 8; i++) v = b_node(&b, "Relu", names[i], 1, &v, 1);
  b_output(&b, v);
  rc_err e = {0};
  CHECK_INT(rc__graph_finalize(&b.g, &e), RC_OK);
  rc_tensor in = {RC_DTYPE_FLOAT, 2, {16, 1000}, NULL};
  rc_plan *inf = NULL, *tr = NULL;
  CHECK_INT(rc_plan_init(&inf, &b.g, &in, NULL, &e), RC_OK);
  rc_plan_opts o = {.training = 1, .trainable = NULL, .keep = NULL, .bn_batch_stats = 0};
  CHECK_INT(rc_plan_init(&tr, &b.g, &in, &o, &e), RC_OK);
  if (inf && tr) {
    size_t one = 16 * 1000 * sizeof(float);
    /* input + output + at most two live intermediates */
    CHECK_LT(rc_plan_bytes(inf), 5 * one);
    CHECK_GE(rc_plan_bytes(tr), 9 * one);
    float *x = rc_plan_tensor(inf, b.g.inputs[0])->data;
    for (int i = 0; i < 16000; i++) x[i] = (float)(i % 7) - 3.0f;
    CHECK_INT(rc_plan_forward(inf, &e), RC_OK);
    const float *y = rc_plan_tensor(inf, b.g.outputs[0])->data;
    for (int i = 0; i < 16000; i++) CHECK_NEAR(y[i], x[i] > 0 ? x[i] : 0, 0, 0);
  }
  rc_plan_free(inf);
  rc_plan_free(tr);
  rc__arena_free(&b.g.arena);
}

static void errors_name_what_is_wrong(void) {
  builder b;
  b_init(&b);
  float w[24] = {0};
  build_reshape_chain(&b, w);
  rc_err e = {0};
  CHECK_INT(rc__graph_finalize(&b.g, &e), RC_OK);
  rc_tensor wrong = {RC_DTYPE_FLOAT, 3, {2, 3, 3}, NULL};
  rc_plan *p = NULL;
  CHECK_INT(rc_plan_init(&p, &b.g, &wrong, NULL, &e), RC_ERR_SHAPE);
  CHECK_STR_CONTAINS(e.msg, "input 'x'");
  CHECK_STR_CONTAINS(e.msg, "handmade.onnx");
  CHECK_NULL(p);
  rc__arena_free(&b.g.arena);

  /* A cycle: a = Relu(b), b = Relu(a). */
  b_init(&b);
  int64_t d[1] = {4};
  int x = b_input(&b, "x", 1, d);
  (void)x;
  int a_in = b.g.n_values + 1; /* the second node's output, made below */
  int a = b_node(&b, "Relu", "a", 1, &a_in, 1);
  int bb = b_node(&b, "Relu", "b", 1, &a, 1);
  CHECK_INT(bb, a_in);
  b_output(&b, bb);
  CHECK_INT(rc__graph_finalize(&b.g, &e), RC_ERR_FORMAT);
  CHECK_STR_CONTAINS(e.msg, "cycle");
  rc__arena_free(&b.g.arena);

  /* An op recoup does not support is refused at load, naming node and op. */
  b_init(&b);
  x = b_input(&b, "x", 1, d);
  b_output(&b, b_node(&b, "NonMaxSuppression", "nms", 1, &x, 1));
  CHECK_INT(rc__graph_finalize(&b.g, &e), RC_ERR_UNSUPPORTED);
  CHECK_STR_CONTAINS(e.msg, "nms");
  CHECK_STR_CONTAINS(e.msg, "NonMaxSuppression");
  rc__arena_free(&b.g.arena);
}

static void allocation_failures_end_cleanly(void) {
  builder b;
  b_init(&b);
  float w[24];
  fill(w, 24, 1);
  build_reshape_chain(&b, w);
  rc_err e = {0};
  CHECK_INT(rc__graph_finalize(&b.g, &e), RC_OK);
  rc_tensor in = {RC_DTYPE_FLOAT, 3, {2, 2, 3}, NULL};
  int failures = 0;
  for (long n = 1; n < 200; n++) {
    rc_plan *p = NULL;
    rc_alloc_set_fail_after(n);
    rc_status st = rc_plan_init(&p, &b.g, &in, NULL, &e);
    rc_alloc_set_fail_after(0);
    if (st == RC_OK) {
      rc_plan_free(p);
      break;
    }
    failures++;
    CHECK_INT(st, RC_ERR_NOMEM);
    CHECK_NULL(p);
  }
  CHECK_GT(failures, 3);
  rc__arena_free(&b.g.arena);
}

/* x (2,8,10,10) -> Conv w1 (16,8,3,3) -> Conv w2 (16,16,3,3) -> y (2,16,6,6);
 * w1 keeps one position in 24 (a pruned layer), w2 is dense. */
static void build_two_convs(builder *b, float *w1, uint8_t *keep1, float *w2) {
  b_init(b);
  int64_t dx[4] = {-1, 8, 10, 10}, d1[4] = {16, 8, 3, 3}, d2[4] = {16, 16, 3, 3};
  int x = b_input(b, "x", 4, dx);
  fill(w1, 16 * 8 * 9, 21);
  fill(w2, 16 * 16 * 9, 22);
  for (int i = 0; i < 16 * 8 * 9; i++) {
    keep1[i] = i % 24 == 5;
    if (!keep1[i]) w1[i] = 0;
  }
  int in1[2] = {x, b_init_tensor(b, "w1", RC_DTYPE_FLOAT, 4, d1, w1)};
  int y1 = b_node(b, "Conv", "conv1", 2, in1, 1);
  int in2[2] = {y1, b_init_tensor(b, "w2", RC_DTYPE_FLOAT, 4, d2, w2)};
  b_output(b, b_node(b, "Conv", "conv2", 2, in2, 1));
}

/* Weight patterns reach the steps before workspaces are sized: the pruned
 * Conv runs sparse and keeps no oneDNN state; one pattern built by the caller
 * serves a training and an inference plan (same pointer, not rebuilt); the
 * results equal those of plans without patterns (the dense path). */
static void patterns_reach_steps_before_sizing(void) {
  static float w1[16 * 8 * 9], w2[16 * 16 * 9];
  static uint8_t keep1[16 * 8 * 9];
  builder b;
  build_two_convs(&b, w1, keep1, w2);
  rc_err e = {0};
  CHECK_INT(rc__graph_finalize(&b.g, &e), RC_OK);
  const int v1 = rc__graph_find_value(&b.g, "w1"), v2 = rc__graph_find_value(&b.g, "w2");
  unsigned char *trainable = rc__calloc((size_t)b.g.n_values, 1);
  const rc__wpattern **pats = rc__calloc((size_t)b.g.n_values, sizeof *pats);
  rc_arena a;
  rc__arena_init(&a, 1 << 12);
  rc__wpattern pat;
  CHECK_INT(rc__wpattern_build(&pat, &a, keep1, 16, 8 * 9, &e), RC_OK);
  trainable[v1] = trainable[v2] = 1;
  pats[v1] = &pat;
  setenv("RECOUP_CONV_PATH", "dnnl", 1);
  const int have_dnnl = rc__conv_path_choice() == RC_CONV_PATH_DNNL;
  rc_tensor in = {RC_DTYPE_FLOAT, 4, {2, 8, 10, 10}, NULL};
  rc_plan *p[2][2] = {{NULL}}; /* [with patterns][training] */
  for (int with = 0; with < 2; with++)
    for (int tr = 0; tr < 2; tr++) {
      rc_plan_opts o = {.training = tr, .trainable = trainable, .patterns = with ? pats : NULL};
      CHECK_INT(rc_plan_init(&p[with][tr], &b.g, &in, &o, &e), RC_OK);
    }
  if (p[0][0] && p[0][1] && p[1][0] && p[1][1]) {
    for (int tr = 0; tr < 2; tr++) {
      CHECK_PTR_EQ(rc__plan_step_pattern(p[1][tr], 0), &pat);
      CHECK_NULL(rc__plan_step_pattern(p[1][tr], 1));
      CHECK_NULL(rc__plan_step_pattern(p[0][tr], 0));
      CHECK_INT(rc__plan_step_has_state(p[1][tr], 0), 0);
      /* oneDNN's primitives exist where its path runs (builds with it). */
      CHECK_INT(rc__plan_step_has_state(p[1][tr], 1), have_dnnl);
      CHECK_INT(rc__plan_step_has_state(p[0][tr], 0), have_dnnl);
    }
    float *outs[2][2];
    for (int with = 0; with < 2; with++) {
      rc_plan *t = p[with][1];
      fill(rc_plan_tensor(t, b.g.inputs[0])->data, 2 * 8 * 100, 23);
      CHECK_INT(rc_plan_forward(t, &e), RC_OK);
      rc_plan_zero_grad(t);
      fill(rc_plan_grad(t, b.g.outputs[0])->data, 2 * 16 * 36, 24);
      CHECK_INT(rc_plan_backward(t, &e), RC_OK);
      outs[with][0] = rc_plan_tensor(t, b.g.outputs[0])->data;
      outs[with][1] = rc_plan_grad(t, v1)->data;
    }
    /* The sparse path leaves frozen positions of the weight gradient alone
     * (sparse.h); kept positions and the output match the dense path. */
    double worst_y = 0, worst_g = 0;
    for (int i = 0; i < 2 * 16 * 36; i++) worst_y = fmax(worst_y, fabs(outs[1][0][i] - outs[0][0][i]));
    for (int i = 0; i < 16 * 8 * 9; i++) {
      if (keep1[i])
        worst_g = fmax(worst_g, fabs(outs[1][1][i] - outs[0][1][i]) / (1 + fabs(outs[0][1][i])));
      else
        CHECK_EQ(outs[1][1][i], 0.0f);
    }
    CHECK_LT(worst_y, 1e-4);
    CHECK_LT(worst_g, 1e-4);
  }
  unsetenv("RECOUP_CONV_PATH");
  /* A pattern whose shape is not its value's is refused, naming the value. */
  rc__wpattern wrong = pat;
  wrong.rows = 8;
  pats[v1] = &wrong;
  rc_plan_opts o = {.training = 1, .trainable = trainable, .patterns = pats};
  rc_plan *bad = NULL;
  CHECK_INT(rc_plan_init(&bad, &b.g, &in, &o, &e), RC_ERR_INVALID);
  CHECK_NULL(bad);
  CHECK_STR_CONTAINS(e.msg, "'w1'");
  for (int with = 0; with < 2; with++)
    for (int tr = 0; tr < 2; tr++) rc_plan_free(p[with][tr]);
  rc__arena_free(&a);
  rc__free(pats);
  rc__free(trainable);
  rc__arena_free(&b.g.arena);
}

/* y = Relu^8(x * w), w (1000) trainable: the inner values' gradients share
 * memory by lifetime (at most three live at once, not eight), every step's
 * backward still starts from a cleared gradient, and two steps in a row give
 * the same weight gradient as the formula: sum over rows of r * x where
 * x * w > 0. */
static void inner_gradients_share_memory(void) {
  builder b;
  b_init(&b);
  int64_t d[2] = {-1, 1000}, dw[1] = {1000};
  static float w[1000];
  fill(w, 1000, 31);
  int v = b_input(&b, "x", 2, d);
  int mul_in[2] = {v, b_init_tensor(&b, "w", RC_DTYPE_FLOAT, 1, dw, w)};
  v = b_node(&b, "Mul", "mul", 2, mul_in, 1);
  static const char *names[] = {"r0", "r1", "r2", "r3", "r4", "r5", "r6", "r7"};
  for (int i = 0; i < 8; i++) v = b_node(&b, "Relu", names[i], 1, &v, 1);
  b_output(&b, v);
  rc_err e = {0};
  CHECK_INT(rc__graph_finalize(&b.g, &e), RC_OK);
  const int wv = rc__graph_find_value(&b.g, "w");
  unsigned char *trainable = rc__calloc((size_t)b.g.n_values, 1);
  trainable[wv] = 1;
  rc_tensor in = {RC_DTYPE_FLOAT, 2, {16, 1000}, NULL};
  rc_plan_opts o = {.training = 1, .trainable = trainable};
  rc_plan *p = NULL;
  CHECK_INT(rc_plan_init(&p, &b.g, &in, &o, &e), RC_OK);
  if (p) {
    const size_t one = 16 * 1000 * sizeof(float);
    /* x and 9 kept activations, the output's and w's gradients, and at
     * most 3 inner gradients (8 without sharing) */
    CHECK_LT(rc_plan_bytes(p), 14 * one);
    float *x = rc_plan_tensor(p, b.g.inputs[0])->data;
    static float r[16 * 1000];
    fill(x, 16 * 1000, 32);
    fill(r, 16 * 1000, 33);
    double worst = 0;
    for (int step = 0; step < 2; step++) {
      CHECK_INT(rc_plan_forward(p, &e), RC_OK);
      rc_plan_zero_grad(p);
      memcpy(rc_plan_grad(p, b.g.outputs[0])->data, r, sizeof r);
      CHECK_INT(rc_plan_backward(p, &e), RC_OK);
      const float *gw = rc_plan_grad(p, wv)->data;
      for (int j = 0; j < 1000; j++) {
        double want = 0;
        for (int i = 0; i < 16; i++)
          if (x[i * 1000 + j] * w[j] > 0) want += (double)r[i * 1000 + j] * x[i * 1000 + j];
        worst = fmax(worst, fabs(gw[j] - want));
      }
    }
    CHECK_LT(worst, 1e-4);
  }
  rc_plan_free(p);
  rc__free(trainable);
  rc__arena_free(&b.g.arena);
}

int main(void) {
  RUN(shape_subgraph_is_folded);
  RUN(reverse_pass_matches_finite_differences);
  RUN(inference_plans_reuse_memory);
  RUN(errors_name_what_is_wrong);
  RUN(allocation_failures_end_cleanly);
  RUN(patterns_reach_steps_before_sizing);
  RUN(inner_gradients_share_memory);
  return TEST_REPORT();
}
