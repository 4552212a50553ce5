/* Running a plan over a whole dataset and comparing logits: shared by
 * `eval`, the validation passes of `distill` and the reports. */
#ifndef RC_TRAIN_EVALUATE_H
#define RC_TRAIN_EVALUATE_H

#include <stdint.h>

#include "core/status.h"
#include "plan/plan.h"
#include "recoup/data.h"
#include "recoup/eval.h"

/* Run the plan (planned for batch size B = its inputs' dim 0) over every
 * sample of d in d's current order, copying the listed values' per-sample
 * data into outs[i] (caller-allocated: d->n * per-sample bytes each). A
 * short last batch is padded with zeros; only its real rows are copied. */
rc_status rc__run_dataset(rc_plan *p, const rc_dataset *d, const int *values, int n_values,
                          void *const *outs, rc_err *e);


rc_status rc__metrics_compute(rc_metrics *m, const float *logits, const int32_t *labels,
                              const float *ref, int64_t n, int64_t k, rc_err *e);

#endif
