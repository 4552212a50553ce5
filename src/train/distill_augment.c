/* Augmentation in distill's run: the list checked against the student's
 * input, each step's batch transformed (data/augment.h draws and applies),
 * and the labels of mixed batches. */
#include <stdio.h>
#include <string.h>

#include "core/alloc.h"
#include "core/log.h"
#include "train/distill_state.h"
#include "train/loss.h"

/* --augment: parsed, checked against the student's input and the run's
 * side data, and announced (the teacher-output cache is off with it). */
rc_status rc__distill_setup_augment(run_state *st, const rc_distill_data *d, rc_distill_result *r, rc_err *e) {
  RC_TRY(rc__augment_parse(&st->aug, st->c->augment, e));
  st->augmenting = rc__augment_any(&st->aug);
  if (!st->augmenting) return RC_OK;
  const rc_graph *g = st->sg;
  if (g->n_inputs != 1)
    return rc__fail(e, RC_ERR_UNSUPPORTED, "augmentation: %s has %d inputs; it transforms one image input",
                    g->path, g->n_inputs);
  char what[300];
  snprintf(what, sizeof what, "input '%s' of %s", g->values[g->inputs[0]].name, g->path);
  RC_TRY(rc__augment_check(&st->aug, rc_plan_tensor(st->train_plan, g->inputs[0]), what, e));
  for (int i = 0; i < RC_DISTILL_OUTPUTS_MAX; i++)
    if (d->side.targets[i] || d->side.labels)
      return rc__fail(e, RC_ERR_UNSUPPORTED,
                      "augmentation does not move dense labels or regression targets with the "
                      "pixels it transforms; give per-output losses without them (the teacher's outputs are "
                      "transformed with the input), or no augmentation");
  rc__augment_describe(&st->aug, r->augment, sizeof r->augment);
  r->teacher_cache_off = 1;
  rc__log(&st->c->log, RC_LOG_INFO,
          "augmentation %s: the teacher runs on every augmented batch (no teacher-output "
          "cache)",
          r->augment);
  return RC_OK;
}

/* Transforms of this rank's rows of batch b, drawn by global batch position
 * so that any split over ranks gives the rows one process gives. A mixing
 * partner may lie in another rank's rows: every rank gathers and transforms
 * the partners it needs itself. */
rc_status rc__distill_augment_batch(run_state *st, int64_t b, int64_t step, step_buffers *sb, rc_err *e) {
  const rc_tensor *in = rc_plan_tensor(st->train_plan, st->sg->inputs[0]);
  int64_t c = in->dims[1], h = in->dims[2], w = in->dims[3], per = c * h * w;
  const rc_augment *a = &st->aug;
  uint64_t seed = st->c->seed;
  float *x = sb->in[0];
  rc_augment_draw d;
  rc__augment_draw_mix(a, &sb->mix, sb->partner, st->batch, h, w, seed, step);
  if (sb->mix.kind != RC_MIX_NONE) {
    for (int64_t j = 0; j < st->local; j++)
      sb->partner_order[j] = st->train.order[b * st->batch + sb->partner[st->offset + j]];
    rc_dataset pv = st->train;
    pv.order = sb->partner_order;
    pv.n = st->local;
    memset(pv.release, 0, sizeof pv.release); /* the step's own gather manages the mapping's pages */
    void *out[RC_DATASET_MAX_INPUTS] = {sb->mix_rows};
    int64_t count;
    RC_TRY(rc_dataset_gather(out, pv.labels ? sb->partner_labels : NULL, &count, &pv, 0, st->local, e));
    for (int64_t j = 0; j < st->local; j++) {
      rc__augment_draw_sample(a, &d, h, w, seed, step, sb->partner[st->offset + j]);
      rc__augment_apply_sample(&d, a->pad, sb->mix_rows + j * per, c, h, w, sb->aug_work);
    }
  }
  for (int64_t j = 0; j < st->local; j++) {
    rc__augment_draw_sample(a, &d, h, w, seed, step, st->offset + j);
    rc__augment_apply_sample(&d, a->pad, x + j * per, c, h, w, sb->aug_work);
  }
  for (int64_t j = 0; j < st->local && sb->mix.kind != RC_MIX_NONE; j++)
    rc__augment_apply_mix(&sb->mix, x + j * per, sb->mix_rows + j * per, c, h, w);
  return RC_OK;
}

rc_status rc__distill_augment_buffers(const run_state *st, step_buffers *sb, rc_err *e) {
  const rc_tensor *in = rc_plan_tensor(st->train_plan, st->sg->inputs[0]);
  size_t plane = (size_t)(in->dims[2] * in->dims[3]);
  sb->partner = rc__malloc(sizeof(int64_t) * (size_t)st->batch);
  sb->partner_order = rc__malloc(sizeof(int64_t) * (size_t)st->local);
  sb->partner_labels = rc__malloc(sizeof(int32_t) * (size_t)st->local);
  sb->mix_rows = rc__malloc(rc_tensor_nbytes(in));
  sb->aug_work = rc__malloc(sizeof(float) * plane);
  if (!sb->partner || !sb->partner_order || !sb->partner_labels || !sb->mix_rows || !sb->aug_work)
    return rc__fail(e, RC_ERR_NOMEM, "out of memory for augmentation");
  return RC_OK;
}

/* Labels of a mixed batch count with the mixing weight: lambda for the
 * sample's own, 1 - lambda for its partner's (common practice with mixup
 * and CutMix). */
rc_status rc__distill_mixed_cross_entropy(const run_state *st, const step_buffers *sb, float *grad, float w,
                                          const float *s, const int32_t *labels, double *ce, rc_err *e) {
  double lam = sb->mix.lambda, own = 0, other = 0;
  RC_TRY(rc_loss_cross_entropy(&own, NULL, grad, (float)(w * lam), s, labels, st->local, st->k, e));
  RC_TRY(rc_loss_cross_entropy(&other, NULL, grad, (float)(w * (1 - lam)), s, sb->partner_labels, st->local, st->k,
                               e));
  *ce = lam * own + (1 - lam) * other;
  return RC_OK;
}
