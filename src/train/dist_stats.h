/* The hook through which a data-parallel step's kernels sum batch
 * statistics over the ranks (rc_op_reduce, ops/op.h): BatchNormalization in
 * training mode normalises by the global batch, not by one rank's share.
 * Kernels' backward passes return no status, so the failures the hook meets
 * are kept here and the step checks them after each pass. */
#ifndef RC_TRAIN_DIST_STATS_H
#define RC_TRAIN_DIST_STATS_H

#include <stdint.h>

#include "ops/op.h"
#include "train/dist.h"

typedef struct rc_dist_stats {
  rc_op_reduce hook;
  rc_dist *dist;
  /* This rank's rows over the global batch: each rank's loss is the mean
   * over its own rows, so its output gradients are 1 / share times the
   * global batch's; sums of gradients are converted with it. */
  double share;
  rc_status failed;
  rc_err err;
} rc_dist_stats;

void rc__dist_stats_init(rc_dist_stats *s, rc_dist *d, int64_t local, int64_t global);
/* The hook for a plan running this rank's rows, NULL when alone. */
const rc_op_reduce *rc__dist_stats_hook(const rc_dist_stats *s);
/* The first failure since the last call (RC_OK when none), then clears it. */
rc_status rc__dist_stats_check(rc_dist_stats *s, rc_err *e);

#endif
