/* Post-training quantization: decide the rewrite on the graph IR, calibrate
 * activation ranges by running the float model, then apply the rewrite to
 * the kept ModelProto through the edit API of src/onnx.
 *
 * Grids (common practice for integer inference):
 * - weights: symmetric per output channel, zero point 0, [-127, 127] for 8
 *   bits (-128 stays unused so the grid is symmetric and negation never
 *   overflows) or [-7, 7] for 4 bits;
 * - activations: asymmetric per-tensor uint8 whose range always includes 0,
 *   so zero (padding, ReLU's floor) is represented exactly; a graph output's
 *   range is stretched by the output margin (our choice, see
 *   rc_quant_config_init);
 * - biases: int32 with scale = input scale x weight scale per channel, the
 *   scale of the integer accumulator, zero point 0. */
#include "compress/quantize.h"

#include <math.h>
#include <stdio.h>
#include <string.h>

#include <cJSON.h>

#include "core/alloc.h"
#include "plan/grid_range.h"
#include "plan/plan.h"

#define HIST_BINS 4096
#define INT32_LIMIT 2147483647.0

void rc_quant_config_init(rc_quant_config *c) {
  c->weight_bits = 8;
  c->activation_bits = 8;
  c->calib = RC_CALIB_PERCENTILE;
  c->percentile = 99.99;
  c->batch = 64;
  c->output_margin = 0.1;
}

void rc_quant_report_free(rc_quant_report *r) {
  rc__free(r->layers);
  rc__free(r->grids);
  memset(r, 0, sizeof *r);
}

rc_dtype rc_quant_weight_dtype(const rc_model *m, int weight_bits) {
  if (weight_bits == 4 && m->graph.opset >= 21 && m->graph.ir_version >= 10) return RC_DTYPE_INT4;
  return RC_DTYPE_INT8;
}

/* ---- grids ---- */

void rc__quant_weight(int8_t *q, float *scale, const rc_tensor *w, int axis, int qmax) {
  const float *x = w->data;
  int64_t ch = w->dims[axis], inner = 1, n = rc_tensor_numel(w);
  for (int d = axis + 1; d < w->rank; d++) inner *= w->dims[d];
  for (int64_t c = 0; c < ch; c++) scale[c] = 0;
  for (int64_t i = 0; i < n; i++) {
    int64_t c = (i / inner) % ch;
    float a = fabsf(x[i]);
    if (a > scale[c]) scale[c] = a;
  }
  for (int64_t c = 0; c < ch; c++) scale[c] = scale[c] > 0 ? scale[c] / (float)qmax : 1.0f;
  for (int64_t i = 0; i < n; i++) {
    float v = rintf(x[i] / scale[(i / inner) % ch]); /* half to even, as QuantizeLinear */
    q[i] = (int8_t)(v < -qmax ? -qmax : v > qmax ? qmax : v);
  }
}

void rc__quant_act_grid(float lo, float hi, float *scale, int *zero_point) {
  if (lo > 0) lo = 0;
  if (hi < 0) hi = 0;
  float s = (hi - lo) / 255.0f;
  if (!(s >= 1e-10f)) s = s > 0 ? 1e-10f : 1.0f; /* all-zero tensor: any positive scale is exact */
  float z = rintf(-lo / s);
  *scale = s;
  *zero_point = z < 0 ? 0 : z > 255 ? 255 : (int)z;
}

void rc__fold_bn(float *w, float *bias, int64_t c_out, int64_t per_channel, const float *gamma, const float *beta,
                 const float *mean, const float *var, float eps) {
  for (int64_t c = 0; c < c_out; c++) {
    double k = (double)gamma[c] / sqrt((double)var[c] + (double)eps);
    for (int64_t i = 0; i < per_channel; i++) w[c * per_channel + i] = (float)(w[c * per_channel + i] * k);
    bias[c] = (float)(((double)bias[c] - mean[c]) * k + beta[c]);
  }
}

/* ---- the rewrite, decided on the graph IR ---- */

typedef struct layer_plan {
  int node;       /* graph node */
  int axis;       /* output-channel axis of the weight */
  int64_t channels;
  rc_tensor w;    /* weight to quantize: the initializer's data or a folded copy */
  const char *w_name;
  float *b;       /* bias (C): initializer data, folded copy, or NULL */
  int b_value;    /* bias initializer, -1 when none (or folded) */
  const char *b_name; /* name new bias tensors derive from */
  int bias_other;     /* a bias not of one value per channel, left as it is */
  int bn;         /* folded BatchNormalization node, -1 if none */
  int in_value;   /* data input */
  int out_value;  /* output after a folded BN and a fused activation */
  const char *key; /* name of the layer's first output after folding: finds it in the message */
} layer_plan;

typedef struct qstate {
  rc_model *m;
  const rc_graph *g;
  const rc_quant_config *cfg;
  rc_quant_report *rep;
  int *uses;      /* node inputs + graph outputs reading each value */
  int *reader;    /* the last node reading each value */
  layer_plan *layers;
  int n_layers;
  int *grid_of;   /* value -> grid index, -1 */
  int *grid_value;
  int n_grids;
  double *lo, *hi;
  int64_t *hist;  /* n_grids x HIST_BINS */
  int64_t *count;
  cJSON *ranges;  /* RC_RANGES_METADATA being written: integer weight -> range */
  rc_err *e;
} qstate;

