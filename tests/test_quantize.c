/* Post-training quantization (src/compress/quantize.c) and the model edit API
 * it writes through (src/onnx/edit.c), on small hand-made graphs.
 *
 * Facts checked, with their sources:
 * - BatchNormalization in inference form is y = scale * (x - mean) /
 *   sqrt(var + epsilon) + B (ONNX operator spec), so folding it into the Conv
 *   must reproduce the unfolded graph's outputs up to float rounding;
 * - symmetric per-channel weight grids: scale = max|w| / 127 (8 bits) or / 7
 *   (4 bits), zero point 0, values in [-127, 127] / [-7, 7] (common practice);
 * - DequantizeLinear computes (x - zero_point) * scale, per axis from opset 13,
 *   int4 from opset 21 (ONNX operator spec), so a bias stored as int32 with
 *   scale = input scale x weight scale adds what the integer accumulator holds
 *   (common practice for integer Conv/Gemm);
 * - asymmetric uint8 activation grid over [min(lo,0), max(hi,0)]: scale =
 *   range / 255, zero point = round(-lo / scale) (common practice). */
#define _POSIX_C_SOURCE 200809L
#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "compress/quantize.h"
#include "onnx/model.h"
#include "onnx/onnx.pb-c.h"
#include "plan/load.h"
#include "plan/plan.h"
#include "onnx_build.h"
#include "recoup/data.h"
#include "test.h"

static char tmp_dir[256];

static const char *tpath(const char *name) {
  static char buf[4][512];
  static int k;
  k = (k + 1) % 4;
  snprintf(buf[k], sizeof buf[k], "%s/%s", tmp_dir, name);
  return buf[k];
}

/* ---- the hand-made network ----
 * x (N,2,4,4) -> Conv(3x3, pad 1, W (3,2,3,3), b (3)) -> BatchNormalization
 * -> Relu -> Flatten -> Gemm(transB=1, W (4,48), b (4)) -> Relu
 * -> MatMul(W (4,5)) -> y (N,5) */

#define C_IN 2
#define C_OUT 3
#define HW 4
#define K1 (C_OUT * HW * HW)
#define H1 4
#define OUTS 5

typedef struct net {
  float wc[C_OUT * C_IN * 9], bc[C_OUT];
  float gamma[C_OUT], beta[C_OUT], mean[C_OUT], var[C_OUT];
  float w1[H1 * K1], b1[H1], w2[H1 * OUTS];
} net;

static float frand(unsigned *s) {
  *s = *s * 1103515245u + 12345u;
  return (float)((*s >> 8) & 0xffff) / 65536.0f * 2.0f - 1.0f;
}

static void net_init(net *n, unsigned seed) {
  for (int i = 0; i < C_OUT * C_IN * 9; i++) n->wc[i] = 0.5f * frand(&seed);
  for (int c = 0; c < C_OUT; c++) {
    n->bc[c] = 0.2f * frand(&seed);
    n->gamma[c] = 1.0f + 0.5f * frand(&seed);
    n->beta[c] = 0.3f * frand(&seed);
    n->mean[c] = 0.2f * frand(&seed);
    n->var[c] = 0.5f + 0.4f * frand(&seed);
  }
  for (int i = 0; i < H1 * K1; i++) n->w1[i] = 0.3f * frand(&seed);
  for (int i = 0; i < H1; i++) n->b1[i] = 0.1f * frand(&seed);
  for (int i = 0; i < H1 * OUTS; i++) n->w2[i] = 0.6f * frand(&seed);
}

