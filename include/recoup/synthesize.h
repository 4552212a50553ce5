/* Inputs synthesised from a teacher alone, for recovery when no data is at
 * hand. Starting from seeded noise, gradient descent (Adam) on the input
 * values makes the per-channel mean and variance entering every
 * BatchNormalization layer match the running statistics stored in it
 * (ZeroQ, Cai et al. 2020; DeepInversion, Yin et al. 2020), with an optional
 * class-balance term and smoothness and L2 priors. The result is
 * deterministic for a seed and thread count. Synthetic samples can miss
 * what real data holds: validate a model recovered with them on real
 * held-out samples. */
#ifndef RECOUP_SYNTHESIZE_H
#define RECOUP_SYNTHESIZE_H

#include <stdint.h>

#include "recoup/data.h"
#include "recoup/export.h"
#include "recoup/model.h"
#include "recoup/status.h"

typedef struct rc_synth_config {
  int64_t count; /* samples to make */
  int64_t batch; /* samples optimised together (their statistics are matched) */
  int64_t steps; /* Adam steps per batch */
  float lr;
  uint64_t seed;
  float w_class, w_tv, w_l2; /* class balance, smoothness prior, L2 prior */
  void (*progress)(void *user, int64_t done, int64_t total, double bn_loss); /* may be NULL */
  void *user;
} rc_synth_config;

/* 1024 samples in batches of 256, 200 steps at rate 0.05, seed 1, weights
 * 0.1 (class), 0.05 (smoothness), 0.001 (L2), no callback. */
RC_API void rc_synth_config_init(rc_synth_config *c);

typedef struct rc_synth_stats {
  int n_bn;             /* BatchNormalization layers matched */
  double bn_loss_start; /* statistics loss of the first batch before any step */
  double bn_loss_end;   /* mean statistics loss over the batches after their last step */
  /* Worst over layers, channels and batches after the last step:
   * |mu_batch - mu_running| / sqrt(var_running + eps) and
   * |var_batch - var_running| / (var_running + eps). */
  double worst_mean_err, worst_var_err;
} rc_synth_stats;

/* Check that the teacher has what synthesis needs: one float input of
 * concrete shape beyond the batch, and BatchNormalization with running
 * statistics stored as initializers. */
RC_API rc_status rc_synth_check(const rc_model *teacher, rc_err *e);

/* out: count * per-sample floats of the teacher's (single) input. */
RC_API rc_status rc_synthesize(float *out, rc_synth_stats *stats, rc_model *teacher, const rc_synth_config *c,
                               rc_err *e);

/* rc_synth_check, then rc_synthesize into a new float32 array of shape
 * (count, the teacher input's per-sample shape); free with rc_array_free. */
RC_API rc_status rc_synthesize_array(rc_array *out, rc_synth_stats *stats, rc_model *teacher,
                                     const rc_synth_config *c, rc_err *e);

#endif
