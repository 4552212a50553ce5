/* Running a plan over a whole dataset and comparing logits: shared by
 * `eval`, the validation passes of `distill` and the reports. */
#ifndef RC_TRAIN_EVALUATE_H
#define RC_TRAIN_EVALUATE_H

#include <stdint.h>

#include "core/status.h"
#include "plan/plan.h"
#include "recoup/data.h"

/* Run the plan (planned for batch size B = its inputs' dim 0) over every
 * sample of d in d's current order, copying the listed values' per-sample
 * data into outs[i] (caller-allocated: d->n * per-sample bytes each). A
 * short last batch is padded with zeros; only its real rows are copied. */
rc_status rc__run_dataset(rc_plan *p, const rc_dataset *d, const int *values, int n_values,
                          void *const *outs, rc_err *e);

/* Metrics of logits (N, K) against labels and/or reference logits. */
typedef struct rc_metrics {
  int64_t n;
  int has_labels, has_ref;
  double top1, top5;     /* accuracy in [0,1]; top5 < 0 when K < 5 */
  double agreement;      /* top-1 agreement with the reference */
  double kl;             /* mean KL(reference || model) at T = 1 */
  double ce;             /* mean cross-entropy against the labels at T = 1 */
  /* Per-output runs (train/outputs.h): kl holds the weighted output terms,
   * agreement and top1 count positions; NaN where no output of the kind. */
  int outputs;
  double miou_ref, miou_labels; /* mean IoU of class maps against the reference / labels */
  double value_mad;      /* mean absolute difference of value outputs to the reference */
} rc_metrics;

rc_status rc__metrics_compute(rc_metrics *m, const float *logits, const int32_t *labels,
                              const float *ref, int64_t n, int64_t k, rc_err *e);

#endif
