/* Op family: resize. Resize (opsets 10..21) and Upsample (opset 9); forward
 * and backward (for X) side by side.
 *
 * Modes nearest and linear (N-d: every axis whose size changes is
 * interpolated, so 4-D NCHW input is bilinear over H, W). Coordinate mapping
 * and rounding follow the ONNX operator specification's formulas for each
 * coordinate_transformation_mode and nearest_mode. Refused at load time:
 * cubic, antialias=1, tf_crop_and_resize (the only mode that reads roi).
 * exclude_outside and cubic_coeff_a only affect cubic; extrapolation_value
 * only tf_crop_and_resize: accepted, no effect.
 * Upsample and Resize-10 state no coordinate rule beyond the output size; we
 * use the asymmetric mapping with floor for nearest (out[i] = in[floor(i /
 * scale)], exact for integer factors) and clamped asymmetric for linear. */
#include <math.h>
#include <string.h>

#include "ops/layout.h"

enum { CT_HALF_PIXEL, CT_HALF_PIXEL_SYMMETRIC, CT_PYTORCH_HALF_PIXEL, CT_ALIGN_CORNERS, CT_ASYMMETRIC,
       CT_TF_HALF_PIXEL_FOR_NN };
enum { NM_ROUND_PREFER_FLOOR, NM_ROUND_PREFER_CEIL, NM_FLOOR, NM_CEIL };
enum { KA_STRETCH, KA_NOT_LARGER, KA_NOT_SMALLER };

typedef struct resize_params {
  int linear;
  int coord;
  int nearest;
  int aspect;
  int scales_at;   /* input holding scales */
  int sizes_at;    /* input holding sizes, -1 if none */
} resize_params;

static int pick(const char *s, const char *const *names, int count) {
  for (int i = 0; i < count; i++)
    if (names[i] && !strcmp(s, names[i])) return i;
  return -1;
}

static rc_status resize_parse(rc_node *n, rc_arena *a, rc_err *e) {
  resize_params *p = rc__arena_zalloc(a, sizeof *p);
  if (!p) return rc__fail(e, RC_ERR_NOMEM, "node '%s' (%s): out of memory", n->label, n->op_type);
  int legacy = !strcmp(n->op_type, "Upsample") || n->opset < 11;
  const char *mode = rc__attr_string(n, "mode", "nearest");
  if (!strcmp(mode, "nearest"))
    p->linear = 0;
  else if (!strcmp(mode, "linear") || (legacy && !strcmp(mode, "bilinear")))
    p->linear = 1;
  else
    return RC_NODE_FAIL(e, n, RC_ERR_UNSUPPORTED, "mode '%s' is not supported (nearest, linear)", mode);
  p->sizes_at = -1;
  p->scales_at = 1;
  p->coord = CT_ASYMMETRIC;
  p->nearest = NM_FLOOR;
  if (!legacy) {
    p->scales_at = 2;
    p->sizes_at = 3;
    static const char *const ct[] = {"half_pixel", "half_pixel_symmetric", "pytorch_half_pixel",
                                      "align_corners", "asymmetric", "tf_half_pixel_for_nn"};
    const char *c = rc__attr_string(n, "coordinate_transformation_mode", "half_pixel");
    p->coord = pick(c, ct, 6);
    if (p->coord == CT_HALF_PIXEL_SYMMETRIC && n->opset < 19) p->coord = -1;
    if (p->coord < 0)
      return RC_NODE_FAIL(e, n, RC_ERR_UNSUPPORTED, "coordinate_transformation_mode '%s' is not supported", c);
    static const char *const nm[] = {"round_prefer_floor", "round_prefer_ceil", "floor", "ceil"};
    const char *r = rc__attr_string(n, "nearest_mode", "round_prefer_floor");
    p->nearest = pick(r, nm, 4);
    if (p->nearest < 0) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "nearest_mode '%s' is unknown", r);
    if (rc__attr_int(n, "antialias", 0) != 0)
      return RC_NODE_FAIL(e, n, RC_ERR_UNSUPPORTED, "antialias=1 is not supported%s", "");
    static const char *const ka[] = {"stretch", "not_larger", "not_smaller"};
    const char *k = rc__attr_string(n, "keep_aspect_ratio_policy", "stretch");
    p->aspect = pick(k, ka, 3);
    if (p->aspect < 0) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "keep_aspect_ratio_policy '%s' is unknown", k);
  }
  n->params = p;
  return RC_OK;
}

static int given(const rc_node *n, const rc_tensor *const *in, int idx) {
  return idx >= 0 && idx < n->n_in && in[idx] && rc_tensor_numel(in[idx]) > 0;
}

