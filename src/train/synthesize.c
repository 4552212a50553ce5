/* Inputs synthesised by matching BatchNormalization statistics; see synthesize.h. */
#include "train/synthesize.h"

#include <math.h>
#include <string.h>

#include "core/alloc.h"
#include "core/rng.h"
#include "plan/plan.h"

/* Defaults: Adam at 0.05 on inputs of unit scale converges in a few hundred
 * steps on small image models (our measurement on the garment demo model);
 * the prior weights keep pixels smooth and bounded without outweighing the
 * statistics term (chosen by us, not taken from the papers, whose weights
 * belong to ImageNet-sized inputs). */
void rc_synth_config_init(rc_synth_config *c) {
  memset(c, 0, sizeof *c);
  c->count = 1024;
  c->batch = 256;
  c->steps = 200;
  c->lr = 0.05f;
  c->seed = 1;
  c->w_class = 0.1f;
  c->w_tv = 0.05f;
  c->w_l2 = 0.001f;
}

typedef struct bn_site {
  int x;                 /* the BatchNormalization input value */
  const float *mean, *var;
  float eps;
} bn_site;

static int bn_stats_ok(const rc_graph *g, const rc_node *n) {
  if (strcmp(n->op_type, "BatchNormalization") || n->n_in < 5) return 0;
  for (int k = 3; k <= 4; k++) {
    int v = n->in[k];
    if (v < 0 || g->values[v].kind != RC_VALUE_INITIALIZER || g->values[v].decl.dtype != RC_DTYPE_FLOAT ||
        !g->values[v].decl.data)
      return 0;
  }
  return 1;
}

rc_status rc_synth_check(const rc_model *teacher, rc_err *e) {
  const rc_graph *g = &teacher->graph;
  if (g->n_inputs != 1)
    return rc__fail(e, RC_ERR_UNSUPPORTED, "%s: synthesis needs a model with one input, it has %d", g->path, g->n_inputs);
  const rc_value *in = &g->values[g->inputs[0]];
  if (in->decl.dtype != RC_DTYPE_FLOAT || in->decl.rank < 2)
    return rc__fail(e, RC_ERR_UNSUPPORTED, "%s: input '%s' must be float32 (batch, ...)", g->path, in->name);
  for (int d = 1; d < in->decl.rank; d++)
    if (in->decl.dims[d] < 1)
      return rc__fail(e, RC_ERR_UNSUPPORTED, "%s: input '%s' needs a fixed size on axis %d to synthesise samples",
                      g->path, in->name, d);
  for (int i = 0; i < g->n_nodes; i++)
    if (bn_stats_ok(g, &g->nodes[i])) return RC_OK;
  return rc__fail(e, RC_ERR_UNSUPPORTED, "%s: no BatchNormalization node with running statistics: synthesis matches "
                  "their stored mean and variance, so it needs a teacher exported with BatchNormalization kept as "
                  "nodes (not folded into the convolutions)", g->path);
}

typedef struct synth {
  rc_plan *p;
  bn_site *bn;
  int n_bn;
  int64_t b, per;          /* batch, floats per sample */
  float *x, *m, *v;        /* the batch being optimised and Adam's moments */
  double *acc;             /* per-channel sums: 2 * max channels */
  int64_t max_c;
} synth;

static void synth_free(synth *s) {
  rc_plan_free(s->p);
  rc__free(s->bn);
  rc__free(s->x);
  rc__free(s->m);
  rc__free(s->v);
  rc__free(s->acc);
}

