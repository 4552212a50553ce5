/* Feature-level distillation losses: terms that compare inner tensors of the
 * student with the teacher's, beside the logit losses of train/loss.h.
 *
 * Conventions (the same as train/loss.h):
 *  - every function writes the unweighted scalar to *loss (summed in double)
 *    and, for each gradient buffer that is not NULL, ADDS
 *    grad_scale * d(loss)/d(that argument) into it, so several terms can
 *    share one gradient buffer; the caller passes its term weight as
 *    grad_scale and multiplies *loss by it for reports;
 *  - batch-level terms are means over the batch (each states its own
 *    normalisation below);
 *  - nothing allocates: scratch memory comes from the caller's `work`, at
 *    least <term>_workspace_floats(...) floats (terms without such a function
 *    need none), aligned to 8 bytes (any rc__malloc'd or arena block is);
 *  - a NaN in any input reaches *loss (no clamp or branch hides it), so the
 *    caller's non-finite check sees it;
 *  - gradient GEMMs go through OpenBLAS, so a call may use its threads;
 *    results do not depend on the thread count except through OpenBLAS.
 *
 * Feature tensors are described by an rc_feat_view: a batch of N samples,
 * each C channels at P positions, stored channels first (N, C, spatial...)
 * as convolutions produce them, or channels last (N, C) / (N, L, C) as fully
 * connected and transformer layers do. */
#ifndef RC_TRAIN_FEATURE_LOSS_H
#define RC_TRAIN_FEATURE_LOSS_H

#include <stddef.h>
#include <stdint.h>

#include "core/status.h"

typedef enum rc_feat_layout {
  RC_FEAT_CHANNELS_FIRST = 0, /* (N, C, P): convolution features, P = H*W... */
  RC_FEAT_CHANNELS_LAST = 1   /* (N, P, C): tokens (N, L, C) or vectors (N, C) */
} rc_feat_layout;

typedef struct rc_feat_view {
  int64_t n;         /* samples */
  int64_t c;         /* channels */
  int64_t positions; /* spatial positions or tokens; 1 for (N, C) */
  rc_feat_layout layout;
} rc_feat_view;

/* The view of a tensor with these dims: rank 2 is (N, C) and rank 3 is
 * (N, L, C), both channels last; rank 4 and above is (N, C, spatial...),
 * channels first. A rank-3 convolution feature (N, C, L) must be described
 * by hand. Refuses rank < 2, dims < 1 and sizes beyond the GEMM int range. */
rc_status rc_feat_view_from_dims(rc_feat_view *v, const int64_t *dims, int rank, rc_err *e);

/* ---- Projectors --------------------------------------------------------
 * A projector maps student channels Cs to teacher channels Ct at every
 * position: a 1x1 convolution for channels-first features, a linear layer on
 * the last axis for channels-last ones. Both are y = W x + b with W (Ct, Cs)
 * row-major and b (Ct): ct*cs + ct floats, which the caller keeps as
 * trainable entries of its parameter store. weight == NULL means no
 * projector (the student feature is compared as it is); that needs Cs == Ct. */

typedef enum rc_feat_init {
  /* Identity weight when Cs == Ct (the term then starts as a plain
   * comparison of the features and the projector only learns what differs),
   * otherwise RC_FEAT_INIT_UNIFORM. */
  RC_FEAT_INIT_AUTO = 0,
  /* W ~ U(-sqrt(3/Cs), sqrt(3/Cs)): Kaiming-uniform (He et al. 2015) with
   * the gain of a linear layer, Var(W) = 1/Cs, so the projection keeps the
   * scale of its input. Drawn from PCG32 (core/rng.h) seeded with `seed`. */
  RC_FEAT_INIT_UNIFORM = 1
} rc_feat_init;

/* Bias is set to zero in both cases. Deterministic for a given seed. */
rc_status rc_feat_projector_init(float *weight, float *bias, int64_t ct, int64_t cs,
                                 rc_feat_init init, uint64_t seed, rc_err *e);

