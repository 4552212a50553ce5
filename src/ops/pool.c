/* Op family: pool (MaxPool, AveragePool, GlobalAveragePool, GlobalMaxPool).
 * Forward and backward side by side. Spatial axes are canonicalised to 3
 * (missing leading axes of size 1); every (sample, channel) plane is
 * independent, so planes are spread over threads and results do not depend
 * on the thread count. */
#include <float.h>
#include <math.h>
#include <string.h>

#include "ops/op.h"
#include "ops/window.h"

#define AX RC_WIN_MAX_AXES

typedef enum pool_kind { POOL_MAX, POOL_AVG, POOL_GLOBAL_MAX, POOL_GLOBAL_AVG } pool_kind;

typedef struct pool_params {
  pool_kind kind;
  rc__window w;
  int ceil_mode, count_include_pad, storage_order;
} pool_params;

/* Resolved for one input shape. */
typedef struct pool_geom {
  int nsp;
  int64_t planes;                         /* N*C */
  int64_t in[AX], out[AX], k[AX], s[AX], d[AX], pb[AX], pe[AX];
  int64_t in_sp, out_sp;
} pool_geom;

static pool_kind kind_of(const char *op) {
  if (!strcmp(op, "MaxPool")) return POOL_MAX;
  if (!strcmp(op, "AveragePool")) return POOL_AVG;
  if (!strcmp(op, "GlobalMaxPool")) return POOL_GLOBAL_MAX;
  return POOL_GLOBAL_AVG;
}

static rc_status refuse_before(const rc_node *n, const char *attr, int since, rc_err *e) {
  if (n->opset < since && rc__attr_find(n, attr))
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): attribute '%s' is not defined before opset %d",
                    n->label, n->op_type, attr, since);
  return RC_OK;
}

static rc_status pool_parse(rc_node *n, rc_arena *a, rc_err *e) {
  pool_params *p = rc__arena_zalloc(a, sizeof *p);
  if (!p) return rc__fail(e, RC_ERR_NOMEM, "node '%s' (%s): out of memory", n->label, n->op_type);
  p->kind = kind_of(n->op_type);
  n->params = p;
  if (p->kind == POOL_GLOBAL_MAX || p->kind == POOL_GLOBAL_AVG) return RC_OK;
  int dil_since = p->kind == POOL_MAX ? 10 : 19;
  RC_TRY(refuse_before(n, "ceil_mode", 10, e));
  RC_TRY(rc__window_parse(n, &p->w, n->opset >= dil_since, e));
  if (!p->w.n_kernel)
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): attribute 'kernel_shape' is required", n->label,
                    n->op_type);
  int64_t cm = rc__attr_int(n, "ceil_mode", 0);
  if (cm != 0 && cm != 1)
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): ceil_mode must be 0 or 1", n->label, n->op_type);
  p->ceil_mode = (int)cm;
  if (p->kind == POOL_AVG) {
    RC_TRY(refuse_before(n, "count_include_pad", 7, e));
    int64_t cip = rc__attr_int(n, "count_include_pad", 0);
    if (cip != 0 && cip != 1)
      return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): count_include_pad must be 0 or 1", n->label,
                      n->op_type);
    p->count_include_pad = (int)cip;
  } else {
    RC_TRY(refuse_before(n, "storage_order", 8, e));
    int64_t so = rc__attr_int(n, "storage_order", 0);
    if (so != 0 && so != 1)
      return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): storage_order must be 0 or 1", n->label,
                      n->op_type);
    p->storage_order = (int)so;
  }
  return RC_OK;
}

