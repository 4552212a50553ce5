/* Distillation of a compressed student from its dense teacher on CPU.
 *
 * The teacher runs forward only; its logits on a training sample are
 * computed when a step first draws it and cached for later epochs (with
 * augmentation every batch is new, so the teacher runs on every batch
 * instead); on the validation samples they are computed once. Terms
 * on inner tensors (hint, attention, ...) also run the teacher forward on
 * each batch: its inner activations are not cached. The
 * student trains through its plan's reverse pass; its trainable initializers
 * live in one flat parameter store that the plan reads and writes in place.
 * Pruning masks hold exactly, the best state by validation is kept, and on
 * return the student model's initializers hold that state, ready to save. */
#ifndef RC_TRAIN_DISTILL_H
#define RC_TRAIN_DISTILL_H

#include <signal.h>
#include <stdint.h>

#include "core/status.h"
#include "data/augment.h"
#include "plan/mask_rule.h"
#include "recoup/log.h"
#include "onnx/model.h"
#include "recoup/distill.h"
#include "train/evaluate.h"
#include "train/features.h"
#include "train/optim.h"
#include "train/outputs.h"

typedef struct rc_dist rc_dist;

typedef enum rc_bn_mode {
  RC_BN_FROZEN = 0,      /* running statistics stay as deployed */
  RC_BN_RECALIBRATE = 1, /* re-estimated over the training data first, then frozen */
  RC_BN_TRAIN = 2        /* batch statistics in training, running stats updated */
} rc_bn_mode;

typedef struct rc_distill_config {
  int64_t epochs;            /* used when steps == 0 */
  int64_t steps;
  int64_t batch;
  rc_loss_spec terms;         /* weights of kd, logit-mse and the feature terms */
  const char *const *pairs;   /* "TEACHER=STUDENT" overrides of automatic pairing */
  const float *pair_weights;  /* per given pair, or NULL */
  int n_pairs;
  float temperature;
  float alpha;               /* weight of the distillation term; < 0 = default */
  rc_optim_config optim;
  rc_sched sched;            /* kind, lr, lr_min, warmup (<0: default), step_size, gamma */
  double clip;               /* max gradient norm, <= 0 = off */
  uint64_t seed;
  rc_bn_mode bn;
  rc_mask_mode mask;          /* what zeros in weights mean (plan/mask_rule.h) */
  const char *const *train_globs;
  int n_train;
  const char *const *freeze_globs;
  int n_freeze;
  int max_rollbacks;         /* non-finite steps rolled back before stopping */
  void (*progress)(void *user, const rc_distill_progress *p);
  void *user;
  /* Notes along the run (resumed, statistics re-estimated, projectors fitted,
   * steps rolled back); a zeroed logger discards them. */
  rc_logger log;
  /* Checkpoints: written atomically every checkpoint_every steps (0: only at
   * epoch ends) and when *stop becomes non-zero (a signal handler sets it);
   * the previous one is kept as PATH.1. NULL: no checkpoints. */
  const char *checkpoint_path;
  int64_t checkpoint_every;
  /* Continue from this checkpoint; the result is byte-identical to an
   * uninterrupted run with the same inputs and settings. */
  const char *resume_path;
  const volatile sig_atomic_t *stop;
  /* Losses per model output (train/output_loss.h). When given they replace
   * the logit terms, and outputs not named take no loss; label_output names
   * the output dense labels (rc_distill_data.side.labels) belong to. */
  const rc_output_loss *output_losses;
  int n_output_losses;
  const char *label_output;
  /* The teacher outputs cached per training sample live in memory up to
   * cache_bytes (0: a quarter of physical memory), beyond it in a mapped
   * temporary file in cache_dir (NULL: the current folder). */
  size_t cache_bytes;
  const char *cache_dir;
  /* The ranks sharing this run (train/dist.h); NULL: this process alone.
   * batch is the global batch, split over the ranks. */
  rc_dist *dist;
  /* Transforms of every training batch, e.g. "flip,crop=4,mix=0.2"
   * (data/augment.h); NULL or "": none. */
  const char *augment;
} rc_distill_config;

void rc_distill_config_defaults(rc_distill_config *c);