static rc_status synth_setup(synth *s, rc_model *teacher, int64_t batch, rc_err *e) {
  const rc_graph *g = &teacher->graph;
  unsigned char *trainable = rc__calloc((size_t)g->n_values + 1, 1), *keep = rc__calloc((size_t)g->n_values + 1, 1);
  s->bn = rc__calloc((size_t)g->n_nodes + 1, sizeof *s->bn);
  rc_status st = RC_OK;
  if (!trainable || !keep || !s->bn) {
    st = rc__fail(e, RC_ERR_NOMEM, "out of memory");
    goto out;
  }
  trainable[g->inputs[0]] = 1; /* the only thing that changes: the input values */
  for (int i = 0; i < g->n_nodes; i++) {
    const rc_node *n = &g->nodes[i];
    if (!bn_stats_ok(g, n)) continue;
    keep[n->in[0]] = 1;
    s->bn[s->n_bn++] = (bn_site){n->in[0], g->values[n->in[3]].decl.data, g->values[n->in[4]].decl.data,
                                 rc__attr_float(n, "epsilon", 1e-5f)};
  }
  rc_tensor shape = g->values[g->inputs[0]].decl;
  shape.data = NULL;
  shape.dims[0] = batch;
  rc_plan_opts o = {.training = 1, .trainable = trainable, .keep = keep, .bn_batch_stats = 0};
  if ((st = rc_plan_init(&s->p, g, &shape, &o, e)) != RC_OK) goto out;
  s->b = batch;
  s->per = rc_tensor_numel(&shape) / batch;
  if (!rc_plan_grad(s->p, g->inputs[0])) {
    st = rc__fail(e, RC_ERR_UNSUPPORTED, "%s: no gradient reaches the input from the BatchNormalization layers",
                  g->path);
    goto out;
  }
  s->max_c = 1;
  for (int j = 0; j < s->n_bn; j++) {
    const rc_tensor *x = rc_plan_tensor(s->p, s->bn[j].x);
    if (x->rank > 1 && x->dims[1] > s->max_c) s->max_c = x->dims[1];
  }
  s->x = rc__malloc(sizeof(float) * (size_t)(batch * s->per));
  s->m = rc__malloc(sizeof(float) * (size_t)(batch * s->per));
  s->v = rc__malloc(sizeof(float) * (size_t)(batch * s->per));
  s->acc = rc__malloc(sizeof(double) * 2 * (size_t)s->max_c);
  if (!s->x || !s->m || !s->v || !s->acc) st = rc__fail(e, RC_ERR_NOMEM, "out of memory");
out:
  rc__free(trainable);
  rc__free(keep);
  return st;
}

double rc_synth_bn_term(float *g, const float *x, const int64_t *dims, int rank, const float *mean,
                        const float *var_run, float eps, double *acc, double *worst_mean, double *worst_var) {
  int64_t n = dims[0], c = rank > 1 ? dims[1] : 1, inner = 1;
  for (int d = 2; d < rank; d++) inner *= dims[d];
  double *mu = acc, *var = acc + c, cnt = (double)n * (double)inner;
  for (int64_t ch = 0; ch < c; ch++) {
    double sum = 0, sq = 0;
    for (int64_t i = 0; i < n; i++)
      for (int64_t k = 0; k < inner; k++) sum += x[(i * c + ch) * inner + k];
    mu[ch] = sum / cnt;
    for (int64_t i = 0; i < n; i++)
      for (int64_t k = 0; k < inner; k++) {
        double d = x[(i * c + ch) * inner + k] - mu[ch];
        sq += d * d;
      }
    var[ch] = sq / cnt;
  }
  double dm = 0, dv = 0;
  for (int64_t ch = 0; ch < c; ch++) {
    double a = mu[ch] - mean[ch], b = var[ch] - var_run[ch];
    dm += a * a;
    dv += b * b;
    double sd = sqrt((double)var_run[ch] + eps), rel = fabs(b) / (var_run[ch] + eps);
    if (worst_mean && fabs(a) / sd > *worst_mean) *worst_mean = fabs(a) / sd;
    if (worst_var && rel > *worst_var) *worst_var = rel;
  }
  dm = sqrt(dm);
  dv = sqrt(dv);
  if (g)
    for (int64_t ch = 0; ch < c; ch++) {
      /* d||a||/d mu_c = a_c / ||a||; d mu_c / dx = 1/cnt; d var_c / dx = 2 (x - mu_c) / cnt. */
      double gm = dm > 0 ? (mu[ch] - mean[ch]) / dm / cnt : 0;
      double gv = dv > 0 ? (var[ch] - var_run[ch]) / dv * 2 / cnt : 0;
      for (int64_t i = 0; i < n; i++)
        for (int64_t k = 0; k < inner; k++) {
          int64_t at = (i * c + ch) * inner + k;
          g[at] += (float)(gm + gv * (x[at] - mu[ch]));
        }
    }
  return dm + dv;
}