static int is_op(const rc_node *n, const char *op) { return !strcmp(n->op_type, op) && !*n->domain; }

static int is_graph_output(const rc_graph *g, int v) {
  for (int i = 0; i < g->n_outputs; i++)
    if (g->outputs[i] == v) return 1;
  return 0;
}

static const rc_value *float_init(const rc_graph *g, const rc_node *n, int slot) {
  if (slot >= n->n_in || n->in[slot] < 0) return NULL;
  const rc_value *v = &g->values[n->in[slot]];
  return v->kind == RC_VALUE_INITIALIZER && v->decl.dtype == RC_DTYPE_FLOAT && v->decl.data ? v : NULL;
}

static rc_status nomem(qstate *q) { return rc__fail(q->e, RC_ERR_NOMEM, "%s: out of memory while quantizing", q->g->path); }

static rc_status count_uses(qstate *q) {
  const rc_graph *g = q->g;
  q->uses = rc__calloc((size_t)g->n_values + 1, sizeof(int));
  q->reader = rc__calloc((size_t)g->n_values + 1, sizeof(int));
  q->grid_of = rc__malloc(sizeof(int) * ((size_t)g->n_values + 1));
  if (!q->uses || !q->reader || !q->grid_of) return nomem(q);
  for (int v = 0; v < g->n_values; v++) q->grid_of[v] = -1;
  for (int i = 0; i < g->n_nodes; i++)
    for (int k = 0; k < g->nodes[i].n_in; k++)
      if (g->nodes[i].in[k] >= 0) {
        q->uses[g->nodes[i].in[k]]++;
        q->reader[g->nodes[i].in[k]] = i;
      }
  for (int i = 0; i < g->n_outputs; i++) q->uses[g->outputs[i]]++;
  return RC_OK;
}

static rc_status check_model(qstate *q) {
  const rc_graph *g = q->g;
  if (g->opset < 13)
    return rc__fail(q->e, RC_ERR_UNSUPPORTED,
                    "%s: opset %d; per-channel DequantizeLinear (the axis attribute) needs opset 13 or later: "
                    "re-export the model with opset 13+",
                    g->path, g->opset);
  for (int i = 0; i < g->n_nodes; i++)
    if (is_op(&g->nodes[i], "QuantizeLinear") || is_op(&g->nodes[i], "DequantizeLinear"))
      return rc__fail(q->e, RC_ERR_INVALID, "%s: node '%s' is a %s: the model is quantized already", g->path,
                      g->nodes[i].label, g->nodes[i].op_type);
  return RC_OK;
}

/* The weight's output-channel axis, or -1 when the layer is not quantized. */
static int weight_axis(const rc_graph *g, const rc_node *n, const rc_value *w) {
  int r = w->decl.rank;
  if (n->n_in < 2 || n->in[0] < 0 || g->values[n->in[0]].kind == RC_VALUE_INITIALIZER) return -1;
  if (is_op(n, "Conv")) return r >= 3 ? 0 : -1;
  if (is_op(n, "ConvTranspose")) return r >= 3 ? 1 : -1;
  if (is_op(n, "Gemm")) return r == 2 ? (rc__attr_int(n, "transB", 0) ? 0 : 1) : -1;
  if (is_op(n, "MatMul")) return r >= 2 ? r - 1 : -1;
  return -1;
}

/* The BatchNormalization that alone reads the Conv's output, in inference form. */
static int foldable_bn(qstate *q, const rc_node *conv, int64_t c_out) {
  const rc_graph *g = q->g;
  int x = conv->out[0];
  if (!is_op(conv, "Conv") || x < 0 || q->uses[x] != 1 || is_graph_output(g, x)) return -1;
  int bi = q->reader[x];
  const rc_node *bn = &g->nodes[bi];
  if (!is_op(bn, "BatchNormalization") || bn->n_in != 5 || bn->in[0] != x) return -1;
  if (rc__attr_int(bn, "training_mode", 0) != 0) return -1;
  for (int k = 1; k < bn->n_out; k++)
    if (bn->out[k] >= 0 && q->uses[bn->out[k]] > 0) return -1;
  for (int k = 1; k < 5; k++) {
    const rc_value *p = float_init(g, bn, k);
    if (!p || rc_tensor_numel(&p->decl) != c_out) return -1;
  }
  return bi;
}

static rc_status fold_layer(qstate *q, layer_plan *L, const rc_value *bias) {
  const rc_graph *g = q->g;
  const rc_node *bn = &g->nodes[L->bn];
  int64_t n = rc_tensor_numel(&L->w);
  float *w = rc__malloc(sizeof(float) * (size_t)n);
  float *b = rc__calloc((size_t)L->channels, sizeof(float));
  if (!w || !b) {
    rc__free(w);
    rc__free(b);
    return nomem(q);
  }
  memcpy(w, L->w.data, sizeof(float) * (size_t)n);
  if (bias) memcpy(b, bias->decl.data, sizeof(float) * (size_t)L->channels);
  rc__fold_bn(w, b, L->channels, n / L->channels, g->values[bn->in[1]].decl.data, g->values[bn->in[2]].decl.data,
              g->values[bn->in[3]].decl.data, g->values[bn->in[4]].decl.data, rc__attr_float(bn, "epsilon", 1e-5f));
  L->w.data = w;
  L->b = b;
  L->b_value = -1;
  return RC_OK;
}