/* Output dims and the scale of every axis. */
static rc_status resize_plan(const rc_node *n, const rc_tensor *const *in, double *scale, int64_t *dims,
                             rc_err *e) {
  const resize_params *p = n->params;
  const rc_tensor *x = in[0];
  int rank = x->rank, axes[RC_MAX_RANK], naxes = rank;
  for (int d = 0; d < rank; d++) {
    axes[d] = d;
    scale[d] = 1.0;
    dims[d] = x->dims[d];
  }
  const rc_attr *aa = n->opset >= 18 ? rc__attr_find(n, "axes") : NULL;
  if (aa && p->sizes_at >= 0) {
    if (aa->type != RC_ATTR_INTS || aa->n > rank)
      return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "attribute 'axes' must be at most %d ints", rank);
    naxes = aa->n;
    for (int i = 0; i < naxes; i++) {
      RC_TRY(rc__axis(n, aa->ints[i], rank, &axes[i], e));
      for (int j = 0; j < i; j++)
        if (axes[j] == axes[i]) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "axis %d appears twice", axes[i]);
    }
  }
  int has_scales = given(n, in, p->scales_at), has_sizes = given(n, in, p->sizes_at);
  if (has_scales == has_sizes)
    return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "exactly one of scales and sizes must be given (%s)",
                        has_scales ? "both are" : "neither is");
  int src = has_scales ? p->scales_at : p->sizes_at;
  RC_TRY(rc__need_const(n, in, src, e));
  const rc_tensor *t = in[src];
  if (t->rank != 1 || t->dims[0] != naxes)
    return RC_NODE_FAIL(e, n, RC_ERR_SHAPE, "%s must have %d entries", has_scales ? "scales" : "sizes", naxes);
  if (has_scales) {
    if (t->dtype != RC_DTYPE_FLOAT) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "scales must be float32%s", "");
    for (int i = 0; i < naxes; i++) {
      float s = ((const float *)t->data)[i];
      int d = axes[i];
      if (!(s > 0) || !isfinite(s))
        return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "scale %g for axis %d is not a positive number", s, d);
      double o = floor((double)x->dims[d] * (double)s);
      if (o > (double)RC_MAX_ELEMENTS)
        return RC_NODE_FAIL(e, n, RC_ERR_LIMIT, "scale %g for axis %d is too large", s, d);
      scale[d] = s;
      dims[d] = (int64_t)o;
    }
  } else {
    if (t->dtype != RC_DTYPE_INT64) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "sizes must be int64%s", "");
    const int64_t *sz = t->data;
    double ka = p->aspect == KA_NOT_LARGER ? INFINITY : 0;
    for (int i = 0; i < naxes; i++) {
      int d = axes[i];
      if (sz[i] < 0 || sz[i] > RC_MAX_ELEMENTS)
        return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "size %lld for axis %d is out of range", (long long)sz[i], d);
      if (x->dims[d] == 0) {
        if (sz[i]) return RC_NODE_FAIL(e, n, RC_ERR_SHAPE, "cannot resize empty axis %d to %lld", d, (long long)sz[i]);
        continue;
      }
      double r = (double)sz[i] / (double)x->dims[d];
      scale[d] = r;
      dims[d] = sz[i];
      if (p->aspect == KA_NOT_LARGER && r < ka) ka = r;
      if (p->aspect == KA_NOT_SMALLER && r > ka) ka = r;
    }
    if (p->aspect != KA_STRETCH)
      for (int i = 0; i < naxes; i++) {
        int d = axes[i];
        scale[d] = ka;
        dims[d] = (int64_t)nearbyint(ka * (double)x->dims[d]);
      }
  }
  for (int d = 0; d < rank; d++)
    if (dims[d] > 0 && x->dims[d] == 0)
      return RC_NODE_FAIL(e, n, RC_ERR_SHAPE, "cannot resize empty axis %d to %lld", d, (long long)dims[d]);
  return RC_OK;
}

static rc_status resize_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  if (!in[0]) return RC_NODE_FAIL(e, n, RC_ERR_INVALID, "input %d is required", 0);
  if (in[0]->dtype != RC_DTYPE_FLOAT)
    return RC_NODE_FAIL(e, n, RC_ERR_UNSUPPORTED, "input is %s, only float32 is supported",
                        rc_dtype_name(in[0]->dtype));
  double scale[RC_MAX_RANK];
  out[0].dtype = RC_DTYPE_FLOAT;
  out[0].rank = in[0]->rank;
  out[0].data = NULL;
  RC_TRY(resize_plan(n, in, scale, out[0].dims, e));
  return rc__check_shape(n, &out[0], e);
}

