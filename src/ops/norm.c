/* Op family: norm. Forward and backward side by side.
 *
 * Statistics are computed in two passes with double accumulators (mean, then
 * squared deviations) so that large offsets do not cancel; BatchNormalization
 * takes both from one read of each row (bn_channel_moments). Per-row or
 * per-channel mean and 1/sqrt(var + eps) are kept in k->saved for backward. */
#include <math.h>
#include <string.h>

#include "ops/broadcast.h"
#include "ops/epilogue.h"
#include "ops/op.h"
#include "ops/rowsum.h"

/* Where statistics go: k->saved in training plans, else the workspace. */
static float *stats_buffer(const rc_kernel *k) { return k->saved ? k->saved : k->work; }

/* Mean and inverse standard deviation (biased variance) of n values. */
static void run_stats(const float *x, int64_t n, float eps, float *mean, float *invstd) {
  double s = 0;
  for (int64_t j = 0; j < n; j++) s += x[j];
  double m = n ? s / (double)n : 0;
  double v = 0;
  for (int64_t j = 0; j < n; j++) {
    double dlt = x[j] - m;
    v += dlt * dlt;
  }
  v = n ? v / (double)n : 0;
  *mean = (float)m;
  *invstd = (float)(1.0 / sqrt(v + eps));
}

/* y = a * x + b over one run: normalisation and affine folded per channel. */
static void affine_run(float *restrict y, const float *restrict x, int64_t n, float a, float b) {
  for (int64_t j = 0; j < n; j++) y[j] = x[j] * a + b;
}

/* dx += a * (dy - mean(dy) - xhat * mean(dy * xhat)) over one run, with
 * xhat = (x - mean) * invstd: the normalisation's backward for a run whose
 * statistics came from itself. Returns sum(dy) and sum(dy*xhat) for the
 * affine parameters. */
static void run_norm_backward(float *dx, const float *x, const float *dy, int64_t n, float mean,
                              float invstd, float a, double *sdy_out, double *sdyx_out) {
  double sdy = 0, sdyx = 0;
  for (int64_t j = 0; j < n; j++) {
    sdy += dy[j];
    sdyx += (double)dy[j] * (x[j] - mean) * invstd;
  }
  if (dx) {
    float mdy = (float)(sdy / (double)n), mdyx = (float)(sdyx / (double)n);
    for (int64_t j = 0; j < n; j++) {
      float xh = (x[j] - mean) * invstd;
      dx[j] += a * (dy[j] - mdy - xh * mdyx);
    }
  }
  *sdy_out = sdy;
  *sdyx_out = sdyx;
}

/* What every normalisation backward reads: x (N, C, ...) or rows, the
 * per-channel scale, dy, the saved statistics and the gradient buffers
 * (NULL where no gradient is wanted). */
typedef struct norm_grads {
  const float *x, *scale, *dy, *st;
  float *dx, *dscale, *dbias;
} norm_grads;

static void norm_grads_init(const rc_kernel *k, norm_grads *g) {
  g->x = k->in[0]->data;
  g->scale = k->in[1]->data;
  g->dy = k->dout[0]->data;
  g->st = k->saved;
  g->dx = k->din[0] ? k->din[0]->data : NULL;
  g->dscale = k->din[1] ? k->din[1]->data : NULL;
  g->dbias = k->n_in > 2 && k->din[2] ? k->din[2]->data : NULL;
}

static rc_status need_param_vector(const rc_node *n, const rc_tensor *const *in, int i, int64_t len,
                                   const char *what, rc_err *e) {
  if (i >= n->n_in || !in[i])
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): input %s is required", n->label, n->op_type, what);
  RC_TRY(rc__need_float(n, in[i], i, e));
  if (rc_tensor_numel(in[i]) != len || in[i]->rank != 1) {
    char s[96];
    return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): %s has shape %s, expected (%lld)", n->label,
                    n->op_type, what, rc_shape_str(in[i], s, sizeof s), (long long)len);
  }
  return RC_OK;
}

/* ======================= BatchNormalization ======================= */
typedef struct bn_params {
  float epsilon, momentum;
  int training_mode;
} bn_params;

