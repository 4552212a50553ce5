/* A group of cooperating processes: the ranks of an MPI job when recoup was
 * built with MPI and started by mpirun or srun, otherwise one process alone.
 * Every call works on a NULL group too, as a group of one (rank 0 of 1), so
 * callers need no second code path.
 *
 * Reductions run in a fixed order (a ring whose sums start at a fixed rank
 * for each chunk), so the same number of ranks gives the same bits on every
 * run; the time spent in them is added up for reports. Joining, ranks,
 * hosts and the point-to-point messages are public: recoup/parallel.h. */
#ifndef RC_TRAIN_DIST_H
#define RC_TRAIN_DIST_H

#include <stddef.h>
#include <stdint.h>

#include "core/status.h"
#include "recoup/parallel.h"

/* Seconds spent in communication so far. */
double rc_dist_comm_seconds(const rc_dist *d);

/* Rows [lo, hi) of n that rank r of size takes: contiguous, sizes differ by
 * at most one, lower ranks take the larger parts. */
void rc_dist_share(int64_t n, int r, int size, int64_t *lo, int64_t *hi);
/* The same in whole blocks of `block` rows (the last may be short), so each
 * block is computed exactly as one process computes it. */
void rc_dist_share_blocks(int64_t n, int64_t block, int r, int size, int64_t *lo, int64_t *hi);

/* Sum buf over all ranks, in place, same result on every rank. */
rc_status rc_dist_sum_f32(rc_dist *d, float *buf, size_t n, rc_err *e);
rc_status rc_dist_sum_f64(rc_dist *d, double *buf, size_t n, rc_err *e);
/* Rank 0's bytes to every rank. */
rc_status rc_dist_bcast(rc_dist *d, void *buf, size_t bytes, rc_err *e);
/* buf holds n rows of row_floats floats; each rank has filled its share
 * (rc_dist_share_blocks); afterwards every rank holds every row. */
rc_status rc_dist_gather_rows(rc_dist *d, float *buf, int64_t n, int64_t block, int64_t row_floats, rc_err *e);
/* Fail on every rank, naming the first rank that differs from rank 0, when
 * the ranks' values of sum differ (what names the checked state). */
rc_status rc_dist_check_equal(rc_dist *d, uint64_t sum, const char *what, rc_err *e);

#endif
