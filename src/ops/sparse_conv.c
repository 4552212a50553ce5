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
#include <math.h>
#include <omp.h>

#include "ops/conv_impl.h"
#include "ops/sparse.h"

/* The density limit, from callgrind instruction counts of forward plus both
 * gradients (batch 16, one thread, random patterns) against the dense paths
 * of conv.c. Break-even kept fractions: 3x3 convolutions of 16/32/64
 * channels on 32x32/16x16/8x8 maps 0.24/0.13/0.065 (at 5% kept: 13.6M vs
 * 66.0M, 19.8M vs 55.1M, 39.6M vs 51.8M instructions); 1x1 convolutions
 * 16->96 on 32x32, 96->24 on 16x16, 128->128 on 8x8 0.18/0.12/0.06. The
 * cost of a kept weight has a part per output row, so break-even falls
 * with the map's side: about 0.24 * sqrt(P / 1024) for P output cells.
 * Timings (min of 9, dense and sparse interleaved, one thread, batch 64,
 * 16 for the 32x32 layer, on the shared machine) gave the same ratios:
 * 3x3 at 5% kept 3.96x (32x32), 3.89x (16x16), 1.26x (8x8); at 10% kept
 * 2.42x, 1.50x, 0.45x; 1x1 96->24 on 16x16 at 10% 0.98x, 128->128 on 8x8
 * at 5% 1.20x. The limit stays a
 * little below break-even, and at most 0.25. 2:4 patterns (half kept) stay
 * dense: 2.2 to 8.4 times the dense instruction count through CSR. */
double rc__sparse_conv_density_limit(const rc__conv_geom *g) {
  const double limit = 0.2 * sqrt((double)g->out_sp / 1024.0);
  return limit < 0.25 ? limit : 0.25;
}

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

/* Rows of one tap walk as one flat run: with unit strides on the two inner
 * axes and rows as wide in the image as in the output, output cell q of a
 * plane reads image cell q + offset, so the valid rows [lo1, hi1) form one
 * contiguous run from (lo1, lo2) to (hi1-1, hi2) in which only the few cells
 * past each row's valid columns do not belong. Those cells (at most
 * FLAT_GAP per row) are saved before the run and put back after it, so the
 * result is the row-by-row walk's, bit for bit, at one loop per plane
 * instead of one per row (rows of 8 to 32 cells made loop overhead the
 * main cost). */
#define FLAT_GAP 4
#define FLAT_ROWS 256

typedef struct flat_run {
  int64_t q0, q1, shift; /* output cells [q0, q1) of the slab read image cell q + shift */
} flat_run;

static int flat_fits(const rc__patch *g, const rc__tap_span *t) {
  return g->s[1] == 1 && g->s[2] == 1 && g->pos[2] == g->img[2] && g->pos[2] - (t->hi[2] - t->lo[2]) <= FLAT_GAP &&
         t->hi[1] - t->lo[1] <= FLAT_ROWS && t->lo[1] < t->hi[1] && t->lo[2] < t->hi[2];
}

/* The run of slab p0 (cells counted from the slab's start in pos). */
static flat_run flat_of(const rc__patch *g, const rc__tap_span *t) {
  const int64_t W = g->pos[2];
  flat_run r = {t->lo[1] * W + t->lo[2], (t->hi[1] - 1) * W + t->hi[2], t->off[1] * W + t->off[2]};
  return r;
}

/* Copies (save = 1) or restores the cells of buf (a slab of pos or img,
 * shifted by `shift`) that the run crosses but does not own. */
/* The gap after row p1's valid columns runs into row p1+1's first valid
 * column: one segment of W - (hi2 - lo2) cells per row but the last. They
 * are a cell or two each, so no library copy (GCC would turn the loop into
 * memcpy calls that cost more than the cells). */
#if defined(__GNUC__) && !defined(__clang__)
__attribute__((optimize("no-tree-loop-distribute-patterns")))
#endif
static void flat_gaps(float *buf, int64_t shift, const rc__patch *g, const rc__tap_span *t, float *keep, int save) {
  const int64_t W = g->pos[2], gap = W - (t->hi[2] - t->lo[2]);
  if (!gap) return;
  float *cell = buf + t->lo[1] * W + t->hi[2] + shift;
  for (int64_t p1 = t->lo[1]; p1 < t->hi[1] - 1; p1++, cell += W, keep += gap)
    for (int64_t j = 0; j < gap; j++)
      if (save) keep[j] = cell[j];
      else cell[j] = keep[j];
}

static void axpy(float *restrict y, const float *restrict x, float v, int64_t n) {
  for (int64_t i = 0; i < n; i++) y[i] += v * x[i];
}

/* One tap walk that adds: into pos (pos[p] += v * img[cell of p], forward)
 * or, its adjoint, into img (img[cell of p] += v * pos[p], input gradient). */
