/* A per-channel epilogue that a producing kernel (Conv) applies to its
 * output rows while they are still in cache, instead of separate passes of
 * BatchNormalization with running statistics and an activation over memory:
 *   z = act(y * a[m] + c[m])   for output channel m,
 * with y the kernel's own result (bias included), which it still writes
 * (backward reads it). The kernels know nothing of graphs: the planner
 * decides which chains run this way and fills the struct per forward.
 * Results equal the separate ops' bit for bit: the same float expressions in
 * the same order (tests/test_ops_fuse.c compares them). */
#ifndef RC_OPS_EPILOGUE_H
#define RC_OPS_EPILOGUE_H

#include <stdint.h>

#include "ops/op.h"

typedef enum rc__epi_act {
  RC_EPI_NONE = 0,
  RC_EPI_RELU, /* gradient where u > 0 */
  RC_EPI_CLIP  /* gradient where lo <= u <= hi, as Clip's backward */
} rc__epi_act;

typedef struct rc__epilogue {
  const float *a, *c; /* per output channel; both NULL: no affine step (u = y) */
  rc__epi_act act;
  float lo, hi; /* Clip's bounds as the node gives them (NaN included) */
  float *z;     /* (N, M, P): the chain's result */
} rc__epilogue;

/* Rows [r0, r1) of z from the same rows of y, both seen as (N*M, P) (row r
 * is channel r % M). y and z may be the same buffer. No threads of its own. */
void rc__epilogue_apply(const rc__epilogue *ep, const float *y, int64_t r0, int64_t r1, int64_t M, int64_t P);

/* One row of one channel with the affine step's a and c given: z (P) <-
 * act(y * a + c); and the backward's mask g (P) <- dz where the activation
 * passes it at y * a + c, else 0. For a training-mode BatchNormalization,
 * whose a and c come from the batch (norm.c). */
void rc__epilogue_row(const rc__epilogue *ep, float *z, const float *y, int64_t P, float a, float c);
void rc__epilogue_mask_row(const rc__epilogue *ep, float *g, const float *y, const float *dz, int64_t P, float a,
                           float c);

/* The chain's backward from dz (N, M, P), one pass over each row:
 * g = dz where the activation passes it (else 0); dy += a[m] * g (dy may be
 * NULL); when sdy is given, per channel sdy[m] = sum g and
 * sdx[m] = sum g * (y - mean[m]), in the order BatchNormalization's own
 * backward sums them. rows: `threads` scratch rows of P floats. */
void rc__epilogue_backward(const rc__epilogue *ep, float *dy, double *sdy, double *sdx, const float *mean,
                           const float *y, const float *dz, int64_t N, int64_t M, int64_t P, float *rows,
                           int threads);

/* Conv's forward with the epilogue applied per sample or chunk (conv.c);
 * ep NULL is the plain forward. */
rc_status rc__conv_forward_epilogue(const rc_kernel *k, const rc__epilogue *ep, rc_err *e);

/* BatchNormalization (norm.c): non-zero when this kernel normalises with its
 * running statistics (not batch statistics). */
int rc__bn_frozen(const rc_kernel *k);
/* The frozen normalisation as y * a + c per channel; mean (may be NULL)
 * receives the running mean. */
void rc__bn_fold(const rc_kernel *k, float *a, float *c, float *mean);
/* Adds the parameter gradients of a frozen normalisation from the sums
 * rc__epilogue_backward gives (sdx taken around the running mean). */
void rc__bn_frozen_param_grads(const rc_kernel *k, const double *sdy, const double *sdx);

/* A BatchNormalization with batch statistics and the activation after it
 * as one step (norm.c): forward writes only ep->z = act(normalised x);
 * backward takes dz, the activation's output gradient, and gives what the
 * two ops' backward would (its own output gradient set to the masked dz on
 * the way). ep->a and ep->c are not used: the batch gives them. */
rc_status rc__bn_batch_forward_fused(const rc_kernel *k, const rc__epilogue *ep, rc_err *e);
void rc__bn_batch_backward_fused(const rc_kernel *k, const rc__epilogue *ep, const float *dz);

/* Clip's bounds as the node gives them (activation.c), NaN left as it is. */
void rc__clip_bounds(const rc_kernel *k, float *lo, float *hi);

#endif
