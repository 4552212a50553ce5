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

/* rc_bn_mode is public: recoup/distill.h. */

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

/* The run's result is the public summary (recoup/distill.h: rc_layer_error,
 * rc_range_check, rc_distill_tensor_rule and the trace are defined there). */
typedef rc_distill_summary rc_distill_result;

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
