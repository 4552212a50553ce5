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
#include "recoup/log.h"
#include "recoup/model.h"
#include "recoup/outputs.h"
#include "recoup/parallel.h"
#include "recoup/rules.h"
#include "recoup/status.h"
#include "recoup/tensor.h"

/* rc_output_side and RC_DISTILL_OUTPUTS_MAX: recoup/outputs.h. */

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

typedef enum rc_distill_optimizer { RC_DISTILL_OPT_ADAMW = 0, RC_DISTILL_OPT_SGD = 1 } rc_distill_optimizer;
typedef enum rc_distill_schedule {
  RC_DISTILL_SCHED_COSINE = 0, /* cosine decay to the end of the run */
  RC_DISTILL_SCHED_STEP = 1,   /* multiplied by gamma every step_size steps */
  RC_DISTILL_SCHED_CONSTANT = 2
} rc_distill_schedule;

typedef enum rc_bn_mode {
  RC_BN_FROZEN = 0,      /* running statistics stay as deployed */
  RC_BN_RECALIBRATE = 1, /* re-estimated over the training data first, then frozen */
  RC_BN_TRAIN = 2        /* batch statistics in training, running stats updated */
} rc_bn_mode;

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
  /* ---- Beyond the basics; rc_distill_settings_init gives each its default. */
  /* Loss terms with weights, "kd=1,hint=0.5,attention" (a term without =W
   * takes its default weight; rc_distill_loss_term lists them); NULL: kd. */
  const char *loss;
  /* "TEACHER=STUDENT" tensor pairs for the feature terms, with a weight each
   * (pair_weights NULL: 1); none: automatic pairing. */
  const char *const *pairs;
  const float *pair_weights;
  int n_pairs;
  rc_distill_optimizer optimizer; /* lr 0 takes its default rate */
  float weight_decay;             /* < 0: the optimizer's default (AdamW 0, SGD 1e-4) */
  float momentum;                 /* SGD; < 0: 0.9 */
  int nesterov;                   /* SGD: Nesterov momentum (1) or plain (0) */
  rc_distill_schedule schedule;   /* after a linear warm-up */
  int64_t warmup;                 /* warm-up steps; < 0: 3% of the steps */
  int64_t step_size;              /* RC_DISTILL_SCHED_STEP: steps between decays; 0: an epoch */
  float gamma;                    /* RC_DISTILL_SCHED_STEP: decay factor */
  double clip;                    /* global gradient norm limit; <= 0: off */
  rc_bn_mode bn;
  rc_mask_mode mask;              /* which zero weights stay zero */
  const char *const *train_globs; /* also train float initializers matching these */
  int n_train;
  const char *const *freeze_globs; /* never train initializers matching these */
  int n_freeze;
  /* Losses per model output (recoup/outputs.h) instead of the logit terms;
   * outputs not named take none. label_output names the output dense labels
   * (rc_distill_data.side.labels) belong to, or NULL. */
  const rc_output_loss *output_losses;
  int n_output_losses;
  const char *label_output;
  /* The teacher outputs cached per training sample stay in memory up to
   * cache_bytes (0: a quarter of physical memory), beyond it in a mapped
   * temporary file in cache_dir (NULL: the current folder). */
  size_t cache_bytes;
  const char *cache_dir;
  /* The processes sharing the run (recoup/parallel.h); NULL: this one alone.
   * batch is then the global batch, split over the ranks. */
  rc_dist *dist;
  /* Notes along the run (resumed, statistics re-estimated, projectors
   * fitted, steps rolled back). log.fn NULL: they reach progress as
   * RC_DISTILL_NOTE events (when progress is set). */
  rc_logger log;
  /* Transforms of every training batch, applied identically to the
   * teacher's and the student's input, e.g. "flip,crop=4,mix=0.2" (see
   * README, --augment); NULL: none. With it the teacher runs on every
   * batch instead of caching its outputs. */
  const char *augment;
} rc_distill_settings;

/* 3 epochs, batch 64, the default temperature and learning rate, seed 1, no
 * checkpoints, no callback; AdamW with a cosine schedule, gradient norm
 * clipped at 5, BatchNormalization frozen, masks chosen automatically. */
RC_API void rc_distill_settings_init(rc_distill_settings *s);

/* Per-layer agreement of student with teacher activations (equal shapes). */
typedef struct rc_layer_error {
  char teacher[128], student[128];
  /* 10*log10(sum t^2 / sum (t-s)^2): +inf when the activations are
   * identical, NaN when no sample was measured (samples_* == 0). */
  double sqnr_before_db, sqnr_after_db;
  int64_t samples_before, samples_after;
} rc_layer_error;