/* with_bn = 0 writes the conv with the given (already folded) weights. */
static void write_net(const net *n, int with_bn, int64_t ir, int64_t opset, const char *path) {
  Onnx__ModelProto *mp = ob_model(ir, opset, "hand_made");
  const int64_t xd[4] = {-1, C_IN, HW, HW}, yd[2] = {-1, OUTS};
  const int64_t wcd[4] = {C_OUT, C_IN, 3, 3}, cd[1] = {C_OUT}, w1d[2] = {H1, K1}, h1d[1] = {H1}, w2d[2] = {H1, OUTS};
  ob_input(mp, "x", RC_DTYPE_FLOAT, 4, xd);
  ob_output(mp, "y", RC_DTYPE_FLOAT, 2, yd);
  ob_init_float(mp, "conv.w", 4, wcd, n->wc);
  ob_init_float(mp, "conv.b", 1, cd, n->bc);
  ob_init_float(mp, "fc1.w", 2, w1d, n->w1);
  ob_init_float(mp, "fc1.b", 1, h1d, n->b1);
  ob_init_float(mp, "fc2.w", 2, w2d, n->w2);
  Onnx__NodeProto *conv = ob_node(mp, "Conv", NULL, "x conv.w conv.b", with_bn ? "conv_out" : "bn_out");
  const int64_t pads[4] = {1, 1, 1, 1}, ks[2] = {3, 3};
  ob_attr_ints(conv, "pads", 4, pads);
  ob_attr_ints(conv, "kernel_shape", 2, ks);
  if (with_bn) {
    ob_init_float(mp, "bn.gamma", 1, cd, n->gamma);
    ob_init_float(mp, "bn.beta", 1, cd, n->beta);
    ob_init_float(mp, "bn.mean", 1, cd, n->mean);
    ob_init_float(mp, "bn.var", 1, cd, n->var);
    ob_node(mp, "BatchNormalization", NULL, "conv_out bn.gamma bn.beta bn.mean bn.var", "bn_out");
  }
  ob_node(mp, "Relu", NULL, "bn_out", "relu1");
  ob_attr_int(ob_node(mp, "Flatten", NULL, "relu1", "flat"), "axis", 1);
  ob_attr_int(ob_node(mp, "Gemm", NULL, "flat fc1.w fc1.b", "fc1_out"), "transB", 1);
  ob_node(mp, "Relu", NULL, "fc1_out", "relu2");
  ob_node(mp, "MatMul", NULL, "relu2 fc2.w", "y");
  CHECK(ob_save(mp, path));
  ob_free_all();
}

#define N_SAMPLES 24

static void make_inputs(float *x, unsigned seed) {
  for (int i = 0; i < N_SAMPLES * C_IN * HW * HW; i++) x[i] = 1.5f * frand(&seed) + 0.25f;
}

/* Run a model file on the samples; y receives N_SAMPLES x OUTS. */
static int run_file(const char *path, const float *x, float *y) {
  rc_err e = {0};
  rc_model *m = NULL;
  rc_plan *p = NULL;
  int ok = rc_model_load(&m, path, NULL, &e) == RC_OK;
  if (!ok) fprintf(stderr, "load %s: %s\n", path, e.msg);
  rc_tensor in = {RC_DTYPE_FLOAT, 4, {N_SAMPLES, C_IN, HW, HW}, NULL};
  if (ok) ok = rc_plan_init(&p, &m->graph, &in, NULL, &e) == RC_OK;
  if (ok) {
    memcpy(rc_plan_tensor(p, m->graph.inputs[0])->data, x, sizeof(float) * N_SAMPLES * C_IN * HW * HW);
    ok = rc_plan_forward(p, &e) == RC_OK;
  }
  if (ok) memcpy(y, rc_plan_tensor(p, m->graph.outputs[0])->data, sizeof(float) * N_SAMPLES * OUTS);
  if (!ok) fprintf(stderr, "%s: %s\n", path, e.msg);
  rc_plan_free(p);
  rc_model_free(m);
  return ok;
}

/* BN folded with the spec's formula in double precision, independently of rc__fold_bn. */
static void fold_reference(const net *n, double *w, double *b) {
  for (int c = 0; c < C_OUT; c++) {
    double k = n->gamma[c] / sqrt((double)n->var[c] + 1e-5);
    for (int i = 0; i < C_IN * 9; i++) w[c * C_IN * 9 + i] = n->wc[c * C_IN * 9 + i] * k;
    b[c] = (n->bc[c] - n->mean[c]) * k + n->beta[c];
  }
}

static void test_bn_fold_matches_unfolded_graph(void) {
  net n, f;
  net_init(&n, 7);
  f = n;
  rc__fold_bn(f.wc, f.bc, C_OUT, C_IN * 9, n.gamma, n.beta, n.mean, n.var, 1e-5f);
  double rw[C_OUT * C_IN * 9], rb[C_OUT];
  fold_reference(&n, rw, rb);
  for (int i = 0; i < C_OUT * C_IN * 9; i++) CHECK_NEAR(f.wc[i], rw[i], 1e-7, 1e-6);
  for (int c = 0; c < C_OUT; c++) CHECK_NEAR(f.bc[c], rb[c], 1e-7, 1e-6);
  write_net(&n, 1, 8, 13, tpath("unfolded.onnx"));
  write_net(&f, 0, 8, 13, tpath("folded.onnx"));
  static float x[N_SAMPLES * C_IN * HW * HW], ya[N_SAMPLES * OUTS], yb[N_SAMPLES * OUTS];
  make_inputs(x, 3);
  CHECK(run_file(tpath("unfolded.onnx"), x, ya));
  CHECK(run_file(tpath("folded.onnx"), x, yb));
  for (int i = 0; i < N_SAMPLES * OUTS; i++) CHECK_NEAR(yb[i], ya[i], 1e-5, 1e-5);
}