/* Where output coordinate o of an axis (in_len -> out_len, scale s) reads. */
static double source_coord(int coord, double o, double s, int64_t in_len, int64_t out_len) {
  switch (coord) {
    case CT_HALF_PIXEL: return (o + 0.5) / s - 0.5;
    case CT_HALF_PIXEL_SYMMETRIC: {
      double adj = (double)out_len / (s * (double)in_len), center = (double)in_len / 2;
      return center * (1 - adj) + (o + 0.5) / s - 0.5;
    }
    case CT_PYTORCH_HALF_PIXEL: return out_len > 1 ? (o + 0.5) / s - 0.5 : 0.0;
    case CT_ALIGN_CORNERS: { /* the spec's length_resized is scale * length, not the rounded size */
      double len = s * (double)in_len;
      return out_len == 1 || len == 1 ? 0.0 : o * (double)(in_len - 1) / (len - 1);
    }
    case CT_TF_HALF_PIXEL_FOR_NN: return (o + 0.5) / s;
    default: return o / s;
  }
}

static int64_t round_nearest(int mode, double v) {
  switch (mode) {
    case NM_ROUND_PREFER_FLOOR: return (int64_t)ceil(v - 0.5);
    case NM_ROUND_PREFER_CEIL: return (int64_t)floor(v + 0.5);
    case NM_FLOOR: return (int64_t)floor(v);
    default: return (int64_t)ceil(v);
  }
}

/* Per output coordinate of one axis: the two input indices and weights. */
typedef struct tap {
  int64_t i0, i1;
  float w0, w1;
} tap;

static size_t resize_workspace(const rc_kernel *k, int backward) {
  (void)backward;
  size_t s = 0;
  for (int d = 0; d < k->out[0]->rank; d++) s += (size_t)k->out[0]->dims[d];
  return s * sizeof(tap);
}

/* Fills taps for every axis (in k->work); interp[d] = 1 where the axis mixes
 * two inputs; returns how many leading axes map onto themselves. */
static int resize_taps(const rc_kernel *k, tap **taps, int *interp) {
  const resize_params *p = k->params;
  const rc_tensor *x = k->in[0], *y = k->out[0];
  double scale[RC_MAX_RANK];
  int64_t dims[RC_MAX_RANK];
  rc_err e;
  resize_plan(k->node, (const rc_tensor *const *)k->in, scale, dims, &e);
  tap *w = k->work;
  int lead = 0, leading = 1;
  for (int d = 0; d < x->rank; d++) {
    taps[d] = w;
    interp[d] = 0;
    int64_t L = x->dims[d], M = y->dims[d];
    int same = L == M && scale[d] == 1.0;
    leading = leading && same;
    lead += leading;
    for (int64_t o = 0; o < M; o++, w++) {
      if (same) { /* every mode maps an unscaled axis onto itself */
        *w = (tap){o, o, 1.0f, 0.0f};
        continue;
      }
      double c = source_coord(p->coord, (double)o, scale[d], L, M);
      if (!p->linear) {
        int64_t i = round_nearest(p->nearest, c);
        i = i < 0 ? 0 : i >= L ? L - 1 : i;
        *w = (tap){i, i, 1.0f, 0.0f};
        continue;
      }
      c = c < 0 ? 0 : c > (double)(L - 1) ? (double)(L - 1) : c;
      int64_t i0 = (int64_t)floor(c);
      double f = c - (double)i0;
      *w = (tap){i0, i0 + 1 < L ? i0 + 1 : L - 1, (float)(1.0 - f), (float)f};
      if (f != 0) interp[d] = 1;
    }
  }
  return lead;
}

/* Offsets and weights of the input points one output row (all axes but the
 * last fixed by idx) reads from: up to 2^(rank-1) corners. */
static int row_corners(int r, tap *const *taps, const int *interp, const int64_t *idx, const int64_t *xs,
                       int64_t *off, float *wt) {
  int nc = 1;
  off[0] = 0;
  wt[0] = 1;
  for (int d = 0; d < r - 1; d++) {
    const tap *t = &taps[d][idx[d]];
    if (!interp[d]) {
      for (int c = 0; c < nc; c++) off[c] += t->i0 * xs[d];
      continue;
    }
    for (int c = 0; c < nc; c++) {
      off[nc + c] = off[c] + t->i1 * xs[d];
      wt[nc + c] = wt[c] * t->w1;
      off[c] += t->i0 * xs[d];
      wt[c] *= t->w0;
    }
    nc *= 2;
  }
  return nc;
}

/* The walk over output rows (all axes but the last fixed) shared by forward
 * and backward. Rows are independent for forward; for backward, rows of
 * different planes (the leading axes that map onto themselves, e.g. N and C)
 * write disjoint parts of dx, so planes run in parallel deterministically. */
