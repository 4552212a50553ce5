/* Depthwise convolution (one input and one output channel per group) with
 * direct vector kernels, for one or two spatial axes.
 *
 * Each input plane is first copied into a zero-bordered grid that covers
 * every cell a window reads, split by stride phase: cell (R, C) of the
 * bordered plane goes to phase (R % sh, C % sw) at (R / sh, C / sw), each
 * phase a (Hq, Wq) plane. Tap (kh, kw) of output cell (oy, ox) then reads
 * phase (u % sh, v % sw) at (oy + u / sh, ox + v / sw), with u = kh*dh and
 * v = kw*dw: on the phase grid, output cell i = oy*Wq + ox reads cell
 * i + (u / sh)*Wq + v / sw. So every tap is one unit-stride multiply-add over
 * the whole plane whatever the stride (the Wq - Wo columns past each row's
 * end are computed and dropped), and short rows (8x8 maps and below) cost no
 * more loop overhead than long ones.
 *
 * The innermost loops are compiled for AVX-512, AVX2 and the baseline and
 * picked at run time (kernel_choice.h). No multiply-add is contracted (ISO C
 * mode) and sums keep 16 lanes in a fixed order, so every level gives the
 * same bits. Forward and the input gradient add in the plain path's order
 * and give its bits too; the weight gradient sums in another order.
 *
 * Shapes: x (N,C,H,W), w (C,1,KH,KW), b (C), y (N,C,Ho,Wo); 1-D is H = 1. */
#include <omp.h>
#include <string.h>

#include "ops/conv_impl.h"
#include "ops/epilogue.h"
#include "ops/kernel_choice.h"

#define LANES 16

typedef struct dw_prims {
  /* y[i] += w * x[i], i < n */
  void (*axpy)(float *restrict y, const float *restrict x, float w, int64_t n);
  /* sum of a[i] * b[i], i < n */
  double (*dot)(const float *a, const float *b, int64_t n);
} dw_prims;

#define DW_PRIMS(isa, attr)                                                                     \
  static attr void axpy_##isa(float *restrict y, const float *restrict x, float w, int64_t n) { \
    for (int64_t i = 0; i < n; i++) y[i] += w * x[i];                                           \
  }                                                                                             \
  static attr double dot_##isa(const float *a, const float *b, int64_t n) {                     \
    float acc[LANES] = {0};                                                                     \
    int64_t j = 0;                                                                              \
    for (; j + LANES <= n; j += LANES)                                                          \
      for (int l = 0; l < LANES; l++) acc[l] += a[j + l] * b[j + l];                            \
    for (int l = 0; j < n; j++, l++) acc[l] += a[j] * b[j];                                     \
    for (int w = LANES / 2; w >= 1; w /= 2)                                                     \
      for (int l = 0; l < w; l++) acc[l] += acc[l + w];                                         \
    return acc[0];                                                                              \
  }

#if defined(__GNUC__) && defined(__x86_64__)
DW_PRIMS(avx512, __attribute__((target("avx512f"))))
DW_PRIMS(avx2, __attribute__((target("avx2"))))
#endif
DW_PRIMS(base, )

static dw_prims prims_for(rc__isa level) {
#if defined(__GNUC__) && defined(__x86_64__)
  if (level == RC_ISA_AVX512) return (dw_prims){axpy_avx512, dot_avx512};
  if (level == RC_ISA_AVX2) return (dw_prims){axpy_avx2, dot_avx2};
#endif
  (void)level;
  return (dw_prims){axpy_base, dot_base};
}

/* One plane's geometry on the phase grid. */
typedef struct dw_plane {
  int64_t H, W, Ho, Wo, KH, KW, sh, sw, dh, dw, ph, pw;
  int64_t Hp, Wp; /* the bordered plane */
  int64_t Hq, Wq; /* one phase */
  int64_t grid;   /* floats of all phases: sh*sw*Hq*Wq */
  int64_t flat;   /* cells of one tap's run: (Ho-1)*Wq + Wo */
} dw_plane;

static dw_plane plane_of(const rc__conv_geom *g) {
  const rc__patch *p = &g->p;
  dw_plane d = {p->img[1], p->img[2], p->pos[1], p->pos[2], p->k[1], p->k[2], p->s[1], p->s[2], p->d[1],
                p->d[2],   p->pad[1], p->pad[2], 0,         0,       0,       0,       0,       0};
  d.Hp = (d.Ho - 1) * d.sh + (d.KH - 1) * d.dh + 1;
  d.Wp = (d.Wo - 1) * d.sw + (d.KW - 1) * d.dw + 1;
  d.Hq = (d.Hp + d.sh - 1) / d.sh;
  d.Wq = (d.Wp + d.sw - 1) / d.sw;
  d.grid = d.sh * d.sw * d.Hq * d.Wq;
  d.flat = (d.Ho - 1) * d.Wq + d.Wo;
  return d;
}

