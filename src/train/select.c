#include "train/select.h"

#include <math.h>

static int uses_labels(const rc_metrics *m, double alpha) { return m->has_labels && alpha < 1; }

double rc__select_measure(const rc_metrics *m, double alpha) {
  if (!m->has_ref) return NAN;
  return uses_labels(m, alpha) ? alpha * m->kl + (1 - alpha) * m->ce : m->kl;
}

int rc__select_better(const rc_metrics *cand, const rc_metrics *best, double alpha) {
  double a = rc__select_measure(cand, alpha), b = rc__select_measure(best, alpha);
  if (isnan(a)) return 0;
  return isnan(b) || a < b;
}

int64_t rc__select_best(const rc_metrics *input, const rc_metrics *history, int64_t n, double alpha) {
  const rc_metrics *best = input;
  int64_t pick = 0;
  for (int64_t i = 0; i < n; i++)
    if (rc__select_better(&history[i], best, alpha)) {
      best = &history[i];
      pick = i + 1;
    }
  return pick;
}

const char *rc__select_rule_name(const rc_metrics *m, double alpha) {
  return uses_labels(m, alpha) ? "kl+cross_entropy" : "kl";
}
