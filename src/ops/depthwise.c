/* Depthwise convolution (one input and one output channel per group) with
 * direct vector kernels, for one or two spatial axes.
 *
 * Each input plane is first copied into a zero-bordered plane xp (Hp, Wp)
 * that covers every cell a window reads, so no tap needs a bounds test. With
 * stride 1 the output is computed on xp's grid: cell (oy, ox) sits at
 * i = oy*Wp + ox and tap (kh, kw) reads xp[i + kh*dh*Wp + kw*dw], so every
 * tap is one long multiply-add over the whole plane (the Wp - Wo columns past
 * each row's end are computed and dropped). Short rows (8x8 maps and below)
 * then cost no more loop overhead than long ones. Other strides go row by
 * row with strided loads.
 *
 * The innermost loops are compiled for AVX-512, AVX2 and the baseline and
 * picked at run time (kernel_choice.h). No multiply-add is contracted (ISO C
 * mode) and sums keep 16 lanes in a fixed order, so every level gives the
 * same bits. Forward and the input gradient add in the reference path's
 * order and give its bits too; the weight gradient sums in another order.
 *
 * Shapes: x (N,C,H,W), w (C,1,KH,KW), b (C), y (N,C,Ho,Wo); 1-D is H = 1. */
#include <omp.h>
#include <string.h>

#include "ops/conv_impl.h"
#include "ops/kernel_choice.h"

#define LANES 16

typedef struct dw_prims {
  /* y[i] += w * x[i*s], i < n */
  void (*gather_add)(float *restrict y, const float *restrict x, int64_t s, float w, int64_t n);
  /* y[i*s] += w * x[i], i < n */
  void (*scatter_add)(float *restrict y, int64_t s, const float *restrict x, float w, int64_t n);
  /* sum of a[i] * b[i*s], i < n */
  double (*dot)(const float *a, const float *b, int64_t s, int64_t n);
} dw_prims;

/* The unit-stride loops are separate so that the compiler vectorises them
 * with plain loads. */
#define DW_PRIMS(isa, attr)                                                                                       \
  static attr void gather_add_##isa(float *restrict y, const float *restrict x, int64_t s, float w, int64_t n) {  \
    if (s == 1)                                                                                                   \
      for (int64_t i = 0; i < n; i++) y[i] += w * x[i];                                                           \
    else                                                                                                          \
      for (int64_t i = 0; i < n; i++) y[i] += w * x[i * s];                                                       \
  }                                                                                                               \
  static attr void scatter_add_##isa(float *restrict y, int64_t s, const float *restrict x, float w, int64_t n) { \
    if (s == 1)                                                                                                   \
      for (int64_t i = 0; i < n; i++) y[i] += w * x[i];                                                           \
    else                                                                                                          \
      for (int64_t i = 0; i < n; i++) y[i * s] += w * x[i];                                                       \
  }                                                                                                               \
  static attr double dot_##isa(const float *a, const float *b, int64_t s, int64_t n) {                            \
    float acc[LANES] = {0};                                                                                       \
    int64_t j = 0;                                                                                                \
    if (s == 1)                                                                                                   \
      for (; j + LANES <= n; j += LANES)                                                                          \
        for (int l = 0; l < LANES; l++) acc[l] += a[j + l] * b[j + l];                                            \
    else                                                                                                          \
      for (; j + LANES <= n; j += LANES)                                                                          \
        for (int l = 0; l < LANES; l++) acc[l] += a[j + l] * b[(j + l) * s];                                      \
    for (int l = 0; j < n; j++, l++) acc[l] += a[j] * b[j * s];                                                   \
    for (int w = LANES / 2; w >= 1; w /= 2)                                                                       \
      for (int l = 0; l < w; l++) acc[l] += acc[l + w];                                                           \
    return acc[0];                                                                                                \
  }

#if defined(__GNUC__) && defined(__x86_64__)
DW_PRIMS(avx512, __attribute__((target("avx512f"))))
DW_PRIMS(avx2, __attribute__((target("avx2"))))
#endif
DW_PRIMS(base, )

static dw_prims prims_for(rc__isa level) {
#if defined(__GNUC__) && defined(__x86_64__)
  if (level == RC_ISA_AVX512) return (dw_prims){gather_add_avx512, scatter_add_avx512, dot_avx512};
  if (level == RC_ISA_AVX2) return (dw_prims){gather_add_avx2, scatter_add_avx2, dot_avx2};
#endif
  (void)level;
  return (dw_prims){gather_add_base, scatter_add_base, dot_base};
}

/* One plane's geometry on the bordered grid. */
typedef struct dw_plane {
  int64_t H, W, Ho, Wo, Hp, Wp, KH, KW, sh, sw, dh, dw, ph, pw;
  int64_t flat; /* cells of the flat stride-1 run: (Ho-1)*Wp + Wo; 0 for the row walk */
} dw_plane;

