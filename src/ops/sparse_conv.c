/* Conv of a sparse student's weight: every kept weight W[m, c, tap] is one
 * shifted, strided walk between output plane m and input plane c (the tap
 * spans of patch.c, computed once per call), so no column matrix is built
 * and the work falls with the weights kept: forward and the input gradient
 * take one multiply-add per kept weight and output cell, the weight
 * gradient one per kept weight and output cell, and frozen positions get
 * no work and no write at all. Threads split output planes (forward),
 * samples (input gradient) or output channels (weight gradient); each
 * element is summed by one thread in a fixed order, so results do not
 * depend on the thread count. No workspace. */
#include <omp.h>

#include "ops/conv_impl.h"
#include "ops/sparse.h"

/* Chosen by measurement (min of 7 timings of forward plus backward, batch
 * 64, 2 threads, ResNet-8-like and mobilenet_v2-like 3x3 and 1x1 layers of
 * 16 to 128 channels on 8x8 to 32x32 maps, against the dense paths of
 * conv.c): see the table in the commit that set it. */
const double rc__sparse_conv_max_density = 0.30;

int rc__sparse_conv_fits(const rc__conv_geom *g, const rc__wpattern *p) {
  return p && !rc__conv_depthwise(g) && g->K <= RC_SPARSE_CONV_MAX_TAPS && p->rows == g->M &&
         p->cols == g->Cg * g->K;
}

static void spans_of(const rc__conv_geom *g, rc__tap_span *sp) {
  for (int64_t kr = 0; kr < g->K; kr++) rc__tap_span_of(&g->p, kr, &sp[kr]);
}

/* Start of the image row a position row (p0, p1) reads through tap t. */
static int64_t img_row(const rc__patch *g, const rc__tap_span *t, int64_t p0, int64_t p1) {
  return ((p0 * g->s[0] + t->off[0]) * g->img[1] + p1 * g->s[1] + t->off[1]) * g->img[2] + t->off[2];
}

static int64_t pos_row(const rc__patch *g, int64_t p0, int64_t p1) { return (p0 * g->pos[1] + p1) * g->pos[2]; }

/* pos[p] += v * img[cell of p] over the tap's valid positions. */
static void span_axpy(float *restrict pos, const float *restrict img, const rc__patch *g, const rc__tap_span *t,
                      float v) {
  const int64_t st = g->s[2], lo = t->lo[2], hi = t->hi[2];
  for (int64_t p0 = t->lo[0]; p0 < t->hi[0]; p0++)
    for (int64_t p1 = t->lo[1]; p1 < t->hi[1]; p1++) {
      float *restrict prow = pos + pos_row(g, p0, p1);
      const float *restrict irow = img + img_row(g, t, p0, p1);
      if (st == 1)
        for (int64_t p = lo; p < hi; p++) prow[p] += v * irow[p];
      else
        for (int64_t p = lo; p < hi; p++) prow[p] += v * irow[p * st];
    }
}

/* img[cell of p] += v * pos[p]: the adjoint of span_axpy. */
static void span_scatter(float *restrict img, const float *restrict pos, const rc__patch *g, const rc__tap_span *t,
                         float v) {
  const int64_t st = g->s[2], lo = t->lo[2], hi = t->hi[2];
  for (int64_t p0 = t->lo[0]; p0 < t->hi[0]; p0++)
    for (int64_t p1 = t->lo[1]; p1 < t->hi[1]; p1++) {
      const float *restrict prow = pos + pos_row(g, p0, p1);
      float *restrict irow = img + img_row(g, t, p0, p1);
      if (st == 1)
        for (int64_t p = lo; p < hi; p++) irow[p] += v * prow[p];
      else
        for (int64_t p = lo; p < hi; p++) irow[p * st] += v * prow[p];
    }
}

