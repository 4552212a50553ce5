/* Losses and batch metrics over class logits (N, K), row-major.
 *
 * Every loss is a mean over the batch, works through log-sum-exp (no overflow
 * for large logits), writes the unweighted scalar to *loss and, when grad is
 * not NULL, ADDS grad_scale * d(loss)/d(student) into grad (N, K) so several
 * terms can share one gradient buffer. per_sample (N), when not NULL,
 * receives each sample's term; their mean is *loss. Nothing here allocates:
 * all output buffers belong to the caller. Sums run in double. */
#ifndef RC_TRAIN_LOSS_H
#define RC_TRAIN_LOSS_H

#include <stdint.h>

#include "core/status.h"

/* Temperature used when a run does not choose one: softens a confident
 * teacher enough to carry the ranking of wrong classes without flattening it
 * (values between 2 and 5 are common practice for image classifiers). */
#define RC_KD_DEFAULT_TEMPERATURE 4.0f

/* Logit distillation (Hinton, Vinyals and Dean 2015):
 *   loss = T^2 / N * sum_i KL(softmax(t_i / T) || softmax(s_i / T))
 *   d loss / d s_i = T * (softmax(s_i / T) - softmax(t_i / T)) / N
 * The T^2 factor keeps gradient size roughly independent of T. Equals
 * PyTorch's KLDivLoss(reduction='batchmean')(log_softmax(s/T), softmax(t/T))*T^2.
 * s, t (N, K); temperature > 0. */
rc_status rc_loss_kd(double *loss, float *per_sample, float *grad, float grad_scale,
                     const float *student, const float *teacher, int64_t n, int64_t k,
                     float temperature, rc_err *e);

/* Logit regression (Ba and Caruana 2014), normalised as the mean over all
 * N*K entries (PyTorch's mse_loss with reduction='mean'), not the paper's
 * sum; so its size does not grow with the number of classes:
 *   loss = 1/(N K) * sum (s - t)^2,   d loss / d s = 2 (s - t) / (N K)
 * per_sample[i] = 1/K * sum_j (s_ij - t_ij)^2. */
rc_status rc_loss_logit_mse(double *loss, float *per_sample, float *grad, float grad_scale,
                            const float *student, const float *teacher, int64_t n,
                            int64_t k, rc_err *e);

/* Cross-entropy on integer labels in [0, K):
 *   loss = -1/N * sum_i log softmax(s_i)[label_i],
 *   d loss / d s_i = (softmax(s_i) - onehot(label_i)) / N
 * A label outside [0, K) is refused with RC_ERR_INVALID naming the sample. */
rc_status rc_loss_cross_entropy(double *loss, float *per_sample, float *grad,
                                float grad_scale, const float *logits,
                                const int32_t *labels, int64_t n, int64_t k, rc_err *e);

/* Mean KL(teacher || student) at T = 1 (a report metric; no gradient). */
rc_status rc_metric_kl(double *mean_kl, float *per_sample, const float *student,
                       const float *teacher, int64_t n, int64_t k, rc_err *e);

/* Samples whose label is in the top `topk` classes: a sample counts when
 * fewer than topk classes have a strictly larger logit (ties favour the
 * label) and its own logit is not NaN. hit (N), when not NULL, gets 1/0.
 * Labels outside [0, K) or topk < 1 are refused. */
rc_status rc_metric_topk(int64_t *correct, uint8_t *hit, const float *logits,
                         const int32_t *labels, int64_t n, int64_t k, int topk, rc_err *e);

/* Predicted class per sample: index of the largest logit, first one on ties,
 * NaN never wins (a row of NaN predicts class 0). pred (N). */
void rc_metric_argmax(int32_t *pred, const float *logits, int64_t n, int64_t k);

/* Samples where both logit sets predict the same class (top-1 agreement).
 * same (N), when not NULL, gets 1/0. Returns the count. */
int64_t rc_metric_agreement(uint8_t *same, const float *a, const float *b, int64_t n,
                            int64_t k);

#endif