/* Where tap (kh, kw) starts reading in the phase grid. */
static int64_t tap_offset(const dw_plane *d, int64_t kh, int64_t kw) {
  const int64_t u = kh * d->dh, v = kw * d->dw;
  return ((u % d->sh) * d->sw + v % d->sw) * d->Hq * d->Wq + (u / d->sh) * d->Wq + v / d->sw;
}

int rc__depthwise_fits(const rc__conv_geom *g) {
  return rc__conv_depthwise(g) && g->p.k[0] == 1 && g->p.img[0] == 1 && g->p.pos[0] == 1 && g->out_sp > 0 &&
         g->K <= RC_DEPTHWISE_MAX_TAPS;
}

/* Floats per thread: the input's phase grid and a flat run (forward), plus
 * the input gradient's phase grid (backward). */
static size_t thread_floats(const dw_plane *d, int backward) {
  return (size_t)d->grid * (backward ? 2 : 1) + (size_t)d->Hq * (size_t)d->Wq;
}

size_t rc__depthwise_workspace(const rc__conv_geom *g, int backward, int threads) {
  const dw_plane d = plane_of(g);
  return sizeof(float) * (size_t)(threads > 1 ? threads : 1) * thread_floats(&d, backward);
}

/* Threads: no more than items, cores, or per-thread workspace copies. */
static int team_size(int64_t items, size_t per, size_t work_bytes) {
  int64_t t = omp_get_max_threads();
  if (t > items) t = items;
  if ((size_t)t > work_bytes / (sizeof(float) * per)) t = (int64_t)(work_bytes / (sizeof(float) * per));
  return t > 1 ? (int)t : 1;
}

/* Moves the cells of x (H, W) that windows read to or from the phase grid
 * xq, one row and one column phase at a time: phase b of a row holds the
 * input columns q*sw + b - pw, a strided run the compiler turns into
 * vector loads or stores. */
static void move_cells(float *xq, float *x, const dw_plane *d, int into_grid) {
  int64_t n = d->W;
  if (d->pw + n > d->Wp) n = d->Wp - d->pw;
  const int64_t phase = d->Hq * d->Wq, sw = d->sw;
  for (int64_t r = 0; r < d->H && n > 0; r++) {
    const int64_t R = r + d->ph;
    if (R >= d->Hp) break;
    float *xr = x + r * d->W, *row = xq + (R % d->sh) * sw * phase + (R / d->sh) * d->Wq;
    if (sw == 1) {
      if (into_grid)
        memcpy(row + d->pw, xr, sizeof(float) * (size_t)n);
      else
        memcpy(xr, row + d->pw, sizeof(float) * (size_t)n);
      continue;
    }
    for (int64_t b = 0; b < sw; b++) {
      /* q with 0 <= q*sw + b - pw < n */
      const int64_t lo = d->pw > b ? (d->pw - b + sw - 1) / sw : 0, hi = (n + d->pw - b + sw - 1) / sw;
      float *dst = row + b * phase;
      const int64_t shift = b - d->pw;
      if (into_grid)
        for (int64_t q = lo; q < hi; q++) dst[q] = xr[q * sw + shift];
      else
        for (int64_t q = lo; q < hi; q++) xr[q * sw + shift] = dst[q];
    }
  }
}

/* xq (phase grid) <- x (H, W), zeros where windows read padding. */
static void to_grid(float *xq, const float *x, const dw_plane *d) {
  memset(xq, 0, sizeof(float) * (size_t)d->grid);
  move_cells(xq, (float *)x, d, 1);
}

/* x (H, W) <- its cells in the phase grid: the inverse of to_grid on them. */
static void from_grid(float *x, const float *xq, const dw_plane *d) { move_cells((float *)xq, x, d, 0); }

/* y (Ho, Wo) = bias + sum over taps of w[tap] * (tap's run of xq). */
static void plane_forward(const dw_prims *f, const dw_plane *d, float *y, const float *xq, const float *w,
                          float bias, float *run) {
  for (int64_t i = 0; i < d->flat; i++) run[i] = bias;
  for (int64_t kh = 0; kh < d->KH; kh++)
    for (int64_t kw = 0; kw < d->KW; kw++) f->axpy(run, xq + tap_offset(d, kh, kw), w[kh * d->KW + kw], d->flat);
  for (int64_t oy = 0; oy < d->Ho; oy++) memcpy(y + oy * d->Wo, run + oy * d->Wq, sizeof(float) * (size_t)d->Wo);
}