/* ---- quantizing the network ---- */

typedef struct quantized {
  rc_model *m;          /* the written file, reloaded */
  rc_quant_report rep;
} quantized;

static int quantize_file(const char *in, const char *out, const rc_quant_config *cfg, const float *x, quantized *q,
                         rc_err *e) {
  memset(q, 0, sizeof *q);
  rc_model *m = NULL;
  rc_dataset d;
  memset(&d, 0, sizeof d);
  rc_tensor xt = {RC_DTYPE_FLOAT, 4, {N_SAMPLES, C_IN, HW, HW}, (void *)x};
  int ok = rc_model_load(&m, in, NULL, e) == RC_OK && rc_dataset_init(&d, &xt, 1, NULL, NULL, 0, e) == RC_OK &&
           rc_quantize_model(m, &d, cfg, &q->rep, e) == RC_OK && rc_model_save(m, out, NULL, 0, e) == RC_OK &&
           rc_model_load(&q->m, out, NULL, e) == RC_OK;
  rc_dataset_free(&d);
  rc_model_free(m);
  return ok;
}

static void quantized_free(quantized *q) {
  rc_model_free(q->m);
  rc_quant_report_free(&q->rep);
}

static const rc_node *producer(const rc_graph *g, int v) {
  return v >= 0 && g->values[v].producer >= 0 ? &g->nodes[g->values[v].producer] : NULL;
}

static const rc_node *find_op(const rc_graph *g, const char *op, int nth) {
  for (int i = 0; i < g->n_nodes; i++)
    if (!strcmp(g->nodes[i].op_type, op) && nth-- == 0) return &g->nodes[i];
  return NULL;
}

static int count_op(const rc_graph *g, const char *op) {
  int c = 0;
  for (int i = 0; i < g->n_nodes; i++) c += !strcmp(g->nodes[i].op_type, op);
  return c;
}

/* The DequantizeLinear feeding input slot of layer n: its integer tensor and scale. */
static const rc_node *dq_of(const rc_graph *g, const rc_node *n, int slot, const rc_tensor **q, const float **scale) {
  const rc_node *dq = slot < n->n_in ? producer(g, n->in[slot]) : NULL;
  if (!dq || strcmp(dq->op_type, "DequantizeLinear")) return NULL;
  *q = &g->values[dq->in[0]].decl;
  *scale = g->values[dq->in[1]].decl.data;
  return dq;
}

/* The hand-made net (with BN, opset 13) in `file`, its samples and a
 * min/max calibration config. */
static void minmax_setup(net *n, unsigned net_seed, const char *file, float *x, unsigned x_seed,
                         rc_quant_config *cfg) {
  net_init(n, net_seed);
  write_net(n, 1, 8, 13, tpath(file));
  make_inputs(x, x_seed);
  rc_quant_config_init(cfg);
  cfg->calib = RC_CALIB_MINMAX;
}