static rc_status bn_parse(rc_node *n, rc_arena *a, rc_err *e) {
  bn_params *p = rc__arena_zalloc(a, sizeof *p);
  if (!p) return rc__fail(e, RC_ERR_NOMEM, "node '%s' (%s): out of memory", n->label, n->op_type);
  p->epsilon = rc__attr_float(n, "epsilon", 1e-5f);
  p->momentum = rc__attr_float(n, "momentum", 0.9f);
  p->training_mode = (int)rc__attr_int(n, "training_mode", 0);
  if (!(p->epsilon >= 0) || !isfinite(p->momentum))
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): invalid epsilon or momentum", n->label, n->op_type);
  /* spatial=0 (opsets 7-8: statistics per C*D1*...*Dn feature) is deprecated;
   * the spec suggests flattening the input instead. */
  if (n->opset < 9 && rc__attr_int(n, "spatial", 1) == 0)
    return rc__fail(e, RC_ERR_UNSUPPORTED, "node '%s' (%s): spatial=0 is not supported", n->label,
                    n->op_type);
  if (n->n_out > (n->opset >= 14 ? 3 : 5))
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): %d outputs", n->label, n->op_type, n->n_out);
  n->params = p;
  return RC_OK;
}

/* x (N,C,D1..Dn), scale/B/mean/var (C) -> y (N,C,D1..Dn)
 * [, running_mean (C), running_var (C) [, saved_mean (C), saved_var (C)]] */
static rc_status bn_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__infer_unary_float(n, in, out, e));
  if (in[0]->rank < 2)
    return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): X has rank %d, expected (N, C, ...)", n->label,
                    n->op_type, in[0]->rank);
  int64_t c = in[0]->dims[1];
  static const char *names[] = {"scale", "B", "input_mean", "input_var"};
  for (int i = 1; i <= 4; i++) RC_TRY(need_param_vector(n, in, i, c, names[i - 1], e));
  for (int o = 1; o < n->n_out; o++) {
    out[o].dtype = RC_DTYPE_FLOAT;
    out[o].rank = 1;
    out[o].dims[0] = c;
    out[o].data = NULL;
  }
  return RC_OK;
}

static int bn_batch_stats(const rc_kernel *k) {
  const bn_params *p = k->params;
  return k->training || p->training_mode;
}

/* Buffers: saved (training plans) holds the batch's element count per
 * channel over every process (a double, for backward's means), then mean[C]
 * and invstd[C]; without saved that block follows the per-channel sums in
 * the workspace. The sums: forward 3C + 1 doubles (per channel the sum, the
 * count, then the squared deviations and the mean of this process's share),
 * backward 2C. */
typedef struct bn_bufs {
  double *count, *sums, *m2, *local_mean;
  float *mean, *inv;
} bn_bufs;

static size_t bn_sums_bytes(int64_t c, int backward) {
  return sizeof(double) * (size_t)(backward ? 2 * c : 3 * c + 1);
}
static size_t bn_saved(const rc_kernel *k) {
  return sizeof(double) + 2 * (size_t)k->in[0]->dims[1] * sizeof(float);
}
static size_t bn_workspace(const rc_kernel *k, int backward) {
  return bn_sums_bytes(k->in[0]->dims[1], backward) + (backward ? 0 : bn_saved(k));
}

static void bn_bufs_of(const rc_kernel *k, int64_t c, bn_bufs *b) {
  unsigned char *st = k->saved ? k->saved : (unsigned char *)k->work + bn_sums_bytes(c, 0);
  b->count = (double *)(void *)st;
  b->mean = (float *)(void *)(st + sizeof(double));
  b->inv = b->mean + c;
  b->sums = k->work;
  b->m2 = b->sums + c + 1;
  b->local_mean = b->m2 + c;
}

static void bn_dims(const rc_tensor *x, int64_t *n, int64_t *c, int64_t *s) {
  *n = x->dims[0];
  *c = x->dims[1];
  *s = 1;
  for (int d = 2; d < x->rank; d++) *s *= x->dims[d];
}

static void write_vec(const rc_kernel *k, int o, int64_t c, float v) {
  if (o < k->n_out && k->out[o]) ((float *)k->out[o]->data)[c] = v;
}

/* Channel c's moments over this process's share of the batch, each row read
 * from memory once: its sum, then its squared deviations around its own
 * mean while the row is still in cache. Rows merge in order by the pairwise
 * update of Chan, Golub and LeVeque (1979; formula from memory) in double.
 * Every square is taken around a mean of the data it sums, so a large mean
 * does not cancel the variance (tests/test_ops_bn_train.c checks a mean of
 * 1e4 against a spread of 1). Gives the sum, the mean and the squared
 * deviations around that mean. */