/* Values entering an activation grid's QuantizeLinear beyond the range the
 * grid represents (they are clamped in the deployed model). */
typedef struct rc_range_stats {
  int64_t values, values_out;   /* values measured, values outside the range */
  int64_t samples, samples_out; /* samples measured, samples with any value outside */
  double worst;                 /* the value furthest outside (0 when none) */
  double bound;                 /* the end of the range it passed */
} rc_range_stats;

typedef struct rc_range_check {
  char tensor[128]; /* the float tensor entering QuantizeLinear */
  rc_range_stats before, after;
} rc_range_check;

#define RC_DISTILL_TRACE_MAX 120
/* Room for the augmentation list in canonical form, with its terminating 0. */
#define RC_DISTILL_AUGMENT_MAX 256

/* One trained weight: what its zeros meant and, if quantized, its integer range. */
typedef struct rc_distill_tensor_rule {
  char name[128];
  rc_mask_choice mask; /* mask.rule points to a static string */
  int64_t frozen;      /* entries frozen at zero */
  int quantized;       /* an integer tensor on a grid: range is set */
  rc_int_range range;
} rc_distill_tensor_rule;

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
  /* ---- The run in detail (arrays owned by the summary) */
  double select_alpha; /* weight of KL in the deciding figure (rc_distill_selection) */
  double samples_per_s;
  int n_trainable_tensors;
  int64_t n_trainable, n_frozen_zeros;
  rc_distill_tensor_rule *rules; /* per trained weight (not biases or normalisation) */
  int n_rules;
  int rollbacks, stopped_nonfinite; /* non-finite steps rolled back; stopped on them */
  int teacher_cache_in_file;        /* the teacher-output cache spilled to a mapped file */
  int64_t teacher_cache_bytes;
  double *epoch_loss; /* per epoch (n_epochs) */
  rc_metrics *epoch_val;
  int64_t n_epochs;
  int64_t steps_per_epoch;
  /* Training loss along the run: the mean over each window of steps, at
   * most RC_DISTILL_TRACE_MAX points (trace_step = the window's last step). */
  int64_t trace_step[RC_DISTILL_TRACE_MAX];
  double trace_loss[RC_DISTILL_TRACE_MAX];
  int n_trace;
  rc_layer_error *layers; /* automatically paired layer outputs of equal shape */
  int n_layers;
  rc_range_check *ranges; /* one per activation grid of a QDQ student */
  int n_ranges;
  int ranks;                    /* processes that shared the run */
  double comm_seconds_per_step; /* communicating (gradient sums, validation outputs, checks),
                                      * over the steps this run took (after a resume: since it) */
  int64_t comm_values_per_step; /* gradient values each step sums (4 bytes each) */
  char augment[RC_DISTILL_AUGMENT_MAX]; /* the transforms in canonical form; "" when none */
  int teacher_cache_off;                /* augmented: the teacher ran on every batch, nothing cached */
  int64_t teacher_cached_samples;       /* training samples whose teacher outputs were computed and cached */
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

/* The loss terms, one per i from 0: the name (NULL past the last), its
 * default weight and a line of help. */
RC_API const char *rc_distill_loss_term(int i, float *default_weight, const char **help);
/* Check a settings.loss text; the message names the term or weight at fault
 * and lists the known terms. */
RC_API rc_status rc_distill_loss_check(const char *text, rc_err *e);
/* Check a settings.augment list ("flip,crop=4,mix=0.2"); the message names
 * the item or value at fault. */
RC_API rc_status rc_distill_augment_check(const char *text, rc_err *e);

/* Check that teacher and student agree on input and output names and shapes. */
RC_API rc_status rc_distill_pair_check(const rc_model *teacher, const rc_model *student, rc_err *e);

/* Reload the file at path and check that its outputs on the first `batch`
 * samples of inputs (float, one per input) equal those of the in-memory
 * student; *max_diff receives the largest difference. */
RC_API rc_status rc_distill_verify(const char *path, rc_model *student, const rc_tensor *inputs, int n_inputs,
                                   int64_t batch, double *max_diff, rc_err *e);

/* The figure that decides which validation state is kept (lower is
 * better): without labels the mean KL(dense || student) at T = 1, with
 * labels alpha*KL + (1 - alpha)*cross-entropy. NaN when it cannot be formed. */
RC_API double rc_distill_selection(const rc_metrics *m, double alpha);
/* Its name for reports: "kl" or "kl+cross_entropy". */
RC_API const char *rc_distill_selection_name(const rc_metrics *m, double alpha);

#endif