static dw_plane plane_of(const rc__conv_geom *g) {
  const rc__patch *p = &g->p;
  dw_plane d = {p->img[1], p->img[2], p->pos[1], p->pos[2], 0,         0,         p->k[1], p->k[2],
                p->s[1],   p->s[2],   p->d[1],   p->d[2],   p->pad[1], p->pad[2], 0};
  d.Hp = (d.Ho - 1) * d.sh + (d.KH - 1) * d.dh + 1;
  d.Wp = (d.Wo - 1) * d.sw + (d.KW - 1) * d.dw + 1;
  if (d.sh == 1 && d.sw == 1) d.flat = (d.Ho - 1) * d.Wp + d.Wo;
  return d;
}

int rc__depthwise_fits(const rc__conv_geom *g) {
  return rc__conv_depthwise(g) && g->p.k[0] == 1 && g->p.img[0] == 1 && g->p.pos[0] == 1 && g->out_sp > 0 &&
         g->K <= RC_DEPTHWISE_MAX_TAPS;
}

/* Floats per thread: the bordered input, and for backward the bordered
 * output gradient and input gradient. */
static size_t thread_floats(const dw_plane *d, int backward) {
  return (size_t)(d->Hp * d->Wp) * (backward ? 3 : 2);
}

/* Threads: no more than items, cores, or per-thread workspace copies. */
static int team_size(int64_t items, size_t per, size_t work_bytes) {
  int64_t t = omp_get_max_threads();
  if (t > items) t = items;
  if ((size_t)t > work_bytes / (sizeof(float) * per)) t = (int64_t)(work_bytes / (sizeof(float) * per));
  return t > 1 ? (int)t : 1;
}

size_t rc__depthwise_workspace(const rc__conv_geom *g, int backward, int threads) {
  const dw_plane d = plane_of(g);
  return sizeof(float) * (size_t)(threads > 1 ? threads : 1) * thread_floats(&d, backward);
}

/* xp (Hp, Wp) <- x (H, W) placed at (ph, pw), zeros elsewhere; cells of x
 * beyond the bordered grid are never read and are left out. */
static void border_copy(float *xp, const float *x, const dw_plane *d) {
  memset(xp, 0, sizeof(float) * (size_t)(d->Hp * d->Wp));
  for (int64_t r = 0; r < d->H && r + d->ph < d->Hp; r++) {
    int64_t c0 = d->pw, n = d->W;
    if (c0 + n > d->Wp) n = d->Wp - c0;
    if (n > 0) memcpy(xp + (r + d->ph) * d->Wp + c0, x + r * d->W, sizeof(float) * (size_t)n);
  }
}

/* x (H, W) <- the interior of xp: the inverse of border_copy on its cells. */
static void interior_copy(float *x, const float *xp, const dw_plane *d) {
  for (int64_t r = 0; r < d->H && r + d->ph < d->Hp; r++) {
    int64_t n = d->W;
    if (d->pw + n > d->Wp) n = d->Wp - d->pw;
    if (n > 0) memcpy(x + r * d->W, xp + (r + d->ph) * d->Wp + d->pw, sizeof(float) * (size_t)n);
  }
}

/* y (Ho, Wo) = bias + sum over taps of w[tap] * (window of xp); acc holds the
 * flat run when the stride is 1. */
static void plane_forward(const dw_prims *f, const dw_plane *d, float *y, const float *xp, const float *w,
                          float bias, float *acc) {
  if (d->flat) {
    for (int64_t i = 0; i < d->flat; i++) acc[i] = bias;
    for (int64_t kh = 0; kh < d->KH; kh++)
      for (int64_t kw = 0; kw < d->KW; kw++)
        f->gather_add(acc, xp + kh * d->dh * d->Wp + kw * d->dw, 1, w[kh * d->KW + kw], d->flat);
    for (int64_t oy = 0; oy < d->Ho; oy++) memcpy(y + oy * d->Wo, acc + oy * d->Wp, sizeof(float) * (size_t)d->Wo);
    return;
  }
  for (int64_t oy = 0; oy < d->Ho; oy++) {
    float *yr = y + oy * d->Wo;
    for (int64_t i = 0; i < d->Wo; i++) yr[i] = bias;
    for (int64_t kh = 0; kh < d->KH; kh++) {
      const float *xr = xp + (oy * d->sh + kh * d->dh) * d->Wp;
      for (int64_t kw = 0; kw < d->KW; kw++) f->gather_add(yr, xr + kw * d->dw, d->sw, w[kh * d->KW + kw], d->Wo);
    }
  }
}

