/* Feature-level distillation inside `distill`: which loss terms, on which
 * pairs of teacher and student tensors, with which learned projectors.
 *
 * Terms and their default weights (the weight given on the command line
 * replaces the default; published methods keep their names):
 *   kd 1, logit-mse 1           logits (train/loss.h)
 *   hint 1                      Romero et al. 2015, every pair, projector where widths differ
 *   attention 1000 (= beta)     Zagoruyko and Komodakis 2017, every pair
 *   boundary 1                  Heo et al. 2019, every pair, projector where widths differ
 *   fsp 1                       Yim et al. 2017, consecutive pairs of equal spatial size
 *   rkd-distance 1, rkd-angle 2 Park et al. 2019, on the logits of the batch
 *   attention-map 1             KL per head over Softmax outputs (N, heads, L, L)
 *   weight-anchor 1e-3          L2 to the teacher's weight of the same name and shape
 * Projectors are trainable entries of the parameter store, never exported. */
#ifndef RC_TRAIN_FEATURES_H
#define RC_TRAIN_FEATURES_H

#include "core/status.h"
#include "ir/ir.h"
#include "plan/plan.h"
#include "train/pairing.h"
#include "train/params.h"

typedef enum rc_term {
  RC_TERM_KD = 0,
  RC_TERM_LOGIT_MSE,
  RC_TERM_HINT,
  RC_TERM_ATTENTION,
  RC_TERM_BOUNDARY,
  RC_TERM_FSP,
  RC_TERM_RKD_DISTANCE,
  RC_TERM_RKD_ANGLE,
  RC_TERM_ATTENTION_MAP,
  RC_TERM_WEIGHT_ANCHOR,
  RC_TERM_COUNT
} rc_term;

typedef struct rc_loss_spec {
  float weight[RC_TERM_COUNT]; /* 0 = term off */
} rc_loss_spec;

/* "kd=1,hint=0.5,attention" (a term without "=w" takes its default weight).
 * Unknown terms and bad weights are refused, naming them. */
rc_status rc_loss_spec_parse(rc_loss_spec *spec, const char *text, rc_err *e);
/* 1 when any term needs inner tensors (teacher run every step). */
int rc_loss_spec_needs_features(const rc_loss_spec *spec);

typedef struct rc_features rc_features;

/* Pair the graphs (explicit pairs or automatic), decide projectors and add
 * their entries to the store (call before rc_params_finalize), and mark the
 * tensors each plan must keep. Per-pair weights may be given (NULL = 1). */
rc_status rc__features_setup(rc_features **out, const rc_loss_spec *spec, const rc_graph *teacher,
                             const rc_graph *student, const rc_tensor *input_shapes_b1,
                             const char *const *pairs, const float *pair_weights, int n_pairs,
                             rc_params *ps, unsigned char *teacher_keep, unsigned char *student_keep,
                             rc_err *e);
/* After rc_params_finalize: initialise projectors (deterministic from seed)
 * and bind weight anchors to store entries (entry index by initializer name). */
rc_status rc__features_init(rc_features *f, rc_params *ps, uint64_t seed, rc_err *e);
/* Before the first step of a run (not a resumed one), after both forwards
 * on its batch: start every projector from the least-squares map between
 * the paired features (feature_loss.h). *fitted counts the projectors fitted. */
rc_status rc__features_fit_projectors(rc_features *f, rc_plan *teacher, rc_plan *student, rc_params *ps,
                                      int *fitted, rc_err *e);
/* After both forwards: add every feature term's gradient into the student
 * plan's gradient buffers and the store; *loss receives their weighted sum.
 * teacher may be NULL when no term reads inner tensors; teacher_logits are
 * the batch's cached teacher logits (N, K) for the relational terms. */
rc_status rc__features_step(rc_features *f, rc_plan *teacher, rc_plan *student, rc_params *ps,
                            const float *teacher_logits, double *loss, rc_err *e);
void rc__features_free(rc_features *f);

#endif
