#include "train/dist_stats.h"

#include <string.h>

static rc_status sum_over_ranks(void *ctx, double *buf, size_t n, int grads, rc_err *e) {
  rc_dist_stats *s = ctx;
  /* Gradient sums into the global batch's scale, summed, and back. */
  if (grads)
    for (size_t i = 0; i < n; i++) buf[i] *= s->share;
  rc_status st = rc_dist_sum_f64(s->dist, buf, n, e);
  if (grads)
    for (size_t i = 0; i < n; i++) buf[i] /= s->share;
  if (st != RC_OK && s->failed == RC_OK) {
    s->failed = st;
    s->err = *e;
  }
  return st;
}

void rc__dist_stats_init(rc_dist_stats *s, rc_dist *d, int64_t local, int64_t global) {
  memset(s, 0, sizeof *s);
  s->dist = d;
  s->share = global > 0 ? (double)local / (double)global : 1;
  s->hook.sum = sum_over_ranks;
  s->hook.ctx = s;
}

const rc_op_reduce *rc__dist_stats_hook(const rc_dist_stats *s) {
  return rc_dist_size(s->dist) > 1 ? &s->hook : NULL;
}

rc_status rc__dist_stats_check(rc_dist_stats *s, rc_err *e) {
  rc_status st = s->failed;
  if (st != RC_OK) *e = s->err;
  s->failed = RC_OK;
  return st;
}
