/* Where the training loop's batches come from: gathered on the spot from
 * arrays in memory, or taken from a prefetch ring (data/prefetch.h) filled
 * by worker threads when samples are read from files per batch (image
 * folders decoded as they are used, memory-mapped arrays). Either way batch
 * b of an epoch holds the same bytes, so the choice changes no result. */
#ifndef RC_TRAIN_BATCH_SOURCE_H
#define RC_TRAIN_BATCH_SOURCE_H

#include <stdint.h>

#include "core/status.h"
#include "data/prefetch.h"
#include "recoup/data.h"

typedef struct rc__batch_source {
  const rc_dataset *view; /* shuffled by the loop for the direct path */
  int64_t batch, offset, local;
  rc__prefetch *ring; /* NULL: gather on the spot */
  int workers, depth;
} rc__batch_source;

/* What the loop will ask for: `count` batches from position `first` of
 * `epoch`, each this rank's rows [offset, offset + local) of a global batch
 * of `batch`; epochs of batches_per_epoch shuffled with `seed`. workers 0
 * means one per compute thread. */
typedef struct rc__batch_source_run {
  uint64_t seed;
  int64_t batch, offset, local, batches_per_epoch;
  int64_t epoch, first, count;
  int labels;
  int workers;
} rc__batch_source_run;

/* Does the view read samples from files per batch (and so gain from a ring)? */
int rc__batch_source_reads_files(const rc_dataset *view);

rc_status rc__batch_source_start(rc__batch_source *bs, const rc_dataset *view, const rc__batch_source_run *run,
                                 rc_err *e);
/* Batch b of the current epoch (the next one in order) into in/labels. */
rc_status rc__batch_source_next(rc__batch_source *bs, int64_t b, void *const *in, int32_t *labels, int64_t *count,
                                rc_err *e);
/* Waiting and samples delivered so far (zeros without a ring). */
void rc__batch_source_stats(rc__batch_source *bs, rc__prefetch_stats *s);
void rc__batch_source_stop(rc__batch_source *bs);

#endif
