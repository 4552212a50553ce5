/* The training loop's batch source (batch_source.h). */
#include "train/batch_source.h"

#include <omp.h>
#include <string.h>

/* Ready batches kept per worker: one being filled, one waiting. */
#define SLOTS_PER_WORKER 2

int rc__batch_source_reads_files(const rc_dataset *view) {
  for (int i = 0; i < view->n_inputs; i++)
    if (view->stream[i] || view->release[i]) return 1;
  return 0;
}

rc_status rc__batch_source_start(rc__batch_source *bs, const rc_dataset *view, const rc__batch_source_run *run,
                                 rc_err *e) {
  memset(bs, 0, sizeof *bs);
  bs->view = view;
  bs->batch = run->batch;
  bs->offset = run->offset;
  bs->local = run->local;
  if (!rc__batch_source_reads_files(view) || run->count < 1 || run->local < 1) return RC_OK;
  bs->workers = run->workers > 0 ? run->workers : omp_get_max_threads();
  if (bs->workers < 1) bs->workers = 1;
  bs->depth = SLOTS_PER_WORKER * bs->workers;
  rc__prefetch_plan p = {view,       run->seed,  run->batch, run->offset, run->local,  run->batches_per_epoch,
                         run->epoch, run->first, run->count, run->labels, bs->workers, bs->depth};
  return rc__prefetch_start(&bs->ring, &p, e);
}

rc_status rc__batch_source_next(rc__batch_source *bs, int64_t b, void *const *in, int32_t *labels, int64_t *count,
                                rc_err *e) {
  if (bs->ring) return rc__prefetch_next(bs->ring, in, labels, count, e);
  rc_dataset part = *bs->view; /* this rank's rows of global batch b */
  part.order = bs->view->order + b * bs->batch + bs->offset;
  part.n = bs->local;
  return rc_dataset_gather(in, labels, count, &part, 0, bs->local, e);
}

void rc__batch_source_stats(rc__batch_source *bs, rc__prefetch_stats *s) {
  memset(s, 0, sizeof *s);
  if (bs->ring) rc__prefetch_stats_get(bs->ring, s);
}

void rc__batch_source_stop(rc__batch_source *bs) {
  rc__prefetch_stop(bs->ring);
  bs->ring = NULL;
}
