/* Optimizers, gradient clipping and learning-rate schedules over the flat
 * parameter store (params.h). A training step is:
 *   rc_params_zero_grad -> forward/backward fill the gradient block ->
 *   rc_clip_grad_norm -> rc_optim_step(lr = rc_sched_lr(schedule, step + 1))
 * Frozen (masked) positions are ignored by clipping and never touched by a
 * step. Nothing here allocates. */
#ifndef RC_TRAIN_OPTIM_H
#define RC_TRAIN_OPTIM_H

#include <stdint.h>

#include "core/status.h"
#include "train/params.h"

typedef enum rc_optim_kind { RC_OPTIM_SGD = 0, RC_OPTIM_ADAMW = 1 } rc_optim_kind;

typedef struct rc_optim_config {
  rc_optim_kind kind;
  float lr;           /* peak rate; the schedule scales it per step */
  float weight_decay; /* SGD: added to the gradient (L2); AdamW: decoupled */
  int decay_norm;     /* also decay RC_PARAM_NORM entries */
  /* SGD (torch.optim.SGD with dampening 0) */
  float momentum;
  int nesterov;
  /* AdamW (torch.optim.AdamW, amsgrad off) */
  float beta1, beta2, eps;
} rc_optim_config;

/* Defaults for recovery fine-tuning, where the student starts close to a good
 * solution and the teacher's outputs are the target:
 * - AdamW, lr 5e-4: large enough to move a pruned or fake-quantized net back
 *   within a few epochs, small enough not to throw away what the compressed
 *   weights still know (1e-3, Adam's usual rate from scratch, tends to
 *   overshoot early from a pretrained start); betas (0.9, 0.999), eps 1e-8
 *   are Adam's standard values.
 * - AdamW weight decay 0: runs are short, the distillation target already
 *   regularises, and decay pulls weights towards zero and away from a fixed
 *   quantization grid.
 * - SGD: lr 0.01 (a tenth of the usual from-scratch rate), momentum 0.9,
 *   Nesterov on, weight decay 1e-4 (the common ImageNet-style value, mild
 *   enough for fine-tuning).
 * Norm scales and biases are never decayed by default (decay_norm 0). */
void rc_optim_defaults(rc_optim_config *c, rc_optim_kind kind);
/* Refuse out-of-range settings with a message naming the field. */
rc_status rc_optim_check(const rc_optim_config *c, rc_err *e);
/* Moment blocks the optimizer needs (pass to rc_params_finalize). */
int rc_optim_moments(const rc_optim_config *c);

/* One update of every entry with rate lr (the schedule's value; c->lr is
 * not read), using the gradient block. Matches torch.optim.SGD /
 * torch.optim.AdamW (PyTorch 1.13) step for step. Increments the store's
 * step counter. */
rc_status rc_optim_step(rc_params *ps, const rc_optim_config *c, float lr, rc_err *e);

/* Scale the gradient block so its global L2 norm (over all non-frozen
 * positions) is at most max_norm, like torch.nn.utils.clip_grad_norm_
 * (coefficient max_norm / (norm + 1e-6), applied only when below 1).
 * Returns the norm before clipping. max_norm <= 0 only measures. A
 * non-finite norm leaves the gradients untouched so the caller can skip the
 * step and roll back. */
double rc_clip_grad_norm(rc_params *ps, double max_norm);

/* Default clipping threshold: AdamW is insensitive to gradient scale, so the
 * clip only guards against rare spikes (a bad batch, a large temperature). */
#define RC_CLIP_DEFAULT_MAX_NORM 5.0

typedef enum rc_sched_kind {
  RC_SCHED_CONSTANT = 0,
  RC_SCHED_STEP = 1,   /* multiply by gamma every step_size steps */
  RC_SCHED_COSINE = 2  /* cosine from lr down to lr_min at step total */
} rc_sched_kind;

typedef struct rc_sched {
  rc_sched_kind kind;
  float lr, lr_min;
  int64_t warmup;    /* W: linear warm-up steps (0 = none) */
  int64_t total;     /* T: last step of the run (cosine) */
  int64_t step_size; /* S (step) */
  float gamma;       /* (step) */
} rc_sched;

/* Learning rate for step t, t = 1 for the first update (pass the store's
 * step counter + 1). With u = t - max(W, 1), which is 0 at the first
 * full-rate step:
 *   t < W:     lr * t / W                                  (all kinds)
 *   constant:  lr
 *   step:      lr * gamma^floor(u / S)
 *   cosine:    lr_min + (lr - lr_min) * (1 + cos(pi * u / (T - W))) / 2,
 *              with T - W read as T - max(W, 1) and u clamped to it:
 *              lr at the first full-rate step, lr_min at t >= T
 *              (just lr if T <= max(W, 1)). */
float rc_sched_lr(const rc_sched *s, int64_t t);
rc_status rc_sched_check(const rc_sched *s, rc_err *e);

/* Defaults for a run of total steps: cosine from lr to lr / 100 with a
 * warm-up of 3% of the steps (none in runs under 67 steps): a short
 * warm-up lets Adam's second moments settle before full-size updates, and
 * the cosine tail ends fine-tuning with small steps near the teacher. */
void rc_sched_defaults(rc_sched *s, float lr, int64_t total);

#endif
