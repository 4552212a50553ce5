/* Losses per model output: distillation of students whose outputs are not
 * one class-score vector per sample (segmentation maps, detector heads,
 * regressions). One table (output_loss.c) holds every term: its name, the
 * keys it takes, its default axis and temperature, and its function.
 *
 * A term is written NAME=TERM[:key=value...] on the command line, e.g.
 *   scores=kd:axis=1:t=2:weights=0.25,1,1   boxes=smooth-l1:beta=0.5
 * Keys: axis (class, coordinate or bin axis of the output, counted over all
 * its dims including the batch axis; negative counts from the end), t
 * (temperature), weight (of the term), weights (per class, kd), beta
 * (smooth-l1), margin (bounded-l2), bins (edge-kd).
 *
 * Conventions as train/loss.h: *loss gets the unweighted mean, grad (when not
 * NULL) gets grad_scale * d loss / d student ADDED; sums in double; nothing
 * allocates. An output of dims (d0, ..., dr-1) with axis a is seen as
 * (outer, K, inner): outer = d0*...*d(a-1), K = d(a), inner = the rest; its
 * positions are the outer*inner places that each hold one K-vector. */
#ifndef RC_TRAIN_OUTPUT_LOSS_H
#define RC_TRAIN_OUTPUT_LOSS_H

#include <stdint.h>

#include "core/status.h"
#include "recoup/outputs.h"

/* rc_out_term, rc_output_loss, rc_output_loss_parse, rc_out_term_name and
 * rc_out_term_needs_targets are public: recoup/outputs.h. */

/* What validation reports for an output the term is on. */
typedef enum rc_out_kind { RC_OUT_CLASSES = 0, RC_OUT_VALUES = 1 } rc_out_kind;

rc_out_kind rc_out_term_kind(rc_out_term t);
/* Comma-separated list of the known term names, for help and errors. */
const char *rc_out_term_list(void);

/* Check o against an output of the given dims (refusing a wrong axis, the
 * batch axis as class axis, bins not dividing the axis, class weights of the
 * wrong count) and resolve its axis and temperature (default_temperature is
 * the run's kd temperature). `where` names the output in messages. */
rc_status rc_output_loss_resolve(rc_output_loss *o, const int64_t *dims, int rank,
                                 float default_temperature, rc_err *e);

/* The view of dims around a resolved axis (outer, K, inner); axis < 0 (terms
 * without one) gives (numel, 1, 1). */
void rc_out_layout(const int64_t *dims, int rank, int axis, int64_t *outer, int64_t *k,
                   int64_t *inner);

/* Compute a resolved term. student, teacher: the output's values (dims);
 * target: the regression targets of the same dims for bounded-l2 (NaN marks
 * a position without a target: it takes no loss), else NULL.
 *
 * Normalisations (each the paper's formula, made a mean as stated):
 *  kd         T^2/P * sum_pos sum_j w_j pt_j (log pt_j - log ps_j),
 *             pt = softmax(t/T), ps = softmax(s/T) over the axis, P positions
 *             (Hinton et al. 2015 per position as Liu et al. 2019; with class
 *             weights as Chen et al. 2017 weight the background class)
 *  kd-sigmoid T^2/numel * sum binary KL(sigmoid(t/T) || sigmoid(s/T))
 *  mse        1/numel * sum (s - t)^2
 *  smooth-l1  1/numel * sum h(s - t), h(d) = d^2/(2 beta) if |d| < beta else
 *             |d| - beta/2 (PyTorch's smooth_l1_loss; beta 0 is L1)
 *  bounded-l2 1/V * sum_pos [es + m > et] es, es = |s - y|^2 and et =
 *             |t - y|^2 summed over the coordinate axis, V positions with a
 *             target (Chen et al. 2017)
 *  edge-kd    T^2/P * sum_pos sum_edges KL over the `bins` entries of each
 *             edge (the axis holds edges * bins) (Zheng et al. 2022) */
rc_status rc_output_loss_compute(double *loss, float *grad, float grad_scale,
                                 const rc_output_loss *o, const int64_t *dims, int rank,
                                 const float *student, const float *teacher,
                                 const float *target, rc_err *e);

/* Cross-entropy of per-position class scores (axis of dims) against integer
 * labels with one label per position (outer*inner, in position order);
 * positions labelled `ignore` take no part. Mean over counted positions
 * (PyTorch's cross_entropy with ignore_index). *counted gets their number. */
rc_status rc_output_ce(double *loss, int64_t *counted, float *grad, float grad_scale,
                       const int64_t *dims, int rank, int axis, const float *scores,
                       const int32_t *labels, int32_t ignore, rc_err *e);

/* Argmax over the axis per position: pred (outer*inner), NaN never wins. */
void rc_output_argmax(int32_t *pred, const float *x, int64_t outer, int64_t k, int64_t inner);

/* Mean intersection over union from a K x K count matrix conf[truth*K+pred]:
 * the mean over classes with a non-empty union. NaN when every union is
 * empty. */
double rc_output_miou(const int64_t *conf, int64_t k);

#endif