static void test_weight_and_bias_grids(void) {
  net n;
  static float x[N_SAMPLES * C_IN * HW * HW];
  rc_quant_config cfg;
  minmax_setup(&n, 11, "net.onnx", x, 5, &cfg);
  cfg.batch = 10; /* 24 samples: a short last batch is calibrated through its own plan */
  rc_err e = {0};
  quantized q;
  if (!quantize_file(tpath("net.onnx"), tpath("q8.onnx"), &cfg, x, &q, &e)) {
    fprintf(stderr, "%s\n", e.msg);
    CHECK(0);
    quantized_free(&q);
    return;
  }
  const rc_graph *g = &q.m->graph;
  CHECK_INT(count_op(g, "BatchNormalization"), 0);
  CHECK_INT(q.rep.n_bn_folded, 1);
  CHECK_INT(q.rep.n_layers, 3);
  /* Grids: x, relu1 (after the folded BN and the fused Relu), flat, relu2, y. */
  CHECK_INT(q.rep.n_grids, 5);
  CHECK_INT(count_op(g, "QuantizeLinear"), 5);
  /* Conv weights: per output channel (axis 0), scale = max|w'| / 127 of the folded weights. */
  double rw[C_OUT * C_IN * 9], rb[C_OUT];
  fold_reference(&n, rw, rb);
  const rc_node *conv = find_op(g, "Conv", 0);
  const rc_tensor *wq = NULL, *bq = NULL, *xq = NULL;
  const float *ws = NULL, *bs = NULL, *xs = NULL;
  CHECK(conv && dq_of(g, conv, 1, &wq, &ws));
  CHECK(conv && dq_of(g, conv, 2, &bq, &bs));
  CHECK(conv && dq_of(g, conv, 0, &xq, &xs));
  if (!wq || !bq || !xq) {
    quantized_free(&q);
    return;
  }
  CHECK_INT(wq->dtype, RC_DTYPE_INT8);
  CHECK_INT(bq->dtype, RC_DTYPE_INT32);
  CHECK_INT(rc__attr_int(producer(g, conv->in[1]), "axis", 1), 0);
  const int8_t *wv = wq->data;
  for (int c = 0; c < C_OUT; c++) {
    double mx = 0;
    for (int i = 0; i < C_IN * 9; i++) mx = fmax(mx, fabs(rw[c * C_IN * 9 + i]));
    CHECK_NEAR(ws[c], mx / 127, 1e-9, 1e-5);
    int peak = 0;
    for (int i = 0; i < C_IN * 9; i++) {
      int v = wv[c * C_IN * 9 + i];
      CHECK_GE(v, -127);
      CHECK_LE(v, 127);
      if (abs(v) > peak) peak = abs(v);
      CHECK_NEAR(v * ws[c], rw[c * C_IN * 9 + i], ws[c] / 2 + 1e-7, 0); /* rounding error at most half a step */
    }
    CHECK_INT(peak, 127);
    /* Bias: int32 with scale = input scale x weight scale, zero point 0. */
    CHECK_NEAR(bs[c], xs[0] * ws[c], 0, 1e-6);
    CHECK_NEAR(((const int32_t *)bq->data)[c], rint(rb[c] / ((double)xs[0] * ws[c])), 1, 0);
  }
  /* Flatten passes the Relu's grid on unchanged. */
  CHECK_STR_EQ(q.rep.grids[1].tensor, "relu1");
  CHECK_STR_EQ(q.rep.grids[2].tensor, "flat");
  CHECK_EQ(q.rep.grids[2].scale, q.rep.grids[1].scale);
  CHECK_EQ(q.rep.grids[2].zero_point, q.rep.grids[1].zero_point);
  /* The input grid: min/max of the samples widened to include 0. */
  float lo = 0, hi = 0;
  for (int i = 0; i < N_SAMPLES * C_IN * HW * HW; i++) {
    lo = fminf(lo, x[i]);
    hi = fmaxf(hi, x[i]);
  }
  CHECK_NEAR(xs[0], (hi - lo) / 255, 1e-9, 1e-6);
  /* Gemm with transB = 1: per-channel along axis 0 of (4, 48); MatMul: along axis rank-1 = 1 of (4, 5). */
  const rc_node *gemm = find_op(g, "Gemm", 0), *mm = find_op(g, "MatMul", 0);
  CHECK(gemm && dq_of(g, gemm, 1, &wq, &ws));
  if (gemm) CHECK_INT(rc__attr_int(producer(g, gemm->in[1]), "axis", 1), 0);
  if (gemm && ws) CHECK_INT(g->values[producer(g, gemm->in[1])->in[1]].decl.dims[0], H1);
  CHECK(mm && dq_of(g, mm, 1, &wq, &ws));
  if (mm) CHECK_INT(rc__attr_int(producer(g, mm->in[1]), "axis", 1), 1);
  if (mm && ws) {
    for (int j = 0; j < OUTS; j++) {
      double mx = 0;
      for (int k = 0; k < H1; k++) mx = fmax(mx, fabs(n.w2[k * OUTS + j]));
      CHECK_NEAR(ws[j], mx / 127, 1e-9, 1e-5);
    }
  }
  /* The graph output keeps its name, now produced by DequantizeLinear. */
  const rc_node *last = producer(g, g->outputs[0]);
  CHECK_NOT_NULL(last);
  if (last) {
    CHECK_STR_EQ(last->op_type, "DequantizeLinear");
  }
  CHECK_STR_EQ(g->values[g->outputs[0]].name, "y");
  /* And the quantized model stays close to the float one. */
  static float yf[N_SAMPLES * OUTS], yq[N_SAMPLES * OUTS];
  CHECK(run_file(tpath("net.onnx"), x, yf));
  CHECK(run_file(tpath("q8.onnx"), x, yq));
  double worst = 0, span = 0;
  for (int i = 0; i < N_SAMPLES * OUTS; i++) {
    worst = fmax(worst, fabs(yq[i] - yf[i]));
    span = fmax(span, fabs(yf[i]));
  }
  CHECK_LT(worst, 0.05 * span);
  quantized_free(&q);
}

