/* Evaluation: run a model over a dataset and measure it against labels
 * and/or a reference model (usually the dense original). */
#ifndef RECOUP_EVAL_H
#define RECOUP_EVAL_H

#include <stdint.h>

#include "recoup/data.h"
#include "recoup/export.h"
#include "recoup/model.h"
#include "recoup/status.h"

/* Metrics of logits (N, K) against labels and/or reference logits. */
typedef struct rc_metrics {
  int64_t n;
  int has_labels, has_ref;
  double top1, top5;     /* accuracy in [0,1]; top5 < 0 when K < 5 */
  double agreement;      /* top-1 agreement with the reference */
  double kl;             /* mean KL(reference || model) at T = 1 */
  double ce;             /* mean cross-entropy against the labels at T = 1 */
  /* Runs with losses per output: kl holds the weighted output terms,
   * agreement and top1 count positions; NaN where no output of the kind. */
  int outputs;
  double miou_ref, miou_labels; /* mean IoU of class maps against the reference / labels */
  double value_mad;      /* mean absolute difference of value outputs to the reference */
} rc_metrics;

typedef struct rc_eval_settings {
  int64_t batch;         /* samples per forward pass */
  int keep_outputs;      /* keep every output of every sample in the result */
} rc_eval_settings;

/* batch 64, outputs not kept. */
RC_API void rc_eval_settings_init(rc_eval_settings *s);

typedef struct rc_eval_result {
  rc_metrics metrics;    /* of the first output; metrics.n 0 when it is not float (N, K) */
  int64_t classes;       /* K, or 0 */
  int n_outputs;
  const char **names;    /* keep_outputs: output names (point into the model) */
  rc_tensor *outputs;    /* keep_outputs: (N, ...) per output, data owned by the result */
} rc_eval_result;

/* Run m over every sample of d in d's current order. With labels in d the
 * accuracy is measured; with ref (may be NULL) the reference runs over the
 * same samples and agreement and KL(ref || m) are measured. Refuses a model
 * whose inputs do not match d's or whose outputs lack the batch axis; a
 * first output that is not float (N, K) is an error only when labels or a
 * reference ask for metrics. */
RC_API rc_status rc_eval_run(rc_eval_result *r, rc_model *m, rc_model *ref, const rc_dataset *d,
                             const rc_eval_settings *s, rc_err *e);
/* Safe on a zeroed result. */
RC_API void rc_eval_result_free(rc_eval_result *r);

/* The metrics of logits (n, k) against labels (n int32 in [0, k), may be
 * NULL) and/or reference logits (n, k, may be NULL), as rc_eval_run
 * measures them: for outputs a program computed or kept itself. */
RC_API rc_status rc_eval_metrics(rc_metrics *m, const float *logits, const int32_t *labels, const float *ref_logits,
                                 int64_t n, int64_t k, rc_err *e);

#endif
