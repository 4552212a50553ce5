/* Unfolding image patches into the rows of a column matrix (im2col) and
 * folding them back (its adjoint), one kernel tap at a time: each tap reads
 * a shifted, strided copy of the image plane, with the positions that fall
 * into padding found once per tap instead of tested per cell. */
#include <string.h>

#include "ops/conv_impl.h"

/* Positions p in [0, npos) with 0 <= p*s + off < size, as [*lo, *hi). */
static void valid_range(int64_t off, int64_t s, int64_t size, int64_t npos, int64_t *lo, int64_t *hi) {
  int64_t l = off >= 0 ? 0 : (-off + s - 1) / s;
  int64_t h = size - off <= 0 ? 0 : (size - off - 1) / s + 1;
  if (h > npos) h = npos;
  if (l > h) l = h;
  *lo = l;
  *hi = h;
}

/* Where kernel tap kr reads: the image offset on each axis and the valid
 * positions [lo, hi) whose cell lies inside the image. */
static void tap_ranges(const rc__patch *g, int64_t kr, int64_t *off0, int64_t *off1, int64_t *off2, int64_t *lo0,
                       int64_t *hi0, int64_t *lo1, int64_t *hi1, int64_t *lo2, int64_t *hi2) {
  int64_t ka = kr / (g->k[1] * g->k[2]), kb = (kr / g->k[2]) % g->k[1], kc = kr % g->k[2];
  *off0 = ka * g->d[0] - g->pad[0];
  *off1 = kb * g->d[1] - g->pad[1];
  *off2 = kc * g->d[2] - g->pad[2];
  valid_range(*off0, g->s[0], g->img[0], g->pos[0], lo0, hi0);
  valid_range(*off1, g->s[1], g->img[1], g->pos[1], lo1, hi1);
  valid_range(*off2, g->s[2], g->img[2], g->pos[2], lo2, hi2);
}

void rc__tap_span_of(const rc__patch *g, int64_t kr, rc__tap_span *t) {
  tap_ranges(g, kr, &t->off[0], &t->off[1], &t->off[2], &t->lo[0], &t->hi[0], &t->lo[1], &t->hi[1], &t->lo[2],
             &t->hi[2]);
}

double rc__tap_walk(rc__tap_mode mode, float *pos, float *img, const rc__patch *g, int64_t kr, float v) {
  int64_t off0, off1, off2, lo0, hi0, lo1, hi1, lo2, hi2;
  tap_ranges(g, kr, &off0, &off1, &off2, &lo0, &hi0, &lo1, &hi1, &lo2, &hi2);
  const int64_t st = g->s[2];
  double dot = 0;
  for (int64_t p0 = lo0; p0 < hi0; p0++)
    for (int64_t p1 = lo1; p1 < hi1; p1++) {
      float *irow = img + ((p0 * g->s[0] + off0) * g->img[1] + p1 * g->s[1] + off1) * g->img[2] + off2;
      float *prow = pos + (p0 * g->pos[1] + p1) * g->pos[2];
      switch (mode) {
        case RC_TAP_SCATTER:
          for (int64_t p = lo2; p < hi2; p++) irow[p * st] += v * prow[p];
          break;
        case RC_TAP_ACCUMULATE:
          for (int64_t p = lo2; p < hi2; p++) prow[p] += v * irow[p * st];
          break;
        case RC_TAP_DOT: {
          /* Rows here are short (a few to 64 cells): a plain serial sum
           * beats a vector reduction's set-up (perf, mobilenet_v2 step). */
          float part = 0;
          for (int64_t p = lo2; p < hi2; p++) part += prow[p] * irow[p * st];
          dot += part;
          break;
        }
      }
    }
  return dot;
}

static void zero(float *p, int64_t n) {
  if (n > 0) memset(p, 0, sizeof(float) * (size_t)n);
}

/* pos[p] = img[cell] for kernel tap kr, 0 where the tap falls in padding.
 * Each output cell is written once: zeros go only where padding is, instead
 * of clearing the whole plane before the copy. */
static void tap_gather(float *pos, const float *img, const rc__patch *g, int64_t kr) {
  int64_t off0, off1, off2, lo0, hi0, lo1, hi1, lo2, hi2;
  tap_ranges(g, kr, &off0, &off1, &off2, &lo0, &hi0, &lo1, &hi1, &lo2, &hi2);
  const int64_t P1 = g->pos[1], P2 = g->pos[2], st = g->s[2];
  if (lo0 >= hi0 || lo1 >= hi1 || lo2 >= hi2) {
    zero(pos, rc__prod3(g->pos));
    return;
  }
  zero(pos, lo0 * P1 * P2);
  for (int64_t p0 = lo0; p0 < hi0; p0++) {
    float *plane = pos + p0 * P1 * P2;
    zero(plane, lo1 * P2);
    for (int64_t p1 = lo1; p1 < hi1; p1++) {
      const float *irow = img + ((p0 * g->s[0] + off0) * g->img[1] + p1 * g->s[1] + off1) * g->img[2] + off2;
      float *prow = plane + p1 * P2;
      zero(prow, lo2);
      if (st == 1)
        memcpy(prow + lo2, irow + lo2, sizeof(float) * (size_t)(hi2 - lo2));
      else
        for (int64_t p = lo2; p < hi2; p++) prow[p] = irow[p * st];
      zero(prow + hi2, P2 - hi2);
    }
    zero(plane + hi1 * P2, (P1 - hi1) * P2);
  }
  zero(pos + hi0 * P1 * P2, (g->pos[0] - hi0) * P1 * P2);
}

/* Rows of ld floats, so that a batch of samples can share one column matrix. */
void rc__unfold(float *col, int64_t ld, const float *img, const rc__patch *g, int64_t channels) {
  const int64_t K = rc__prod3(g->k), plane = rc__prod3(g->img);
  for (int64_t r = 0; r < channels * K; r++) tap_gather(col + r * ld, img + (r / K) * plane, g, r % K);
}

void rc__fold_add(float *img, const float *col, int64_t ld, const rc__patch *g, int64_t channels) {
  const int64_t K = rc__prod3(g->k), plane = rc__prod3(g->img);
  for (int64_t r = 0; r < channels * K; r++)
    rc__tap_walk(RC_TAP_SCATTER, (float *)(col + r * ld), img + (r / K) * plane, g, r % K, 1.0f);
}