static double bn_term(synth *s, const bn_site *site, float *g, double *worst_mean, double *worst_var) {
  const rc_tensor *t = rc_plan_tensor(s->p, site->x);
  return rc_synth_bn_term(g, t->data, t->dims, t->rank, site->mean, site->var, site->eps, s->acc, worst_mean,
                          worst_var);
}

/* Cross-entropy of output (B, K) against class i mod K, gradient added. */
static void class_term(const rc_tensor *out, float *g, float w) {
  int64_t b = out->dims[0], k = out->dims[1];
  const float *z = out->data;
  for (int64_t i = 0; i < b; i++) {
    double m = -INFINITY, sum = 0;
    for (int64_t j = 0; j < k; j++)
      if (z[i * k + j] > m) m = z[i * k + j];
    for (int64_t j = 0; j < k; j++) sum += exp(z[i * k + j] - m);
    for (int64_t j = 0; j < k; j++) {
      double p = exp(z[i * k + j] - m) / sum;
      g[i * k + j] += (float)(w * (p - (j == i % k ? 1.0 : 0.0)) / (double)b);
    }
  }
}

double rc_synth_priors(float *g, const float *xs, const int64_t *dims, int rank, float w_tv, float w_l2) {
  int64_t n = 1;
  for (int d = 0; d < rank; d++) n *= dims[d];
  int64_t w = rank >= 3 ? dims[rank - 1] : 1, h = rank >= 3 ? dims[rank - 2] : 1;
  int64_t planes = n / (w * h);
  double pairs = (double)planes * (double)((w - 1) * h + (h - 1) * w), l2 = 0, tv = 0;
  for (int64_t i = 0; i < n; i++) {
    l2 += (double)xs[i] * xs[i];
    if (g) g[i] += (float)(w_l2 * 2 * xs[i] / (double)n);
  }
  if (pairs > 0)
    for (int64_t p = 0; p < planes; p++)
      for (int64_t y = 0; y < h; y++)
        for (int64_t x = 0; x < w; x++) {
          int64_t at = (p * h + y) * w + x;
          for (int dir = 0; dir < 2; dir++) {
            int64_t next = dir ? at + w : at + 1;
            if (dir ? y + 1 >= h : x + 1 >= w) continue;
            double d = (double)xs[next] - xs[at];
            tv += d * d;
            if (g) {
              g[next] += (float)(w_tv * 2 * d / pairs);
              g[at] -= (float)(w_tv * 2 * d / pairs);
            }
          }
        }
  return w_l2 * l2 / (double)n + (pairs > 0 ? w_tv * tv / pairs : 0);
}

/* Forward, seed the gradients, backward; returns L_bn. */
static rc_status synth_step(synth *s, const rc_synth_config *c, double *bn_loss, double *wm, double *wv, rc_err *e) {
  const rc_graph *g = rc_plan_graph(s->p);
  rc_tensor *in = rc_plan_tensor(s->p, g->inputs[0]);
  memcpy(in->data, s->x, sizeof(float) * (size_t)(s->b * s->per));
  rc_plan_zero_grad(s->p);
  RC_TRY(rc_plan_forward(s->p, e));
  double total = 0;
  for (int j = 0; j < s->n_bn; j++) {
    rc_tensor *gt = rc_plan_grad(s->p, s->bn[j].x);
    total += bn_term(s, &s->bn[j], gt ? gt->data : NULL, wm, wv);
  }
  *bn_loss = total;
  const rc_tensor *out = rc_plan_tensor(s->p, g->outputs[0]);
  rc_tensor *og = rc_plan_grad(s->p, g->outputs[0]);
  if (c->w_class > 0 && og && out->rank == 2) class_term(out, og->data, c->w_class);
  RC_TRY(rc_plan_backward(s->p, e));
  rc_tensor *ig = rc_plan_grad(s->p, g->inputs[0]);
  rc_synth_priors(ig->data, s->x, in->dims, in->rank, c->w_tv, c->w_l2);
  return RC_OK;
}