static int fusable_activation(const rc_node *n) { return is_op(n, "Relu") || is_op(n, "Clip"); }

static rc_status plan_layer(qstate *q, int ni) {
  const rc_graph *g = q->g;
  const rc_node *n = &g->nodes[ni];
  if (!(is_op(n, "Conv") || is_op(n, "ConvTranspose") || is_op(n, "Gemm") || is_op(n, "MatMul"))) return RC_OK;
  const rc_value *w = float_init(g, n, 1);
  if (!w || n->n_out < 1 || n->out[0] < 0) return RC_OK;
  int axis = weight_axis(g, n, w);
  if (axis < 0 || rc_tensor_numel(&w->decl) < 1) return RC_OK;
  layer_plan *L = &q->layers[q->n_layers];
  memset(L, 0, sizeof *L);
  L->node = ni;
  L->axis = axis;
  L->w = w->decl;
  L->w_name = w->name;
  L->channels = w->decl.dims[axis];
  L->in_value = n->in[0];
  const rc_value *bias = is_op(n, "MatMul") ? NULL : float_init(g, n, 2);
  L->b = bias ? bias->decl.data : NULL;
  L->b_value = bias ? n->in[2] : -1;
  L->b_name = bias ? bias->name : NULL;
  L->bn = foldable_bn(q, n, L->channels);
  if (bias && L->bn >= 0 && rc_tensor_numel(&bias->decl) != L->channels) L->bn = -1;
  if (n->n_in > 2 && n->in[2] >= 0 && !bias) L->bn = -1; /* a computed bias cannot be folded into */
  if (bias && rc_tensor_numel(&bias->decl) != L->channels) { /* a broadcast bias stays float, untouched */
    L->b = NULL;
    L->b_value = -1;
    L->b_name = NULL;
    L->bias_other = 1;
  }
  L->out_value = n->out[0];
  if (L->bn >= 0) {
    RC_TRY(fold_layer(q, L, bias));
    L->out_value = g->nodes[L->bn].out[0];
  }
  L->key = g->values[L->out_value].name;
  int o = L->out_value;
  if (q->uses[o] == 1 && !is_graph_output(g, o) && fusable_activation(&g->nodes[q->reader[o]]) &&
      g->nodes[q->reader[o]].in[0] == o && g->nodes[q->reader[o]].out[0] >= 0)
    L->out_value = g->nodes[q->reader[o]].out[0];
  q->n_layers++;
  return RC_OK;
}

static void mark_grid(qstate *q, int v) {
  if (v < 0 || q->grid_of[v] >= 0) return;
  q->grid_of[v] = q->n_grids;
  q->grid_value[q->n_grids++] = v;
}

static rc_status plan_rewrite(qstate *q) {
  const rc_graph *g = q->g;
  q->layers = rc__calloc((size_t)g->n_nodes + 1, sizeof *q->layers);
  q->grid_value = rc__malloc(sizeof(int) * (2 * (size_t)g->n_nodes + 1));
  if (!q->layers || !q->grid_value) return nomem(q);
  for (int i = 0; i < g->n_nodes; i++) RC_TRY(plan_layer(q, i));
  if (!q->n_layers)
    return rc__fail(q->e, RC_ERR_INVALID,
                    "%s: no Conv, ConvTranspose, Gemm or MatMul with a float initializer weight to quantize", g->path);
  if (q->cfg->activation_bits)
    for (int i = 0; i < q->n_layers; i++) {
      mark_grid(q, q->layers[i].in_value);
      mark_grid(q, q->layers[i].out_value);
    }
  return RC_OK;
}

/* ---- calibration ---- */

static void observe_range(qstate *q, int gi, const float *x, int64_t n) {
  double lo = q->lo[gi], hi = q->hi[gi];
  for (int64_t i = 0; i < n; i++) {
    if (x[i] != x[i]) { /* NaN: remembered, reported once the pass is over */
      q->lo[gi] = NAN;
      return;
    }
    if (x[i] < lo) lo = x[i];
    if (x[i] > hi) hi = x[i];
  }
  q->lo[gi] = lo;
  q->hi[gi] = hi;
}

static void observe_hist(qstate *q, int gi, const float *x, int64_t n) {
  int64_t *h = q->hist + (size_t)gi * HIST_BINS;
  double lo = q->lo[gi], width = (q->hi[gi] - lo) / HIST_BINS;
  for (int64_t i = 0; i < n; i++) {
    int64_t b = width > 0 ? (int64_t)((x[i] - lo) / width) : 0;
    h[b < 0 ? 0 : b >= HIST_BINS ? HIST_BINS - 1 : b]++;
  }
  q->count[gi] += n;
}

