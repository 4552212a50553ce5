/* Losses and metrics over logits (N, K). Rows are independent; each row is
 * reduced in double and the batch mean is summed in row order, so results do
 * not depend on thread count. */
#include "train/loss.h"

#include <math.h>
#include <stddef.h>

static rc_status check_sizes(const char *what, const void *a, const void *b, int64_t n,
                             int64_t k, rc_err *e) {
  if (!a || !b) return rc__fail(e, RC_ERR_INVALID, "%s: missing logits", what);
  if (n < 1 || k < 1)
    return rc__fail(e, RC_ERR_SHAPE, "%s: logits must be (N, K) with N, K >= 1, got (%lld, %lld)",
                    what, (long long)n, (long long)k);
  return RC_OK;
}

static rc_status check_labels(const char *what, const int32_t *labels, int64_t n, int64_t k,
                              rc_err *e) {
  if (!labels) return rc__fail(e, RC_ERR_INVALID, "%s: missing labels", what);
  for (int64_t i = 0; i < n; i++)
    if (labels[i] < 0 || labels[i] >= k)
      return rc__fail(e, RC_ERR_INVALID, "%s: label %d of sample %lld is outside [0, %lld)",
                      what, (int)labels[i], (long long)i, (long long)k);
  return RC_OK;
}

static double row_max(const float *x, int64_t k) {
  double m = x[0];
  for (int64_t j = 1; j < k; j++)
    if (x[j] > m) m = x[j];
  return m;
}

/* log sum_j exp((x_j - m) / T) with m the row maximum: the shifted log of the
 * softmax denominator, so log p_j = (x_j - m) / T - result. */
static double row_log_denominator(const float *x, int64_t k, double m, double temp) {
  double z = 0.0;
  for (int64_t j = 0; j < k; j++) z += exp((x[j] - m) / temp);
  return log(z);
}

/* One row of KL(softmax(t/T) || softmax(s/T)); adds gscale * (p_s - p_t) to g. */
static double kd_row(float *g, const float *s, const float *t, int64_t k, double temp,
                     double gscale) {
  double ms = row_max(s, k), mt = row_max(t, k);
  double lzs = row_log_denominator(s, k, ms, temp);
  double lzt = row_log_denominator(t, k, mt, temp);
  double kl = 0.0;
  for (int64_t j = 0; j < k; j++) {
    double ls = (s[j] - ms) / temp - lzs;
    double lt = (t[j] - mt) / temp - lzt;
    double pt = exp(lt);
    /* 0 * log 0 = 0: a class the teacher rules out adds nothing. */
    if (pt > 0.0) kl += pt * (lt - ls);
    if (g) g[j] += (float)(gscale * (exp(ls) - pt));
  }
  return kl;
}

rc_status rc_loss_kd(double *loss, float *per_sample, float *grad, float grad_scale,
                     const float *student, const float *teacher, int64_t n, int64_t k,
                     float temperature, rc_err *e) {
  RC_TRY(check_sizes("kd loss", student, teacher, n, k, e));
  if (!(temperature > 0.0f) || !isfinite(temperature))
    return rc__fail(e, RC_ERR_INVALID, "kd loss: temperature must be a positive number, got %g",
                    (double)temperature);
  double temp = temperature;
  double gscale = (double)grad_scale * temp / (double)n;
  double total = 0.0;
  for (int64_t i = 0; i < n; i++) {
    float *g = grad ? grad + i * k : NULL;
    double li = temp * temp * kd_row(g, student + i * k, teacher + i * k, k, temp, gscale);
    if (per_sample) per_sample[i] = (float)li;
    total += li;
  }
  if (loss) *loss = total / (double)n;
  return RC_OK;
}