static void span_add(int into_img, float *pos, float *img, const rc__patch *g, const rc__tap_span *t, float v) {
  const int64_t st = g->s[2], lo = t->lo[2], hi = t->hi[2], slab_pos = g->pos[1] * g->pos[2],
                slab_img = g->img[1] * g->img[2];
  if (flat_fits(g, t)) {
    float keep[FLAT_GAP * FLAT_ROWS];
    const flat_run r = flat_of(g, t);
    for (int64_t p0 = t->lo[0]; p0 < t->hi[0]; p0++) {
      float *ps = pos + p0 * slab_pos + r.q0, *is = img + (p0 * g->s[0] + t->off[0]) * slab_img + r.q0 + r.shift;
      float *dst = into_img ? is : ps;
      const int64_t shift = into_img ? r.shift : 0;
      flat_gaps(dst - r.q0 - shift, shift, g, t, keep, 1);
      axpy(dst, into_img ? ps : is, v, r.q1 - r.q0);
      flat_gaps(dst - r.q0 - shift, shift, g, t, keep, 0);
    }
    return;
  }
  for (int64_t p0 = t->lo[0]; p0 < t->hi[0]; p0++)
    for (int64_t p1 = t->lo[1]; p1 < t->hi[1]; p1++) {
      float *prow = pos + pos_row(g, p0, p1), *irow = img + img_row(g, t, p0, p1);
      if (st == 1) axpy(into_img ? irow + lo : prow + lo, into_img ? prow + lo : irow + lo, v, hi - lo);
      else if (into_img)
        for (int64_t p = lo; p < hi; p++) irow[p * st] += v * prow[p];
      else
        for (int64_t p = lo; p < hi; p++) prow[p] += v * irow[p * st];
    }
}

/* sum of a[i] * b[i] in 8 lanes added in a fixed order (vectorisable without
 * reassociation, the same bits on every run). */
#define DOT_LANES 8
static float dot(const float *a, const float *b, int64_t n) {
  float acc[DOT_LANES] = {0};
  int64_t i = 0;
  for (; i + DOT_LANES <= n; i += DOT_LANES)
    for (int l = 0; l < DOT_LANES; l++) acc[l] += a[i + l] * b[i + l];
  for (int l = 0; i < n; i++, l++) acc[l] += a[i] * b[i];
  for (int w = DOT_LANES / 2; w >= 1; w /= 2)
    for (int l = 0; l < w; l++) acc[l] += acc[l + w];
  return acc[0];
}

/* The products a flat run's dot takes at the gap cells (to be taken off). */
static double flat_gap_dot(const float *pos, const float *img, int64_t shift, const rc__patch *g,
                           const rc__tap_span *t) {
  const int64_t W = g->pos[2], gap = W - (t->hi[2] - t->lo[2]);
  double acc = 0;
  for (int64_t p1 = t->lo[1]; gap && p1 < t->hi[1] - 1; p1++) {
    const int64_t q = p1 * W + t->hi[2];
    for (int64_t j = 0; j < gap; j++) acc += (double)pos[q + j] * img[q + j + shift];
  }
  return acc;
}

/* sum of pos[p] * img[cell of p]: one flat run per slab where it fits (its
 * gap products taken off again), else rows summed in float, added in double. */
static double span_dot(const float *pos, const float *img, const rc__patch *g, const rc__tap_span *t) {
  const int64_t st = g->s[2], lo = t->lo[2], hi = t->hi[2], slab_pos = g->pos[1] * g->pos[2],
                slab_img = g->img[1] * g->img[2];
  double acc = 0;
  if (flat_fits(g, t)) {
    const flat_run r = flat_of(g, t);
    for (int64_t p0 = t->lo[0]; p0 < t->hi[0]; p0++) {
      const float *ps = pos + p0 * slab_pos, *is = img + (p0 * g->s[0] + t->off[0]) * slab_img;
      acc += dot(ps + r.q0, is + r.q0 + r.shift, r.q1 - r.q0) - flat_gap_dot(ps, is, r.shift, g, t);
    }
    return acc;
  }
  for (int64_t p0 = t->lo[0]; p0 < t->hi[0]; p0++)
    for (int64_t p1 = t->lo[1]; p1 < t->hi[1]; p1++) {
      const float *prow = pos + pos_row(g, p0, p1), *irow = img + img_row(g, t, p0, p1);
      if (st == 1) {
        acc += dot(prow + lo, irow + lo, hi - lo);
        continue;
      }
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
      span_add(0, ym, (float *)(xg + (cc / K) * S), &g->p, &sp[cc % K], wm[cc]);
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
        span_add(1, (float *)dym, dxg + (cc / K) * S, &g->p, &sp[cc % K], wm[cc]);
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
