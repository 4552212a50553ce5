/* Feature-level distillation inside `distill`: which loss terms, on which
 * pairs of teacher and student tensors, with which learned projectors.
 *
 * RC_LOSS_TERMS below lists every term with its default weight (a weight
 * given by the caller replaces it). Published methods keep their names:
 * hint (Romero et al. 2015; every pair, projector where widths differ),
 * attention (Zagoruyko and Komodakis 2017; every pair, default weight =
 * their beta), boundary (Heo et al. 2019; every pair, projector where widths
 * differ), fsp (Yim et al. 2017; consecutive pairs of equal spatial size),
 * rkd-distance and rkd-angle (Park et al. 2019; on the logits of the batch).
 * kd and logit-mse are in train/loss.h; attention-map is KL per head over
 * Softmax outputs (N, heads, L, L); weight-anchor is L2 to the teacher's
 * weight of the same name and shape.
 * Projectors are trainable entries of the parameter store, never exported. */
#ifndef RC_TRAIN_FEATURES_H
#define RC_TRAIN_FEATURES_H

#include "core/status.h"
#include "ir/ir.h"
#include "plan/plan.h"
#include "train/pairing.h"
#include "train/params.h"

/* Every loss term, one row each: X(ID, name, default weight, kind, help).
 * The enum, the parser, the list of known terms in its errors, the CLI's
 * help and the loss code all read this table. Default weights name
 * constants of train/feature_loss.h, expanded only where that is included. */
#define RC_LOSS_TERMS(X)                                                                                    \
  X(KD, "kd", 1, RC_TERM_ON_LOGITS, "KL divergence of temperature-softened outputs")                         \
  X(LOGIT_MSE, "logit-mse", 1, RC_TERM_ON_LOGITS, "mean squared error of the outputs")                        \
  X(HINT, "hint", 1, RC_TERM_ON_FEATURES, "paired inner tensors, projected where widths differ")              \
  X(ATTENTION, "attention", RC_AT_DEFAULT_BETA, RC_TERM_ON_FEATURES, "spatial attention of paired tensors")   \
  X(BOUNDARY, "boundary", 1, RC_TERM_ON_FEATURES, "activation boundaries of paired tensors")                 \
  X(FSP, "fsp", 1, RC_TERM_ON_FEATURES, "flow between consecutive pairs of equal spatial size")              \
  X(RKD_DISTANCE, "rkd-distance", RC_RKD_DEFAULT_DISTANCE_WEIGHT, RC_TERM_ON_BATCH, "distances in the batch") \
  X(RKD_ANGLE, "rkd-angle", RC_RKD_DEFAULT_ANGLE_WEIGHT, RC_TERM_ON_BATCH, "angles in the batch")             \
  X(ATTENTION_MAP, "attention-map", 1, RC_TERM_ON_FEATURES, "KL per head over Softmax attention maps")        \
  X(WEIGHT_ANCHOR, "weight-anchor", 1e-3f, RC_TERM_ON_WEIGHTS, "L2 to the teacher's weight of the same name")

/* What a term reads. */
typedef enum rc_term_kind {
  RC_TERM_ON_LOGITS = 0,   /* the outputs of each sample */
  RC_TERM_ON_FEATURES = 1, /* inner tensors: the teacher runs every step */
  RC_TERM_ON_BATCH = 2,    /* relations among the outputs of a batch */
  RC_TERM_ON_WEIGHTS = 3   /* the student's weights against the teacher's */
} rc_term_kind;

typedef enum rc_term {
#define RC_TERM_ENUM(id, name, weight, kind, help) RC_TERM_##id,
  RC_LOSS_TERMS(RC_TERM_ENUM)
#undef RC_TERM_ENUM
  RC_TERM_COUNT
} rc_term;

typedef struct rc_loss_spec {
  float weight[RC_TERM_COUNT]; /* 0 = term off */
} rc_loss_spec;

typedef struct rc_term_info {
  const char *name;
  float default_weight;
  rc_term_kind kind;
  const char *help;
} rc_term_info;

/* The table's row of t (NULL outside the table). */
const rc_term_info *rc_term_info_of(rc_term t);
/* "kd=1,hint=0.5,attention" (a term without "=w" takes its default weight).
 * Unknown terms and bad weights are refused, naming them and listing the
 * known terms; the messages name no command-line flag (callers add that). */
rc_status rc_loss_spec_parse(rc_loss_spec *spec, const char *text, rc_err *e);
/* 1 when any term needs inner tensors (teacher run every step). */
int rc_loss_spec_needs_features(const rc_loss_spec *spec);

typedef struct rc_features rc_features;

/* Pair the graphs (explicit pairs or automatic), decide projectors and add
 * their entries to the store (call before rc_params_finalize), and mark the
 * tensors each plan must keep. Per-pair weights may be given (NULL = 1). */
rc_status rc__features_init(rc_features **out, const rc_loss_spec *spec, const rc_graph *teacher,
                            const rc_graph *student, const rc_tensor *input_shapes_b1,
                            const char *const *pairs, const float *pair_weights, int n_pairs,
                            rc_params *ps, unsigned char *teacher_keep, unsigned char *student_keep,
                            rc_err *e);
/* After rc_params_finalize: initialise projectors (deterministic from seed)
 * and bind weight anchors to store entries (entry index by initializer name). */
rc_status rc__features_bind(rc_features *f, rc_params *ps, uint64_t seed, rc_err *e);
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