rc_status rc_loss_logit_mse(double *loss, float *per_sample, float *grad, float grad_scale,
                            const float *student, const float *teacher, int64_t n,
                            int64_t k, rc_err *e) {
  RC_TRY(check_sizes("logit-mse loss", student, teacher, n, k, e));
  double gscale = 2.0 * (double)grad_scale / ((double)n * (double)k);
  double total = 0.0;
  for (int64_t i = 0; i < n; i++) {
    const float *s = student + i * k, *t = teacher + i * k;
    double row = 0.0;
    for (int64_t j = 0; j < k; j++) {
      double d = (double)s[j] - (double)t[j];
      row += d * d;
      if (grad) grad[i * k + j] += (float)(gscale * d);
    }
    if (per_sample) per_sample[i] = (float)(row / (double)k);
    total += row;
  }
  if (loss) *loss = total / ((double)n * (double)k);
  return RC_OK;
}

rc_status rc_loss_cross_entropy(double *loss, float *per_sample, float *grad,
                                float grad_scale, const float *logits,
                                const int32_t *labels, int64_t n, int64_t k, rc_err *e) {
  RC_TRY(check_sizes("cross-entropy loss", logits, logits, n, k, e));
  RC_TRY(check_labels("cross-entropy loss", labels, n, k, e));
  double gscale = (double)grad_scale / (double)n;
  double total = 0.0;
  for (int64_t i = 0; i < n; i++) {
    const float *s = logits + i * k;
    double m = row_max(s, k);
    double lz = row_log_denominator(s, k, m, 1.0);
    double li = -((s[labels[i]] - m) - lz);
    if (grad) {
      float *g = grad + i * k;
      for (int64_t j = 0; j < k; j++) {
        double p = exp((s[j] - m) - lz);
        g[j] += (float)(gscale * (p - (j == labels[i] ? 1.0 : 0.0)));
      }
    }
    if (per_sample) per_sample[i] = (float)li;
    total += li;
  }
  if (loss) *loss = total / (double)n;
  return RC_OK;
}

rc_status rc_metric_kl(double *mean_kl, float *per_sample, const float *student,
                       const float *teacher, int64_t n, int64_t k, rc_err *e) {
  return rc_loss_kd(mean_kl, per_sample, NULL, 0.0f, student, teacher, n, k, 1.0f, e);
}

rc_status rc_metric_topk(int64_t *correct, uint8_t *hit, const float *logits,
                         const int32_t *labels, int64_t n, int64_t k, int topk, rc_err *e) {
  RC_TRY(check_sizes("top-k accuracy", logits, logits, n, k, e));
  RC_TRY(check_labels("top-k accuracy", labels, n, k, e));
  if (topk < 1) return rc__fail(e, RC_ERR_INVALID, "top-k accuracy: k must be >= 1, got %d", topk);
  int64_t count = 0;
  for (int64_t i = 0; i < n; i++) {
    const float *s = logits + i * k;
    float own = s[labels[i]];
    int ok = 0;
    if (!isnan(own)) {
      int64_t above = 0;
      for (int64_t j = 0; j < k; j++)
        if (s[j] > own || isnan(s[j])) above++;
      ok = above < topk;
    }
    if (hit) hit[i] = (uint8_t)ok;
    count += ok;
  }
  if (correct) *correct = count;
  return RC_OK;
}

static int32_t argmax_row(const float *s, int64_t k) {
  int64_t best = -1;
  for (int64_t j = 0; j < k; j++)
    if (!isnan(s[j]) && (best < 0 || s[j] > s[best])) best = j;
  return (int32_t)(best < 0 ? 0 : best);
}

void rc_metric_argmax(int32_t *pred, const float *logits, int64_t n, int64_t k) {
  if (!pred || !logits || k < 1) return;
  for (int64_t i = 0; i < n; i++) pred[i] = argmax_row(logits + i * k, k);
}

int64_t rc_metric_agreement(uint8_t *same, const float *a, const float *b, int64_t n,
                            int64_t k) {
  if (!a || !b || k < 1) return 0;
  int64_t count = 0;
  for (int64_t i = 0; i < n; i++) {
    int ok = argmax_row(a + i * k, k) == argmax_row(b + i * k, k);
    if (same) same[i] = (uint8_t)ok;
    count += ok;
  }
  return count;
}