/* Narrow [lo, hi] to the central `percentile` share of the histogram. */
static void percentile_range(qstate *q, int gi) {
  const int64_t *h = q->hist + (size_t)gi * HIST_BINS;
  double lo = q->lo[gi], width = (q->hi[gi] - lo) / HIST_BINS;
  if (q->count[gi] == 0) return;
  int64_t clip = (int64_t)floor((double)q->count[gi] * (100.0 - q->cfg->percentile) / 100.0);
  int64_t seen = 0;
  int b_lo = 0, b_hi = HIST_BINS - 1;
  for (; b_lo < HIST_BINS - 1; b_lo++) {
    seen += h[b_lo];
    if (seen > clip) break;
  }
  seen = 0;
  for (; b_hi > 0; b_hi--) {
    seen += h[b_hi];
    if (seen > clip) break;
  }
  if (b_hi < b_lo) b_hi = b_lo;
  q->lo[gi] = lo + width * b_lo;
  q->hi[gi] = lo + width * (b_hi + 1);
}

typedef struct calib_plans {
  rc_plan *full, *last; /* batch B, and the short final batch when the count is not a multiple */
  int64_t batch;
} calib_plans;

static rc_status make_plan(qstate *q, const rc_dataset *d, int64_t batch, const unsigned char *keep, rc_plan **p) {
  rc_tensor shapes[RC_DATASET_MAX_INPUTS];
  for (int i = 0; i < d->n_inputs; i++) {
    shapes[i] = d->inputs[i];
    shapes[i].dims[0] = batch;
    shapes[i].data = NULL;
    if (d->to_float[i]) shapes[i].dtype = RC_DTYPE_FLOAT; /* converted per batch */
  }
  rc_plan_opts opts = {0};
  opts.keep = keep;
  return rc_plan_init(p, q->g, shapes, &opts, q->e);
}

static rc_status calib_pass(qstate *q, const rc_dataset *d, calib_plans *cp, int pass) {
  int64_t n_batches = rc_dataset_n_batches(d, cp->batch, 0);
  for (int64_t b = 0; b < n_batches; b++) {
    rc_plan *p = b == n_batches - 1 && cp->last ? cp->last : cp->full;
    void *bufs[RC_DATASET_MAX_INPUTS];
    for (int i = 0; i < d->n_inputs; i++) bufs[i] = rc_plan_tensor(p, q->g->inputs[i])->data;
    int64_t count;
    RC_TRY(rc_dataset_gather(bufs, NULL, &count, d, b, cp->batch, q->e));
    RC_TRY(rc_plan_forward(p, q->e));
    for (int gi = 0; gi < q->n_grids; gi++) {
      const rc_tensor *t = rc_plan_tensor(p, q->grid_value[gi]);
      if (pass == 0) observe_range(q, gi, t->data, rc_tensor_numel(t));
      else observe_hist(q, gi, t->data, rc_tensor_numel(t));
    }
  }
  return RC_OK;
}

static rc_status check_grid_tensors(qstate *q, rc_plan *p) {
  for (int gi = 0; gi < q->n_grids; gi++) {
    const rc_tensor *t = rc_plan_tensor(p, q->grid_value[gi]);
    if (t->dtype != RC_DTYPE_FLOAT || !t->data)
      return rc__fail(q->e, RC_ERR_UNSUPPORTED, "%s: tensor '%s' to calibrate is %s, float32 expected", q->g->path,
                      q->g->values[q->grid_value[gi]].name, rc_dtype_name(t->dtype));
  }
  return RC_OK;
}

static rc_status calibrate(qstate *q, const rc_dataset *d) {
  const rc_graph *g = q->g;
  if (d->n < 1) return rc__fail(q->e, RC_ERR_INVALID, "%s: no calibration samples", g->path);
  if (d->n_inputs != g->n_inputs)
    return rc__fail(q->e, RC_ERR_INVALID, "%s: the model has %d inputs, the calibration data %d", g->path,
                    g->n_inputs, d->n_inputs);
  q->lo = rc__malloc(sizeof(double) * ((size_t)q->n_grids + 1));
  q->hi = rc__malloc(sizeof(double) * ((size_t)q->n_grids + 1));
  q->count = rc__calloc((size_t)q->n_grids + 1, sizeof(int64_t));
  unsigned char *keep = rc__calloc((size_t)g->n_values + 1, 1);
  if (!q->lo || !q->hi || !q->count || !keep) {
    rc__free(keep);
    return nomem(q);
  }
  for (int gi = 0; gi < q->n_grids; gi++) {
    keep[q->grid_value[gi]] = 1;
    q->lo[gi] = INFINITY;
    q->hi[gi] = -INFINITY;
  }
  calib_plans cp = {NULL, NULL, q->cfg->batch < d->n ? q->cfg->batch : d->n};
  rc_status st = make_plan(q, d, cp.batch, keep, &cp.full);
  if (st == RC_OK && d->n % cp.batch) st = make_plan(q, d, d->n % cp.batch, keep, &cp.last);
  rc__free(keep);
  if (st == RC_OK) st = check_grid_tensors(q, cp.full);
  if (st == RC_OK) st = calib_pass(q, d, &cp, 0);
  for (int gi = 0; st == RC_OK && gi < q->n_grids; gi++)
    if (!isfinite(q->lo[gi]) || !isfinite(q->hi[gi]))
      st = rc__fail(q->e, RC_ERR_NUMERIC, "%s: tensor '%s' holds non-finite values on the calibration data", g->path,
                    g->values[q->grid_value[gi]].name);
  if (st == RC_OK && q->cfg->calib == RC_CALIB_PERCENTILE && q->n_grids) {
    q->hist = rc__calloc((size_t)q->n_grids * HIST_BINS, sizeof(int64_t));
    if (!q->hist) st = nomem(q);
    if (st == RC_OK) st = calib_pass(q, d, &cp, 1);
    for (int gi = 0; st == RC_OK && gi < q->n_grids; gi++) percentile_range(q, gi);
  }
  rc_plan_free(cp.full);
  rc_plan_free(cp.last);
  return st;
}

