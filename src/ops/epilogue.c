/* See epilogue.h. The expressions copy those of BatchNormalization's affine
 * step (norm.c), Relu and Clip (activation.c), so that a fused chain and the
 * separate ops give the same bits. */
#include "ops/epilogue.h"

#include <math.h>
#include <omp.h>
#include <string.h>

#include "ops/rowsum.h"

/* Each row is one loop: u = y * a + c (or y itself when `affine` is 0;
 * callers pass a constant, so the compiler makes two loops), then the
 * activation, a select the compiler vectorises (checked with
 * -fopt-info-vec). The gradient is read unconditionally for the same
 * reason. */
static inline void relu_row(float *z, const float *y, int64_t P, float a, float c, int affine) {
  for (int64_t j = 0; j < P; j++) {
    const float u = affine ? y[j] * a + c : y[j];
    z[j] = u > 0.0f ? u : 0.0f;
  }
}

static inline void clip_row(float *z, const float *y, int64_t P, float a, float c, int affine, float lo,
                            float hi) {
  for (int64_t j = 0; j < P; j++) {
    const float u = affine ? y[j] * a + c : y[j];
    const float v = u >= lo ? u : lo;
    z[j] = hi < v ? hi : v;
  }
}

static inline void relu_mask(float *restrict g, const float *y, const float *dz, int64_t P, float a, float c,
                             int affine) {
  for (int64_t j = 0; j < P; j++) {
    const float u = affine ? y[j] * a + c : y[j], d = dz[j];
    g[j] = u > 0.0f ? d : 0.0f;
  }
}

static inline void clip_mask(float *restrict g, const float *y, const float *dz, int64_t P, float a, float c,
                             int affine, float lo, float hi) {
  for (int64_t j = 0; j < P; j++) {
    const float u = affine ? y[j] * a + c : y[j], d = dz[j];
    g[j] = (u >= lo) & (u <= hi) ? d : 0.0f;
  }
}

/* z (P) <- act(y * a + c), or act(y) when `affine` is 0 (a constant at
 * every call, so each variant compiles to its own vector loop). */
static inline void act_row(const rc__epilogue *ep, float *z, const float *y, int64_t P, float a, float c,
                           int affine) {
  if (ep->act == RC_EPI_RELU) {
    relu_row(z, y, P, a, c, affine);
  } else if (ep->act == RC_EPI_CLIP) {
    /* As Clip's forward: a NaN bound is no bound. */
    const float lo = isnan(ep->lo) ? -INFINITY : ep->lo, hi = isnan(ep->hi) ? INFINITY : ep->hi;
    clip_row(z, y, P, a, c, affine, lo, hi);
  } else if (affine) {
    for (int64_t j = 0; j < P; j++) z[j] = y[j] * a + c;
  } else if (z != y) {
    memmove(z, y, sizeof(float) * (size_t)P);
  }
}

/* z (P) <- act(y * a[m] + c[m]). */
static void apply_row(const rc__epilogue *ep, float *z, const float *y, int64_t P, int64_t m) {
  if (ep->a)
    act_row(ep, z, y, P, ep->a[m], ep->c[m], 1);
  else
    act_row(ep, z, y, P, 1.0f, 0.0f, 0);
}

void rc__epilogue_row(const rc__epilogue *ep, float *z, const float *y, int64_t P, float a, float c) {
  act_row(ep, z, y, P, a, c, 1);
}

void rc__epilogue_apply(const rc__epilogue *ep, const float *y, int64_t r0, int64_t r1, int64_t M, int64_t P) {
  for (int64_t r = r0; r < r1; r++) apply_row(ep, ep->z + r * P, y + r * P, P, r % M);
}

/* g (P) <- dz where the activation passes it at u = y * a + c (u = y when
 * `affine` is 0), else 0. */
static inline void act_mask(const rc__epilogue *ep, float *restrict g, const float *y, const float *dz, int64_t P,
                            float a, float c, int affine) {
  if (ep->act == RC_EPI_RELU)
    relu_mask(g, y, dz, P, a, c, affine);
  else if (ep->act == RC_EPI_CLIP)
    clip_mask(g, y, dz, P, a, c, affine, ep->lo, ep->hi);
  else
    memcpy(g, dz, sizeof(float) * (size_t)P);
}

static void mask_row(const rc__epilogue *ep, float *restrict g, const float *y, const float *dz, int64_t P,
                     int64_t m) {
  if (ep->a)
    act_mask(ep, g, y, dz, P, ep->a[m], ep->c[m], 1);
  else
    act_mask(ep, g, y, dz, P, 1.0f, 0.0f, 0);
}

void rc__epilogue_mask_row(const rc__epilogue *ep, float *restrict g, const float *y, const float *dz, int64_t P,
                           float a, float c) {
  act_mask(ep, g, y, dz, P, a, c, 1);
}

/* y, dz (N, M, P) -> dy (N, M, P) += a * g; sums per channel. */
void rc__epilogue_backward(const rc__epilogue *ep, float *dy, double *sdy, double *sdx, const float *mean,
                           const float *y, const float *dz, int64_t N, int64_t M, int64_t P, float *rows,
                           int threads) {
  /* Channels are shared among threads; each channel's sums run over the
   * batch in order, so the result does not depend on the thread count. */
#pragma omp parallel for num_threads(threads) schedule(static) if (threads > 1)
  for (int64_t m = 0; m < M; m++) {
    float *g = rows + (size_t)omp_get_thread_num() * (size_t)P;
    const float a = ep->a ? ep->a[m] : 1.0f;
    double s = 0, sx = 0;
    for (int64_t n = 0; n < N; n++) {
      const int64_t off = (n * M + m) * P;
      mask_row(ep, g, y + off, dz + off, P, m);
      if (sdy) {
        s += rc__row_sum(g, P);
        sx += rc__row_dot_dev(g, y + off, P, mean[m]);
      }
      if (!dy) continue;
      float *d = dy + off;
      /* BatchNormalization's backward adds a * (g - 0 - xhat * 0) with its
       * frozen means: the same value as a * g for finite inputs. */
      if (ep->a)
        for (int64_t j = 0; j < P; j++) d[j] += a * g[j];
      else
        for (int64_t j = 0; j < P; j++) d[j] += g[j];
    }
    if (sdy) {
      sdy[m] = s;
      sdx[m] = sx;
    }
  }
}