static void bn_channel_moments(const float *x, int64_t N, int64_t C, int64_t S, int64_t c, double *sum,
                               double *mean, double *m2) {
  double s = 0, mu = 0, q = 0;
  for (int64_t n = 0; n < N && S > 0; n++) {
    const float *xr = x + (n * C + c) * S;
    const double rs = rc__row_sum(xr, S), rm = rs / (double)S;
    const double rq = rc__row_sq_dev(xr, S, (float)rm);
    const double seen = (double)(n * S), both = seen + (double)S, d = rm - mu;
    mu += d * ((double)S / both);
    q += rq + d * d * (seen * (double)S / both);
    s += rs;
  }
  *sum = s;
  *mean = mu;
  *m2 = q;
}

/* Sums over every process holding a share of the batch (no-op alone). */
static rc_status bn_sum_across(const rc_kernel *k, double *buf, size_t n, int grads, rc_err *e) {
  return k->reduce ? k->reduce->sum(k->reduce->ctx, buf, n, grads, e) : RC_OK;
}

/* Channel c with its statistics known: the running and saved outputs, the
 * statistics backward reads, then y = x * a + b per row, or the fused
 * activation's z = act(x * a + b) (ep, see fuse.h). */
static void bn_normalise_channel(const rc_kernel *k, const bn_bufs *b, const rc__epilogue *ep, int64_t c,
                                 float mean, float var, int batch) {
  const bn_params *p = k->params;
  int64_t N, C, S;
  bn_dims(k->in[0], &N, &C, &S);
  const float *x = k->in[0]->data, *scale = k->in[1]->data, *bias = k->in[2]->data;
  const float *rmean = k->in[3]->data, *rvar = k->in[4]->data;
  if (batch) {
    /* running = input * momentum + batch * (1 - momentum) (spec text). */
    write_vec(k, 1, c, rmean[c] * p->momentum + mean * (1.0f - p->momentum));
    write_vec(k, 2, c, rvar[c] * p->momentum + var * (1.0f - p->momentum));
  } else {
    /* Inference: running statistics pass through unchanged. */
    write_vec(k, 1, c, mean);
    write_vec(k, 2, c, var);
  }
  write_vec(k, 3, c, mean); /* opsets < 14: saved_mean, saved_var */
  write_vec(k, 4, c, var);
  float inv = 1.0f / sqrtf(var + p->epsilon);
  b->mean[c] = mean;
  b->inv[c] = inv;
  float a = scale[c] * inv, shift = bias[c] - mean * a;
  for (int64_t n = 0; n < N; n++) {
    const int64_t off = (n * C + c) * S;
    if (ep)
      rc__epilogue_row(ep, ep->z + off, x + off, S, a, shift);
    else
      affine_run((float *)k->out[0]->data + off, x + off, S, a, shift);
  }
}

/* Batch mean and biased variance per channel over the whole batch, however
 * it is split, then the normalisation. The population variance, as the
 * spec's ReduceVar, both for normalising and for the running update
 * (PyTorch would use the unbiased one there). Alone, each channel is done
 * in one go while its rows are still in cache. Split over processes: the
 * sums and counts are summed across them, then each process's squared
 * deviations moved to the global mean (Σ(x-M)² = M2 + n (m - M)², both
 * terms non-negative) and summed too; x is still read once. */
