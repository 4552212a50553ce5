/* What the Conv kernels share across their files: the resolved geometry,
 * unfolding and folding of patches (patch.c), the batched GEMM path
 * (conv_batch.c) and the direct depthwise kernels (depthwise.c). conv.c
 * resolves the geometry and picks a path. */
#ifndef RC_OPS_CONV_IMPL_H
#define RC_OPS_CONV_IMPL_H

#include <stddef.h>
#include <stdint.h>

#include "ops/window.h"

/* One unfolding: an image of `channels` planes of size img[], windows of
 * size k[] placed at positions pos[] (image cell = p*s - pad + kk*d). */
typedef struct rc__patch {
  int64_t img[RC_WIN_MAX_AXES], pos[RC_WIN_MAX_AXES], k[RC_WIN_MAX_AXES], s[RC_WIN_MAX_AXES], d[RC_WIN_MAX_AXES],
      pad[RC_WIN_MAX_AXES];
} rc__patch;

/* What a walk over one kernel tap does between a position plane (length P)
 * and one image plane. */
typedef enum tap_mode {
  RC_TAP_SCATTER,    /* img[cell] += v * pos[p] (fold; depthwise input gradient) */
  RC_TAP_ACCUMULATE, /* pos[p] += v * img[cell] (depthwise forward) */
  RC_TAP_DOT         /* returns sum of pos[p] * img[cell] (depthwise weight gradient) */
} rc__tap_mode;

/* Everything a kernel needs, resolved from the input shapes. For Conv the
 * unfolded image is x and positions are y's cells; for ConvTranspose the
 * image is y and positions are x's cells. */
typedef struct rc__conv_geom {
  int nsp;
  int64_t N, C, M, G;           /* batch, input channels, output channels, groups */
  int64_t Cg, Mg, K;            /* channels per group, kernel cells */
  int64_t in_sp, out_sp;        /* spatial cells of x and y */
  int64_t out[RC_WIN_MAX_AXES]; /* y spatial dims (canonical) */
  rc__patch p;
  int direct; /* 1x1, stride 1, no padding: the column matrix is x itself */
} rc__conv_geom;

static inline int64_t rc__prod3(const int64_t *v) { return v[0] * v[1] * v[2]; }

/* One input and one output channel per group. */
static inline int rc__conv_depthwise(const rc__conv_geom *g) { return g->Cg == 1 && g->Mg == 1 && g->G > 1; }

/* ---- patch.c ---- */

/* Where one kernel tap reads: image offsets per axis and the positions
 * [lo, hi) per axis whose cell lies inside the image. */
typedef struct rc__tap_span {
  int64_t off[RC_WIN_MAX_AXES], lo[RC_WIN_MAX_AXES], hi[RC_WIN_MAX_AXES];
} rc__tap_span;
void rc__tap_span_of(const rc__patch *g, int64_t kr, rc__tap_span *t);

/* Walks kernel tap kr (index into k[0]*k[1]*k[2]) over every position. */
double rc__tap_walk(rc__tap_mode mode, float *pos, float *img, const rc__patch *g, int64_t kr, float v);
/* col rows (channels*K, P), row r at col + r*ld, <- unfolded img (channels, img...).
 * No threads of its own. */
void rc__unfold(float *col, int64_t ld, const float *img, const rc__patch *g, int64_t channels);
/* img (channels, img...) += folded col (rows as for rc__unfold): the adjoint of unfold. */
void rc__fold_add(float *img, const float *col, int64_t ld, const rc__patch *g, int64_t channels);

/* ---- conv_batch.c ---- */

/* Samples per chunk for Conv's batched GEMM path; 1 where the per-sample
 * path serves (depthwise, one sample, maps large enough on their own). */
int64_t rc__conv_chunk(const rc__conv_geom *g);
/* Workspace the chunked path needs for nb samples per chunk on `threads`
 * threads, and the threads that fit in work_bytes (at least 1). */