static rc_status pool_geometry(const rc_node *n, const pool_params *p, const rc_tensor *x, pool_geom *g,
                               rc_err *e) {
  memset(g, 0, sizeof *g);
  if (x->dtype != RC_DTYPE_FLOAT)
    return rc__fail(e, RC_ERR_UNSUPPORTED, "node '%s' (%s): input X has dtype %s; only float is supported",
                    n->label, n->op_type, rc_dtype_name(x->dtype));
  int global = p->kind == POOL_GLOBAL_MAX || p->kind == POOL_GLOBAL_AVG;
  if (x->rank < 3 || (!global && x->rank > 2 + AX))
    return rc__fail(e, RC_ERR_UNSUPPORTED, "node '%s' (%s): input X has rank %d; ranks 3 to %d are supported",
                    n->label, n->op_type, x->rank, global ? RC_MAX_RANK : 2 + AX);
  g->planes = x->dims[0] * x->dims[1];
  if (global) {
    /* One window over all spatial cells, seen as a single axis. */
    g->nsp = x->rank - 2;
    int64_t cells = 1;
    for (int i = 2; i < x->rank; i++) cells *= x->dims[i];
    for (int j = 0; j < AX; j++) g->in[j] = g->out[j] = g->k[j] = g->s[j] = g->d[j] = 1;
    g->in[AX - 1] = g->k[AX - 1] = cells;
    g->in_sp = cells;
    g->out_sp = 1;
    return RC_OK;
  }
  int nsp = x->rank - 2;
  if (p->w.n_kernel != nsp)
    return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): kernel_shape has %d values for %d spatial axes",
                    n->label, n->op_type, p->w.n_kernel, nsp);
  int64_t in[AX], out[AX], pb[AX], pe[AX], s[AX], d[AX];
  for (int i = 0; i < nsp; i++) in[i] = x->dims[2 + i];
  RC_TRY(rc__window_resolve(n, &p->w, nsp, in, p->w.kernel, p->ceil_mode, out, pb, pe, s, d, e));
  g->nsp = nsp;
  for (int j = 0; j < AX; j++) {
    int i = j - (AX - nsp);
    g->in[j] = i >= 0 ? in[i] : 1;
    g->out[j] = i >= 0 ? out[i] : 1;
    g->k[j] = i >= 0 ? p->w.kernel[i] : 1;
    g->s[j] = i >= 0 ? s[i] : 1;
    g->d[j] = i >= 0 ? d[i] : 1;
    g->pb[j] = i >= 0 ? pb[i] : 0;
    g->pe[j] = i >= 0 ? pe[i] : 0;
  }
  g->in_sp = g->in[0] * g->in[1] * g->in[2];
  g->out_sp = g->out[0] * g->out[1] * g->out[2];
  return RC_OK;
}

static rc_status pool_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  if (n->n_in < 1 || !in[0])
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): input X is required", n->label, n->op_type);
  const pool_params *p = n->params;
  pool_geom g;
  RC_TRY(pool_geometry(n, p, in[0], &g, e));
  out[0].dtype = RC_DTYPE_FLOAT;
  out[0].rank = in[0]->rank;
  out[0].dims[0] = in[0]->dims[0];
  out[0].dims[1] = in[0]->dims[1];
  for (int i = 2; i < in[0]->rank; i++)
    out[0].dims[i] = (p->kind == POOL_GLOBAL_MAX || p->kind == POOL_GLOBAL_AVG) ? 1 : g.out[AX - g.nsp + i - 2];
  RC_TRY(rc__check_shape(n, &out[0], e));
  if (n->n_out > 1) {
    if (p->kind != POOL_MAX)
      return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): has %d outputs, expected 1", n->label, n->op_type,
                      n->n_out);
    out[1] = out[0];
    out[1].dtype = RC_DTYPE_INT64;
  }
  return RC_OK;
}

static void geometry_of(const rc_kernel *k, pool_geom *g) {
  rc_err e;
  /* Validated by infer for these very shapes; cannot fail here. */
  pool_geometry(k->node, k->params, k->in[0], g, &e);
}

/* Window of output cell o along axis j: kernel taps [*lo, *hi) land inside
 * the input; *start is the input cell of tap 0. */
static void taps(const pool_geom *g, int j, int64_t o, int64_t *start, int64_t *lo, int64_t *hi) {
  int64_t st = o * g->s[j] - g->pb[j], d = g->d[j];
  int64_t l = st >= 0 ? 0 : (-st + d - 1) / d;
  int64_t h = g->in[j] - st <= 0 ? 0 : (g->in[j] - st - 1) / d + 1;
  if (h > g->k[j]) h = g->k[j];
  if (l > h) l = h;
  *start = st;
  *lo = l;
  *hi = h;
}