static rc_status bn_batch_forward(const rc_kernel *k, const rc__epilogue *ep, rc_err *e) {
  int64_t N, C, S;
  bn_dims(k->in[0], &N, &C, &S);
  const float *x = k->in[0]->data;
  const double count = (double)(N * S);
  bn_bufs b;
  bn_bufs_of(k, C, &b);
  *b.count = count;
  if (!k->reduce) {
#pragma omp parallel for schedule(static) if (N * C * S > RC__PAR_MIN)
    for (int64_t c = 0; c < C; c++) {
      double sum, mu, q;
      bn_channel_moments(x, N, C, S, c, &sum, &mu, &q);
      const double mean = count > 0 ? sum / count : 0, d = mu - mean;
      bn_normalise_channel(k, &b, ep, c, (float)mean, count > 0 ? (float)((q + count * d * d) / count) : 0.0f,
                           1);
    }
    return RC_OK;
  }
#pragma omp parallel for schedule(static) if (N * C * S > RC__PAR_MIN)
  for (int64_t c = 0; c < C; c++) bn_channel_moments(x, N, C, S, c, &b.sums[c], &b.local_mean[c], &b.m2[c]);
  b.sums[C] = count;
  RC_TRY(bn_sum_across(k, b.sums, (size_t)C + 1, 0, e));
  const double m = b.sums[C];
  *b.count = m;
  for (int64_t c = 0; c < C; c++) {
    const double mean = m > 0 ? b.sums[c] / m : 0, d = b.local_mean[c] - mean;
    b.mean[c] = (float)mean;
    b.sums[c] = b.m2[c] + count * d * d;
  }
  RC_TRY(bn_sum_across(k, b.sums, (size_t)C, 0, e));
#pragma omp parallel for schedule(static) if (N * C * S > RC__PAR_MIN)
  for (int64_t c = 0; c < C; c++) bn_normalise_channel(k, &b, ep, c, b.mean[c], m > 0 ? (float)(b.sums[c] / m) : 0.0f, 1);
  return RC_OK;
}

static rc_status bn_forward(const rc_kernel *k, rc_err *e) {
  if (bn_batch_stats(k)) return bn_batch_forward(k, NULL, e);
  int64_t N, C, S;
  bn_dims(k->in[0], &N, &C, &S);
  const float *rmean = k->in[3]->data, *rvar = k->in[4]->data;
  bn_bufs b;
  bn_bufs_of(k, C, &b);
#pragma omp parallel for schedule(static) if (N * C * S > RC__PAR_MIN)
  for (int64_t c = 0; c < C; c++) bn_normalise_channel(k, &b, NULL, c, rmean[c], rvar[c], 0);
  return RC_OK;
}

/* What the backward of one normalisation reads: g is dy, or with a fused
 * activation (ep) dz masked where the activation passed it, its input
 * recomputed from x with forward's own a and b (the same bits). The masked
 * gradient is written where the activation's backward would put it, the
 * normalisation's own output gradient (dy), row by row as the sums reach
 * it, so the input-gradient pass reads it like the unfused one. */
typedef struct bn_back {
  int64_t N, C, S;
  const float *x, *dz, *scale, *bias, *mean, *inv;
  float *dy, *dx;
  const rc__epilogue *ep;
} bn_back;

static const float *bn_grad_row(const bn_back *t, int64_t c, int64_t off) {
  if (!t->ep) return t->dy + off;
  const float a = t->scale[c] * t->inv[c];
  rc__epilogue_mask_row(t->ep, t->dy + off, t->x + off, t->dz + off, t->S, a, t->bias[c] - t->mean[c] * a);
  return t->dy + off;
}

/* Σg and Σg·(x - mean) over channel c: a row's second sum reads it while
 * it is still in cache. */
static void bn_channel_grad_sums(const bn_back *t, int64_t c, double *sg, double *sgx) {
  double s = 0, sx = 0;
  for (int64_t n = 0; n < t->N; n++) {
    const int64_t off = (n * t->C + c) * t->S;
    const float *g = bn_grad_row(t, c, off);
    s += rc__row_sum(g, t->S);
    sx += rc__row_dot_dev(g, t->x + off, t->S, t->mean[c]);
  }
  *sg = s;
  *sgx = sx;
}

/* dx += a * (g - mean(g) - xhat * mean(g * xhat)) over channel c. */
static void bn_channel_dx(const bn_back *t, int64_t c, float mdy, float mdyx) {
  const float mean = t->mean[c], inv = t->inv[c], a = t->scale[c] * inv;
  const int64_t S = t->S;
  for (int64_t n = 0; n < t->N; n++) {
    const int64_t off = (n * t->C + c) * S;
    const float *gr = t->dy + off, *xr = t->x + off;
    float *restrict d = t->dx + off;
    for (int64_t j = 0; j < S; j++) d[j] += a * (gr[j] - mdy - (xr[j] - mean) * inv * mdyx);
  }
}

/* Batch statistics: the full normalisation backward (the statistics depend
 * on x). Inference: y is affine in x, dx = scale/sqrt(var+eps) * dy, and
 * input_mean / input_var receive their gradients too. With the batch split
 * over processes, the scale and B gradients stay this process's own (the
 * caller sums parameter gradients), while dx's two means are taken over the
 * whole batch: Σdy and Σdy·x̂ are summed across processes first. Alone, each
 * channel's sums and dx come in one go while its rows are in cache. A
 * failed sum is kept by the hook's owner (backward returns no status). */
