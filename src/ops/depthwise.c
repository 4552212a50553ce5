/* Depthwise convolution (one input channel per group, one or more output
 * channels per group) with direct vector kernels, for one or two spatial
 * axes.
 *
 * Each input plane is copied into a zero-bordered grid that covers every
 * cell a window reads, split by stride phase: cell (R, C) of the bordered
 * plane goes to phase (R % sh, C % sw) at (R / sh, C / sw), each phase a
 * (Hq, Wq) plane. Tap (kh, kw) of output cell (oy, ox) then reads phase
 * (u % sh, v % sw) at (oy + u / sh, ox + v / sw), with u = kh*dh and
 * v = kw*dw: on the phase grid, output cell i = oy*Wq + ox reads cell
 * i + (u / sh)*Wq + v / sw, a unit-stride run whatever the stride. The
 * grid's border is zeroed once per call (the cells a plane fills are the
 * same for every plane), so a plane costs one copy of its cells.
 *
 * The kernels keep a strip of 16 results in registers and apply every tap
 * to it before storing (one load per tap instead of a load and a store of
 * the partial sums per tap and pass over the plane). Rows of 16 outputs or
 * more are computed row by row straight into y; shorter rows take the flat
 * run of (Ho-1)*Wq + Wo cells (the Wq - Wo columns past each row's end are
 * computed and dropped), so 8x8 maps and below still fill whole vectors.
 * The input gradient is the same stencil gathered from the output
 * gradient's run: at stride 1 straight into dx's rows, otherwise into the
 * phase grid of dx, phase by phase (only the taps of that phase reach it).
 * The weight gradient keeps 16 lanes per tap and reads each output
 * gradient value once for all taps.
 *
 * The kernels are compiled for AVX-512, AVX2 and the baseline and picked at
 * run time (kernel_choice.h). No multiply-add is contracted (ISO C mode)
 * and sums keep 16 lanes in a fixed order, so every level gives the same
 * bits. Forward and the input gradient add in the plain path's order (the
 * taps in order, starting from the bias or dx's own value) and give its
 * bits too; the weight gradient sums in another order.
 *
 * Shapes: x (N,C,H,W), w (M,1,KH,KW), b (M), y (N,M,Ho,Wo) with M a multiple
 * of C (group = C; output channel m reads input channel m / (M/C)); 1-D is
 * H = 1. */
#include <omp.h>
#include <string.h>

#include "ops/conv_impl.h"
#include "ops/epilogue.h"
#include "ops/kernel_choice.h"

#define LANES 16
/* Rows at least this long are computed row by row, shorter ones as a flat run. */
#define ROW_MIN LANES

#if defined(__GNUC__)
#define RC_DW_INLINE __attribute__((always_inline))
#else
#define RC_DW_INLINE
#endif

/* One plane's geometry on the phase grid. */
typedef struct dw_plane {
  int64_t H, W, Ho, Wo, KH, KW, sh, sw, dh, dw, ph, pw;
  int64_t Hp, Wp;   /* the bordered plane */
  int64_t Hq, Wq;   /* one phase */
  int64_t grid;     /* floats of all phases: sh*sw*Hq*Wq */
  int64_t flat;     /* cells of one tap's run: (Ho-1)*Wq + Wo */
  int64_t margin;   /* zeros before the output gradient's run: the largest tap shift */
  int64_t run_size; /* floats of that run with its margin: margin + Hq*Wq */
} dw_plane;

/* Stride 2: input column j is bordered column J = j + pw, in column phase
 * J % 2 at J / 2. Both phases at once, so that loads and stores run over
 * whole input rows (interleaving shuffles instead of single floats). */