/* ---- applying the rewrite to the message ---- */

/* Names of what one grid adds, in the project's own vocabulary, derived
 * from the tensor T the grid belongs to:
 *   T.grid       the integer tensor (initializer, or QuantizeLinear's output)
 *   T.grid_step  its scale (the distance between neighbouring grid points)
 *   T.grid_zero  its zero point
 *   T.on_grid    the float tensor DequantizeLinear gives the consumers
 *   T.pre_grid   a graph output's float values before its pair (the output keeps T)
 *   T.to_grid, T.from_grid   the QuantizeLinear and DequantizeLinear nodes
 * When any of them is taken, all take the same numeric suffix (_1, _2, ...),
 * so the names of one grid stay recognisable as a set. */
typedef struct grid_names {
  char grid[512], step[512], zero[512], on[512], pre[512], to[512], from[512];
} grid_names;

/* Bytes of base kept in a derived name: at most 400, never splitting a UTF-8 character. */
static int base_len(const char *base) {
  size_t n = strlen(base);
  if (n <= 400) return (int)n;
  n = 400;
  while (n > 0 && ((unsigned char)base[n] & 0xC0) == 0x80) n--;
  return (int)n;
}

static rc_status name_grid(qstate *q, const char *base, grid_names *gn) {
  static const char *const parts[] = {"grid", "grid_step", "grid_zero", "on_grid", "pre_grid", "to_grid", "from_grid"};
  char *dst[] = {gn->grid, gn->step, gn->zero, gn->on, gn->pre, gn->to, gn->from};
  for (int k = 0; k < 100000; k++) {
    int free_set = 1;
    for (int i = 0; i < 7 && free_set; i++) {
      char sfx[16] = "";
      if (k) snprintf(sfx, sizeof sfx, "_%d", k);
      snprintf(dst[i], sizeof gn->grid, "%.*s.%s%s", base_len(base), base, parts[i], sfx);
      free_set = !rc_model_edit_name_used(q->m, dst[i]);
    }
    if (free_set) return RC_OK;
  }
  return rc__fail(q->e, RC_ERR_LIMIT, "%s: no free grid names derived from '%.64s'", q->g->path, base);
}

static rc_status unique(qstate *q, const char *base, const char *suffix, char *buf, size_t n) {
  char want[512];
  snprintf(want, sizeof want, "%.*s.%s", base_len(base), base, suffix);
  return rc_model_edit_unique_name(q->m, want, buf, n, q->e);
}

static rc_status node_of(qstate *q, const char *output, int *idx) {
  *idx = rc_model_edit_producer(q->m, output);
  if (*idx < 0)
    return rc__fail(q->e, RC_ERR_INVALID, "%s: no node produces '%s' in the model being rewritten", q->g->path, output);
  return RC_OK;
}

static rc_status add_dequantize(qstate *q, const char *node, const char *x, const char *scale,
                                const char *zero_point, int axis, const char *y) {
  const char *ins[3] = {x, scale, zero_point};
  rc_attr a = {0};
  a.name = "axis";
  a.type = RC_ATTR_INT;
  a.i = axis;
  return rc_model_edit_add_node(q->m, "DequantizeLinear", node, ins, zero_point ? 3 : 2, &y, 1, &a, axis >= 0 ? 1 : 0,
                                q->e);
}

static rc_status apply_folds(qstate *q) {
  for (int i = 0; i < q->n_layers; i++) {
    layer_plan *L = &q->layers[i];
    if (L->bn < 0) continue;
    const rc_node *bn = &q->g->nodes[L->bn];
    int pb, pc;
    RC_TRY(node_of(q, q->g->values[bn->out[0]].name, &pb));
    RC_TRY(rc_model_edit_remove_node(q->m, pb, q->e));
    RC_TRY(node_of(q, q->g->values[bn->in[0]].name, &pc));
    RC_TRY(rc_model_edit_set_output(q->m, pc, 0, L->key, q->e));
    q->rep->n_bn_folded++;
  }
  return RC_OK;
}

