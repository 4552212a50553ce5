/* The teacher's rows of each training step: cached per sample and filled
 * lazily as steps first draw samples, or computed on every augmented batch. */
#include <string.h>

#include "plan/plan.h"
#include "train/distill_state.h"

/* The teacher on this rank's rows of the step's batch, as the student sees
 * them, placed at their rows of the global batch (the other rows are
 * zeros) so that each gets the bits one process gives it. */
static rc_status teacher_forward(run_state *st, const step_buffers *sb, rc_err *e) {
  const rc_graph *tg = &st->teacher->graph, *sg = st->sg;
  for (int i = 0; i < tg->n_inputs; i++) {
    int j = rc__graph_find_in(sg, sg->inputs, sg->n_inputs, tg->values[tg->inputs[i]].name);
    rc_tensor *t = rc_plan_tensor(st->teacher_plan, tg->inputs[i]);
    size_t row = rc_tensor_nbytes(t) / (size_t)t->dims[0];
    memset(t->data, 0, rc_tensor_nbytes(t));
    memcpy((unsigned char *)t->data + row * (size_t)st->offset, sb->in[j], row * (size_t)st->local);
  }
  return rc_plan_forward(st->teacher_plan, e);
}

/* How far past this step's rows a teacher pass looks for samples to fill
 * its free rows with, in batches. */
#define TEACHER_LOOKAHEAD 16

/* One teacher pass over the samples at the training positions slot_pos
 * (one per row of the teacher's plan; a free row repeats another's
 * sample), caching the rows whose slot_sample is set. */
static rc_status teacher_fill(run_state *st, const step_buffers *sb, rc_err *e) {
  const rc_graph *tg = &st->teacher->graph, *sg = st->sg;
  rc_dataset td = st->train;
  void *in[RC_DATASET_MAX_INPUTS];
  for (int i = 0; i < tg->n_inputs; i++) {
    rc_dataset_take_input(&td, i, &st->train,
                          rc__graph_find_in(sg, sg->inputs, sg->n_inputs, tg->values[tg->inputs[i]].name));
    in[i] = rc_plan_tensor(st->teacher_plan, tg->inputs[i])->data;
  }
  td.order = sb->slot_pos;
  td.n = st->batch;
  memset(td.release, 0, sizeof td.release); /* the step's own gather manages a mapping's pages */
  int64_t count;
  RC_TRY(rc_dataset_gather(in, NULL, &count, &td, 0, st->batch, e));
  RC_TRY(rc_plan_forward(st->teacher_plan, e));
  const float *t = rc_plan_tensor(st->teacher_plan, tg->outputs[0])->data;
  for (int64_t r = 0; r < st->batch; r++) {
    int64_t sample = sb->slot_sample[r];
    if (sample < 0) continue;
    memcpy(st->teacher_logits + sample * st->k, t + r * st->k, sizeof(float) * (size_t)st->k);
    st->teacher_have[sample] = 1;
    st->teacher_cached++;
  }
  return RC_OK;
}

/* Give the sample at training position pos its row in the next teacher
 * pass, if it needs one and its row is free. */
static void claim_slot(const run_state *st, const step_buffers *sb, int64_t pos, int *claimed) {
  int64_t sample = st->train.index[pos], r = sample % st->batch;
  if (st->teacher_have[sample] || sb->slot_sample[r] >= 0) return;
  sb->slot_sample[r] = sample;
  sb->slot_pos[r] = pos;
  *claimed = 1;
}

/* Compute the teacher's rows that this rank's part of batch b lacks. A
 * row's bits depend on the sample and on its row in the teacher's plan
 * (the GEMM library picks kernels by position), so sample s always takes
 * row s mod batch, as a pass over the samples in order gives it: the cache
 * holds the same bits whichever steps draw it first. Rows this step leaves
 * free go to samples the next batches of the epoch draw. */
static rc_status teacher_lazy(run_state *st, step_buffers *sb, int64_t b, int64_t spe, rc_err *e) {
  const int64_t *order = st->train.order;
  int64_t first = b * st->batch + st->offset;
  for (;;) {
    for (int64_t r = 0; r < st->batch; r++) sb->slot_sample[r] = -1;
    int claimed = 0;
    for (int64_t j = 0; j < st->local; j++) claim_slot(st, sb, order[first + j], &claimed);
    if (!claimed) return RC_OK;
    int64_t end = b + 1 + TEACHER_LOOKAHEAD < spe ? b + 1 + TEACHER_LOOKAHEAD : spe;
    for (int64_t bb = b + 1; bb < end; bb++)
      for (int64_t j = 0; j < st->local && bb * st->batch + st->offset + j < st->train.n; j++)
        claim_slot(st, sb, order[bb * st->batch + st->offset + j], &claimed);
    int64_t any = 0;
    for (int64_t r = 0; r < st->batch; r++)
      if (sb->slot_sample[r] >= 0) any = sb->slot_pos[r];
    for (int64_t r = 0; r < st->batch; r++)
      if (sb->slot_sample[r] < 0) sb->slot_pos[r] = any;
    RC_TRY(teacher_fill(st, sb, e));
  }
}

/* The teacher's rows for this rank's part of batch b: from the cache,
 * filled as steps first draw samples (a run of a few steps never runs the
 * teacher over the whole set), or, with augmentation, computed on the
 * augmented batch itself. */
rc_status rc__distill_teacher_rows(run_state *st, step_buffers *sb, int64_t b, int64_t spe, rc_err *e) {
  if (!st->k) return RC_OK;
  size_t row = sizeof(float) * (size_t)st->k;
  if (st->augmenting) {
    RC_TRY(teacher_forward(st, sb, e));
    const float *t = rc_plan_tensor(st->teacher_plan, st->teacher->graph.outputs[0])->data;
    memcpy(sb->teacher, t + st->offset * st->k, row * (size_t)st->local);
    return RC_OK;
  }
  RC_TRY(teacher_lazy(st, sb, b, spe, e));
  const int64_t *order = st->train.order + b * st->batch + st->offset;
  for (int64_t j = 0; j < st->local; j++)
    memcpy(sb->teacher + j * st->k, st->teacher_logits + st->train.index[order[j]] * st->k, row);
  return RC_OK;
}