static inline RC_DW_INLINE void move_pairs(float *p0, float *p1, float *xr, int64_t pw, int64_t n, int into_grid) {
  int64_t j = 0;
  if (pw % 2 && n > 0) { /* J odd: phase 1 */
    if (into_grid)
      p1[pw / 2] = xr[0];
    else
      xr[0] = p1[pw / 2];
    j = 1;
  }
  const int64_t q0 = (j + pw) / 2, pairs = (n - j) / 2;
  float *a = p0 + q0, *b = p1 + q0, *x = xr + j;
  if (into_grid)
    for (int64_t k = 0; k < pairs; k++) a[k] = x[2 * k], b[k] = x[2 * k + 1];
  else
    for (int64_t k = 0; k < pairs; k++) x[2 * k] = a[k], x[2 * k + 1] = b[k];
  j += 2 * pairs;
  if (j < n) { /* J even: phase 0 */
    if (into_grid)
      p0[(j + pw) / 2] = xr[j];
    else
      xr[j] = p0[(j + pw) / 2];
  }
}

/* Moves the cells of x (H, W) that windows read to or from the phase grid
 * xq, one row and one column phase at a time: phase b of a row holds the
 * input columns q*sw + b - pw, a strided run the compiler turns into
 * vector loads or stores (each instruction-set level has its copy). The
 * grid's other cells are left as they are. */
static inline RC_DW_INLINE void move_body(float *xq, float *x, const dw_plane *d, int into_grid) {
  int64_t n = d->W;
  if (d->pw + n > d->Wp) n = d->Wp - d->pw;
  const int64_t phase = d->Hq * d->Wq, sw = d->sw;
  for (int64_t r = 0; r < d->H && n > 0; r++) {
    const int64_t R = r + d->ph;
    if (R >= d->Hp) break;
    /* no divisions at stride 1: small planes are mostly per-row cost */
    float *xr = x + r * d->W, *row = d->sh == 1 ? xq + R * d->Wq : xq + (R % d->sh) * sw * phase + (R / d->sh) * d->Wq;
    if (sw == 1 && n >= 4 * LANES) {
      if (into_grid)
        memcpy(row + d->pw, xr, sizeof(float) * (size_t)n);
      else
        memcpy(xr, row + d->pw, sizeof(float) * (size_t)n);
      continue;
    }
    if (sw == 1) { /* short rows: an inline loop costs less than the call */
      float *g = row + d->pw;
      if (into_grid)
        for (int64_t q = 0; q < n; q++) g[q] = xr[q];
      else
        for (int64_t q = 0; q < n; q++) xr[q] = g[q];
      continue;
    }
    if (sw == 2) {
      move_pairs(row, row + phase, xr, d->pw, n, into_grid);
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

/* run <- dy (Ho, Wo) at row stride Wq; the cells around stay zero. */
static inline RC_DW_INLINE void to_run_body(float *run, const float *dy, const dw_plane *d) {
  for (int64_t oy = 0; oy < d->Ho; oy++)
    for (int64_t ox = 0; ox < d->Wo; ox++) run[oy * d->Wq + ox] = dy[oy * d->Wo + ox];
}

/* One stencil: out[i] = init[i] (or init_c) + sum over taps t, in order, of
 * wt[t] * src[i + off[t]], for i < n. out may be init. */
typedef struct dw_stencil {
  const float *src;
  const int64_t *off;
  const float *wt;
  int taps;
} dw_stencil;

typedef struct dw_kernels {
  void (*apply)(float *out, const float *init, float init_c, const dw_stencil *s, int64_t n);
  /* lanes[t*LANES + l] += a[i] * src[i + off[t]] over i < n, i % LANES == l */
  void (*dots)(float *lanes, const float *a, const dw_stencil *s, int64_t n);
  void (*move)(float *xq, float *x, const dw_plane *d, int into_grid); /* move_body */
  void (*to_run)(float *run, const float *dy, const dw_plane *d);    /* to_run_body */
} dw_kernels;

#if defined(__GNUC__)
typedef float v16 __attribute__((vector_size(LANES * sizeof(float))));
typedef float v16u __attribute__((vector_size(LANES * sizeof(float)), aligned(sizeof(float)), may_alias));
#define LOAD(p) (*(const v16u *)(p))
#define STORE(p, v) (*(v16u *)(p) = (v))

/* The bodies, inlined into each instruction-set variant with the tap count
 * a constant where it is 9 (3x3 windows: the accumulators stay in registers). */
static inline __attribute__((always_inline)) void apply_body(float *out, const float *init, float init_c,
                                                             const dw_stencil *s, int64_t n, int taps) {
  int64_t i = 0;
  for (; i + LANES <= n; i += LANES) {
    v16 acc;
    if (init)
      acc = LOAD(init + i);
    else
      acc = (v16){0} + init_c;
    for (int t = 0; t < taps; t++) acc += s->wt[t] * LOAD(s->src + s->off[t] + i);
    STORE(out + i, acc);
  }
  for (; i < n; i++) {
    float acc = init ? init[i] : init_c;
    for (int t = 0; t < taps; t++) acc += s->wt[t] * s->src[s->off[t] + i];
    out[i] = acc;
  }
}

static inline __attribute__((always_inline)) void dots_body(float *lanes, const float *a, const dw_stencil *s,
                                                            int64_t n, int taps) {
  v16 acc[RC_DEPTHWISE_MAX_TAPS];
  for (int t = 0; t < taps; t++) acc[t] = LOAD(lanes + t * LANES);
  int64_t i = 0;
  for (; i + LANES <= n; i += LANES) {
    const v16 av = LOAD(a + i);
    for (int t = 0; t < taps; t++) acc[t] += av * LOAD(s->src + s->off[t] + i);
  }
  for (int t = 0; t < taps; t++) STORE(lanes + t * LANES, acc[t]);
  for (int l = 0; i < n; i++, l++)
    for (int t = 0; t < taps; t++) lanes[t * LANES + l] += a[i] * s->src[s->off[t] + i];
}

#define DW_KERNELS(isa, attr)                                                                           \
  static attr void apply_##isa(float *out, const float *init, float init_c, const dw_stencil *s,       \
                               int64_t n) {                                                            \
    if (s->taps == 9)                                                                                  \
      apply_body(out, init, init_c, s, n, 9);                                                          \
    else                                                                                               \
      apply_body(out, init, init_c, s, n, s->taps);                                                    \
  }                                                                                                    \
  static attr void dots_##isa(float *lanes, const float *a, const dw_stencil *s, int64_t n) {          \
    if (s->taps == 9)                                                                                  \
      dots_body(lanes, a, s, n, 9);                                                                    \
    else                                                                                               \
      dots_body(lanes, a, s, n, s->taps);                                                              \
  }
#else
/* Without GNU vector types: the same sums, one lane at a time. */
#define DW_KERNELS(isa, attr)                                                                           \
  static void apply_##isa(float *out, const float *init, float init_c, const dw_stencil *s, int64_t n) { \
    for (int64_t i = 0; i < n; i++) {                                                                  \
      float acc = init ? init[i] : init_c;                                                             \
      for (int t = 0; t < s->taps; t++) acc += s->wt[t] * s->src[s->off[t] + i];                       \
      out[i] = acc;                                                                                    \
    }                                                                                                  \
  }                                                                                                    \
  static void dots_##isa(float *lanes, const float *a, const dw_stencil *s, int64_t n) {               \
    for (int64_t i = 0; i < n; i++)                                                                    \
      for (int t = 0; t < s->taps; t++) lanes[t * LANES + i % LANES] += a[i] * s->src[s->off[t] + i];  \
  }