void rc__depthwise_forward(const rc__conv_geom *g, float *y, const float *x, const float *w, const float *b,
                           float *work, size_t work_bytes, const rc__epilogue *ep) {
  const dw_plane d = plane_of(g);
  const dw_prims f = prims_for(rc__isa_level());
  const int64_t planes = g->N * g->C, K = g->K;
  const size_t per = thread_floats(&d, 0);
  const int T = planes * K * g->out_sp > 32768 ? team_size(planes, per, work_bytes) : 1;
#pragma omp parallel for num_threads(T) schedule(static) if (T > 1)
  for (int64_t pl = 0; pl < planes; pl++) {
    float *xq = work + (size_t)omp_get_thread_num() * per, *run = xq + d.grid;
    const int64_t c = pl % g->C;
    to_grid(xq, x + pl * g->in_sp, &d);
    plane_forward(&f, &d, y + pl * g->out_sp, xq, w + c * K, b ? b[c] : 0.0f, run);
    if (ep) rc__epilogue_apply(ep, y, pl, pl + 1, g->C, g->out_sp); /* the plane is still in cache */
  }
}

/* run <- dy (Ho, Wo) on the flat layout, zeros in the dropped columns. */
static void to_run(float *run, const float *dy, const dw_plane *d) {
  memset(run, 0, sizeof(float) * (size_t)d->flat);
  for (int64_t oy = 0; oy < d->Ho; oy++) memcpy(run + oy * d->Wq, dy + oy * d->Wo, sizeof(float) * (size_t)d->Wo);
}

/* dxq += each tap's w-weighted run of dy. */
static void plane_input_grad(const dw_prims *f, const dw_plane *d, float *dxq, const float *run, const float *w) {
  for (int64_t kh = 0; kh < d->KH; kh++)
    for (int64_t kw = 0; kw < d->KW; kw++) f->axpy(dxq + tap_offset(d, kh, kw), run, w[kh * d->KW + kw], d->flat);
}

/* acc[tap] += <run of dy, tap's run of xq>. */
static void plane_weight_grad(const dw_prims *f, const dw_plane *d, double *acc, const float *xq,
                              const float *run) {
  for (int64_t kh = 0; kh < d->KH; kh++)
    for (int64_t kw = 0; kw < d->KW; kw++)
      acc[kh * d->KW + kw] += f->dot(run, xq + tap_offset(d, kh, kw), d->flat);
}

/* Channels are shared out among threads and each walks the batch in order,
 * so the weight gradient needs no reduction across threads and does not
 * depend on their number. The input gradient starts from dx's own values
 * (moved into the grid and back), so it adds in the plain path's order. */
void rc__depthwise_backward(const rc__conv_geom *g, float *dx, float *dw, const float *x, const float *w,
                            const float *dy, float *work, size_t work_bytes) {
  const dw_plane d = plane_of(g);
  const dw_prims f = prims_for(rc__isa_level());
  const int64_t K = g->K, C = g->C;
  const size_t per = thread_floats(&d, 1);
  const int T = g->N * C * K * g->out_sp > 32768 ? team_size(C, per, work_bytes) : 1;
#pragma omp parallel for num_threads(T) schedule(static) if (T > 1)
  for (int64_t c = 0; c < C; c++) {
    float *xq = work + (size_t)omp_get_thread_num() * per, *dxq = xq + d.grid, *run = dxq + d.grid;
    double acc[RC_DEPTHWISE_MAX_TAPS] = {0};
    for (int64_t n = 0; n < g->N; n++) {
      const int64_t pl = n * C + c;
      to_run(run, dy + pl * g->out_sp, &d);
      if (dx) {
        to_grid(dxq, dx + pl * g->in_sp, &d);
        plane_input_grad(&f, &d, dxq, run, w + c * K);
        from_grid(dx + pl * g->in_sp, dxq, &d);
      }
      if (dw) {
        to_grid(xq, x + pl * g->in_sp, &d);
        plane_weight_grad(&f, &d, acc, xq, run);
      }
    }
    if (dw)
      for (int64_t k = 0; k < K; k++) dw[c * K + k] += (float)acc[k];
  }
}
