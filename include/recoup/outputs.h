/* Losses per model output, for students whose outputs are not one
 * class-score vector per sample (segmentation maps, detector heads,
 * regressions): the terms, their side data (regression targets, dense class
 * labels) and evaluation with them.
 *
 * A term is written NAME=TERM[:key=value...], e.g.
 *   scores=kd:axis=1:t=2:weights=0.25,1,1   boxes=smooth-l1:beta=0.5
 * Terms: kd (axis, t, weights), kd-sigmoid (t), mse, smooth-l1 (beta),
 * bounded-l2 (axis, margin; needs targets), edge-kd (axis, bins, t); each
 * takes weight=W. */
#ifndef RECOUP_OUTPUTS_H
#define RECOUP_OUTPUTS_H

#include <stdint.h>

#include "recoup/data.h"
#include "recoup/eval.h"
#include "recoup/export.h"
#include "recoup/model.h"
#include "recoup/status.h"
#include "recoup/tensor.h"

#define RC_DISTILL_OUTPUTS_MAX 16

typedef enum rc_out_term {
  RC_OUT_KD = 0,     /* softmax KL per position over the class axis */
  RC_OUT_KD_SIGMOID, /* binary KL per entry (independent probabilities) */
  RC_OUT_MSE,        /* mean squared difference to the teacher */
  RC_OUT_SMOOTH_L1,  /* Huber with beta, to the teacher */
  RC_OUT_BOUNDED_L2, /* Chen et al. 2017: error to targets bounded by the teacher's */
  RC_OUT_EDGE_KD,    /* Zheng et al. 2022: KL per box edge over discrete positions */
  RC_OUT_TERM_COUNT
} rc_out_term;

#define RC_OUT_MAX_CLASS_WEIGHTS 256
#define RC_OUT_AXIS_DEFAULT (-1000)

/* One parsed term. */
typedef struct rc_output_loss {
  char output[128]; /* the model output's name */
  rc_out_term term;
  float weight;        /* of the term; 1 unless given */
  int axis;            /* as given (RC_OUT_AXIS_DEFAULT: the term's default) */
  float temperature;   /* <= 0: the term's default (kd: the run's temperature) */
  float beta;          /* smooth-l1 */
  float margin;        /* bounded-l2 */
  int bins;            /* edge-kd: bins per edge */
  int n_class_weights; /* 0: every class weighs 1 */
  float class_weights[RC_OUT_MAX_CLASS_WEIGHTS];
} rc_output_loss;

/* Parse "NAME=TERM[:key=value...]"; unknown terms, keys a term does not take,
 * and values out of range are refused naming the text. */
RC_API rc_status rc_output_loss_parse(rc_output_loss *o, const char *spec, rc_err *e);
RC_API const char *rc_out_term_name(rc_out_term t);
/* 1 when the term needs regression targets (bounded-l2). */
RC_API int rc_out_term_needs_targets(rc_out_term t);

/* Per-sample side data of one set of samples (training pool or validation)
 * for losses per model output. */
typedef struct rc_output_side {
  /* targets[i]: for output loss i, per sample as many floats as the output
   * holds per sample, or NULL. */
  const float *targets[RC_DISTILL_OUTPUTS_MAX];
  /* Dense labels: one int32 per position of the labelled output (the
   * output's shape without its batch and class axes), per sample; NULL:
   * none. Positions holding `ignore` take no loss and no metric. */
  const int32_t *labels;
  int32_t ignore;
} rc_output_side;

/* Segmentation datasets commonly mark unlabelled pixels with 255. */
#define RC_OUTPUT_DEFAULT_IGNORE 255

/* A run's per-output terms and the side data read for them. Fill with
 * rc_output_set_init, add terms and targets, then rc_output_set_load. */
typedef struct rc_output_set {
  rc_output_loss specs[RC_DISTILL_OUTPUTS_MAX];
  int n;
  const char *targets[RC_DISTILL_OUTPUTS_MAX], *val_targets[RC_DISTILL_OUTPUTS_MAX]; /* "NAME=FILE" */
  int n_targets, n_val_targets;
  long ignore; /* dense label value that takes no loss */
  rc_array target_arrays[RC_DISTILL_OUTPUTS_MAX], val_target_arrays[RC_DISTILL_OUTPUTS_MAX];
  rc_array labels, val_labels; /* int32 dense labels */
  char label_output[128];      /* the kd output they belong to, "" when none */
  rc_output_part failed;       /* set by rc_output_set_load when it fails */
} rc_output_set;

/* No terms, ignore value RC_OUTPUT_DEFAULT_IGNORE. */
RC_API void rc_output_set_init(rc_output_set *o);
RC_API void rc_output_set_free(rc_output_set *o);
/* Parse and add one term (at most RC_DISTILL_OUTPUTS_MAX). */
RC_API rc_status rc_output_set_add(rc_output_set *o, const char *spec, rc_err *e);
/* Targets of the training (val = 0) or validation samples, "OUTPUT=FILE";
 * the text is kept, not copied. */
RC_API rc_status rc_output_set_add_targets(rc_output_set *o, const char *text, int val, rc_err *e);

/* Check every term against m's outputs planned for inputs of input_shapes
 * (batch 1), read targets (shape (N, the output's per-sample shape); NaN
 * marks a position without a target) and dense labels (shape (N, the kd
 * output's per-sample shape without the class axis), integers in
 * [0, classes) or the ignore value), filling side and val_side. n_train,
 * n_val: samples of each set (n_val < 0: no validation set of its own);
 * labels_path, val_labels_path: dense labels or NULL. On failure o->failed
 * says which part the message is about. */
RC_API rc_status rc_output_set_load(rc_output_set *o, rc_model *m, const rc_tensor *input_shapes, int n_inputs,
                                    int64_t n_train, const char *labels_path, int64_t n_val,
                                    const char *val_labels_path, rc_output_side *side, rc_output_side *val_side,
                                    rc_err *e);

/* Dense labels alone: for an output of shape dims at batch 1 with its class
 * axis `axis`, n samples. */
RC_API rc_status rc_output_labels_read(rc_array *out, const char *path, int64_t n, const int64_t *dims, int rank,
                                       int axis, long ignore, rc_err *e);

/* Per-output figures of `model` against `ref` (NULL: against itself, for
 * label figures alone) over every sample of d, planned for input_shapes
 * (the batch). Outputs without a term in o get the default: kd over axis 1
 * for float outputs of rank 3 and more (class maps); a term needing targets
 * is measured as mse. labels_path: dense labels, or NULL. */
RC_API rc_status rc_output_set_eval(rc_metrics *m, rc_output_set *o, rc_model *model, rc_model *ref,
                                    const rc_tensor *input_shapes, int n_inputs, const rc_dataset *d,
                                    const char *labels_path, rc_err *e);

#endif