static void test_int4_weights(void) {
  net n;
  net_init(&n, 13);
  static float x[N_SAMPLES * C_IN * HW * HW];
  make_inputs(x, 9);
  rc_quant_config cfg;
  rc_quant_config_init(&cfg);
  cfg.weight_bits = 4;
  rc_err e = {0};
  /* Opset 13: no int4 type for DequantizeLinear, so int8 tensors hold [-7, 7]. */
  write_net(&n, 1, 8, 13, tpath("net13.onnx"));
  quantized q;
  CHECK(quantize_file(tpath("net13.onnx"), tpath("q4_13.onnx"), &cfg, x, &q, &e));
  if (q.m) {
    CHECK_INT(q.rep.weight_dtype, RC_DTYPE_INT8);
    CHECK_INT(q.rep.int4_as_int8, 1);
    const rc_graph *g = &q.m->graph;
    const rc_tensor *wq = NULL;
    const float *ws = NULL;
    const rc_node *conv = find_op(g, "Conv", 0);
    CHECK(conv && dq_of(g, conv, 1, &wq, &ws));
    if (wq) {
      CHECK_INT(wq->dtype, RC_DTYPE_INT8);
      int peak = 0;
      for (int64_t i = 0; i < rc_tensor_numel(wq); i++) {
        int v = ((const int8_t *)wq->data)[i];
        CHECK_GE(v, -7);
        CHECK_LE(v, 7);
        if (abs(v) > peak) peak = abs(v);
      }
      CHECK_INT(peak, 7);
      double rw[C_OUT * C_IN * 9], rb[C_OUT];
      fold_reference(&n, rw, rb);
      for (int c = 0; c < C_OUT; c++) {
        double mx = 0;
        for (int i = 0; i < C_IN * 9; i++) mx = fmax(mx, fabs(rw[c * C_IN * 9 + i]));
        CHECK_NEAR(ws[c], mx / 7, 1e-9, 1e-5);
      }
    }
  } else {
    fprintf(stderr, "%s\n", e.msg);
  }
  quantized_free(&q);
  /* Opset 21 with IR version 10: int4 tensors (ONNX data type 22). */
  write_net(&n, 1, 10, 21, tpath("net21.onnx"));
  CHECK(quantize_file(tpath("net21.onnx"), tpath("q4_21.onnx"), &cfg, x, &q, &e));
  if (q.m) {
    CHECK_INT(q.rep.weight_dtype, RC_DTYPE_INT4);
    CHECK_INT(q.rep.int4_as_int8, 0);
    const rc_graph *g = &q.m->graph;
    const rc_tensor *wq = NULL;
    const float *ws = NULL;
    const rc_node *gemm = find_op(g, "Gemm", 0);
    CHECK(gemm && dq_of(g, gemm, 1, &wq, &ws));
    if (wq) {
      CHECK_INT(wq->dtype, RC_DTYPE_INT4);
      for (int64_t i = 0; i < rc_tensor_numel(wq); i++) CHECK_LE(abs(((const int8_t *)wq->data)[i]), 7);
    }
    static float yf[N_SAMPLES * OUTS], yq[N_SAMPLES * OUTS];
    CHECK(run_file(tpath("net21.onnx"), x, yf));
    CHECK(run_file(tpath("q4_21.onnx"), x, yq));
  } else {
    fprintf(stderr, "%s\n", e.msg);
  }
  quantized_free(&q);
}