typedef struct row_walk {
  tap *taps[RC_MAX_RANK];
  int interp[RC_MAX_RANK];
  int rank, lerp;
  int64_t xs[RC_MAX_RANK], ydims[RC_MAX_RANK], width, rows, planes;
} row_walk;

#define CORNERS (1 << (RC_MAX_RANK - 1))
#define PARALLEL_MIN 16384 /* output elements below which threads cost more than they give */

static void walk_begin(const rc_kernel *k, row_walk *w) {
  const rc_tensor *x = k->in[0], *y = k->out[0];
  w->rank = x->rank;
  int lead = resize_taps(k, w->taps, w->interp);
  if (lead > w->rank - 1) lead = w->rank - 1;
  w->lerp = w->interp[w->rank - 1];
  rc__contig_strides(w->xs, x->rank, x->dims);
  memcpy(w->ydims, y->dims, sizeof w->ydims);
  w->width = y->dims[x->rank - 1];
  w->rows = rc_tensor_numel(y) / w->width;
  w->planes = 1;
  for (int d = 0; d < lead; d++) w->planes *= y->dims[d];
}

/* Offsets and weights of the input points output row `row` reads. */
static int walk_row(const row_walk *w, int64_t row, int64_t *off, float *wt) {
  int64_t idx[RC_MAX_RANK];
  for (int d = w->rank - 2; d >= 0; d--) {
    idx[d] = row % w->ydims[d];
    row /= w->ydims[d];
  }
  return row_corners(w->rank, w->taps, w->interp, idx, w->xs, off, wt);
}

/* x (.., L_d, ..) -> y (.., M_d, ..) */
static rc_status resize_forward(const rc_kernel *k, rc_err *e) {
  (void)e;
  const rc_tensor *x = k->in[0];
  rc_tensor *y = k->out[0];
  if (rc_tensor_numel(y) == 0) return RC_OK;
  if (x->rank == 0) {
    *(float *)y->data = *(const float *)x->data;
    return RC_OK;
  }
  row_walk w;
  walk_begin(k, &w);
  const float *xd = x->data;
  const tap *last = w.taps[w.rank - 1];
#pragma omp parallel for schedule(static) if (w.rows * w.width >= PARALLEL_MIN)
  for (int64_t row = 0; row < w.rows; row++) {
    int64_t off[CORNERS];
    float wt[CORNERS], *yd = (float *)y->data + row * w.width;
    int nc = walk_row(&w, row, off, wt);
    for (int64_t j = 0; j < w.width; j++) {
      const tap *t = &last[j];
      float acc = 0;
      for (int c = 0; c < nc; c++) {
        const float *p = xd + off[c];
        acc += w.lerp ? wt[c] * (t->w0 * p[t->i0] + t->w1 * p[t->i1]) : wt[c] * p[t->i0];
      }
      yd[j] = acc;
    }
  }
  return RC_OK;
}

/* Each output's gradient goes back to the points it read, with the same
 * weights (nearest: scatter-add). */
static void resize_backward(const rc_kernel *k) {
  if (!k->din[0] || !k->dout[0]) return;
  const rc_tensor *x = k->in[0], *y = k->out[0];
  if (rc_tensor_numel(y) == 0) return;
  if (x->rank == 0) {
    *(float *)k->din[0]->data += *(const float *)k->dout[0]->data;
    return;
  }
  row_walk w;
  walk_begin(k, &w);
  float *gx = k->din[0]->data;
  const tap *last = w.taps[w.rank - 1];
  int64_t per_plane = w.rows / w.planes;
#pragma omp parallel for schedule(static) if (w.planes > 1 && w.rows * w.width >= PARALLEL_MIN)
  for (int64_t plane = 0; plane < w.planes; plane++)
    for (int64_t row = plane * per_plane; row < (plane + 1) * per_plane; row++) {
      int64_t off[CORNERS];
      float wt[CORNERS];
      const float *gy = (const float *)k->dout[0]->data + row * w.width;
      int nc = walk_row(&w, row, off, wt);
      for (int64_t j = 0; j < w.width; j++) {
        const tap *t = &last[j];
        for (int c = 0; c < nc; c++) {
          float *p = gx + off[c], g = wt[c] * gy[j];
          if (w.lerp) {
            p[t->i0] += t->w0 * g;
            p[t->i1] += t->w1 * g;
          } else {
            p[t->i0] += g;
          }
        }
      }
    }
}

const rc_op_def rc__ops_resize[] = {
    {"Resize", "", 10, 21, 0, resize_parse, resize_infer, resize_workspace, NULL, resize_forward, resize_backward},
    {"Upsample", "", 9, 9, 0, resize_parse, resize_infer, resize_workspace, NULL, resize_forward, resize_backward},
};
const int rc__ops_resize_count = (int)(sizeof rc__ops_resize / sizeof rc__ops_resize[0]);