static rc_status add_float_bias(qstate *q, layer_plan *L, int node) {
  char name[512];
  RC_TRY(unique(q, L->b_name ? L->b_name : L->w_name, L->b_name ? "folded" : "bias.folded", name, sizeof name));
  rc_tensor t = {RC_DTYPE_FLOAT, 1, {L->channels}, L->b};
  RC_TRY(rc_model_edit_add_initializer(q->m, name, &t, q->e));
  return rc_model_edit_set_input(q->m, node, 2, name, q->e);
}

/* int32 bias on the accumulator's grid; 0 when a value would overflow int32. */
static rc_status add_int_bias(qstate *q, layer_plan *L, int node, const float *w_scale, float in_scale, int *done) {
  *done = 0;
  int rank = L->b_value >= 0 ? q->g->values[L->b_value].decl.rank : 1; /* a folded bias is (C) */
  if (rank != 1) return RC_OK;
  int32_t *qb = rc__malloc(sizeof(int32_t) * (size_t)L->channels);
  float *sb = rc__malloc(sizeof(float) * (size_t)L->channels);
  if (!qb || !sb) {
    rc__free(qb);
    rc__free(sb);
    return nomem(q);
  }
  int ok = 1;
  for (int64_t c = 0; c < L->channels && ok; c++) {
    sb[c] = in_scale * w_scale[c];
    double v = rint((double)L->b[c] / (double)sb[c]);
    ok = isfinite(v) && fabs(v) <= INT32_LIMIT;
    qb[c] = ok ? (int32_t)v : 0;
  }
  rc_status st = RC_OK;
  if (ok) {
    char base[512];
    const char *from = L->b_name ? L->b_name : L->w_name;
    snprintf(base, sizeof base, "%.*s%s", base_len(from), from, L->b_name ? "" : ".bias");
    grid_names gn;
    rc_tensor tq = {RC_DTYPE_INT32, 1, {L->channels}, qb}, ts = {RC_DTYPE_FLOAT, 1, {L->channels}, sb};
    st = name_grid(q, base, &gn);
    if (st == RC_OK) st = rc_model_edit_add_initializer(q->m, gn.grid, &tq, q->e);
    if (st == RC_OK) st = rc_model_edit_add_initializer(q->m, gn.step, &ts, q->e);
    if (st == RC_OK) st = add_dequantize(q, gn.from, gn.grid, gn.step, NULL, 0, gn.on);
    if (st == RC_OK) st = rc_model_edit_set_input(q->m, node, 2, gn.on, q->e);
    *done = st == RC_OK;
  }
  rc__free(qb);
  rc__free(sb);
  return st;
}

static int int_bias_allowed(const rc_node *n) {
  if (is_op(n, "Conv")) return 1;
  return is_op(n, "Gemm") && rc__attr_float(n, "alpha", 1.0f) == 1.0f && rc__attr_float(n, "beta", 1.0f) == 1.0f;
}

/* The weight grid's range is narrower than its dtype's (symmetric, and 4-bit
 * values in int8 tensors below opset 21): record it so that training keeps it. */
static rc_status record_range(qstate *q, const char *tensor, const char *from, int qmax) {
  cJSON *t = q->ranges ? cJSON_GetObjectItemCaseSensitive(q->ranges, "tensors") : NULL;
  if (!q->ranges && (q->ranges = cJSON_CreateObject()) && cJSON_AddNumberToObject(q->ranges, "schema", 1))
    t = cJSON_AddObjectToObject(q->ranges, "tensors");
  cJSON *r = t ? cJSON_AddObjectToObject(t, tensor) : NULL;
  if (!r || !cJSON_AddNumberToObject(r, "min", -qmax) || !cJSON_AddNumberToObject(r, "max", qmax) ||
      !cJSON_AddStringToObject(r, "from", from))
    return nomem(q);
  return RC_OK;
}

static rc_status write_ranges(qstate *q) {
  if (!q->ranges) return RC_OK;
  char *text = cJSON_PrintUnformatted(q->ranges);
  if (!text) return nomem(q);
  rc_status st = rc_model_edit_set_metadata(q->m, RC_RANGES_METADATA, text, q->e);
  cJSON_free(text);
  return st;
}