static void test_weight_only_and_percentile(void) {
  net n;
  net_init(&n, 17);
  write_net(&n, 1, 8, 13, tpath("netw.onnx"));
  static float x[N_SAMPLES * C_IN * HW * HW];
  make_inputs(x, 21);
  x[5] = 40.0f; /* one outlier: min/max follows it, a 99% percentile does not */
  rc_quant_config cfg;
  rc_quant_config_init(&cfg);
  cfg.activation_bits = 0;
  rc_err e = {0};
  quantized q;
  CHECK(quantize_file(tpath("netw.onnx"), tpath("qw.onnx"), &cfg, x, &q, &e));
  if (q.m) {
    CHECK_INT(count_op(&q.m->graph, "QuantizeLinear"), 0);
    CHECK_INT(count_op(&q.m->graph, "DequantizeLinear"), 3); /* the three weights; biases stay float */
    CHECK_INT(q.rep.n_grids, 0);
    CHECK_INT(q.rep.n_bias_float, 2);
  }
  quantized_free(&q);
  cfg.activation_bits = 8;
  cfg.calib = RC_CALIB_MINMAX;
  CHECK(quantize_file(tpath("netw.onnx"), tpath("qmm.onnx"), &cfg, x, &q, &e));
  float hi_minmax = q.m ? q.rep.grids[0].hi : 0;
  CHECK_STR_EQ(q.rep.grids ? q.rep.grids[0].tensor : "", "x");
  CHECK_NEAR(hi_minmax, 40.0, 0, 1e-6);
  quantized_free(&q);
  cfg.calib = RC_CALIB_PERCENTILE;
  cfg.percentile = 99.0;
  CHECK(quantize_file(tpath("netw.onnx"), tpath("qpc.onnx"), &cfg, x, &q, &e));
  if (q.m) {
    CHECK_LT(q.rep.grids[0].hi, 2.0f);  /* inputs are in [-1.25, 1.75] apart from the outlier */
    CHECK_GT(q.rep.grids[0].hi, 1.5f);
    CHECK_LT(q.rep.grids[0].lo, -1.0f);
  }
  quantized_free(&q);
}

/* The output margin stretches the graph output's grid (y, the last of the
 * five) by 1 + margin about zero and leaves every inner grid as calibrated. */
static void test_output_margin(void) {
  net n;
  static float x[N_SAMPLES * C_IN * HW * HW];
  rc_quant_config cfg;
  minmax_setup(&n, 29, "netm.onnx", x, 31, &cfg);
  CHECK_NEAR(cfg.output_margin, 0.1, 0, 0);
  rc_err e = {0};
  quantized wide, tight;
  CHECK(quantize_file(tpath("netm.onnx"), tpath("qm_wide.onnx"), &cfg, x, &wide, &e));
  cfg.output_margin = 0;
  CHECK(quantize_file(tpath("netm.onnx"), tpath("qm_tight.onnx"), &cfg, x, &tight, &e));
  if (wide.m && tight.m && wide.rep.n_grids == 5 && tight.rep.n_grids == 5) {
    for (int i = 0; i < 4; i++) {
      CHECK(!strcmp(wide.rep.grids[i].tensor, tight.rep.grids[i].tensor));
      CHECK(wide.rep.grids[i].scale == tight.rep.grids[i].scale);
      CHECK(wide.rep.grids[i].margin == 0);
    }
    const rc_quant_grid *w = &wide.rep.grids[4], *t = &tight.rep.grids[4];
    CHECK(!strcmp(w->tensor, "y"));
    CHECK_NEAR(w->margin, 0.1, 0, 1e-7);
    CHECK_NEAR(w->lo, t->lo * 1.1, 0, 1e-6);
    CHECK_NEAR(w->hi, t->hi * 1.1, 0, 1e-6);
    CHECK_NEAR(w->scale, t->scale * 1.1, 0, 1e-5);
    CHECK(t->lo < 0 && t->hi > 0); /* both ends stretched, so the check means something */
  } else {
    CHECK(0);
  }
  quantized_free(&wide);
  quantized_free(&tight);
  cfg.output_margin = -0.5;
  CHECK(!quantize_file(tpath("netm.onnx"), tpath("never.onnx"), &cfg, x, &tight, &e));
  CHECK_STR_CONTAINS(e.msg, "output margin");
  quantized_free(&tight);
}

