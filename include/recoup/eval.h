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

/* What a failed per-output evaluation (rc_eval_run) or rc_output_set_load
 * was checking or reading, so that a caller can say where it took that part
 * from (a command line: which option). */
typedef enum rc_output_part {
  RC_OUTPUT_PART_NONE = 0,    /* no failure, or one of the model or data itself */
  RC_OUTPUT_PART_TERMS,       /* a term against the model's outputs */
  RC_OUTPUT_PART_TARGETS,     /* targets of the training samples */
  RC_OUTPUT_PART_VAL_TARGETS, /* targets of the validation samples */
  RC_OUTPUT_PART_LABELS,      /* dense labels of the training samples */
  RC_OUTPUT_PART_VAL_LABELS   /* dense labels of the validation samples */
} rc_output_part;

/* Most output terms per-output evaluation takes. */
#define RC_EVAL_OUTPUTS_MAX 16

typedef struct rc_eval_settings {
  int64_t batch;         /* samples per forward pass */
  int keep_outputs;      /* keep every output of every sample in the result */
  /* Per-output evaluation, for models whose outputs are class maps
   * (segmentation) or values (boxes, depth) rather than (N, K) logits: on
   * when per_output is set or output terms are given. Each term is
   * "OUTPUT=TERM[:key=value...]" as distillation's per-output losses take
   * it (rc_eval_output_term_check); none: every float output of rank 3 or
   * more is a class map on axis 1. Terms that train towards targets are
   * measured as values (mean squared difference). The result's metrics then
   * hold the weighted terms against the reference (kl), per-position
   * agreement (and, with dense labels, accuracy as top1), mean IoU against
   * the reference and the labels, and the values' mean absolute difference;
   * without a reference the model is measured against itself (has_ref 0). */
  int per_output;
  const char *const *output_terms;
  int n_output_terms; /* at most RC_EVAL_OUTPUTS_MAX */
  /* Dense labels of the first output with a kd term, as read (any numeric
   * dtype; see rc_eval_dense_labels), or NULL; dense_labels_name names them
   * in messages (the file). Positions holding ignore_label count nowhere. */
  const rc_array *dense_labels;
  const char *dense_labels_name;
  int32_t ignore_label;
} rc_eval_settings;

/* Segmentation data sets commonly mark unlabelled positions with 255. */
#define RC_EVAL_DEFAULT_IGNORE_LABEL 255

/* batch 64, outputs not kept, per-output evaluation off, ignore label 255. */
RC_API void rc_eval_settings_init(rc_eval_settings *s);

typedef struct rc_eval_result {
  rc_metrics metrics;    /* of the first output; metrics.n 0 when it is not float (N, K) */
  int64_t classes;       /* K, or 0 */
  int n_outputs;
  const char **names;    /* keep_outputs: output names (point into the model) */
  rc_tensor *outputs;    /* keep_outputs: (N, ...) per output, data owned by the result */
  rc_output_part failed; /* when per-output evaluation failed: the terms, the labels or neither */
} rc_eval_result;

/* Run m over every sample of d in d's current order. With labels in d the
 * accuracy is measured; with ref (may be NULL) the reference runs over the
 * same samples and agreement and KL(ref || m) are measured. Refuses a model
 * whose inputs do not match d's or whose outputs lack the batch axis; a
 * first output that is not float (N, K) is an error only when labels or a
 * reference ask for metrics. With per-output evaluation (see
 * rc_eval_settings) the metrics are per output instead, and the labels of
 * d are not used. */
RC_API rc_status rc_eval_run(rc_eval_result *r, rc_model *m, rc_model *ref, const rc_dataset *d,
                             const rc_eval_settings *s, rc_err *e);
/* Safe on a zeroed result. */
RC_API void rc_eval_result_free(rc_eval_result *r);

/* Check one per-output term's text ("scores=kd:axis=1", "boxes=smooth-l1")
 * without a model: the term exists, takes the keys given, values in range. */
RC_API rc_status rc_eval_output_term_check(const char *text, rc_err *e);

/* Dense labels for a class-map output of shape dims (rank dims, any batch)
 * whose class axis is `axis`: raw holds n samples of the output's shape
 * without its batch and class axes, whole numbers in [0, dims[axis]) or
 * `ignore`; *out becomes them as int32. name names raw in messages. */
RC_API rc_status rc_eval_dense_labels(rc_array *out, const rc_array *raw, const char *name, int64_t n,
                                      const int64_t *dims, int rank, int axis, int32_t ignore, rc_err *e);

/* The metrics of logits (n, k) against labels (n int32 in [0, k), may be
 * NULL) and/or reference logits (n, k, may be NULL), as rc_eval_run
 * measures them: for outputs a program computed or kept itself. */
RC_API rc_status rc_eval_metrics(rc_metrics *m, const float *logits, const int32_t *labels,
                                 const float *ref_logits, int64_t n, int64_t k, rc_err *e);

#endif