#endif

/* The copies in and out of the grids, per level too. */
#define DW_COPIES(isa, attr)                                                                            \
  static attr void move_##isa(float *xq, float *x, const dw_plane *d, int into_grid) {                 \
    move_body(xq, x, d, into_grid);                                                                    \
  }                                                                                                    \
  static attr void to_run_##isa(float *run, const float *dy, const dw_plane *d) { to_run_body(run, dy, d); }

#if defined(__GNUC__) && defined(__x86_64__)
DW_COPIES(avx512, __attribute__((target("avx512f"))))
DW_COPIES(avx2, __attribute__((target("avx2"))))
DW_KERNELS(avx512, __attribute__((target("avx512f"))))
DW_KERNELS(avx2, __attribute__((target("avx2"))))
#endif
DW_KERNELS(base, )
DW_COPIES(base, )

static dw_kernels kernels_for(rc__isa level) {
#if defined(__GNUC__) && defined(__x86_64__)
  if (level == RC_ISA_AVX512) return (dw_kernels){apply_avx512, dots_avx512, move_avx512, to_run_avx512};
  if (level == RC_ISA_AVX2) return (dw_kernels){apply_avx2, dots_avx2, move_avx2, to_run_avx2};
#endif
  (void)level;
  return (dw_kernels){apply_base, dots_base, move_base, to_run_base};
}


