/* Conv of an N:M-patterned weight (nm.h) on recoup's per-sample path: each
 * thread takes whole samples, unfolds one (a 1x1, stride-1, unpadded
 * convolution reads x itself) and runs the strip kernels in place of the
 * three GEMMs: y_n = W . col, dcol = W^T . dy_n (folded back onto dx_n) and
 * dW += dy_n . col^T at kept positions. The workspace is the per-sample
 * path's own (conv.c): a column matrix per thread and, for backward, a
 * private weight gradient per thread, added in thread order afterwards at
 * kept positions only, so results are the same bits for a thread count
 * and frozen positions of dW are never written. A 1x1 convolution read in
 * place splits dW by rows instead (backward_direct): the same bits for any
 * thread count. Where these kernels run by default: rc__nm_conv_pays. */
#include <omp.h>
#include <string.h>

#include "ops/conv_impl.h"
#include "ops/epilogue.h"
#include "ops/nm.h"
#include "ops/sparse.h"

int rc__nm_conv_fits(const rc__conv_geom *g, const rc__wpattern *p) {
  return p && p->nm && g->G == 1 && !rc__conv_depthwise(g) && p->rows == g->M && p->cols == g->Cg * g->K &&
         p->nm->cells == g->K;
}

static size_t col_floats(const rc__conv_geom *g) {
  return g->direct ? 0 : (size_t)(g->C * g->K) * (size_t)g->out_sp;
}

size_t rc__nm_conv_thread_floats(const rc__conv_geom *g, int backward) {
  return col_floats(g) + (backward ? (size_t)g->M * (size_t)(g->Cg * g->K) : 0);
}

/* y_n (M, P) = b + W . col(x_n). */
static void forward_sample(const rc__conv_geom *g, const rc__wpattern *p, float *yn, const float *xn,
                           const float *w, const float *b, float *col) {
  const int64_t P = g->out_sp;
  const float *src = xn;
  if (!g->direct) {
    rc__unfold(col, P, xn, &g->p, g->C);
    src = col;
  }
  if (b)
    for (int64_t m = 0; m < g->M; m++)
      for (int64_t i = 0; i < P; i++) yn[m * P + i] = b[m];
  rc__nm_gather(p->start, p->col, 0, g->M, w, p->cols, 1, src, NULL, P, yn, P, P, b != NULL);
}

/* Stride-1 windows need no column matrix: with each input plane copied
 * into a zero-bordered plane of Wp = Wo + (kw-1)*dw columns, the column
 * row of (channel c, cell t) is that plane read from offset
 * (kh(t)*dh) * Wp + kw(t)*dw, and the output comes out Wp wide, its last
 * Wp - Wo columns of each row unused. The kernels then read about one
 * K-th of what an unfolded matrix holds. */
typedef struct padded_geom {
  int64_t Hp, Wp, plane, L, x_floats, per; /* per: floats per thread */
} padded_geom;

static int padded_of(const rc__conv_geom *g, padded_geom *q) {
  const rc__patch *p = &g->p;
  if (g->direct || p->img[0] != 1 || p->k[0] != 1 || p->s[1] != 1 || p->s[2] != 1) return 0;
  q->Hp = p->pos[1] + (p->k[1] - 1) * p->d[1];
  q->Wp = p->pos[2] + (p->k[2] - 1) * p->d[2];
  q->plane = q->Hp * q->Wp;
  q->L = p->pos[1] * q->Wp;
  /* the last plane's shifted rows run (kw-1)*dw cells past its end */
  q->x_floats = g->C * q->plane + (p->k[2] - 1) * p->d[2];
  q->per = q->x_floats + g->M * q->L;
  return 1;
}

/* Floats before the threads' buffers: the row-offset table (int64 each). */
static size_t table_floats(const rc__conv_geom *g) { return ((size_t)(2 * g->C * g->K) + 15) & ~(size_t)15; }

