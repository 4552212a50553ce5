/* Distillation: fine-tune a compressed student against its dense teacher.
 *
 * The teacher runs forward only; the student trains with the distillation
 * loss at a temperature, pruning masks hold exactly and integer weights stay
 * on their grids. The best state by validation is kept: on return the
 * student holds it, ready for rc_distill_save. */
#ifndef RECOUP_DISTILL_H
#define RECOUP_DISTILL_H

#include <signal.h>
#include <stdint.h>

#include "recoup/data.h"
#include "recoup/eval.h"
#include "recoup/export.h"
#include "recoup/model.h"
#include "recoup/status.h"
#include "recoup/tensor.h"

#define RC_DISTILL_OUTPUTS_MAX 16

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

/* The samples: float inputs laid out as the models' inputs with axis 0 the
 * sample, optional int32 labels (for accuracy), and either separate
 * validation samples or a share of `inputs` held out. */
typedef struct rc_distill_data {
  const rc_tensor *inputs; /* one per student input (graph order), dims[0] = samples */
  int n_inputs;
  const int32_t *labels;   /* per sample, or NULL */
  const rc_tensor *val_inputs; /* NULL: hold out val_split of `inputs` */
  const int32_t *val_labels;
  double val_split;
  /* Per-output runs: regression targets and dense labels, indexed by sample
   * of `inputs` (side) and of `val_inputs` (val_side). */
  rc_output_side side, val_side;
  /* Per input: converted to float32 per batch with norms[i] when its scale
   * is non-zero (raw uint8/float16 sources, possibly file mappings); NULL
   * when the inputs are ready as they are. sources/val_sources (may be NULL)
   * are the arrays behind inputs/val_inputs, for releasing mapped pages. */
  const rc_data_norm *norms;
  const rc_array *sources;
  const rc_array *val_sources;
} rc_distill_data;

typedef enum rc_distill_event { RC_DISTILL_STEP = 0, RC_DISTILL_EPOCH = 1, RC_DISTILL_NOTE = 2 } rc_distill_event;

/* What the progress callback receives. */
typedef struct rc_distill_progress {
  rc_distill_event event;
  int64_t epoch, epochs;     /* 1-based epoch */
  int64_t step, steps;       /* steps done, total */
  double loss;               /* running mean over the epoch so far */
  double lr;
  double samples_per_s;
  double elapsed_s, eta_s;
  rc_metrics val;            /* RC_DISTILL_EPOCH: validation of this epoch */
  int is_best;
  const char *note;          /* RC_DISTILL_NOTE: a line for the user */
  /* Inputs read from files per batch (image folders, mapped arrays) are
   * prefetched by worker threads: the share of the training steps' time
   * spent waiting for them, and the samples per second the workers delivered
   * (the rate that limits the step when the share is large); 0 otherwise. */
  double input_wait_share;
  double input_samples_per_s;
} rc_distill_progress;

typedef struct rc_distill_settings {
  int64_t epochs;            /* used when steps == 0 */
  int64_t steps;             /* total optimizer steps; 0: epochs decide */
  int64_t batch;
  float temperature;
  float alpha;               /* weight of the distillation term against labels; < 0: default */
  float lr;                  /* peak learning rate of AdamW; 0: default */
  uint64_t seed;
  /* Checkpoints written atomically every checkpoint_every steps (0: at epoch
   * ends) and when *stop becomes non-zero; NULL: none. resume_path continues
   * an interrupted run to the same result as an uninterrupted one. */
  const char *checkpoint_path;
  int64_t checkpoint_every;
  const char *resume_path;
  void (*progress)(void *user, const rc_distill_progress *p); /* may be NULL */
  void *user;
  /* Cancellation: a signal handler (or another thread) sets *stop non-zero;
   * the run stops after the current step with RC_ERR_INTERRUPTED, writing a
   * checkpoint first when checkpoint_path is set. NULL: never. */
  const volatile sig_atomic_t *stop;
} rc_distill_settings;

/* 3 epochs, batch 64, the default temperature and learning rate, seed 1, no
 * checkpoints, no callback. */
RC_API void rc_distill_settings_init(rc_distill_settings *s);

typedef struct rc_distill_summary {
  rc_metrics teacher, before, after; /* on the validation samples */
  int64_t n_train, n_val;
  int64_t steps_done;
  int64_t best_epoch;                /* 0 = the input was never beaten */
  int improved;                      /* the student changed (best_epoch > 0) */
  int mask_ok;                       /* every pruned entry is still zero */
  int n_grids;                       /* integer weights rewritten on their unchanged grids */
  double seconds;
  int *changed;                      /* for rc_distill_save */
  int n_changed;
} rc_distill_summary;

/* Train student against teacher (same inputs and outputs; checked). */
RC_API rc_status rc_distill_train(rc_distill_summary *out, rc_model *teacher, rc_model *student,
                                  const rc_distill_data *data, const rc_distill_settings *s,
                                  rc_err *e);
/* Save the trained student to path (rc_model_save with the changed values),
 * then reload the written file and check that its outputs on the first
 * batch of `inputs` equal the in-memory student's. */
RC_API rc_status rc_distill_save(const rc_distill_summary *sum, rc_model *student, const char *path,
                                 const rc_distill_data *data, rc_err *e);
/* Safe on a zeroed summary. */
RC_API void rc_distill_summary_free(rc_distill_summary *s);

#endif