static rc_status quantize_layer(qstate *q, layer_plan *L, rc_quant_layer *info) {
  const rc_node *n = &q->g->nodes[L->node];
  int node;
  RC_TRY(node_of(q, L->key, &node));
  int64_t numel = rc_tensor_numel(&L->w);
  int qmax = q->cfg->weight_bits == 4 ? 7 : 127;
  int8_t *wq = rc__malloc((size_t)numel + 1);
  float *ws = rc__malloc(sizeof(float) * (size_t)L->channels);
  if (!wq || !ws) {
    rc__free(wq);
    rc__free(ws);
    return nomem(q);
  }
  rc__quant_weight(wq, ws, &L->w, L->axis, qmax);
  rc_tensor tq = L->w, ts = {RC_DTYPE_FLOAT, 1, {L->channels}, ws};
  tq.dtype = q->rep->weight_dtype;
  tq.data = wq;
  grid_names gn;
  rc_status st = name_grid(q, L->w_name, &gn);
  if (st == RC_OK) st = rc_model_edit_add_initializer(q->m, gn.grid, &tq, q->e);
  if (st == RC_OK) st = record_range(q, gn.grid, L->w_name, qmax);
  if (st == RC_OK) st = rc_model_edit_add_initializer(q->m, gn.step, &ts, q->e);
  if (st == RC_OK) st = add_dequantize(q, gn.from, gn.grid, gn.step, NULL, L->axis, gn.on);
  if (st == RC_OK) st = rc_model_edit_set_input(q->m, node, 1, gn.on, q->e);
  snprintf(info->name, sizeof info->name, "%s", n->label);
  snprintf(info->op_type, sizeof info->op_type, "%s", n->op_type);
  info->channels = L->channels;
  info->axis = L->axis;
  info->scale_min = info->scale_max = ws[0];
  for (int64_t c = 1; c < L->channels; c++) {
    if (ws[c] < info->scale_min) info->scale_min = ws[c];
    if (ws[c] > info->scale_max) info->scale_max = ws[c];
  }
  info->bn_folded = L->bn >= 0;
  if (st == RC_OK && L->b) {
    int gi = q->grid_of[L->in_value], done = 0;
    if (gi >= 0 && int_bias_allowed(n)) st = add_int_bias(q, L, node, ws, q->rep->grids[gi].scale, &done);
    if (st == RC_OK && !done && L->bn >= 0) st = add_float_bias(q, L, node);
    info->bias = done ? 2 : 1;
    if (!done) q->rep->n_bias_float++;
  } else if (L->bias_other) {
    info->bias = 1;
    q->rep->n_bias_float++;
  }
  rc__free(wq);
  rc__free(ws);
  return st;
}

static rc_status quantize_activation(qstate *q, const rc_quant_grid *gr, int value) {
  const rc_graph *g = q->g;
  const char *t = g->values[value].name;
  grid_names gn;
  RC_TRY(name_grid(q, t, &gn));
  rc_tensor ts = {RC_DTYPE_FLOAT, 0, {0}, (void *)&gr->scale};
  RC_TRY(rc_model_edit_add_initializer(q->m, gn.step, &ts, q->e));
  uint8_t zp = (uint8_t)gr->zero_point;
  rc_tensor tz = {RC_DTYPE_UINT8, 0, {0}, &zp};
  RC_TRY(rc_model_edit_add_initializer(q->m, gn.zero, &tz, q->e));
  const char *src = t, *dst;
  if (is_graph_output(g, value)) {
    /* Keep the output's name: the producer writes a new float tensor and
     * the DequantizeLinear takes over the original name. */
    int p;
    RC_TRY(node_of(q, t, &p));
    const rc_node *pn = &g->nodes[g->values[value].producer];
    int slot = 0;
    while (slot < pn->n_out && pn->out[slot] != value) slot++;
    if (slot == pn->n_out) slot = 0; /* a folded BN's output, now the Conv's first */
    RC_TRY(rc_model_edit_set_output(q->m, p, slot, gn.pre, q->e));
    src = gn.pre;
    dst = t;
  } else {
    RC_TRY(rc_model_edit_rewire(q->m, t, gn.on, NULL, q->e));
    dst = gn.on;
  }
  const char *ins[3] = {src, gn.step, gn.zero};
  const char *outs[1] = {gn.grid};
  RC_TRY(rc_model_edit_add_node(q->m, "QuantizeLinear", gn.to, ins, 3, outs, 1, NULL, 0, q->e));
  return add_dequantize(q, gn.from, gn.grid, gn.step, gn.zero, -1, dst);
}

static rc_status apply_rewrite(qstate *q) {
  rc_quant_report *r = q->rep;
  RC_TRY(apply_folds(q));
  for (int i = 0; i < q->n_layers; i++) {
    RC_TRY(quantize_layer(q, &q->layers[i], &r->layers[i]));
    r->n_layers = i + 1;
  }
  for (int gi = 0; gi < q->n_grids; gi++) RC_TRY(quantize_activation(q, &r->grids[gi], q->grid_value[gi]));
  RC_TRY(write_ranges(q));
  rc_model_edit_drop_unused(q->m);
  return rc_model_edit_sort(q->m, q->e);
}

/* Ops whose output values are a subset of their input's (max pooling, pure
 * layout changes): an output grid equal to the input's loses nothing. */
static int grid_preserving(const rc_node *n) {
  static const char *const ops[] = {"MaxPool", "Flatten", "Reshape", "Transpose", "Squeeze", "Unsqueeze"};
  for (size_t i = 0; i < sizeof ops / sizeof ops[0]; i++)
    if (is_op(n, ops[i])) return 1;
  return 0;
}

/* The grid that reaches tensor v through a chain of grid-preserving ops
 * (MaxPool then Flatten, say), or -1. */
static int grid_passed_through(const qstate *q, int v) {
  for (int hops = 0; hops < q->g->n_nodes; hops++) {
    int p = q->g->values[v].producer;
    if (p < 0) return -1;
    const rc_node *n = &q->g->nodes[p];
    if (!grid_preserving(n) || n->n_in < 1 || n->in[0] < 0 || n->out[0] != v) return -1;
    v = n->in[0];
    if (q->grid_of[v] >= 0) return q->grid_of[v];
  }
  return -1;
}

