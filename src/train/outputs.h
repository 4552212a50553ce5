/* Per-output losses inside `distill` and `eval`: the terms of
 * train/output_loss.h bound to a teacher and a student plan. The teacher runs
 * beside the student every step (its outputs may be whole maps, too large to
 * cache for every sample). Side data (regression targets per output, dense
 * class labels for one output) is indexed by sample number. */
#ifndef RC_TRAIN_OUTPUTS_H
#define RC_TRAIN_OUTPUTS_H

#include <stdint.h>

#include "plan/plan.h"
#include "recoup/data.h"
#include "recoup/distill.h"
#include "train/evaluate.h"
#include "train/output_loss.h"

/* rc_output_side (per-sample targets and dense labels) is public: recoup/distill.h. */
#define RC_OUTPUTS_MAX RC_DISTILL_OUTPUTS_MAX

typedef struct rc_outputs rc_outputs;

/* Bind specs to both plans (planned for the same batch size): each output
 * must exist in both graphs with equal shapes; axes and class weights are
 * checked against the shapes. label_output (or NULL) names the output dense
 * labels belong to; it needs a kd term. default_t is the run's temperature. */
rc_status rc__outputs_create(rc_outputs **out, const rc_output_loss *specs, int n, float default_t,
                             rc_plan *teacher, rc_plan *student, const char *label_output, rc_err *e);
void rc__outputs_free(rc_outputs *o);

/* Elements per sample of spec i's output and of the dense labels. */
int64_t rc__outputs_per_sample(const rc_outputs *o, int i);
int64_t rc__outputs_label_per_sample(const rc_outputs *o);

/* One training step after both plans ran forward on the same inputs: the
 * weighted terms (plus, with labels, (1 - alpha) times the cross-entropy of
 * the labelled output, the terms then weighing alpha) with gradients seeded
 * into the student plan's output gradients. samples (count) are the batch's
 * sample numbers into side. */
rc_status rc__outputs_step(rc_outputs *o, rc_plan *teacher, rc_plan *student, const rc_output_side *side,
                           const int64_t *samples, int64_t count, float alpha, double *loss, rc_err *e);

/* Run both plans over every sample of d (the teacher's inputs copied from
 * the student's by name) and fill m: kl = the mean of the weighted terms
 * (what selects the best state), agreement = per-position agreement of the
 * class outputs, miou_ref, value_mad, and with labels top1 (per-position
 * accuracy), miou_labels and ce. samples: d's sample numbers into side (may
 * be NULL when side has nothing). */
rc_status rc__outputs_validate(rc_outputs *o, rc_plan *teacher, rc_plan *student, const rc_dataset *d,
                               const rc_output_side *side, const int64_t *samples, rc_metrics *m, rc_err *e);

/* Copy the student plan's inputs into the teacher plan's inputs by name. */
rc_status rc__outputs_copy_inputs(rc_plan *teacher, rc_plan *student, rc_err *e);

#endif