static void bn_backward_run(const rc_kernel *k, const rc__epilogue *ep, const float *dz) {
  int64_t N, C, S;
  bn_dims(k->in[0], &N, &C, &S);
  norm_grads g;
  norm_grads_init(k, &g);
  bn_bufs b;
  bn_bufs_of(k, C, &b);
  const bn_back t = {N, C, S, g.x, dz, g.scale, k->in[2]->data, b.mean, b.inv, k->dout[0]->data, g.dx, ep};
  float *dmean = k->din[3] ? k->din[3]->data : NULL, *dvar = k->din[4] ? k->din[4]->data : NULL;
  double *sdy = b.sums, *sdyx = b.sums + C;
  const int batch = bn_batch_stats(k), together = !(batch && k->reduce);
  const double m = *b.count;
#pragma omp parallel for schedule(static) if (N * C * S > RC__PAR_MIN)
  for (int64_t c = 0; c < C; c++) {
    const float inv = b.inv[c];
    bn_channel_grad_sums(&t, c, &sdy[c], &sdyx[c]);
    sdyx[c] *= inv;
    if (g.dscale) g.dscale[c] += (float)sdyx[c];
    if (g.dbias) g.dbias[c] += (float)sdy[c];
    if (!batch) {
      float a = g.scale[c] * inv;
      if (dmean) dmean[c] += (float)(-sdy[c] * a);
      if (dvar) dvar[c] += (float)(-0.5 * sdyx[c] * g.scale[c] * inv * inv);
    }
    if (g.dx && together)
      bn_channel_dx(&t, c, batch && m > 0 ? (float)(sdy[c] / m) : 0.0f, batch && m > 0 ? (float)(sdyx[c] / m) : 0.0f);
  }
  if (!g.dx || together) return;
  rc_err e;
  if (bn_sum_across(k, b.sums, 2 * (size_t)C, 1, &e) != RC_OK) return;
#pragma omp parallel for schedule(static) if (N * C * S > RC__PAR_MIN)
  for (int64_t c = 0; c < C; c++)
    bn_channel_dx(&t, c, m > 0 ? (float)(sdy[c] / m) : 0.0f, m > 0 ? (float)(sdyx[c] / m) : 0.0f);
}

static void bn_backward(const rc_kernel *k) {
  if (k->dout[0]) bn_backward_run(k, NULL, NULL);
}

/* For a training-mode BatchNormalization whose activation the plan fuses
 * (fuse.h): forward writes ep->z only; backward reads dz, the activation's
 * output gradient. */
rc_status rc__bn_batch_forward_fused(const rc_kernel *k, const rc__epilogue *ep, rc_err *e) {
  return bn_batch_forward(k, ep, e);
}

void rc__bn_batch_backward_fused(const rc_kernel *k, const rc__epilogue *ep, const float *dz) {
  if (k->dout[0]) bn_backward_run(k, ep, dz);
}

/* For a Conv's epilogue (epilogue.h): the frozen normalisation as the
 * affine step bn_forward takes, and its parameter gradients as bn_backward
 * gives them from the same sums. */
int rc__bn_frozen(const rc_kernel *k) { return !bn_batch_stats(k); }

void rc__bn_fold(const rc_kernel *k, float *a, float *c, float *mean) {
  const bn_params *p = k->params;
  const float *scale = k->in[1]->data, *bias = k->in[2]->data, *rmean = k->in[3]->data, *rvar = k->in[4]->data;
  for (int64_t ch = 0; ch < k->in[0]->dims[1]; ch++) {
    float inv = 1.0f / sqrtf(rvar[ch] + p->epsilon);
    a[ch] = scale[ch] * inv;
    c[ch] = bias[ch] - rmean[ch] * a[ch];
    if (mean) mean[ch] = rmean[ch];
  }
}