static int forward_padded(const rc__conv_geom *g, const rc__wpattern *p, int threads, float *y, const float *x,
                          const float *w, const float *b, float *work, size_t work_bytes, const rc__epilogue *ep) {
  padded_geom q;
  if (!padded_of(g, &q) || work_bytes < sizeof(float) * (table_floats(g) + (size_t)threads * (size_t)q.per))
    return 0;
  const rc__patch *pp = &g->p;
  const int64_t K = g->K, kw = pp->k[2], H = pp->img[1], W = pp->img[2], Ho = pp->pos[1], Wo = pp->pos[2],
                P = g->out_sp;
  int64_t *roff = (int64_t *)(void *)work;
  for (int64_t c = 0; c < g->C; c++)
    for (int64_t t = 0; t < K; t++)
      roff[c * K + t] = c * q.plane + (t / kw) * pp->d[1] * q.Wp + (t % kw) * pp->d[2];
  float *base = work + table_floats(g);
#pragma omp parallel num_threads(threads) if (threads > 1)
  {
    float *xp = base + (size_t)omp_get_thread_num() * (size_t)q.per, *yp = xp + q.x_floats;
    memset(xp, 0, sizeof(float) * (size_t)q.x_floats); /* borders stay zero: only the interior is copied */
#pragma omp for schedule(static)
    for (int64_t n = 0; n < g->N; n++) {
      const float *xn = x + n * g->C * g->in_sp;
      for (int64_t c = 0; c < g->C; c++)
        for (int64_t i = 0; i < H; i++)
          memcpy(xp + c * q.plane + (i + pp->pad[1]) * q.Wp + pp->pad[2], xn + (c * H + i) * W,
                 sizeof(float) * (size_t)W);
      rc__nm_gather(p->start, p->col, 0, g->M, w, p->cols, 1, xp, roff, 0, yp, q.L, q.L, 0);
      float *yn = y + n * g->M * P;
      for (int64_t m = 0; m < g->M; m++) {
        const float bias = b ? b[m] : 0.0f;
        for (int64_t i = 0; i < Ho; i++)
          for (int64_t j = 0; j < Wo; j++) yn[(m * Ho + i) * Wo + j] = yp[m * q.L + i * q.Wp + j] + bias;
      }
      if (ep) rc__epilogue_apply(ep, y, n * g->M, (n + 1) * g->M, g->M, P);
    }
  }
  return 1;
}

void rc__nm_conv_forward(const rc__conv_geom *g, const rc__wpattern *p, int threads, float *y, const float *x,
                         const float *w, const float *b, float *work, size_t work_bytes, const rc__epilogue *ep) {
  if (forward_padded(g, p, threads, y, x, w, b, work, work_bytes, ep)) return;
  const size_t per = rc__nm_conv_thread_floats(g, 0);
  const int64_t P = g->out_sp;
#pragma omp parallel for num_threads(threads) schedule(static) if (threads > 1)
  for (int64_t n = 0; n < g->N; n++) {
    forward_sample(g, p, y + n * g->M * P, x + n * g->C * g->in_sp, w, b,
                   work + (size_t)omp_get_thread_num() * per);
    if (ep) rc__epilogue_apply(ep, y, n * g->M, (n + 1) * g->M, g->M, P); /* rows still in cache */
  }
}

/* Sample n (unfolded): dw += dy_n . col(x_n)^T at kept positions; dx_n += fold(W^T . dy_n). */
static void backward_sample(const rc__conv_geom *g, const rc__wpattern *p, int64_t n, float *dx, float *dw,
                            const float *x, const float *w, const float *dy, float *col) {
  const int64_t P = g->out_sp, CK = g->Cg * g->K;
  const float *dyn = dy + n * g->M * P;
  if (dw) {
    rc__unfold(col, P, x + n * g->C * g->in_sp, &g->p, g->C);
    rc__nm_wgrad(p, 0, g->M, dw, dyn, P, 0, col, P, 0, P, 1);
  }
  if (!dx) return;
  float *dxn = dx + n * g->C * g->in_sp;
  rc__nm_gather(p->nm->cstart, p->nm->crow, 0, CK, w, 1, CK, dyn, NULL, P, col, P, P, 0);
  rc__fold_add(dxn, col, P, &g->p, g->C);
}

/* Samples whose weight-gradient sums are kept in lanes before they are
 * added to dW: as many as fill about 4096 columns, while that block of x
 * stays within 256 KiB (the core's cache). */
static int64_t wgrad_block(const rc__conv_geom *g) {
  int64_t b = (4096 + g->out_sp - 1) / g->out_sp;
  const int64_t fit = (int64_t)((256 << 10) / (sizeof(float) * (size_t)(g->C * g->out_sp)));
  if (b > fit) b = fit;
  return b < 1 ? 1 : b;
}

/* A 1x1 convolution read in place needs no column matrix: threads split the
 * weight's rows for dW (each kept weight summed over a block of samples in
 * lanes, blocks added in order, so the bits do not depend on the thread
 * count) and the samples for dx. */