static dw_plane plane_of(const rc__conv_geom *g) {
  const rc__patch *p = &g->p;
  dw_plane d = {p->img[1], p->img[2], p->pos[1], p->pos[2], p->k[1], p->k[2], p->s[1], p->s[2], p->d[1],
                p->d[2],   p->pad[1], p->pad[2], 0,         0,       0,       0,       0,       0,
                0,         0};
  d.Hp = (d.Ho - 1) * d.sh + (d.KH - 1) * d.dh + 1;
  d.Wp = (d.Wo - 1) * d.sw + (d.KW - 1) * d.dw + 1;
  d.Hq = (d.Hp + d.sh - 1) / d.sh;
  d.Wq = (d.Wp + d.sw - 1) / d.sw;
  d.grid = d.sh * d.sw * d.Hq * d.Wq;
  d.flat = (d.Ho - 1) * d.Wq + d.Wo;
  d.margin = ((d.KH - 1) * d.dh / d.sh) * d.Wq + (d.KW - 1) * d.dw / d.sw;
  d.run_size = d.margin + d.Hq * d.Wq;
  return d;
}

/* Where tap (kh, kw) starts reading in the phase grid. */
static int64_t tap_offset(const dw_plane *d, int64_t kh, int64_t kw) {
  const int64_t u = kh * d->dh, v = kw * d->dw;
  return ((u % d->sh) * d->sw + v % d->sw) * d->Hq * d->Wq + (u / d->sh) * d->Wq + v / d->sw;
}

/* How far back in its phase tap (kh, kw) reaches: (u / sh)*Wq + v / sw. */
static int64_t tap_shift(const dw_plane *d, int64_t kh, int64_t kw) {
  return (kh * d->dh / d->sh) * d->Wq + kw * d->dw / d->sw;
}

int rc__depthwise_fits(const rc__conv_geom *g) {
  return g->Cg == 1 && g->G == g->C && g->G > 1 && g->Mg >= 1 && g->p.k[0] == 1 && g->p.img[0] == 1 &&
         g->p.pos[0] == 1 && g->out_sp > 0 && g->Mg * g->K <= RC_DEPTHWISE_MAX_TAPS;
}

static int64_t round_lanes(int64_t n) { return (n + LANES - 1) / LANES * LANES; }

/* Floats per thread. Forward: the input's phase grid and a flat run (in
 * whole vectors).
 * Backward: the input's and the input gradient's phase grids and the output
 * gradient's run with its margin. */