static void test_act_grid(void) {
  float s;
  int z;
  rc__quant_act_grid(-1.0f, 3.0f, &s, &z);
  CHECK_NEAR(s, 4.0 / 255, 0, 1e-7);
  CHECK_INT(z, 64); /* round(1 / (4/255)) = round(63.75) */
  rc__quant_act_grid(0.5f, 2.0f, &s, &z); /* widened to [0, 2]: zero is exact */
  CHECK_NEAR(s, 2.0 / 255, 0, 1e-7);
  CHECK_INT(z, 0);
  rc__quant_act_grid(-3.0f, -1.0f, &s, &z);
  CHECK_INT(z, 255);
  rc__quant_act_grid(0, 0, &s, &z);
  CHECK_GT(s, 0);
  CHECK_INT(z, 0);
}

static void test_weight_grid_axes(void) {
  /* (2, 3) weight: per-channel along axis 1 (a Gemm with transB = 0). */
  const float w[6] = {0.5f, -2.0f, 0.0f, -1.0f, 1.0f, 0.0f};
  rc_tensor t = {RC_DTYPE_FLOAT, 2, {2, 3}, (void *)w};
  int8_t q[6];
  float s[3];
  rc__quant_weight(q, s, &t, 1, 127);
  CHECK_NEAR(s[0], 1.0 / 127, 0, 1e-7);
  CHECK_NEAR(s[1], 2.0 / 127, 0, 1e-7);
  CHECK_NEAR(s[2], 1.0, 0, 0); /* all-zero channel: any positive scale; 1 is used */
  CHECK_INT(q[0], 64);          /* 0.5 * 127 = 63.5 rounds half to even */
  CHECK_INT(q[1], -127);
  CHECK_INT(q[3], -127);
  CHECK_INT(q[4], 64);          /* 1.0 / (2/127) = 63.5 -> 64 */
  CHECK_INT(q[2], 0);
}

static void test_refusals(void) {
  net n;
  net_init(&n, 19);
  static float x[N_SAMPLES * C_IN * HW * HW];
  make_inputs(x, 1);
  rc_quant_config cfg;
  rc_quant_config_init(&cfg);
  rc_err e = {0};
  quantized q;
  write_net(&n, 1, 7, 12, tpath("net12.onnx"));
  CHECK(!quantize_file(tpath("net12.onnx"), tpath("never.onnx"), &cfg, x, &q, &e));
  CHECK_STR_CONTAINS(e.msg, "opset 13");
  CHECK_NE(access(tpath("never.onnx"), F_OK), 0);
  quantized_free(&q);
  /* A quantized model is refused as input. */
  write_net(&n, 1, 8, 13, tpath("net_ok.onnx"));
  CHECK(quantize_file(tpath("net_ok.onnx"), tpath("already.onnx"), &cfg, x, &q, &e));
  quantized_free(&q);
  CHECK(!quantize_file(tpath("already.onnx"), tpath("twice.onnx"), &cfg, x, &q, &e));
  CHECK_STR_CONTAINS(e.msg, "quantized already");
  quantized_free(&q);
  cfg.weight_bits = 3;
  CHECK(!quantize_file(tpath("net_ok.onnx"), tpath("never.onnx"), &cfg, x, &q, &e));
  CHECK_STR_CONTAINS(e.msg, "weight bits");
  quantized_free(&q);
}

