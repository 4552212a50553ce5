/* The step's gradients summed over the ranks of a data-parallel run. Only
 * what trains is sent: entries that take a gradient, and within them the
 * positions their pruning mask keeps (frozen zeros never change, so their
 * gradients are never needed). Each rank's gradient is the mean over its
 * part of the global batch; scaled by part / global before the sum, the
 * result is the mean over the global batch, as one process computes it. */
#ifndef RC_TRAIN_DIST_GRADS_H
#define RC_TRAIN_DIST_GRADS_H

#include <stdint.h>

#include "train/dist.h"
#include "train/params.h"

typedef struct rc_grad_sync {
  unsigned char *send; /* per store entry: 1 = takes a gradient */
  float *buf;          /* packed values sent, plus the extras */
  size_t n;            /* packed gradient values (bytes per step = 4n) */
  int n_extra;
} rc_grad_sync;

/* send: per store entry (rc_params_count), copied. n_extra doubles ride
 * along each sum (the loss, the stop request), carried as floats. */
rc_status rc__grad_sync_init(rc_grad_sync *g, rc_params *ps, const unsigned char *send, int n_extra, rc_err *e);
/* Scale this rank's gradients and extras by scale, sum over ranks, unpack. */
rc_status rc__grad_sync_run(rc_grad_sync *g, rc_dist *d, rc_params *ps, float scale, double *extra, rc_err *e);
void rc__grad_sync_free(rc_grad_sync *g);

/* Checksum of every value in the store (FNV-1a over the bytes). */
uint64_t rc__params_checksum(rc_params *ps);

#endif