void rc__bn_frozen_param_grads(const rc_kernel *k, const double *sdy, const double *sdx) {
  const bn_params *p = k->params;
  const float *scale = k->in[1]->data, *rvar = k->in[4]->data;
  float *dscale = k->din[1] ? k->din[1]->data : NULL, *dbias = k->din[2] ? k->din[2]->data : NULL;
  float *dmean = k->din[3] ? k->din[3]->data : NULL, *dvar = k->din[4] ? k->din[4]->data : NULL;
  for (int64_t ch = 0; ch < k->in[0]->dims[1]; ch++) {
    float inv = 1.0f / sqrtf(rvar[ch] + p->epsilon), a = scale[ch] * inv;
    double sdyx = sdx[ch] * inv;
    if (dscale) dscale[ch] += (float)sdyx;
    if (dbias) dbias[ch] += (float)sdy[ch];
    if (dmean) dmean[ch] += (float)(-sdy[ch] * a);
    if (dvar) dvar[ch] += (float)(-0.5 * sdyx * scale[ch] * inv * inv);
  }
}

/* ======================= LayerNormalization ======================= */
typedef struct ln_params {
  int64_t axis;
  float epsilon;
} ln_params;

static rc_status ln_parse(rc_node *n, rc_arena *a, rc_err *e) {
  ln_params *p = rc__arena_zalloc(a, sizeof *p);
  if (!p) return rc__fail(e, RC_ERR_NOMEM, "node '%s' (%s): out of memory", n->label, n->op_type);
  p->axis = rc__attr_int(n, "axis", -1);
  p->epsilon = rc__attr_float(n, "epsilon", 1e-5f);
  int64_t stash = rc__attr_int(n, "stash_type", 1);
  /* stash_type 1 = float32 statistics, which is what we compute. */
  if (stash != 1)
    return rc__fail(e, RC_ERR_UNSUPPORTED, "node '%s' (%s): stash_type=%lld (only 1, float32, is supported)",
                    n->label, n->op_type, (long long)stash);
  if (!(p->epsilon >= 0))
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): invalid epsilon", n->label, n->op_type);
  n->params = p;
  return RC_OK;
}

static int ln_axis(const rc_kernel *k) {
  const ln_params *p = k->params;
  return (int)(p->axis < 0 ? p->axis + k->in[0]->rank : p->axis);
}

/* Scale / B: the normalised dims X.shape[axis:] (leading 1s allowed). */
static rc_status ln_check_param(const rc_node *n, const rc_tensor *x, int axis, const rc_tensor *t,
                                int idx, rc_err *e) {
  RC_TRY(rc__need_float(n, t, idx, e));
  int ok = t->rank <= x->rank;
  for (int d = 0; ok && d < t->rank; d++) {
    int xd = x->rank - t->rank + d;
    ok = xd >= axis ? t->dims[d] == x->dims[xd] : t->dims[d] == 1;
  }
  int64_t want = 1;
  for (int d = axis; d < x->rank; d++) want *= x->dims[d];
  if (!ok || rc_tensor_numel(t) != want) {
    char sx[96], st[96];
    return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): %s %s does not match X %s normalised from axis %d",
                    n->label, n->op_type, idx == 1 ? "Scale" : "B", rc_shape_str(t, st, sizeof st),
                    rc_shape_str(x, sx, sizeof sx), axis);
  }
  return RC_OK;
}

/* x (d0..d[axis-1], d[axis]..d[r-1]), scale and B (d[axis]..) -> y (same as x)
 * [, mean (d0..d[axis-1], 1..1), inv_std_dev (same)] */
static rc_status ln_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__infer_unary_float(n, in, out, e));
  const ln_params *p = n->params;
  int axis;
  if (in[0]->rank == 0)
    return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): X is a scalar", n->label, n->op_type);
  RC_TRY(rc__axis(n, p->axis, in[0]->rank, &axis, e));
  if (n->n_in < 2 || !in[1])
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): input Scale is required", n->label, n->op_type);
  RC_TRY(ln_check_param(n, in[0], axis, in[1], 1, e));
  if (n->n_in > 2 && in[2]) RC_TRY(ln_check_param(n, in[0], axis, in[2], 2, e));
  for (int o = 1; o < n->n_out && o < 3; o++) {
    out[o] = *in[0];
    out[o].data = NULL;
    for (int d = axis; d < in[0]->rank; d++) out[o].dims[d] = 1;
  }
  if (n->n_out > 3)
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): %d outputs", n->label, n->op_type, n->n_out);
  return RC_OK;
}

static void ln_layout(const rc_kernel *k, int64_t *rows, int64_t *len) {
  int axis = ln_axis(k);
  *rows = *len = 1;
  for (int d = 0; d < k->in[0]->rank; d++) *(d < axis ? rows : len) *= k->in[0]->dims[d];
}