/* Least-squares start for a projector, from one batch of paired features:
 * W, b = argmin over the batch's samples and positions of |W s + b - t|^2
 * + lambda |W|^2 (ridge regression, b not penalised; lambda = 0.1 * mean
 * diagonal of sum s s^T keeps the system solvable when student channels are
 * dead or collinear, and keeps W small: a stronger ridge trained better on
 * the demo pair than a near-exact fit). A projector drawn at random makes the
 * hint term push the student towards a random mix of the teacher's channels
 * until it has learned better; the fitted one starts from the best linear
 * map between the two, so the term's gradient is useful from the first step.
 * Writes W (Ct, Cs) and b (Ct) and sets *fitted = 1; leaves them as they
 * were with *fitted = 0 when the system is degenerate or not finite.
 * Work: rc_feat_projector_fit_workspace_doubles(Cs, Ct) doubles. */
size_t rc_feat_projector_fit_workspace_doubles(int64_t cs, int64_t ct);
rc_status rc_feat_projector_fit(int *fitted, float *weight, float *bias, const float *student,
                                const float *teacher, const rc_feat_view *sv,
                                const rc_feat_view *tv, double *work, rc_err *e);

/* ---- Hint (Romero et al. 2015, FitNets) ---------------------------------
 * Student s (view sv, Cs channels), teacher t (view tv, Ct channels); same
 * N, P and layout. With y = W s + b (or y = s without a projector):
 *   loss = 1/(N P Ct) * sum (y - t)^2          (mean over all elements)
 * Gradients to the student feature, W (Ct, Cs) and b (Ct); each may be NULL. */
size_t rc_loss_hint_workspace_floats(const rc_feat_view *sv, const rc_feat_view *tv);
rc_status rc_loss_hint(double *loss, float *grad_student, float *grad_weight, float *grad_bias,
                       float grad_scale, const float *student, const float *teacher,
                       const float *weight, const float *bias, const rc_feat_view *sv,
                       const rc_feat_view *tv, float *work, rc_err *e);

/* ---- Activation boundaries (Heo et al. 2019) ----------------------------
 * s = projected student pre-activations (as for hint: y = W s + b, or no
 * projector), t = teacher pre-activations (before the ReLU). Per element,
 * with rho(t) = 1 if t > 0 else 0 and margin mu > 0:
 *   l = rho(t) max(0, mu - y)^2 + (1 - rho(t)) max(0, mu + y)^2
 *   loss = 1/(N P Ct) * sum l                  (mean over all elements; the
 *                                               paper sums them)
 * Same workspace as hint. */
#define RC_AB_DEFAULT_MARGIN 1.0f
size_t rc_loss_boundary_workspace_floats(const rc_feat_view *sv, const rc_feat_view *tv);
rc_status rc_loss_boundary(double *loss, float *grad_student, float *grad_weight,
                           float *grad_bias, float grad_scale, const float *student,
                           const float *teacher, const float *weight, const float *bias,
                           const rc_feat_view *sv, const rc_feat_view *tv, float margin,
                           float *work, rc_err *e);

/* ---- Attention transfer (Zagoruyko and Komodakis 2017) ------------------
 * Per sample, the activation-based attention map with p = 2,
 *   q[p] = sum_c A[c, p]^2,  u = q / max(||q||_2, 1e-12)
 * (the floor only keeps an all-zero map finite), and, as the paper states it
 * (beta/2 times the 2-norm of the difference, NOT squared):
 *   loss = 1/N * sum_n beta/2 * || u_s(n) - u_t(n) ||_2
 * Channels may differ; positions must be equal (spatial sizes differing is
 * refused with an error naming both: resize in the graph if needed). At
 * u_s == u_t the norm has no derivative; its gradient is taken as zero. */
#define RC_AT_DEFAULT_BETA 1000.0f
size_t rc_loss_attention_workspace_floats(const rc_feat_view *sv, const rc_feat_view *tv);
rc_status rc_loss_attention(double *loss, float *grad_student, float grad_scale,
                            const float *student, const float *teacher, const rc_feat_view *sv,
                            const rc_feat_view *tv, float beta, float *work, rc_err *e);

/* ---- Flow of solution procedure (Yim et al. 2017) -----------------------
 * Two layers of one network with equal positions P: F1 (C1 channels) and F2
 * (C2 channels). Per sample G = F1 F2^T / P, a (C1, C2) matrix summed over
 * positions. Student and teacher need equal C1 and C2 (their P may differ).
 *   loss = 1/N * sum_n || G_s(n) - G_t(n) ||_F^2   (squared Frobenius norm,
 *                                                   summed over the C1*C2
 *                                                   entries, as the paper)
 * Gradients to both student features (either may be NULL). All four views
 * must share one layout. */