/* The edit API directly: append, rewire, sort, drop what is unused. */
static void test_edit_api(void) {
  net n;
  net_init(&n, 23);
  write_net(&n, 0, 8, 13, tpath("edit_in.onnx"));
  rc_err e = {0};
  rc_model *m = NULL;
  CHECK_STATUS(rc_model_load(&m, tpath("edit_in.onnx"), NULL, &e), RC_OK);
  if (!m) return;
  /* y' = Neg(Neg(relu2)) inserted before the MatMul, appended at the end of the node list. */
  CHECK_STATUS(rc_model_edit_rewire(m, "relu2", "twice", NULL, &e), RC_OK);
  const char *in1[1] = {"relu2"}, *out1[1] = {"once"}, *in2[1] = {"once"}, *out2[1] = {"twice"};
  CHECK_STATUS(rc_model_edit_add_node(m, "Neg", "n2", in2, 1, out2, 1, NULL, 0, &e), RC_OK);
  CHECK_STATUS(rc_model_edit_add_node(m, "Neg", "n1", in1, 1, out1, 1, NULL, 0, &e), RC_OK);
  CHECK_FAILS(rc_model_edit_add_node(m, "Neg", NULL, in1, 1, out1, 1, NULL, 0, &e)); /* "once" is produced */
  CHECK(rc_model_edit_name_used(m, "once"));
  char buf[64];
  CHECK_STATUS(rc_model_edit_unique_name(m, "once", buf, sizeof buf, &e), RC_OK);
  CHECK_STR_EQ(buf, "once_1");
  /* fc1.b replaced by a new initializer; the old one becomes unused. */
  const float nb[H1] = {0};
  rc_tensor t = {RC_DTYPE_FLOAT, 1, {H1}, (void *)nb};
  CHECK_FAILS(rc_model_edit_add_initializer(m, "fc1.b", &t, &e)); /* name in use */
  CHECK_STATUS(rc_model_edit_add_initializer(m, "fc1.zero_bias", &t, &e), RC_OK);
  int gi = rc_model_edit_producer(m, "fc1_out");
  CHECK_GE(gi, 0);
  CHECK_STATUS(rc_model_edit_set_input(m, gi, 2, "fc1.zero_bias", &e), RC_OK);
  CHECK_FAILS(rc_model_edit_set_input(m, gi, 4, "x", &e));
  CHECK_INT(rc_model_edit_drop_unused(m), 1);
  CHECK_STATUS(rc_model_edit_sort(m, &e), RC_OK);
  CHECK_LT(rc_model_edit_producer(m, "once"), rc_model_edit_producer(m, "twice"));
  CHECK_LT(rc_model_edit_producer(m, "twice"), rc_model_edit_producer(m, "y"));
  CHECK_STATUS(rc_model_save(m, tpath("edit_out.onnx"), NULL, 0, &e), RC_OK);
  rc_model_free(m);
  /* Same outputs as the float net with fc1's bias zeroed. */
  for (int i = 0; i < H1; i++) n.b1[i] = 0;
  write_net(&n, 0, 8, 13, tpath("edit_ref.onnx"));
  static float x[N_SAMPLES * C_IN * HW * HW], ya[N_SAMPLES * OUTS], yb[N_SAMPLES * OUTS];
  make_inputs(x, 2);
  CHECK(run_file(tpath("edit_out.onnx"), x, ya));
  CHECK(run_file(tpath("edit_ref.onnx"), x, yb));
  for (int i = 0; i < N_SAMPLES * OUTS; i++) CHECK_NEAR(ya[i], yb[i], 0, 0);
  /* A cycle is refused. */
  CHECK_STATUS(rc_model_load(&m, tpath("edit_out.onnx"), NULL, &e), RC_OK);
  if (m) {
    int a = rc_model_edit_producer(m, "once");
    CHECK_STATUS(rc_model_edit_set_input(m, a, 0, "twice", &e), RC_OK);
    CHECK_FAILS(rc_model_edit_sort(m, &e));
    CHECK_STR_CONTAINS(e.msg, "cycle");
    rc_model_free(m);
  }
}

static void remove_tmp(void) {
  static const char *const files[] = {"unfolded.onnx", "folded.onnx", "net.onnx", "q8.onnx", "net13.onnx",
                                      "q4_13.onnx", "net21.onnx", "q4_21.onnx", "netw.onnx", "qw.onnx",
                                      "qmm.onnx", "qpc.onnx", "net12.onnx", "net_ok.onnx", "already.onnx",
                                      "edit_in.onnx", "edit_out.onnx", "edit_ref.onnx", "netm.onnx",
                                      "qm_wide.onnx", "qm_tight.onnx"};
  for (size_t i = 0; i < sizeof files / sizeof files[0]; i++) unlink(tpath(files[i]));
  rmdir(tmp_dir);
}

int main(void) {
  snprintf(tmp_dir, sizeof tmp_dir, "%s/recoup-quantize-XXXXXX", getenv("TMPDIR") ? getenv("TMPDIR") : "/tmp");
  if (!mkdtemp(tmp_dir)) {
    perror("mkdtemp");
    return 1;
  }
  RUN(test_bn_fold_matches_unfolded_graph);
  RUN(test_weight_grid_axes);
  RUN(test_act_grid);
  RUN(test_weight_and_bias_grids);
  RUN(test_int4_weights);
  RUN(test_weight_only_and_percentile);
  RUN(test_output_margin);
  RUN(test_refusals);
  RUN(test_edit_api);
  remove_tmp();
  return TEST_REPORT();
}
