/* A ring of ready batches filled ahead of the training step by worker
 * threads.
 *
 * The ring serves a run of consecutive (epoch, batch) positions of a dataset
 * view: epoch e is shuffled as rc_dataset_shuffle(seed, e) shuffles it, and
 * batch b takes this rank's rows [offset, offset + local) of the global
 * batch at b * batch. Each worker gathers whole batches (decoding image
 * files, converting mapped arrays) into a slot of the ring; the consumer
 * takes them in order. A batch's bytes depend only on its position, never on
 * which worker filled it or when, so the ring changes no result. Memory is
 * bounded by depth slots of one local batch each.
 */
#ifndef RC_DATA_PREFETCH_H
#define RC_DATA_PREFETCH_H

#include <stdint.h>

#include "core/status.h"
#include "recoup/data.h"

typedef struct rc__prefetch rc__prefetch;

typedef struct rc__prefetch_plan {
  const rc_dataset *view; /* read by the workers; must outlive the ring */
  uint64_t seed;
  int64_t batch;             /* rows of a global batch */
  int64_t offset, local;     /* this rank's rows of each global batch */
  int64_t batches_per_epoch; /* whole global batches in an epoch */
  int64_t epoch, first;      /* the first position served */
  int64_t count;             /* positions served in all */
  int labels;                /* gather labels too (the view must have them) */
  int workers;               /* threads filling the ring, >= 1 */
  int depth;                 /* slots, >= 1 */
} rc__prefetch_plan;

/* How long the consumer waited for batches and how many samples the workers
 * gathered: decoding limits the step when waiting is a large share. */
typedef struct rc__prefetch_stats {
  double wait_s;
  int64_t samples;
  int64_t waits; /* batches that were not ready when asked for */
} rc__prefetch_stats;

/* Slots and threads are made here; the workers start at once. */
rc_status rc__prefetch_start(rc__prefetch **out, const rc__prefetch_plan *p, rc_err *e);
/* The next position's inputs into in[i] (local * the view's sample bytes)
 * and labels (local int32, when asked for); *count rows. An error a worker
 * met on this batch (an unreadable file) is returned here, with its message. */
rc_status rc__prefetch_next(rc__prefetch *pf, void *const *in, int32_t *labels, int64_t *count, rc_err *e);
void rc__prefetch_stats_get(rc__prefetch *pf, rc__prefetch_stats *s);
/* Stops the workers (waiting for the batch each is on) and frees the ring;
 * safe on NULL. */
void rc__prefetch_stop(rc__prefetch *pf);

#endif