/* sum of pos[p] * img[cell of p]; rows summed in float, rows added in double. */
static double span_dot(const float *pos, const float *img, const rc__patch *g, const rc__tap_span *t) {
  const int64_t st = g->s[2], lo = t->lo[2], hi = t->hi[2];
  double acc = 0;
  for (int64_t p0 = t->lo[0]; p0 < t->hi[0]; p0++)
    for (int64_t p1 = t->lo[1]; p1 < t->hi[1]; p1++) {
      const float *prow = pos + pos_row(g, p0, p1), *irow = img + img_row(g, t, p0, p1);
      float part = 0;
      for (int64_t p = lo; p < hi; p++) part += prow[p] * irow[p * st];
      acc += part;
    }
  return acc;
}

void rc__sparse_conv_forward(const rc__conv_geom *g, const rc__wpattern *p, float *y, const float *x,
                             const float *w, const float *b) {
  rc__tap_span sp[RC_SPARSE_CONV_MAX_TAPS];
  spans_of(g, sp);
  const int64_t P = g->out_sp, S = g->in_sp, K = g->K, CgK = g->Cg * K, planes = g->N * g->M;
#pragma omp parallel for schedule(static) if (planes > 1)
  for (int64_t pl = 0; pl < planes; pl++) {
    const int64_t n = pl / g->M, m = pl % g->M;
    float *ym = y + pl * P;
    const float bias = b ? b[m] : 0.0f;
    for (int64_t i = 0; i < P; i++) ym[i] = bias;
    const float *xg = x + (n * g->C + (m / g->Mg) * g->Cg) * S, *wm = w + m * CgK;
    for (int64_t j = p->start[m]; j < p->start[m + 1]; j++) {
      const int64_t cc = p->col[j];
      span_axpy(ym, xg + (cc / K) * S, &g->p, &sp[cc % K], wm[cc]);
    }
  }
}

/* dx_n += the kept weights' scatter of dy_n, sample by sample. */
static void input_grad(const rc__conv_geom *g, const rc__wpattern *p, const rc__tap_span *sp, float *dx,
                       const float *w, const float *dy) {
  const int64_t P = g->out_sp, S = g->in_sp, K = g->K, CgK = g->Cg * K;
#pragma omp parallel for schedule(static) if (g->N > 1)
  for (int64_t n = 0; n < g->N; n++)
    for (int64_t m = 0; m < g->M; m++) {
      const float *dym = dy + (n * g->M + m) * P, *wm = w + m * CgK;
      float *dxg = dx + (n * g->C + (m / g->Mg) * g->Cg) * S;
      for (int64_t j = p->start[m]; j < p->start[m + 1]; j++) {
        const int64_t cc = p->col[j];
        span_scatter(dxg + (cc / K) * S, dym, &g->p, &sp[cc % K], wm[cc]);
      }
    }
}

/* dw[m, c, tap] += sum over samples (in order) of <dy plane m, x plane c
 * through tap>, at kept positions only. */
static void weight_grad(const rc__conv_geom *g, const rc__wpattern *p, const rc__tap_span *sp, float *dw,
                        const float *x, const float *dy) {
  const int64_t P = g->out_sp, S = g->in_sp, K = g->K, CgK = g->Cg * K;
#pragma omp parallel for schedule(dynamic, 1) if (g->M > 1)
  for (int64_t m = 0; m < g->M; m++) {
    const int64_t c0 = (m / g->Mg) * g->Cg;
    for (int64_t j = p->start[m]; j < p->start[m + 1]; j++) {
      const int64_t cc = p->col[j], c = c0 + cc / K;
      double acc = 0;
      for (int64_t n = 0; n < g->N; n++)
        acc += span_dot(dy + (n * g->M + m) * P, x + (n * g->C + c) * S, &g->p, &sp[cc % K]);
      dw[m * CgK + cc] += (float)acc;
    }
  }
}

void rc__sparse_conv_backward(const rc__conv_geom *g, const rc__wpattern *p, float *dx, float *dw, const float *x,
                              const float *w, const float *dy) {
  rc__tap_span sp[RC_SPARSE_CONV_MAX_TAPS];
  spans_of(g, sp);
  if (dw) weight_grad(g, p, sp, dw, x, dy);
  if (dx) input_grad(g, p, sp, dx, w, dy);
}