static void backward_direct(const rc__conv_geom *g, const rc__wpattern *p, int threads, float *dx, float *dw,
                            const float *x, const float *w, const float *dy) {
  const int64_t P = g->out_sp, C = g->C, M = g->M, B = wgrad_block(g);
#pragma omp parallel num_threads(threads) if (threads > 1)
  {
    for (int64_t n0 = 0; dw && n0 < g->N; n0 += B) {
      const int64_t cnt = g->N - n0 < B ? g->N - n0 : B;
#pragma omp for schedule(static)
      for (int64_t r = 0; r < M; r++)
        rc__nm_wgrad(p, r, r + 1, dw, dy + n0 * M * P, P, M * P, x + n0 * C * P, P, C * P, P, cnt);
    }
    if (dx) {
#pragma omp for schedule(static)
      for (int64_t n = 0; n < g->N; n++)
        rc__nm_gather(p->nm->cstart, p->nm->crow, 0, C, w, 1, C, dy + n * M * P, NULL, P, dx + n * C * P, P, P, 1);
    }
  }
}

void rc__nm_conv_backward(const rc__conv_geom *g, const rc__wpattern *p, int threads, float *dx, float *dw,
                          const float *x, const float *w, const float *dy, float *work) {
  if (g->direct) {
    backward_direct(g, p, threads, dx, dw, x, w, dy);
    return;
  }
  const size_t per = rc__nm_conv_thread_floats(g, 1), col = col_floats(g);
  if (threads <= 1) {
    for (int64_t n = 0; n < g->N; n++) backward_sample(g, p, n, dx, dw, x, w, dy, work);
    return;
  }
#pragma omp parallel num_threads(threads)
  {
    float *mine = work + (size_t)omp_get_thread_num() * per, *part = dw ? mine + col : NULL;
    if (part)
      for (int64_t r = 0; r < p->rows; r++)
        for (int64_t e = p->start[r]; e < p->start[r + 1]; e++) part[r * p->cols + p->col[e]] = 0.0f;
#pragma omp for schedule(static)
    for (int64_t n = 0; n < g->N; n++) backward_sample(g, p, n, dx, part, x, w, dy, mine);
  }
  if (dw)
    for (int t = 0; t < threads; t++) {
      const float *part = work + (size_t)t * per + col;
      for (int64_t r = 0; r < p->rows; r++)
        for (int64_t e = p->start[r]; e < p->start[r + 1]; e++)
          dw[r * p->cols + p->col[e]] += part[r * p->cols + p->col[e]];
    }
}

/* Where the N:M kernels run by default: CPU time of one layer's forward
 * and backward (min of 9, one thread, batch 64, a 2:4 weight, on the
 * shared 2-core machine; ratio = N:M / the path that would otherwise run).
 * Forward: 1x1 layers with 64 or more output cells, 0.45 to 0.80 (16->96
 * on 32x32 0.65, 96->24 on 16x16 0.80, 144->32 on 8x8 0.45, stride-2
 * 16->32 and 32->64 0.80 and 0.61), but 1.2 to 1.3 on 4x4 maps. Stride-1
 * 3x3 layers through the padded planes 0.52 (16->16 on 32x32), 0.62
 * (32->32 on 16x16), 0.71 (64->64 on 8x8) of recoup's own GEMMs, but 1.13,
 * 1.79 and 2.25 of oneDNN's time; stride-2 3x3 layers (unfolded) 0.77 to
 * 1.02 of the GEMMs. Backward: 1x1 layers read in place that narrow or keep
 * their channels, 0.83 to 0.88 (96->24 on 16x16, 144->32 on 8x8, 96->16 on
 * 32x32), but 1.39 for 16->96 on 32x32, 1.8 to 1.9 on 4x4 maps, 0.8 to 1.9
 * for 3x3 and 1.8 to 5.6 against oneDNN. At two threads (wall time, min of
 * 21) the forward of those 1x1 layers gave 0.43 to 0.90 and 1.2 to 1.4 on
 * 4x4 maps again. */
#define NM_MIN_CELLS 64

int rc__nm_conv_pays(const rc__conv_geom *g, int backward, int dnnl) {
  padded_geom q;
  if (g->out_sp < NM_MIN_CELLS) return 0;
  if (backward) return g->direct && g->C >= g->M;
  if (g->K == 1) return 1;
  return !dnnl && padded_of(g, &q);
}
