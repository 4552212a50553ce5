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
#include "recoup/synthesize.h"

/* rc_synth_config, rc_synth_stats, rc_synth_config_init, rc_synth_check and
 * rc_synthesize are public: recoup/synthesize.h. */

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