/* Headroom for a graph output: inputs beyond the calibration samples give
 * outputs beyond their range, and a clipped output loses its order (the
 * top logits tie at the grid's end). The range is stretched by 1 + margin
 * about zero, so zero stays exact. */
static void widen_output_grid(rc_quant_grid *gr, double margin) {
  gr->lo = (float)(gr->lo * (1.0 + margin));
  gr->hi = (float)(gr->hi * (1.0 + margin));
  gr->margin = (float)margin;
  rc__quant_act_grid(gr->lo, gr->hi, &gr->scale, &gr->zero_point);
}

static rc_status make_report(qstate *q, const rc_dataset *d) {
  rc_quant_report *r = q->rep;
  r->layers = rc__calloc((size_t)q->n_layers + 1, sizeof *r->layers);
  r->grids = rc__calloc((size_t)q->n_grids + 1, sizeof *r->grids);
  if (!r->layers || !r->grids) return nomem(q);
  r->weight_dtype = rc_quant_weight_dtype(q->m, q->cfg->weight_bits);
  r->int4_as_int8 = q->cfg->weight_bits == 4 && r->weight_dtype == RC_DTYPE_INT8;
  r->calib_samples = q->n_grids ? d->n : 0;
  for (int gi = 0; gi < q->n_grids; gi++) {
    rc_quant_grid *gr = &r->grids[gi];
    snprintf(gr->tensor, sizeof gr->tensor, "%s", q->g->values[q->grid_value[gi]].name);
    gr->lo = (float)(q->lo[gi] < 0 ? q->lo[gi] : 0);
    gr->hi = (float)(q->hi[gi] > 0 ? q->hi[gi] : 0);
    rc__quant_act_grid(gr->lo, gr->hi, &gr->scale, &gr->zero_point);
    int from = grid_passed_through(q, q->grid_value[gi]);
    if (from >= 0 && from < gi) { /* same grid: the second pair is lossless and an integer runtime keeps int8 */
      gr->lo = r->grids[from].lo;
      gr->hi = r->grids[from].hi;
      gr->scale = r->grids[from].scale;
      gr->zero_point = r->grids[from].zero_point;
    } else if (is_graph_output(q->g, q->grid_value[gi]) && q->cfg->output_margin > 0) {
      widen_output_grid(gr, q->cfg->output_margin);
    }
  }
  r->n_grids = q->n_grids;
  return RC_OK;
}

static rc_status check_config(const rc_graph *g, const rc_quant_config *c, rc_err *e) {
  if (c->weight_bits != 8 && c->weight_bits != 4)
    return rc__fail(e, RC_ERR_INVALID, "%s: weight bits must be 8 or 4, not %d", g->path, c->weight_bits);
  if (c->activation_bits != 8 && c->activation_bits != 0)
    return rc__fail(e, RC_ERR_INVALID, "%s: activation bits must be 8 or none, not %d", g->path, c->activation_bits);
  if (c->calib == RC_CALIB_PERCENTILE && !(c->percentile > 50 && c->percentile <= 100))
    return rc__fail(e, RC_ERR_INVALID, "%s: percentile %g is outside (50, 100]", g->path, c->percentile);
  if (c->batch < 1) return rc__fail(e, RC_ERR_INVALID, "%s: calibration batch must be positive", g->path);
  if (!(c->output_margin >= 0 && c->output_margin <= RC_QUANT_MARGIN_MAX))
    return rc__fail(e, RC_ERR_INVALID, "%s: output margin %g is outside [0, %g]", g->path, c->output_margin,
                    (double)RC_QUANT_MARGIN_MAX);
  return RC_OK;
}

static void qstate_free(qstate *q) {
  for (int i = 0; i < q->n_layers; i++)
    if (q->layers[i].bn >= 0) {
      rc__free(q->layers[i].w.data);
      rc__free(q->layers[i].b);
    }
  rc__free(q->layers);
  rc__free(q->uses);
  rc__free(q->reader);
  rc__free(q->grid_of);
  rc__free(q->grid_value);
  rc__free(q->lo);
  rc__free(q->hi);
  rc__free(q->hist);
  rc__free(q->count);
  cJSON_Delete(q->ranges);
}

rc_status rc_quantize_model(rc_model *m, const rc_dataset *d, const rc_quant_config *cfg, rc_quant_report *rep,
                            rc_err *e) {
  memset(rep, 0, sizeof *rep);
  qstate q;
  memset(&q, 0, sizeof q);
  q.m = m;
  q.g = &m->graph;
  q.cfg = cfg;
  q.rep = rep;
  q.e = e;
  rc_status st = check_config(q.g, cfg, e);
  if (st == RC_OK) st = check_model(&q);
  if (st == RC_OK) st = count_uses(&q);
  if (st == RC_OK) st = plan_rewrite(&q);
  if (st == RC_OK && q.n_grids) st = calibrate(&q, d);
  if (st == RC_OK) st = make_report(&q, d);
  if (st == RC_OK) st = apply_rewrite(&q);
  qstate_free(&q);
  if (st != RC_OK) rc_quant_report_free(rep);
  return st;
}