size_t rc__conv_chunk_bytes(const rc__conv_geom *g, int64_t nb, int backward, int threads);
int rc__conv_chunk_threads(const rc__conv_geom *g, int64_t nb, int backward, size_t work_bytes);
/* y = b + W * x, nb samples per GEMM; ep (or NULL) runs on each chunk's rows. */
struct rc__epilogue;
void rc__conv_chunk_forward(const rc__conv_geom *g, int64_t nb, int threads, float *y, const float *x,
                            const float *w, const float *b, float *work, const struct rc__epilogue *ep);
/* dx += input gradient, dw += weight gradient (either may be NULL). */
void rc__conv_chunk_backward(const rc__conv_geom *g, int64_t nb, int threads, float *dx, float *dw, const float *x,
                             const float *w, const float *dy, float *work);

/* ---- depthwise.c ---- */

/* Kernel cells the direct depthwise kernels take (a 9x9 window is 81). */
#define RC_DEPTHWISE_MAX_TAPS 128

/* Non-zero when the direct kernels can serve this depthwise Conv (one
 * input channel per group, one or more output channels): one or two
 * spatial axes, at most RC_DEPTHWISE_MAX_TAPS cells for all output channels
 * of a group. */
int rc__depthwise_fits(const rc__conv_geom *g);
/* Workspace for forward (backward = 0) or backward (1) on `threads` threads. */
size_t rc__depthwise_workspace(const rc__conv_geom *g, int backward, int threads);
/* y = b + depthwise conv of x; work holds work_bytes; ep (or NULL) runs on
 * each plane as it is done. */
void rc__depthwise_forward(const rc__conv_geom *g, float *y, const float *x, const float *w, const float *b,
                           float *work, size_t work_bytes, const struct rc__epilogue *ep);
/* dx += input gradient, dw += weight gradient (either may be NULL). */
void rc__depthwise_backward(const rc__conv_geom *g, float *dx, float *dw, const float *x, const float *w,
                            const float *dy, float *work, size_t work_bytes);

/* ---- sparse_conv.c ---- */

/* Kernel cells the sparse Conv kernels take (their tap spans sit on the stack). */
#define RC_SPARSE_CONV_MAX_TAPS 64

struct rc__wpattern;
/* Largest kept fraction at which the sparse kernels pay for this Conv. */
double rc__sparse_conv_density_limit(const rc__conv_geom *g);
/* Non-zero when the sparse kernels can serve this Conv with pattern p
 * (not depthwise, at most RC_SPARSE_CONV_MAX_TAPS cells, p shaped as W). */
int rc__sparse_conv_fits(const rc__conv_geom *g, const struct rc__wpattern *p);
/* y = b + conv of x with the kept weights of w. */
void rc__sparse_conv_forward(const rc__conv_geom *g, const struct rc__wpattern *p, float *y, const float *x,
                             const float *w, const float *b);
/* dx += input gradient, dw += weight gradient at kept positions only (either may be NULL). */
void rc__sparse_conv_backward(const rc__conv_geom *g, const struct rc__wpattern *p, float *dx, float *dw,
                              const float *x, const float *w, const float *dy);
/* ---- nm_conv.c: N:M-patterned weights (nm.h) ---- */

/* Non-zero when p has N:M structure (p->nm) matching this Conv (one group,
 * not depthwise, shaped as W); whether it runs is nm_conv_chosen's rule. */
int rc__nm_conv_fits(const rc__conv_geom *g, const struct rc__wpattern *p);
/* Non-zero where the N:M kernels beat the path that would otherwise run
 * for forward or backward (dnnl: oneDNN would take this Conv). */
int rc__nm_conv_pays(const rc__conv_geom *g, int backward, int dnnl);
/* Floats of workspace per thread (a column matrix; for backward also a
 * weight gradient). */