static size_t ln_saved(const rc_kernel *k) {
  int64_t rows, len;
  ln_layout(k, &rows, &len);
  return 2 * (size_t)rows * sizeof(float);
}
static size_t ln_workspace(const rc_kernel *k, int backward) { return backward ? 0 : ln_saved(k); }

static rc_status ln_forward(const rc_kernel *k, rc_err *e) {
  const ln_params *p = k->params;
  int64_t rows, len;
  ln_layout(k, &rows, &len);
  const float *x = k->in[0]->data, *scale = k->in[1]->data;
  const float *bias = k->n_in > 2 && k->in[2] ? k->in[2]->data : NULL;
  float *y = k->out[0]->data, *st = stats_buffer(k);
  float *omean = k->n_out > 1 && k->out[1] ? k->out[1]->data : NULL;
  float *oinv = k->n_out > 2 && k->out[2] ? k->out[2]->data : NULL;
#pragma omp parallel for schedule(static) if (rows * len > RC__PAR_MIN)
  for (int64_t r = 0; r < rows; r++) {
    const float *xr = x + r * len;
    float *yr = y + r * len;
    float mean, inv;
    run_stats(xr, len, p->epsilon, &mean, &inv);
    st[r] = mean;
    st[rows + r] = inv;
    if (omean) omean[r] = mean;
    if (oinv) oinv[r] = inv;
    if (bias)
      for (int64_t j = 0; j < len; j++) yr[j] = (xr[j] - mean) * inv * scale[j] + bias[j];
    else
      for (int64_t j = 0; j < len; j++) yr[j] = (xr[j] - mean) * inv * scale[j];
  }
  (void)e;
  return RC_OK;
}

/* Column block for the Scale/B gradient sums: each thread owns a block of
 * columns and walks every row in order, so sums are deterministic. */
#define LN_COL_BLOCK 256

static void ln_backward(const rc_kernel *k) {
  if (!k->dout[0]) return; /* Mean / InvStdDev outputs carry no gradient here */
  int64_t rows, len;
  ln_layout(k, &rows, &len);
  norm_grads ng;
  norm_grads_init(k, &ng);
  const float *x = ng.x, *scale = ng.scale, *dy = ng.dy, *st = ng.st;
  float *dx = ng.dx, *dscale = ng.dscale, *dbias = ng.dbias;
  if (dx) {
#pragma omp parallel for schedule(static) if (rows * len > RC__PAR_MIN)
    for (int64_t r = 0; r < rows; r++) {
      const float *xr = x + r * len, *dr = dy + r * len;
      float mean = st[r], inv = st[rows + r];
      /* g = dy * scale; dx = inv * (g - mean(g) - xhat * mean(g * xhat)) */
      double sg = 0, sgx = 0;
      for (int64_t j = 0; j < len; j++) {
        float g = dr[j] * scale[j];
        sg += g;
        sgx += (double)g * (xr[j] - mean) * inv;
      }
      float mg = (float)(sg / (double)len), mgx = (float)(sgx / (double)len);
      float *gr = dx + r * len;
      for (int64_t j = 0; j < len; j++)
        gr[j] += inv * (dr[j] * scale[j] - mg - (xr[j] - mean) * inv * mgx);
    }
  }
  if (!dscale && !dbias) return;
  int64_t nblk = (len + LN_COL_BLOCK - 1) / LN_COL_BLOCK;
#pragma omp parallel for schedule(static) if (rows * len > RC__PAR_MIN)
  for (int64_t b = 0; b < nblk; b++) {
    int64_t j0 = b * LN_COL_BLOCK, nj = len - j0 < LN_COL_BLOCK ? len - j0 : LN_COL_BLOCK;
    double ss[LN_COL_BLOCK], sb[LN_COL_BLOCK];
    memset(ss, 0, sizeof ss);
    memset(sb, 0, sizeof sb);
    for (int64_t r = 0; r < rows; r++) {
      const float *xr = x + r * len + j0, *dr = dy + r * len + j0;
      float mean = st[r], inv = st[rows + r];
      for (int64_t j = 0; j < nj; j++) {
        ss[j] += (double)dr[j] * (xr[j] - mean) * inv;
        sb[j] += dr[j];
      }
    }
    for (int64_t j = 0; j < nj; j++) {
      if (dscale) dscale[j0 + j] += (float)ss[j];
      if (dbias) dbias[j0 + j] += (float)sb[j];
    }
  }
}