static size_t thread_floats(const dw_plane *d, int backward) {
  if (backward) return (size_t)d->grid * 2 + (size_t)d->run_size;
  return (size_t)d->grid + (size_t)round_lanes(d->Hq * d->Wq);
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

/* The taps of a window in order, as offsets into the phase grid. */
static void forward_taps(const dw_plane *d, int64_t *off) {
  for (int64_t kh = 0; kh < d->KH; kh++)
    for (int64_t kw = 0; kw < d->KW; kw++) off[kh * d->KW + kw] = tap_offset(d, kh, kw);
}

/* y (Ho, Wo) = bias + sum over taps of w[tap] * (tap's run of xq). */
static void plane_forward(const dw_kernels *f, const dw_plane *d, float *y, dw_stencil *s, float bias, float *run) {
  const float *xq = s->src;
  if (d->Wo >= ROW_MIN) {
    for (int64_t oy = 0; oy < d->Ho; oy++) {
      s->src = xq + oy * d->Wq;
      f->apply(y + oy * d->Wo, NULL, bias, s, d->Wo);
    }
    s->src = xq;
    return;
  }
  /* Whole vectors: lanes past the run read at most LANES - 1 floats past the
   * grid (into run) and are dropped; 8x8 maps and below otherwise ran the
   * one-lane tail loop for most of their cells. */
  f->apply(run, NULL, bias, s, round_lanes(d->flat));
  for (int64_t oy = 0; oy < d->Ho; oy++)
    for (int64_t ox = 0; ox < d->Wo; ox++) y[oy * d->Wo + ox] = run[oy * d->Wq + ox];
}

void rc__depthwise_forward(const rc__conv_geom *g, float *y, const float *x, const float *w, const float *b,
                           float *work, size_t work_bytes, const rc__epilogue *ep) {
  const dw_plane d = plane_of(g);
  const dw_kernels f = kernels_for(rc__isa_level());
  const int64_t planes = g->N * g->C, K = g->K, mult = g->Mg;
  const size_t per = thread_floats(&d, 0);
  const int T = planes * mult * K * g->out_sp > 32768 ? team_size(planes, per, work_bytes) : 1;
  int64_t off[RC_DEPTHWISE_MAX_TAPS];
  forward_taps(&d, off);
#pragma omp parallel num_threads(T) if (T > 1)
  {
    float *xq = work + (size_t)omp_get_thread_num() * per, *run = xq + d.grid;
    memset(xq, 0, sizeof(float) * (size_t)d.grid);
#pragma omp for schedule(static)
    for (int64_t pl = 0; pl < planes; pl++) {
      f.move(xq, (float *)(x + pl * g->in_sp), &d, 1);
      /* input plane (n, c) feeds output planes (n, c*mult + j) */
      for (int64_t j = 0, m = (pl % g->C) * mult, out = pl * mult; j < mult; j++, m++, out++) {
        dw_stencil s = {xq, off, w + m * K, (int)K};
        plane_forward(&f, &d, y + out * g->out_sp, &s, b ? b[m] : 0.0f, run);
        if (ep) rc__epilogue_apply(ep, y, out, out + 1, g->M, g->out_sp); /* the plane is still in cache */
      }
    }
  }
}

/* The input gradient's stencils, one per phase of the grid: the taps that
 * reach the phase, in order, reading the output gradient's run back by
 * their shift. start[ph]..start[ph+1] index the phase's taps in off, wt. */
typedef struct dw_back_taps {
  int64_t off[RC_DEPTHWISE_MAX_TAPS];
  int64_t tap[RC_DEPTHWISE_MAX_TAPS]; /* which weight each entry takes */
  int start[RC_DEPTHWISE_MAX_TAPS + 1];
  int phases;
} dw_back_taps;

static void backward_taps(const dw_plane *d, dw_back_taps *bt) {
  int k = 0;
  bt->phases = (int)(d->sh * d->sw);
  for (int ph = 0; ph < bt->phases; ph++) {
    bt->start[ph] = k;
    for (int64_t kh = 0; kh < d->KH; kh++)
      for (int64_t kw = 0; kw < d->KW; kw++)
        if ((kh * d->dh % d->sh) * d->sw + kw * d->dw % d->sw == ph) {
          bt->off[k] = -tap_shift(d, kh, kw);
          bt->tap[k++] = kh * d->KW + kw;
        }
  }
  bt->start[bt->phases] = k;
}

/* dx += the taps' w-weighted gather of the run. At stride 1 with rows long
 * enough, straight into dx's rows (those windows reach); otherwise through
 * dx's phase grid, one phase at a time. */
static void plane_input_grad(const dw_kernels *f, const dw_plane *d, const dw_back_taps *bt, float *dx, float *dxq,
                             const float *run, const float *w) {
  float wt[RC_DEPTHWISE_MAX_TAPS];
  for (int k = 0; k < bt->start[bt->phases]; k++) wt[k] = w[bt->tap[k]];
  if (d->sh == 1 && d->sw == 1 && d->W >= ROW_MIN) {
    dw_stencil s = {NULL, bt->off, wt, bt->start[1]};
    int64_t n = d->W;
    if (d->pw + n > d->Wp) n = d->Wp - d->pw;
    for (int64_t r = 0; r < d->H && n > 0 && r + d->ph < d->Hp; r++) {
      s.src = run + (r + d->ph) * d->Wq + d->pw;
      f->apply(dx + r * d->W, dx + r * d->W, 0.0f, &s, n);
    }
    return;
  }
  f->move(dxq, dx, d, 1);
  const int64_t phase = d->Hq * d->Wq;
  for (int ph = 0; ph < bt->phases; ph++) {
    const int lo = bt->start[ph];
    if (bt->start[ph + 1] == lo) continue;
    dw_stencil s = {run, bt->off + lo, wt + lo, bt->start[ph + 1] - lo};
    f->apply(dxq + ph * phase, dxq + ph * phase, 0.0f, &s, phase);
  }
  f->move(dxq, dx, d, 0);
}

/* acc[tap][lane] += the plane's 16 lanes of <run of dy, tap's run of xq>:
 * lanes are summed over the batch in double and folded once per channel
 * (fold_lanes), not per plane, which cost more than the dots on 4x4 maps. */
static void plane_weight_grad(const dw_kernels *f, const dw_plane *d, double *acc, const dw_stencil *s,
                              const float *run) {
  float lanes[RC_DEPTHWISE_MAX_TAPS * LANES];
  const int cells = s->taps * LANES;
  memset(lanes, 0, sizeof(float) * (size_t)cells);
  f->dots(lanes, run, s, d->flat);
  for (int i = 0; i < cells; i++) acc[i] += lanes[i];
}

/* dw[tap] += the sum of the tap's lanes, in a fixed order. */
static void fold_lanes(float *dw, double *acc, int64_t taps) {
  for (int64_t t = 0; t < taps; t++) {
    double *l = acc + t * LANES;
    for (int half = LANES / 2; half >= 1; half /= 2)
      for (int i = 0; i < half; i++) l[i] += l[i + half];
    dw[t] += (float)l[0];
  }
}

/* Channels are shared out among threads and each walks the batch in order,
 * so the weight gradient needs no reduction across threads and does not
 * depend on their number. The input gradient starts from dx's own values,
 * so it adds in the plain path's order. */
void rc__depthwise_backward(const rc__conv_geom *g, float *dx, float *dw, const float *x, const float *w,
                            const float *dy, float *work, size_t work_bytes) {
  const dw_plane d = plane_of(g);
  const dw_kernels f = kernels_for(rc__isa_level());
  const int64_t K = g->K, C = g->C, mult = g->Mg;
  const size_t per = thread_floats(&d, 1);
  const int T = g->N * C * mult * K * g->out_sp > 32768 ? team_size(C, per, work_bytes) : 1;
  int64_t off[RC_DEPTHWISE_MAX_TAPS];
  forward_taps(&d, off);
  dw_back_taps bt;
  backward_taps(&d, &bt);
#pragma omp parallel num_threads(T) if (T > 1)
  {
    float *xq = work + (size_t)omp_get_thread_num() * per, *dxq = xq + d.grid, *run = dxq + d.grid + d.margin;
    memset(xq, 0, sizeof(float) * per);
#pragma omp for schedule(static)
    for (int64_t c = 0; c < C; c++) {
      double acc[RC_DEPTHWISE_MAX_TAPS * LANES]; /* (mult, K, LANES): the channel's output channels */
      if (dw) memset(acc, 0, sizeof(double) * (size_t)(mult * K * LANES));
      const dw_stencil s = {xq, off, NULL, (int)K};
      for (int64_t n = 0; n < g->N; n++) {
        const int64_t pl = n * C + c;
        if (dw) f.move(xq, (float *)(x + pl * g->in_sp), &d, 1);
        for (int64_t j = 0, m = c * mult; j < mult; j++, m++) {
          f.to_run(run, dy + (n * g->M + m) * g->out_sp, &d);
          if (dx) plane_input_grad(&f, &d, &bt, dx + pl * g->in_sp, dxq, run, w + m * K);
          if (dw) plane_weight_grad(&f, &d, acc + j * K * LANES, &s, run);
        }
      }
      if (dw) fold_lanes(dw + c * mult * K, acc, mult * K);
    }
  }
}