/* Per-layer agreement of student with teacher activations (equal shapes). */
typedef struct rc_layer_error {
  char teacher[128], student[128];
  /* 10·log10(Σt² / Σ(t−s)²): +inf when the activations are identical, NaN
   * when no sample was measured (samples_* == 0). */
  double sqnr_before_db, sqnr_after_db;
  int64_t samples_before, samples_after;
} rc_layer_error;

/* Values entering an activation grid's QuantizeLinear beyond the range the
 * grid represents (they are clamped in the deployed model). */
typedef struct rc_range_stats {
  int64_t values, values_out;    /* values measured, values outside the range */
  int64_t samples, samples_out;  /* samples measured, samples with any value outside */
  double worst;                  /* the value furthest outside (0 when none) */
  double bound;                  /* the end of the range it passed */
} rc_range_stats;

typedef struct rc_range_check {
  char tensor[128];              /* the float tensor entering QuantizeLinear */
  rc_range_stats before, after;
} rc_range_check;

#define RC_DISTILL_TRACE_MAX 120

/* One trained weight: what its zeros meant and, if quantized, its integer range. */
typedef struct rc_distill_tensor_rule {
  char name[128];
  rc_mask_choice mask;      /* mask.rule points to a static string */
  int64_t frozen;           /* entries frozen at zero */
  int quantized;            /* an integer tensor on a grid: range is set */
  rc_int_range range;
} rc_distill_tensor_rule;

typedef struct rc_distill_result {
  rc_metrics teacher, before, after; /* on the validation samples */
  int64_t n_train, n_val;
  int64_t steps_done;
  int64_t best_epoch;                /* 0 = the input was never beaten */
  double select_alpha;               /* weight of KL in the deciding figure (train/select.h) */
  int improved;
  double seconds, samples_per_s;
  int n_trainable_tensors;
  int64_t n_trainable, n_frozen_zeros;
  int mask_ok;
  int n_grids;                       /* integer initializers rewritten on their unchanged grids and ranges */
  rc_distill_tensor_rule *rules;     /* per trained weight (not biases or normalisation) */
  int n_rules;
  int rollbacks, stopped_nonfinite;
  int teacher_cache_in_file;         /* the teacher-output cache spilled to a mapped file */
  int64_t teacher_cache_bytes;
  double *epoch_loss;                /* per epoch (n_epochs) */
  rc_metrics *epoch_val;
  int64_t n_epochs;
  int64_t steps_per_epoch;
  /* Training loss along the run: the mean over each window of steps, at
   * most RC_DISTILL_TRACE_MAX points (trace_step = the window's last step). */
  int64_t trace_step[RC_DISTILL_TRACE_MAX];
  double trace_loss[RC_DISTILL_TRACE_MAX];
  int n_trace;
  rc_layer_error *layers;            /* automatically paired layer outputs of equal shape */
  int n_layers;
  rc_range_check *ranges;            /* one per activation grid of a QDQ student */
  int n_ranges;
  int *changed;                      /* student values whose data changed: save these */
  int n_changed;
  int ranks;                         /* processes that shared the run */
  double comm_seconds_per_step;      /* communicating (gradient sums, validation outputs, checks),
                                      * over the steps this run took (after a resume: since it) */
  int64_t comm_values_per_step;      /* gradient values each step sums (4 bytes each) */
  char augment[RC_AUGMENT_TEXT_MAX]; /* the transforms in canonical form; "" when none */
  int teacher_cache_off;             /* augmented: the teacher ran on every batch, nothing cached */
  int64_t teacher_cached_samples;    /* training samples whose teacher outputs were computed and cached */
} rc_distill_result;

void rc_distill_result_free(rc_distill_result *r);

/* Check that teacher and student agree on input and output names and shapes. */
rc_status rc_distill_check_pair(const rc_graph *teacher, const rc_graph *student, rc_err *e);

rc_status rc_distill_run(rc_distill_result *r, rc_model *teacher, rc_model *student,
                         const rc_distill_data *d, const rc_distill_config *c, rc_err *e);

/* Reload a written file and check its outputs on one batch of samples equal
 * those of the in-memory model. */
rc_status rc_distill_verify_written(const char *path, rc_model *student, const rc_tensor *inputs,
                                    int n_inputs, int64_t batch, double *max_diff, rc_err *e);

#endif