/* ======================= InstanceNormalization ======================= */
static rc_status in_parse(rc_node *n, rc_arena *a, rc_err *e) {
  float *eps = rc__arena_zalloc(a, sizeof *eps);
  if (!eps) return rc__fail(e, RC_ERR_NOMEM, "node '%s' (%s): out of memory", n->label, n->op_type);
  *eps = rc__attr_float(n, "epsilon", 1e-5f);
  if (!(*eps >= 0)) return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): invalid epsilon", n->label, n->op_type);
  n->params = eps;
  return RC_OK;
}

/* x (N,C,D1..Dn), scale (C), B (C) -> y (N,C,D1..Dn) */
static rc_status in_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  RC_TRY(rc__infer_unary_float(n, in, out, e));
  if (in[0]->rank < 3)
    return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): X has rank %d, expected (N, C, D1, ...)", n->label,
                    n->op_type, in[0]->rank);
  RC_TRY(need_param_vector(n, in, 1, in[0]->dims[1], "scale", e));
  return need_param_vector(n, in, 2, in[0]->dims[1], "B", e);
}

static size_t in_saved(const rc_kernel *k) {
  return 2 * (size_t)(k->in[0]->dims[0] * k->in[0]->dims[1]) * sizeof(float);
}
static size_t in_workspace(const rc_kernel *k, int backward) { return backward ? 0 : in_saved(k); }

static rc_status in_forward(const rc_kernel *k, rc_err *e) {
  float eps = *(const float *)k->params;
  int64_t N, C, S;
  bn_dims(k->in[0], &N, &C, &S);
  const float *x = k->in[0]->data, *scale = k->in[1]->data, *bias = k->in[2]->data;
  float *y = k->out[0]->data, *st = stats_buffer(k);
  int64_t rows = N * C;
#pragma omp parallel for schedule(static) if (rows * S > RC__PAR_MIN)
  for (int64_t r = 0; r < rows; r++) {
    int64_t c = r % C;
    float mean, inv;
    run_stats(x + r * S, S, eps, &mean, &inv);
    st[r] = mean;
    st[rows + r] = inv;
    float a = scale[c] * inv;
    affine_run(y + r * S, x + r * S, S, a, bias[c] - mean * a);
  }
  (void)e;
  return RC_OK;
}

static void in_backward(const rc_kernel *k) {
  if (!k->dout[0]) return;
  int64_t N, C, S;
  bn_dims(k->in[0], &N, &C, &S);
  norm_grads b;
  norm_grads_init(k, &b);
  const float *x = b.x, *scale = b.scale, *dy = b.dy, *st = b.st;
  float *dx = b.dx, *dscale = b.dscale, *dbias = b.dbias;
  int64_t rows = N * C;
  /* Parallel over channels: each owns its scale/B sums, rows in fixed order. */
#pragma omp parallel for schedule(static) if (rows * S > RC__PAR_MIN)
  for (int64_t c = 0; c < C; c++) {
    double tdy = 0, tdyx = 0;
    for (int64_t n = 0; n < N; n++) {
      int64_t r = n * C + c;
      double sdy, sdyx;
      run_norm_backward(dx ? dx + r * S : NULL, x + r * S, dy + r * S, S, st[r], st[rows + r],
                        scale[c] * st[rows + r], &sdy, &sdyx);
      tdy += sdy;
      tdyx += sdyx;
    }
    if (dscale) dscale[c] += (float)tdyx;
    if (dbias) dbias[c] += (float)tdy;
  }
}

/* BatchNormalization: 7-8 (spatial attribute), 9-13 (five outputs), 14+
 * (training_mode, three outputs). InstanceNormalization unchanged from 6. */
const rc_op_def rc__ops_norm[] = {
    {"BatchNormalization", "", 7, 21, 0, bn_parse, bn_infer, bn_workspace, bn_saved, bn_forward, bn_backward},
    {"LayerNormalization", "", 17, 21, 0, ln_parse, ln_infer, ln_workspace, ln_saved, ln_forward, ln_backward},
    {"InstanceNormalization", "", 6, 21, 0, in_parse, in_infer, in_workspace, in_saved, in_forward, in_backward},
};
const int rc__ops_norm_count = (int)(sizeof rc__ops_norm / sizeof rc__ops_norm[0]);