/* Adam (Kingma and Ba 2015) with its usual betas, on the inputs. */
static void adam(synth *s, const float *grad, float lr, int64_t t) {
  const double b1 = 0.9, b2 = 0.999, eps = 1e-8;
  double c1 = 1 - pow(b1, (double)t), c2 = 1 - pow(b2, (double)t);
  for (int64_t i = 0; i < s->b * s->per; i++) {
    s->m[i] = (float)(b1 * s->m[i] + (1 - b1) * grad[i]);
    s->v[i] = (float)(b2 * s->v[i] + (1 - b2) * (double)grad[i] * grad[i]);
    s->x[i] -= (float)(lr * (s->m[i] / c1) / (sqrt(s->v[i] / c2) + eps));
  }
}

static float normal(rc_rng *r) {
  /* Box-Muller; 1 - u keeps the logarithm finite. */
  double u = 1.0 - rc__rng_uniform(r), v = rc__rng_uniform(r);
  return (float)(sqrt(-2 * log(u)) * cos(6.283185307179586 * v));
}

rc_status rc_synthesize(float *out, rc_synth_stats *stats, rc_model *teacher, const rc_synth_config *c, rc_err *e) {
  memset(stats, 0, sizeof *stats);
  RC_TRY(rc_synth_check(teacher, e));
  if (c->count < 1 || c->batch < 2 || c->steps < 1 || !(c->lr > 0))
    return rc__fail(e, RC_ERR_INVALID, "synthesis needs count >= 1, batch >= 2, steps >= 1 and a positive rate");
  synth s;
  memset(&s, 0, sizeof s);
  int64_t batch = c->batch < c->count ? c->batch : c->count;
  if (batch < 2) batch = 2; /* one sample has no variance to match */
  rc_status st = synth_setup(&s, teacher, batch, e);
  const rc_graph *g = &teacher->graph;
  int64_t n_batches = (c->count + batch - 1) / batch, done = 0, total = n_batches * c->steps;
  double end_sum = 0;
  stats->n_bn = s.n_bn;
  for (int64_t bi = 0; bi < n_batches && st == RC_OK; bi++) {
    rc_rng rng;
    rc__rng_seed(&rng, c->seed, (uint64_t)bi);
    for (int64_t i = 0; i < s.b * s.per; i++) s.x[i] = normal(&rng);
    memset(s.m, 0, sizeof(float) * (size_t)(s.b * s.per));
    memset(s.v, 0, sizeof(float) * (size_t)(s.b * s.per));
    double loss = 0;
    for (int64_t t = 1; t <= c->steps && st == RC_OK; t++) {
      if ((st = synth_step(&s, c, &loss, NULL, NULL, e)) != RC_OK) break;
      if (bi == 0 && t == 1) stats->bn_loss_start = loss;
      adam(&s, rc_plan_grad(s.p, g->inputs[0])->data, c->lr, t);
      done++;
      if (c->progress) c->progress(c->user, done, total, loss);
    }
    if (st != RC_OK) break;
    /* The statistics of the final inputs (measured after the last update). */
    if ((st = synth_step(&s, c, &loss, &stats->worst_mean_err, &stats->worst_var_err, e)) != RC_OK) break;
    end_sum += loss;
    int64_t rows = c->count - bi * batch < batch ? c->count - bi * batch : batch;
    memcpy(out + bi * batch * s.per, s.x, sizeof(float) * (size_t)(rows * s.per));
  }
  if (st == RC_OK) {
    stats->bn_loss_end = end_sum / (double)n_batches;
    for (int64_t i = 0; i < c->count * s.per; i++)
      if (!isfinite(out[i])) {
        st = rc__fail(e, RC_ERR_NUMERIC, "%s: synthesis diverged (non-finite input values); lower the rate", g->path);
        break;
      }
  }
  synth_free(&s);
  return st;
}
