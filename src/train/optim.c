/* SGD and AdamW on the flat store, global-norm clipping, schedules. The
 * updates are elementwise, so splitting them over threads does not change
 * results; the clipping norm is summed serially in double. */
#include "train/optim.h"

#include <math.h>
#include <stddef.h>

/* Below this many floats an entry is updated on one thread. */
#define PAR_MIN 32768

static const double PI = 3.14159265358979323846;

void rc_optim_defaults(rc_optim_config *c, rc_optim_kind kind) {
  *c = (rc_optim_config){0};
  c->kind = kind;
  c->beta1 = 0.9f;
  c->beta2 = 0.999f;
  c->eps = 1e-8f;
  if (kind == RC_OPTIM_SGD) {
    c->lr = 0.01f;
    c->momentum = 0.9f;
    c->nesterov = 1;
    c->weight_decay = 1e-4f;
  } else {
    c->lr = 5e-4f;
    c->weight_decay = 0.0f;
  }
}

static int in_unit(float x) { return x >= 0.0f && x < 1.0f; }

rc_status rc_optim_check(const rc_optim_config *c, rc_err *e) {
  if (c->kind != RC_OPTIM_SGD && c->kind != RC_OPTIM_ADAMW)
    return rc__fail(e, RC_ERR_INVALID, "optimizer: unknown kind %d", (int)c->kind);
  if (!(c->lr > 0.0f) || !isfinite(c->lr))
    return rc__fail(e, RC_ERR_INVALID, "optimizer: learning rate must be > 0, got %g", (double)c->lr);
  if (!(c->weight_decay >= 0.0f) || !isfinite(c->weight_decay))
    return rc__fail(e, RC_ERR_INVALID, "optimizer: weight decay must be >= 0, got %g",
                    (double)c->weight_decay);
  if (c->kind == RC_OPTIM_SGD) {
    if (!in_unit(c->momentum))
      return rc__fail(e, RC_ERR_INVALID, "optimizer: momentum must be in [0, 1), got %g",
                      (double)c->momentum);
    if (c->nesterov && c->momentum == 0.0f)
      return rc__fail(e, RC_ERR_INVALID, "optimizer: Nesterov momentum needs momentum > 0");
  } else {
    if (!in_unit(c->beta1) || !in_unit(c->beta2))
      return rc__fail(e, RC_ERR_INVALID, "optimizer: betas must be in [0, 1), got %g, %g",
                      (double)c->beta1, (double)c->beta2);
    if (!(c->eps > 0.0f) || !isfinite(c->eps))
      return rc__fail(e, RC_ERR_INVALID, "optimizer: eps must be > 0, got %g", (double)c->eps);
  }
  return RC_OK;
}

int rc_optim_moments(const rc_optim_config *c) {
  if (c->kind == RC_OPTIM_ADAMW) return 2;
  return c->momentum != 0.0f ? 1 : 0;
}

static int decays(const rc_param_entry *en, const rc_optim_config *c) {
  if (en->flags & RC_PARAM_NO_DECAY) return 0;
  if ((en->flags & RC_PARAM_NORM) && !c->decay_norm) return 0;
  return c->weight_decay != 0.0f;
}

/* torch.optim.SGD, dampening 0:
 *   d = g + wd * p;  buf = d on the first step, else momentum * buf + d;
 *   d = nesterov ? d + momentum * buf : buf;  p -= lr * d
 * p, g, buf (n); mask (n) or NULL; buf NULL without momentum. */
static void sgd_update(float *p, float *buf, const float *g, const uint8_t *mask, int64_t n,
                       float lr, float wd, float momentum, int nesterov, int first) {
#pragma omp parallel for if (n >= PAR_MIN) schedule(static)
  for (int64_t j = 0; j < n; j++) {
    if (mask && !mask[j]) continue;
    float d = g[j] + wd * p[j];
    if (buf) {
      float b = first ? d : momentum * buf[j] + d;
      buf[j] = b;
      d = nesterov ? d + momentum * b : b;
    }
    p[j] -= lr * d;
  }
}

/* torch.optim.AdamW:
 *   p *= 1 - lr * wd;  m = b1 m + (1 - b1) g;  v = b2 v + (1 - b2) g^2;
 *   p -= (lr / (1 - b1^t)) * m / (sqrt(v) / sqrt(1 - b2^t) + eps)
 * p, g, m, v (n); mask (n) or NULL. */
static void adamw_update(float *p, float *m, float *v, const float *g, const uint8_t *mask,
                         int64_t n, float shrink, float b1, float b2, float step_size,
                         float bc2_sqrt, float eps) {
  float c1 = 1.0f - b1, c2 = 1.0f - b2;
#pragma omp parallel for if (n >= PAR_MIN) schedule(static)
  for (int64_t j = 0; j < n; j++) {
    if (mask && !mask[j]) continue;
    float gj = g[j];
    float mj = b1 * m[j] + c1 * gj;
    float vj = b2 * v[j] + c2 * gj * gj;
    m[j] = mj;
    v[j] = vj;
    float denom = sqrtf(vj) / bc2_sqrt + eps;
    p[j] = p[j] * shrink - step_size * (mj / denom);
  }
}