/* Taps of the window along axis j that lie inside the padded input
 * [-pad_begin, in + pad_end): the divisor when padding counts. Cells that
 * ceil_mode adds beyond the padded input never count. */
static int64_t taps_in_padded(const pool_geom *g, int j, int64_t start) {
  int64_t d = g->d[j], lo_edge = -g->pb[j], hi_edge = g->in[j] + g->pe[j];
  int64_t l = start >= lo_edge ? 0 : (lo_edge - start + d - 1) / d;
  int64_t h = hi_edge - start <= 0 ? 0 : (hi_edge - start - 1) / d + 1;
  if (h > g->k[j]) h = g->k[j];
  return h > l ? h - l : 0;
}

/* ---- MaxPool / GlobalMaxPool ---- */

static size_t max_saved(const rc_kernel *k) {
  return sizeof(int32_t) * (size_t)rc_tensor_numel(k->out[0]);
}

/* Index the Indices output reports for plane cell (a,b,c): flattened over
 * the whole tensor, row-major, or column-major over the spatial axes. */
static int64_t spec_index(const pool_geom *g, int storage_order, int64_t plane, int64_t a, int64_t b,
                          int64_t c) {
  int64_t within = storage_order ? a + g->in[0] * (b + g->in[1] * c) : (a * g->in[1] + b) * g->in[2] + c;
  return plane * g->in_sp + within;
}

/* Maximum of a window and whether it saw a NaN. `v > best ? v : best` is
 * exactly what the maxss instruction computes, so the compiler needs no
 * branch: with branches, the comparisons' random outcomes (about half
 * mispredicted) made pooling cost more than the convolutions. */
static float window_max(const float *xp, int64_t W, int64_t a0, int64_t a1, int64_t c0, int64_t c1, int *nan) {
  float best = -INFINITY;
  int seen_nan = 0;
  for (int64_t a = a0; a < a1; a++)
    for (int64_t c = c0; c < c1; c++) {
      float v = xp[a * W + c];
      best = v > best ? v : best;
      seen_nan |= v != v;
    }
  *nan = seen_nan;
  return best;
}

/* The common case: windows over the last two axes with dilation 1 and no
 * Indices output. Same result as the general loop below: the first maximum
 * in scan order (the first NaN if any) is the one whose position is saved. */
static void max_forward_plain(const pool_geom *g, const float *x, float *y, int32_t *arg) {
  const int64_t O = g->out_sp, I = g->in_sp, W = g->in[2];
#pragma omp parallel for schedule(static) if (g->planes * (O + I) > 16384)
  for (int64_t pl = 0; pl < g->planes; pl++) {
    const float *xp = x + pl * I;
    for (int64_t o1 = 0; o1 < g->out[1]; o1++) {
      int64_t st1, lo1, hi1;
      taps(g, 1, o1, &st1, &lo1, &hi1);
      for (int64_t o2 = 0; o2 < g->out[2]; o2++) {
        int64_t st2, lo2, hi2;
        taps(g, 2, o2, &st2, &lo2, &hi2);
        int64_t oi = pl * O + o1 * g->out[2] + o2, a0 = st1 + lo1, a1 = st1 + hi1, c0 = st2 + lo2, c1 = st2 + hi2;
        if (a0 >= a1 || c0 >= c1) {
          y[oi] = -FLT_MAX;
          if (arg) arg[oi] = -1;
          continue;
        }
        int nan;
        float best = window_max(xp, W, a0, a1, c0, c1, &nan);
        y[oi] = nan ? NAN : best;
        if (!arg) continue;
        int32_t where = -1;
        for (int64_t a = a0; a < a1 && where < 0; a++)
          for (int64_t c = c0; c < c1; c++) {
            float v = xp[a * W + c];
            if (nan ? v != v : v == best) {
              where = (int32_t)(a * W + c);
              break;
            }
          }
        arg[oi] = where;
        if (nan) y[oi] = xp[where]; /* the first NaN itself, as the general loop keeps it */
      }
    }
  }
}