void rc__depthwise_forward(const rc__conv_geom *g, float *y, const float *x, const float *w, const float *b,
                           float *work, size_t work_bytes) {
  const dw_plane d = plane_of(g);
  const dw_prims f = prims_for(rc__isa_level());
  const int64_t planes = g->N * g->C, K = g->K;
  const size_t per = thread_floats(&d, 0);
  const int T = planes * K * g->out_sp > 32768 ? team_size(planes, per, work_bytes) : 1;
#pragma omp parallel for num_threads(T) schedule(static) if (T > 1)
  for (int64_t pl = 0; pl < planes; pl++) {
    float *xp = work + (size_t)omp_get_thread_num() * per, *acc = xp + d.Hp * d.Wp;
    const int64_t c = pl % g->C;
    border_copy(xp, x + pl * g->in_sp, &d);
    plane_forward(&f, &d, y + pl * g->out_sp, xp, w + c * K, b ? b[c] : 0.0f, acc);
  }
}

/* dxp += the taps' scatter of dy; dyp holds dy on the flat grid when the
 * stride is 1 (zeros in the dropped columns). */
static void plane_input_grad(const dw_prims *f, const dw_plane *d, float *dxp, const float *dy, const float *w,
                             float *dyp) {
  if (d->flat) {
    memset(dyp, 0, sizeof(float) * (size_t)d->flat);
    for (int64_t oy = 0; oy < d->Ho; oy++)
      memcpy(dyp + oy * d->Wp, dy + oy * d->Wo, sizeof(float) * (size_t)d->Wo);
    for (int64_t kh = 0; kh < d->KH; kh++)
      for (int64_t kw = 0; kw < d->KW; kw++)
        f->scatter_add(dxp + kh * d->dh * d->Wp + kw * d->dw, 1, dyp, w[kh * d->KW + kw], d->flat);
    return;
  }
  for (int64_t kh = 0; kh < d->KH; kh++)
    for (int64_t kw = 0; kw < d->KW; kw++)
      for (int64_t oy = 0; oy < d->Ho; oy++)
        f->scatter_add(dxp + (oy * d->sh + kh * d->dh) * d->Wp + kw * d->dw, d->sw, dy + oy * d->Wo,
                       w[kh * d->KW + kw], d->Wo);
}

/* dw[tap] (KH*KW) partial sums of <dy, window of xp>, added into acc in double. */
static void plane_weight_grad(const dw_prims *f, const dw_plane *d, double *acc, const float *xp, const float *dy,
                              const float *dyp) {
  for (int64_t kh = 0; kh < d->KH; kh++)
    for (int64_t kw = 0; kw < d->KW; kw++) {
      const float *base = xp + kh * d->dh * d->Wp + kw * d->dw;
      double s = 0;
      if (d->flat)
        s = f->dot(dyp, base, 1, d->flat);
      else
        for (int64_t oy = 0; oy < d->Ho; oy++)
          s += f->dot(dy + oy * d->Wo, base + oy * d->sh * d->Wp, d->sw, d->Wo);
      acc[kh * d->KW + kw] += s;
    }
}

/* Channels are shared out among threads and each walks the batch in order,
 * so the weight gradient needs no reduction across threads and does not
 * depend on their number. */
void rc__depthwise_backward(const rc__conv_geom *g, float *dx, float *dw, const float *x, const float *w,
                            const float *dy, float *work, size_t work_bytes) {
  const dw_plane d = plane_of(g);
  const dw_prims f = prims_for(rc__isa_level());
  const int64_t K = g->K, C = g->C;
  const size_t per = thread_floats(&d, 1);
  const int T = g->N * C * K * g->out_sp > 32768 ? team_size(C, per, work_bytes) : 1;
#pragma omp parallel for num_threads(T) schedule(static) if (T > 1)
  for (int64_t c = 0; c < C; c++) {
    float *xp = work + (size_t)omp_get_thread_num() * per, *dyp = xp + d.Hp * d.Wp, *dxp = dyp + d.Hp * d.Wp;
    double acc[RC_DEPTHWISE_MAX_TAPS] = {0};
    for (int64_t n = 0; n < g->N; n++) {
      const int64_t pl = n * C + c;
      if (dx) {
        border_copy(dxp, dx + pl * g->in_sp, &d);
        plane_input_grad(&f, &d, dxp, dy + pl * g->out_sp, w + c * K, dyp);
        interior_copy(dx + pl * g->in_sp, dxp, &d);
      }
      if (dw) {
        border_copy(xp, x + pl * g->in_sp, &d);
        if (d.flat && !dx) {
          memset(dyp, 0, sizeof(float) * (size_t)d.flat);
          for (int64_t oy = 0; oy < d.Ho; oy++)
            memcpy(dyp + oy * d.Wp, dy + pl * g->out_sp + oy * d.Wo, sizeof(float) * (size_t)d.Wo);
        }
        plane_weight_grad(&f, &d, acc, xp, dy + pl * g->out_sp, dyp);
      }
    }
    if (dw)
      for (int64_t k = 0; k < K; k++) dw[c * K + k] += (float)acc[k];
  }
}