size_t rc__nm_conv_thread_floats(const rc__conv_geom *g, int backward);
/* y = b + W . x, samples split among `threads`; ep (or NULL) runs per
 * sample. Stride-1 windows read zero-bordered copies of the input planes
 * instead of a column matrix where work_bytes holds them. */
void rc__nm_conv_forward(const rc__conv_geom *g, const struct rc__wpattern *p, int threads, float *y,
                         const float *x, const float *w, const float *b, float *work, size_t work_bytes,
                         const struct rc__epilogue *ep);
/* dx += input gradient, dw += weight gradient at kept positions only (either may be NULL). */
void rc__nm_conv_backward(const rc__conv_geom *g, const struct rc__wpattern *p, int threads, float *dx, float *dw,
                          const float *x, const float *w, const float *dy, float *work);
/* ---- conv_dnnl.c: oneDNN's convolutions (RECOUP_HAVE_DNNL) ---- */

struct rc_op_state;
/* Built without oneDNN (RECOUP_HAVE_DNNL unset), fits and ready give 0. */
/* Non-zero when the oneDNN path takes this Conv: one or two spatial axes,
 * a window larger than 1x1, not depthwise (depthwise.c serves that). */
int rc__conv_dnnl_fits(const rc__conv_geom *g);
/* Workspace for forward (backward = 0) or backward (1); the primitives are
 * made into state (NULL: made, measured and dropped). 0 when oneDNN
 * refuses the shape. */
size_t rc__conv_dnnl_workspace(struct rc_op_state *state, const rc__conv_geom *g, int has_bias, int backward);
/* Non-zero when state holds primitives made for a Conv (for tests). */
int rc__conv_dnnl_ready(const struct rc_op_state *state);
/* y = b + conv(x). Returns 0, having written nothing, when it cannot run. */
int rc__conv_dnnl_forward(struct rc_op_state *state, const rc__conv_geom *g, float *y, const float *x,
                          const float *w, const float *b, void *work, size_t work_bytes);
/* dx += input gradient, dw += weight gradient (either may be NULL).
 * Returns 0, having added nothing, when it cannot run. */
int rc__conv_dnnl_backward(struct rc_op_state *state, const rc__conv_geom *g, int has_bias, float *dx, float *dw,
                           const float *x, const float *w, const float *dy, void *work, size_t work_bytes);
/* ---- conv_dnnl_1x1.c: 1x1 Conv as one oneDNN batched matmul (RECOUP_HAVE_DNNL) ---- */

/* Non-zero when the matmul can serve this Conv: 1x1, stride 1, unpadded,
 * one group. Built without oneDNN, ready and workspace give 0. */
int rc__conv_mm_fits(const rc__conv_geom *g);
/* Non-zero where the matmul was measured to beat recoup's GEMMs, for the
 * forward (data_grad = 0) or the input gradient (1). */
int rc__conv_mm_pays(const rc__conv_geom *g, int data_grad);
/* Workspace (oneDNN's scratchpad) of one pass, forward (which_pass = 0)
 * or input gradient (1), whose matmul is made into state (NULL: made,
 * measured and dropped). 0 when oneDNN refuses the shape. */
size_t rc__conv_mm_workspace(struct rc_op_state *state, const rc__conv_geom *g, int which_pass);
/* Non-zero when state holds a matmul made for a 1x1 Conv (for tests). */
int rc__conv_mm_ready(const struct rc_op_state *state);
/* y = W . x, no bias. Returns 0 when it cannot run. */
int rc__conv_mm_forward(struct rc_op_state *state, const rc__conv_geom *g, float *y, const float *x, const float *w,
                        void *work, size_t work_bytes);
/* dx += W^T . dy. Returns 0, having added nothing, when it cannot run. */
int rc__conv_mm_backward_data(struct rc_op_state *state, const rc__conv_geom *g, float *dx, const float *w,
                              const float *dy, void *work, size_t work_bytes);

#endif