/* x (N,C,D...) -> y (N,C,O...), optional indices (N,C,O...) int64;
 * argmax per output cell (plane-local, -1 if the window saw no input) saved
 * for backward. The first maximum in scan order wins; NaN propagates. */
static rc_status max_forward(const rc_kernel *k, rc_err *e) {
  pool_geom g;
  geometry_of(k, &g);
  const pool_params *p = k->params;
  const float *x = k->in[0]->data;
  float *y = k->out[0]->data;
  int64_t *ind = k->n_out > 1 && k->out[1] ? k->out[1]->data : NULL;
  int32_t *arg = k->saved;
  const int64_t O = g.out_sp, I = g.in_sp;
  if (!ind && g.in[0] == 1 && g.out[0] == 1 && g.d[1] == 1 && g.d[2] == 1) {
    max_forward_plain(&g, x, y, arg);
    return RC_OK;
  }
#pragma omp parallel for schedule(static) if (g.planes * (O + I) > 16384)
  for (int64_t pl = 0; pl < g.planes; pl++) {
    const float *xp = x + pl * I;
    for (int64_t o0 = 0; o0 < g.out[0]; o0++) {
      int64_t st0, lo0, hi0;
      taps(&g, 0, o0, &st0, &lo0, &hi0);
      for (int64_t o1 = 0; o1 < g.out[1]; o1++) {
        int64_t st1, lo1, hi1;
        taps(&g, 1, o1, &st1, &lo1, &hi1);
        for (int64_t o2 = 0; o2 < g.out[2]; o2++) {
          int64_t st2, lo2, hi2;
          taps(&g, 2, o2, &st2, &lo2, &hi2);
          float best = -FLT_MAX;
          int64_t where = -1, ba = 0, bb = 0, bc = 0;
          for (int64_t t0 = lo0; t0 < hi0; t0++) {
            int64_t a = st0 + t0 * g.d[0];
            for (int64_t t1 = lo1; t1 < hi1; t1++) {
              int64_t b = st1 + t1 * g.d[1];
              const float *row = xp + (a * g.in[1] + b) * g.in[2];
              for (int64_t t2 = lo2; t2 < hi2; t2++) {
                int64_t c = st2 + t2 * g.d[2];
                float v = row[c];
                if (where < 0 || v > best || (isnan(v) && !isnan(best))) {
                  best = v;
                  where = (a * g.in[1] + b) * g.in[2] + c;
                  ba = a, bb = b, bc = c;
                }
              }
            }
          }
          int64_t oi = pl * O + (o0 * g.out[1] + o1) * g.out[2] + o2;
          y[oi] = best;
          if (arg) arg[oi] = (int32_t)where;
          if (ind) ind[oi] = where < 0 ? -1 : spec_index(&g, p->storage_order, pl, ba, bb, bc);
        }
      }
    }
  }
  return RC_OK;
}

static void max_backward(const rc_kernel *k) {
  if (!k->din[0] || !k->dout[0] || !k->saved) return;
  pool_geom g;
  geometry_of(k, &g);
  const float *dy = k->dout[0]->data;
  const int32_t *arg = k->saved;
  float *dx = k->din[0]->data;
  const int64_t O = g.out_sp, I = g.in_sp;
#pragma omp parallel for schedule(static) if (g.planes * (O + I) > 16384)
  for (int64_t pl = 0; pl < g.planes; pl++)
    for (int64_t o = 0; o < O; o++) {
      int32_t a = arg[pl * O + o];
      if (a >= 0) dx[pl * I + a] += dy[pl * O + o];
    }
}

/* ---- AveragePool / GlobalAveragePool ---- */

/* Divisor of output cell (o0,o1,o2): taps inside the input, or inside the
 * padded input when count_include_pad is set. */