rc_status rc_optim_step(rc_params *ps, const rc_optim_config *c, float lr, rc_err *e) {
  RC_TRY(rc_optim_check(c, e));
  if (!(lr >= 0.0f) || !isfinite(lr))
    return rc__fail(e, RC_ERR_INVALID, "optimizer step: learning rate %g is not usable", (double)lr);
  int need = rc_optim_moments(c);
  if (!rc_params_value(ps, -1) || rc_params_moments(ps) < need)
    return rc__fail(e, RC_ERR_INVALID,
                    "optimizer step: parameter store not finalized with %d moment blocks", need);
  int64_t t = rc_params_steps(ps) + 1;
  /* Bias corrections in double, as PyTorch computes them in Python. */
  double bc1 = 1.0 - pow((double)c->beta1, (double)t);
  double bc2 = 1.0 - pow((double)c->beta2, (double)t);
  for (int i = 0; i < rc_params_count(ps); i++) {
    const rc_param_entry *en = rc_params_entry(ps, i);
    float *p = rc_params_value(ps, i);
    const float *g = rc_params_grad(ps, i);
    float wd = decays(en, c) ? c->weight_decay : 0.0f;
    if (c->kind == RC_OPTIM_SGD) {
      float *buf = c->momentum != 0.0f ? rc_params_block(ps, RC_BLOCK_MOMENT1, i) : NULL;
      sgd_update(p, buf, g, en->mask, en->numel, lr, wd, c->momentum, c->nesterov, t == 1);
    } else {
      float shrink = (float)(1.0 - (double)lr * (double)wd);
      adamw_update(p, rc_params_block(ps, RC_BLOCK_MOMENT1, i),
                   rc_params_block(ps, RC_BLOCK_MOMENT2, i), g, en->mask, en->numel, shrink,
                   c->beta1, c->beta2, (float)((double)lr / bc1), (float)sqrt(bc2), c->eps);
    }
  }
  rc_params_set_steps(ps, t);
  return RC_OK;
}

double rc_clip_grad_norm(rc_params *ps, double max_norm) {
  float *grad = rc_params_grad(ps, -1);
  if (!grad) return 0.0;
  double sq = 0.0;
  for (int i = 0; i < rc_params_count(ps); i++) {
    const rc_param_entry *en = rc_params_entry(ps, i);
    const float *g = grad + en->offset;
    for (int64_t j = 0; j < en->numel; j++)
      if (!en->mask || en->mask[j]) sq += (double)g[j] * (double)g[j];
  }
  double norm = sqrt(sq);
  if (!(max_norm > 0.0) || !isfinite(norm)) return norm;
  double coef = max_norm / (norm + 1e-6);
  if (coef < 1.0) {
    float f = (float)coef;
    size_t total = rc_params_total(ps);
    for (size_t j = 0; j < total; j++) grad[j] *= f;
  }
  return norm;
}

float rc_sched_lr(const rc_sched *s, int64_t t) {
  double lr = s->lr;
  if (t < 1) t = 1;
  if (t < s->warmup) return (float)(lr * (double)t / (double)s->warmup);
  /* u counts from 0 at the first full-rate step (t = W, or t = 1 without
   * warm-up), so step and cosine decay start from lr exactly. */
  int64_t start = s->warmup > 1 ? s->warmup : 1;
  int64_t u = t - start;
  switch (s->kind) {
    case RC_SCHED_STEP:
      return (float)(lr * pow((double)s->gamma, (double)(u / s->step_size)));
    case RC_SCHED_COSINE: {
      int64_t span = s->total - start;
      if (span <= 0) return (float)lr;
      if (u > span) u = span;
      double lo = s->lr_min;
      return (float)(lo + (lr - lo) * (1.0 + cos(PI * (double)u / (double)span)) / 2.0);
    }
    case RC_SCHED_CONSTANT:
    default:
      return (float)lr;
  }
}

rc_status rc_sched_check(const rc_sched *s, rc_err *e) {
  if (s->kind != RC_SCHED_CONSTANT && s->kind != RC_SCHED_STEP && s->kind != RC_SCHED_COSINE)
    return rc__fail(e, RC_ERR_INVALID, "schedule: unknown kind %d", (int)s->kind);
  if (!(s->lr > 0.0f) || !isfinite(s->lr))
    return rc__fail(e, RC_ERR_INVALID, "schedule: learning rate must be > 0, got %g", (double)s->lr);
  if (s->warmup < 0)
    return rc__fail(e, RC_ERR_INVALID, "schedule: warm-up steps must be >= 0, got %lld",
                    (long long)s->warmup);
  if (s->kind == RC_SCHED_STEP) {
    if (s->step_size < 1)
      return rc__fail(e, RC_ERR_INVALID, "schedule: step size must be >= 1, got %lld",
                      (long long)s->step_size);
    if (!(s->gamma > 0.0f) || !isfinite(s->gamma))
      return rc__fail(e, RC_ERR_INVALID, "schedule: gamma must be > 0, got %g", (double)s->gamma);
  }
  if (s->kind == RC_SCHED_COSINE) {
    if (s->total < 1)
      return rc__fail(e, RC_ERR_INVALID, "schedule: total steps must be >= 1, got %lld",
                      (long long)s->total);
    if (!(s->lr_min >= 0.0f) || !(s->lr_min <= s->lr))
      return rc__fail(e, RC_ERR_INVALID, "schedule: minimum rate %g must be in [0, %g]",
                      (double)s->lr_min, (double)s->lr);
  }
  return RC_OK;
}

void rc_sched_defaults(rc_sched *s, float lr, int64_t total) {
  *s = (rc_sched){0};
  s->kind = RC_SCHED_COSINE;
  s->lr = lr;
  s->lr_min = lr / 100.0f;
  s->total = total;
  s->warmup = total * 3 / 100;
  s->step_size = 1;
  s->gamma = 1.0f;
}