size_t rc_loss_fsp_workspace_floats(const rc_feat_view *s1, const rc_feat_view *s2);
rc_status rc_loss_fsp(double *loss, float *grad_s1, float *grad_s2, float grad_scale,
                      const float *s1, const float *s2, const float *t1, const float *t2,
                      const rc_feat_view *s1v, const rc_feat_view *s2v, const rc_feat_view *t1v,
                      const rc_feat_view *t2v, float *work, rc_err *e);

/* ---- Relational knowledge distillation (Park et al. 2019) ---------------
 * Over the samples of a batch: student embeddings (N, Ds), teacher (N, Dt)
 * (any feature flattened per sample; Ds and Dt may differ). Huber is
 * PyTorch's smooth_l1 with delta 1: h(x) = x^2/2 if |x| < 1 else |x| - 1/2.
 *
 * Distance: psi(i, j) = ||e_i - e_j|| / mu, mu = mean over distinct pairs;
 *   loss = 1/(N (N-1)) * sum_{i != j} h(psi_s(i, j) - psi_t(i, j)).
 * Angle: psi(i, j, k) = <(e_i - e_j)/||e_i - e_j||, (e_k - e_j)/||e_k - e_j||>,
 *   the cosine of the angle at j, over distinct triples;
 *   loss = 1/(N (N-1) (N-2)) * sum_{i, j, k distinct} h(psi_s - psi_t).
 * Both go through the double-precision Gram matrix of each batch:
 * O(N^2 D) for it and O(N^3) for the triples, so a batch of 128 costs little.
 * Fewer than 2 (distance) or 3 (angle) samples have no relation: loss 0, no
 * gradient. Coinciding samples (zero distance) or a batch of identical
 * samples (mu = 0) give psi = 0 there and pass no gradient through it.
 * Default weights are common practice: 1 for distance, 2 for angle (the
 * caller applies them through grad_scale). */
#define RC_RKD_DEFAULT_DISTANCE_WEIGHT 1.0f
#define RC_RKD_DEFAULT_ANGLE_WEIGHT 2.0f
size_t rc_loss_rkd_workspace_floats(int64_t n);
rc_status rc_loss_rkd_distance(double *loss, float *grad_student, float grad_scale,
                               const float *student, const float *teacher, int64_t n,
                               int64_t ds, int64_t dt, float *work, rc_err *e);
rc_status rc_loss_rkd_angle(double *loss, float *grad_student, float grad_scale,
                            const float *student, const float *teacher, int64_t n, int64_t ds,
                            int64_t dt, float *work, rc_err *e);

/* ---- Attention-map matching for transformer students ---------------------
 * Attention probabilities (the output of Softmax) s, t (N, H, Lq, Lk), rows
 * summing to one over Lk:
 *   loss = 1/(N H Lq) * sum_rows KL(t_row || s_row)
 *        = 1/(N H Lq) * sum t (log t - log max(s, eps)),   eps = 1e-8,
 * with 0 log 0 = 0. The clamp keeps a probability that underflowed to zero
 * finite; below it no gradient flows (as through a clamp). Gradient with
 * respect to the student probabilities: -t / s / (N H Lq); the caller's graph
 * carries it back through the Softmax. */
#define RC_ATTN_KL_EPS 1e-8f
rc_status rc_loss_attention_map(double *loss, float *grad_student, float grad_scale,
                                const float *student, const float *teacher, int64_t n,
                                int64_t heads, int64_t lq, int64_t lk, rc_err *e);

/* ---- Weight anchor -------------------------------------------------------
 * Pulls student weights towards the teacher's where shapes match, as the
 * L2-SP penalty (Li, Grandvalet and Davoine 2018):
 *   loss = 1/2 * sum_i m_i (w_i - w0_i)^2,   d loss / d w_i = m_i (w_i - w0_i)
 * a sum, not a mean, so the pull on one weight does not depend on the size
 * of its tensor; mask (count bytes, 1 = trainable) excludes frozen entries
 * (pruned zeros) from both; NULL = all entries. */
rc_status rc_loss_weight_anchor(double *loss, float *grad, float grad_scale, const float *student,
                                const float *teacher, const uint8_t *mask, int64_t count,
                                rc_err *e);

#endif
