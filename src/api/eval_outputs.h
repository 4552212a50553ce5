/* Per-output evaluation behind rc_eval_run (eval_outputs.c), the batch
 * shapes both parts of eval plan with (eval.c), and the per-sample shape
 * checks that labels and targets share (outputs.c). */
#ifndef RC_API_EVAL_OUTPUTS_H
#define RC_API_EVAL_OUTPUTS_H

#include "recoup/eval.h"

/* The shapes of d's inputs taken `batch` samples at a time (float32 where
 * d converts per batch): one per input into shapes. */
void rc__eval_batch_shapes(rc_tensor *shapes, const rc_dataset *d, int64_t batch);

/* The per-output metrics of model against ref (NULL: itself) over every
 * sample of d, as rc_eval_settings describes them. On failure *failed says
 * whether the terms or the dense labels were at fault (else it is left). */
rc_status rc__eval_outputs(rc_metrics *m, rc_model *model, rc_model *ref, const rc_dataset *d, int64_t batch,
                           const rc_eval_settings *s, rc_output_part *failed, rc_err *e);

/* The output's per-sample shape (dims without the batch axis and without
 * skip_axis, -1: none), as a float tensor for checks and messages. */
void rc__output_sample_shape(rc_tensor *t, const int64_t *dims, int rank, int skip_axis);
/* a holds n samples of shape want; otherwise an error naming `name` and
 * `what` (e.g. "dense labels", "targets") with both shapes. */
rc_status rc__check_per_sample(const rc_array *a, const char *name, int64_t n, const rc_tensor *want,
                               const char *what, rc_err *e);

#endif
