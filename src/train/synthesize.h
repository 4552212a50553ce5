/* Inputs synthesised from a teacher alone, for recovery without data.
 *
 * The teacher's BatchNormalization layers store the per-channel mean and
 * variance of their inputs over the data it was trained on. Starting from
 * seeded noise, gradient descent (Adam) on the input values makes every
 * BatchNormalization input's batch statistics match them (ZeroQ, Cai et al.
 * 2020; DeepInversion, Yin et al. 2020):
 *   L_bn = sum_layers ( ||mu_batch - mu_running||_2 + ||var_batch - var_running||_2 )
 * with the biased batch variance, norms over channels. Optional terms:
 *   class balance  w_class * cross-entropy of the output (N, K) against
 *                  classes assigned in turn (sample i -> class i mod K), so
 *                  every class is represented (DeepInversion's label term)
 *   priors         w_tv * mean over neighbours of the squared difference
 *                  (total variation, squared form) + w_l2 * mean x^2
 * Each batch is optimised on its own; the result is deterministic for a
 * seed and thread count. */
#ifndef RC_TRAIN_SYNTHESIZE_H
#define RC_TRAIN_SYNTHESIZE_H

#include <stdint.h>

#include "core/status.h"
#include "onnx/model.h"

typedef struct rc_synth_config {
  int64_t count;     /* samples to make */
  int64_t batch;     /* samples optimised together (their statistics are matched) */
  int64_t steps;     /* Adam steps per batch */
  float lr;
  uint64_t seed;
  float w_class, w_tv, w_l2;
  void (*progress)(void *user, int64_t done, int64_t total, double bn_loss);
  void *user;
} rc_synth_config;

void rc_synth_defaults(rc_synth_config *c);

typedef struct rc_synth_stats {
  int n_bn;                 /* BatchNormalization layers matched */
  double bn_loss_start;     /* L_bn of the first batch before any step */
  double bn_loss_end;       /* mean L_bn over the batches after their last step */
  /* Worst over layers, channels and batches after the last step:
   * |mu_batch - mu_running| / sqrt(var_running + eps) and
   * |var_batch - var_running| / (var_running + eps). */
  double worst_mean_err, worst_var_err;
} rc_synth_stats;

/* Check that the teacher has what synthesis needs: one float input of
 * concrete shape beyond the batch, and BatchNormalization with running
 * statistics stored as initializers. */
rc_status rc_synth_check(const rc_model *teacher, rc_err *e);

/* out: count * per-sample floats of the teacher's (single) input. */
rc_status rc_synthesize(float *out, rc_synth_stats *stats, rc_model *teacher, const rc_synth_config *c, rc_err *e);

/* The terms on their own (for tests against PyTorch). Statistics term of
 * one layer input x (dims, (N, C, ...)): returns ||mu - mean||_2 +
 * ||var - var_run||_2 and adds its gradient into g (when not NULL); acc holds
 * 2*C doubles of scratch; worst_* (when not NULL) are raised to this layer's
 * worst channel errors as rc_synth_stats defines them. */
double rc_synth_bn_term(float *g, const float *x, const int64_t *dims, int rank, const float *mean,
                        const float *var_run, float eps, double *acc, double *worst_mean, double *worst_var);
/* Priors on x (the last two axes are the image): returns w_tv * mean over
 * neighbour pairs of the squared difference + w_l2 * mean x^2, gradient added. */
double rc_synth_priors(float *g, const float *x, const int64_t *dims, int rank, float w_tv, float w_l2);

#endif