static int64_t avg_divisor(const pool_geom *g, int include_pad, const int64_t *st, const int64_t *lo,
                           const int64_t *hi) {
  int64_t cnt = 1;
  for (int j = 0; j < AX; j++) cnt *= include_pad ? taps_in_padded(g, j, st[j]) : hi[j] - lo[j];
  return cnt;
}

/* One plane of AveragePool: forward (src x, dst y) or backward (src dy,
 * dst dx, which it adds into). Both walk the same windows. */
static void avg_plane(const pool_geom *g, int include_pad, const float *src, float *dst, int backward) {
  for (int64_t o0 = 0; o0 < g->out[0]; o0++)
    for (int64_t o1 = 0; o1 < g->out[1]; o1++)
      for (int64_t o2 = 0; o2 < g->out[2]; o2++) {
        int64_t st[AX], lo[AX], hi[AX];
        taps(g, 0, o0, &st[0], &lo[0], &hi[0]);
        taps(g, 1, o1, &st[1], &lo[1], &hi[1]);
        taps(g, 2, o2, &st[2], &lo[2], &hi[2]);
        const int64_t oi = (o0 * g->out[1] + o1) * g->out[2] + o2, div = avg_divisor(g, include_pad, st, lo, hi);
        const float gv = backward && div ? src[oi] / (float)div : 0.0f;
        double sum = 0;
        for (int64_t t0 = lo[0]; t0 < hi[0]; t0++)
          for (int64_t t1 = lo[1]; t1 < hi[1]; t1++) {
            const int64_t row = ((st[0] + t0 * g->d[0]) * g->in[1] + st[1] + t1 * g->d[1]) * g->in[2] + st[2];
            if (backward)
              for (int64_t t2 = lo[2]; t2 < hi[2]; t2++) dst[row + t2 * g->d[2]] += gv;
            else
              for (int64_t t2 = lo[2]; t2 < hi[2]; t2++) sum += src[row + t2 * g->d[2]];
          }
        if (!backward) dst[oi] = div ? (float)(sum / (double)div) : 0.0f;
      }
}

/* x (N,C,D...) -> y (N,C,O...): mean over each window. */
static rc_status avg_forward(const rc_kernel *k, rc_err *e) {
  pool_geom g;
  geometry_of(k, &g);
  const pool_params *p = k->params;
  const float *x = k->in[0]->data;
  float *y = k->out[0]->data;
  const int64_t O = g.out_sp, I = g.in_sp;
#pragma omp parallel for schedule(static) if (g.planes * (O + I) > 16384)
  for (int64_t pl = 0; pl < g.planes; pl++) avg_plane(&g, p->count_include_pad, x + pl * I, y + pl * O, 0);
  return RC_OK;
}

static void avg_backward(const rc_kernel *k) {
  if (!k->din[0] || !k->dout[0]) return;
  pool_geom g;
  geometry_of(k, &g);
  const pool_params *p = k->params;
  const float *dy = k->dout[0]->data;
  float *dx = k->din[0]->data;
  const int64_t O = g.out_sp, I = g.in_sp;
#pragma omp parallel for schedule(static) if (g.planes * (O + I) > 16384)
  for (int64_t pl = 0; pl < g.planes; pl++) avg_plane(&g, p->count_include_pad, dy + pl * O, dx + pl * I, 1);
}

const rc_op_def rc__ops_pool[] = {
    {"MaxPool", "", 1, 21, 0, pool_parse, pool_infer, NULL, max_saved, max_forward, max_backward},
    {"AveragePool", "", 1, 21, 0, pool_parse, pool_infer, NULL, NULL, avg_forward, avg_backward},
    {"GlobalMaxPool", "", 1, 21, 0, pool_parse, pool_infer, NULL, max_saved, max_forward, max_backward},
    {"GlobalAveragePool", "", 1, 21, 0, pool_parse, pool_infer, NULL, NULL, avg_forward, avg_backward},
};
const int rc__ops_pool_count = (int)(sizeof rc__ops_pool / sizeof rc__ops_pool[0]);
