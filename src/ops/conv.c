/* Op family: conv (Conv, ConvTranspose). Forward and backward side by side.
 *
 * Both ops work through an unfolded-patch ("column") matrix and GEMMs
 * (patch.c: unfold = im2col, writing each column cell once; fold = col2im,
 * a walk over one kernel tap). The same helpers serve Conv's forward and
 * input gradient and ConvTranspose's forward and input gradient, since each
 * op is the other's adjoint. Conv picks one of three paths: several samples
 * per GEMM where feature maps are small (conv_batch.c; a 1x1 convolution's
 * unfolding is then a copy), direct vector kernels for depthwise
 * convolution (depthwise.c), and otherwise one sample per thread, with a
 * 1x1, stride-1, unpadded convolution skipping the unfolding (the input
 * already is the column matrix). That per-sample path, with the tap walk
 * for depthwise, is also the plain path RECOUP_CONV_PATH=reference selects
 * (kernel_choice.h). Where the build has oneDNN, its convolutions take
 * the non-depthwise layers with windows larger than 1x1 first (conv_dnnl.c;
 * a shape it refuses falls through to the paths above), and a batched
 * matmul takes the forward and input gradient of 1x1 layers on small maps
 * (conv_dnnl_1x1.c). Spatial axes are
 * canonicalised to 3 (missing leading axes have size 1), so 1-D, 2-D and
 * 3-D share one path. */
#include <cblas.h>
#include <limits.h>
#include <omp.h>
#include <string.h>

#include "ops/conv_impl.h"
#include "ops/epilogue.h"
#include "ops/kernel_choice.h"
#include "ops/op.h"
#include "ops/sparse.h"

#define AX RC_WIN_MAX_AXES

/* ---- window attributes (shared with pool.c through window.h) ---- */

static rc_status read_axes(const rc_node *n, const char *name, int64_t *dst, int max, int *count,
                           int64_t min_value, rc_err *e) {
  const rc_attr *a = rc__attr_find(n, name);
  *count = 0;
  if (!a) return RC_OK;
  if (a->type != RC_ATTR_INTS)
    return rc__fail(e, RC_ERR_FORMAT, "node '%s' (%s): attribute '%s' must be a list of ints", n->label,
                    n->op_type, name);
  if (a->n > max)
    return rc__fail(e, RC_ERR_UNSUPPORTED,
                    "node '%s' (%s): attribute '%s' has %d values; at most %d are supported (up to %d "
                    "spatial axes)", n->label, n->op_type, name, a->n, max, AX);
  for (int i = 0; i < a->n; i++) {
    if (a->ints[i] < min_value || a->ints[i] > ((int64_t)1 << 30))
      return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): attribute '%s' value %lld out of range",
                      n->label, n->op_type, name, (long long)a->ints[i]);
    dst[i] = a->ints[i];
  }
  *count = a->n;
  return RC_OK;
}

rc_status rc__window_parse(const rc_node *n, rc__window *w, int allow_dilations, rc_err *e) {
  memset(w, 0, sizeof *w);
  RC_TRY(read_axes(n, "kernel_shape", w->kernel, AX, &w->n_kernel, 1, e));
  RC_TRY(read_axes(n, "strides", w->strides, AX, &w->n_strides, 1, e));
  RC_TRY(read_axes(n, "pads", w->pads, 2 * AX, &w->n_pads, 0, e));
  if (!allow_dilations && rc__attr_find(n, "dilations"))
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): attribute 'dilations' is not defined at opset %d",
                    n->label, n->op_type, n->opset);
  RC_TRY(read_axes(n, "dilations", w->dilations, AX, &w->n_dilations, 1, e));
  if (w->n_pads % 2)
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): attribute 'pads' needs an even count, got %d",
                    n->label, n->op_type, w->n_pads);
  const char *ap = rc__attr_string(n, "auto_pad", "NOTSET");
  if (!strcmp(ap, "NOTSET") || !*ap) w->auto_pad = RC_AUTO_PAD_NOTSET;
  else if (!strcmp(ap, "VALID")) w->auto_pad = RC_AUTO_PAD_VALID;
  else if (!strcmp(ap, "SAME_UPPER")) w->auto_pad = RC_AUTO_PAD_SAME_UPPER;
  else if (!strcmp(ap, "SAME_LOWER")) w->auto_pad = RC_AUTO_PAD_SAME_LOWER;
  else
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): auto_pad '%s' is not one of NOTSET, VALID, "
                    "SAME_UPPER, SAME_LOWER", n->label, n->op_type, ap);
  /* The spec forbids pads together with auto_pad; all-zero pads are harmless. */
  if (w->auto_pad != RC_AUTO_PAD_NOTSET)
    for (int i = 0; i < w->n_pads; i++)
      if (w->pads[i])
        return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): 'pads' cannot be combined with auto_pad '%s'",
                        n->label, n->op_type, ap);
  return RC_OK;
}

static rc_status check_count(const rc_node *n, const char *name, int count, int want, rc_err *e) {
  if (count && count != want)
    return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): attribute '%s' has %d values for %d spatial axes",
                    n->label, n->op_type, name, count, want);
  return RC_OK;
}

rc_status rc__window_resolve(const rc_node *n, const rc__window *w, int nsp, const int64_t *in,
                             const int64_t *k, int ceil_mode, int64_t *out, int64_t *pad_begin,
                             int64_t *pad_end, int64_t *s, int64_t *d, rc_err *e) {
  if (nsp < 1 || nsp > AX)
    return rc__fail(e, RC_ERR_UNSUPPORTED, "node '%s' (%s): %d spatial axes; 1 to %d are supported",
                    n->label, n->op_type, nsp, AX);
  RC_TRY(check_count(n, "strides", w->n_strides, nsp, e));
  RC_TRY(check_count(n, "dilations", w->n_dilations, nsp, e));
  RC_TRY(check_count(n, "pads", w->n_pads, 2 * nsp, e));
  for (int i = 0; i < nsp; i++) {
    s[i] = w->n_strides ? w->strides[i] : 1;
    d[i] = w->n_dilations ? w->dilations[i] : 1;
    int64_t extent = (k[i] - 1) * d[i] + 1;
    int64_t pb = w->n_pads ? w->pads[i] : 0, pe = w->n_pads ? w->pads[nsp + i] : 0;
    int64_t o;
    switch (w->auto_pad) {
      case RC_AUTO_PAD_VALID:
        pb = pe = 0;
        o = in[i] >= extent ? (in[i] - extent) / s[i] + 1 : 0;
        break;
      case RC_AUTO_PAD_SAME_UPPER:
      case RC_AUTO_PAD_SAME_LOWER: {
        o = (in[i] + s[i] - 1) / s[i];
        int64_t total = (o - 1) * s[i] + extent - in[i];
        if (total < 0) total = 0;
        /* Odd padding: the extra cell goes at the end for SAME_UPPER. */
        pb = w->auto_pad == RC_AUTO_PAD_SAME_UPPER ? total / 2 : total - total / 2;
        pe = total - pb;
        break;
      }
      default: {
        int64_t span = in[i] + pb + pe - extent;
        if (span < 0) {
          o = 0;
          break;
        }
        o = (ceil_mode ? (span + s[i] - 1) / s[i] : span / s[i]) + 1;
        /* ceil_mode: a window starting in the end padding would see no input. */
        if (ceil_mode && (o - 1) * s[i] >= in[i] + pb) o--;
        break;
      }
    }
    if (o <= 0)
      return rc__fail(e, RC_ERR_SHAPE,
                      "node '%s' (%s): spatial axis %d of size %lld is smaller than the window "
                      "(kernel %lld, dilation %lld, pads %lld+%lld)",
                      n->label, n->op_type, i, (long long)in[i], (long long)k[i], (long long)d[i],
                      (long long)pb, (long long)pe);
    out[i] = o;
    pad_begin[i] = pb;
    pad_end[i] = pe;
  }
  return RC_OK;
}

/* ---- Conv / ConvTranspose geometry ---- */

typedef struct conv_params {
  rc__window w;
  int64_t group;
  int transpose;
  int n_out_pad, n_out_shape;
  int64_t out_pad[AX], out_shape[AX + 2]; /* output_shape as written: spatial, or (N, C, spatial...) */
} conv_params;

static rc_status conv_parse(rc_node *n, rc_arena *a, rc_err *e) {
  conv_params *p = rc__arena_zalloc(a, sizeof *p);
  if (!p) return rc__fail(e, RC_ERR_NOMEM, "node '%s' (%s): out of memory", n->label, n->op_type);
  p->transpose = !strcmp(n->op_type, "ConvTranspose");
  RC_TRY(rc__window_parse(n, &p->w, 1, e));
  p->group = rc__attr_int(n, "group", 1);
  if (p->group < 1 || p->group > ((int64_t)1 << 30))
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): group %lld must be positive", n->label,
                    n->op_type, (long long)p->group);
  if (p->transpose) {
    RC_TRY(read_axes(n, "output_padding", p->out_pad, AX, &p->n_out_pad, 0, e));
    const rc_attr *os = rc__attr_find(n, "output_shape");
    if (os) {
      if (os->type != RC_ATTR_INTS || os->n < 1 || os->n > AX + 2)
        return rc__fail(e, RC_ERR_UNSUPPORTED, "node '%s' (%s): attribute 'output_shape' must list "
                        "1 to %d sizes", n->label, n->op_type, AX + 2);
      for (int i = 0; i < os->n; i++) {
        if (os->ints[i] < 1 || os->ints[i] > ((int64_t)1 << 30))
          return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): output_shape value %lld out of range",
                          n->label, n->op_type, (long long)os->ints[i]);
        p->out_shape[i] = os->ints[i];
      }
      p->n_out_shape = os->n;
    }
  }
  n->params = p;
  return RC_OK;
}

static rc_status need_float(const rc_node *n, const rc_tensor *t, const char *what, rc_err *e) {
  if (t->dtype != RC_DTYPE_FLOAT)
    return rc__fail(e, RC_ERR_UNSUPPORTED, "node '%s' (%s): input %s has dtype %s; only float is supported",
                    n->label, n->op_type, what, rc_dtype_name(t->dtype));
  return RC_OK;
}

/* ConvTranspose pads and output sizes, following the spec's equations. */
static rc_status transpose_resolve(const rc_node *n, const conv_params *cp, int nsp, const int64_t *in,
                                   const int64_t *k, int64_t *out, int64_t *pb, int64_t *s, int64_t *d,
                                   rc_err *e) {
  const rc__window *w = &cp->w;
  RC_TRY(check_count(n, "strides", w->n_strides, nsp, e));
  RC_TRY(check_count(n, "dilations", w->n_dilations, nsp, e));
  RC_TRY(check_count(n, "pads", w->n_pads, 2 * nsp, e));
  RC_TRY(check_count(n, "output_padding", cp->n_out_pad, nsp, e));
  /* Some exporters write output_shape in full, (N, C, spatial...). */
  const int64_t *out_shape = cp->n_out_shape == nsp + 2 ? cp->out_shape + 2 : cp->out_shape;
  if (cp->n_out_shape && cp->n_out_shape != nsp && cp->n_out_shape != nsp + 2)
    return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): attribute 'output_shape' has %d values for %d spatial axes",
                    n->label, n->op_type, cp->n_out_shape, nsp);
  for (int i = 0; i < nsp; i++) {
    s[i] = w->n_strides ? w->strides[i] : 1;
    d[i] = w->n_dilations ? w->dilations[i] : 1;
    int64_t op = cp->n_out_pad ? cp->out_pad[i] : 0;
    if (op && op >= s[i] && op >= d[i])
      return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): output_padding %lld must be less than the "
                      "stride or the dilation of axis %d", n->label, n->op_type, (long long)op, i);
    int64_t full = s[i] * (in[i] - 1) + op + (k[i] - 1) * d[i] + 1;
    int64_t o, begin;
    if (cp->n_out_shape || w->auto_pad == RC_AUTO_PAD_SAME_UPPER || w->auto_pad == RC_AUTO_PAD_SAME_LOWER) {
      o = cp->n_out_shape ? out_shape[i] : in[i] * s[i];
      int64_t total = full - o;
      /* Where the odd cell of padding goes changed at opset 11. */
      int small_begin = w->auto_pad == RC_AUTO_PAD_SAME_UPPER;
      if (cp->n_out_shape && n->opset < 11) small_begin = !small_begin;
      /* An output larger than the natural one (negative total) gets its
       * extra cells at the end, as output_padding would give them. */
      begin = total <= 0 ? 0 : small_begin ? total / 2 : total - total / 2;
    } else if (w->auto_pad == RC_AUTO_PAD_VALID) {
      o = full;
      begin = 0;
    } else {
      begin = w->n_pads ? w->pads[i] : 0;
      o = full - begin - (w->n_pads ? w->pads[nsp + i] : 0);
    }
    if (o <= 0)
      return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): spatial axis %d would have size %lld", n->label,
                      n->op_type, i, (long long)o);
    out[i] = o;
    pb[i] = begin;
  }
  return RC_OK;
}

static rc_status conv_geometry(const rc_node *n, const conv_params *cp, const rc_tensor *x, const rc_tensor *w,
                               const rc_tensor *b, rc__conv_geom *g, rc_err *e) {
  memset(g, 0, sizeof *g);
  RC_TRY(need_float(n, x, "X", e));
  RC_TRY(need_float(n, w, "W", e));
  if (b) RC_TRY(need_float(n, b, "B", e));
  if (x->rank < 3 || x->rank > 2 + AX)
    return rc__fail(e, RC_ERR_UNSUPPORTED, "node '%s' (%s): input X has rank %d; ranks 3 to %d are supported",
                    n->label, n->op_type, x->rank, 2 + AX);
  if (w->rank != x->rank)
    return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): W has rank %d but X has rank %d", n->label,
                    n->op_type, w->rank, x->rank);
  int nsp = x->rank - 2;
  g->nsp = nsp;
  g->N = x->dims[0];
  g->C = x->dims[1];
  g->G = cp->group;
  int64_t k[AX];
  for (int i = 0; i < nsp; i++) {
    k[i] = w->dims[2 + i];
    if (k[i] < 1)
      return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): W has an empty kernel axis", n->label, n->op_type);
    if (cp->w.n_kernel && (cp->w.n_kernel != nsp || cp->w.kernel[i] != k[i]))
      return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): kernel_shape does not match W's spatial dims",
                      n->label, n->op_type);
  }
  if (g->C % g->G)
    return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): %lld input channels do not divide into %lld groups",
                    n->label, n->op_type, (long long)g->C, (long long)g->G);
  g->Cg = g->C / g->G;
  if (!cp->transpose) {
    if (w->dims[1] != g->Cg)
      return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): W has %lld input channels per group, X gives %lld",
                      n->label, n->op_type, (long long)w->dims[1], (long long)g->Cg);
    g->M = w->dims[0];
    if (g->M % g->G)
      return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): %lld output channels do not divide into %lld groups",
                      n->label, n->op_type, (long long)g->M, (long long)g->G);
    g->Mg = g->M / g->G;
  } else {
    if (w->dims[0] != g->C)
      return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): W has %lld input channels, X has %lld", n->label,
                      n->op_type, (long long)w->dims[0], (long long)g->C);
    g->Mg = w->dims[1];
    g->M = g->Mg * g->G;
  }
  if (b && (b->rank != 1 || b->dims[0] != g->M))
    return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): B must have shape (%lld)", n->label, n->op_type,
                    (long long)g->M);
  int64_t in[AX], out[AX], pb[AX], pe[AX], s[AX], d[AX];
  for (int i = 0; i < nsp; i++) in[i] = x->dims[2 + i];
  if (!cp->transpose)
    RC_TRY(rc__window_resolve(n, &cp->w, nsp, in, k, 0, out, pb, pe, s, d, e));
  else
    RC_TRY(transpose_resolve(n, cp, nsp, in, k, out, pb, s, d, e));
  /* Canonical 3 axes: leading axes of size 1. */
  rc__patch *p = &g->p;
  int64_t cin[AX], cout[AX];
  for (int j = 0; j < AX; j++) {
    int i = j - (AX - nsp);
    cin[j] = i >= 0 ? in[i] : 1;
    cout[j] = i >= 0 ? out[i] : 1;
    p->k[j] = i >= 0 ? k[i] : 1;
    p->s[j] = i >= 0 ? s[i] : 1;
    p->d[j] = i >= 0 ? d[i] : 1;
    p->pad[j] = i >= 0 ? pb[i] : 0;
    g->out[j] = cout[j];
  }
  for (int j = 0; j < AX; j++) {
    p->img[j] = cp->transpose ? cout[j] : cin[j];
    p->pos[j] = cp->transpose ? cin[j] : cout[j];
  }
  g->K = rc__prod3(p->k);
  g->in_sp = rc__prod3(cin);
  g->out_sp = rc__prod3(cout);
  g->direct = g->K == 1 && rc__prod3(p->s) == 1 && !p->pad[0] && !p->pad[1] && !p->pad[2] && g->in_sp == g->out_sp;
  /* The column matrix of one group must stay addressable. */
  int64_t rows = (cp->transpose ? g->M : g->C) * g->K;
  if (rows > 0 && rc__prod3(p->pos) > RC_MAX_ELEMENTS / rows)
    return rc__fail(e, RC_ERR_LIMIT, "node '%s' (%s): unfolded patch matrix too large", n->label, n->op_type);
  /* GEMM sizes are ints. */
  if (rows > INT_MAX || g->in_sp > INT_MAX || g->out_sp > INT_MAX || g->C * g->K > INT_MAX ||
      g->M * g->K > INT_MAX)
    return rc__fail(e, RC_ERR_LIMIT, "node '%s' (%s): matrix dimension beyond %d", n->label, n->op_type, INT_MAX);
  return RC_OK;
}

static rc_status conv_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  if (n->n_in < 2 || !in[0] || !in[1])
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): inputs X and W are required", n->label, n->op_type);
  rc__conv_geom g;
  RC_TRY(conv_geometry(n, n->params, in[0], in[1], n->n_in > 2 ? in[2] : NULL, &g, e));
  out[0].dtype = RC_DTYPE_FLOAT;
  out[0].rank = in[0]->rank;
  out[0].dims[0] = g.N;
  out[0].dims[1] = g.M;
  for (int i = 0; i < g.nsp; i++) out[0].dims[2 + i] = g.out[AX - g.nsp + i];
  return rc__check_shape(n, &out[0], e);
}

static const rc_tensor *opt_in(const rc_kernel *k, int i) { return i < k->n_in ? k->in[i] : NULL; }

static void geometry_of(const rc_kernel *k, rc__conv_geom *g) {
  rc_err e;
  /* Validated by infer for these very shapes; cannot fail here. */
  conv_geometry(k->node, k->params, k->in[0], k->in[1], opt_in(k, 2), g, &e);
}

/* Conv runs its samples in parallel, each thread with single-threaded
 * GEMMs (OpenBLAS does not thread inside a parallel region): one team per
 * call instead of a team per small per-sample GEMM, whose start-up cost made
 * two threads slower than one on small models. Per thread: one sample's
 * column matrix and, for backward, a private weight gradient that is summed
 * in thread order afterwards (deterministic for a given thread count). */
static size_t col_floats(const rc__conv_geom *g) {
  return g->direct ? 0 : (size_t)(g->C * g->K) * (size_t)rc__prod3(g->p.pos);
}

static size_t thread_floats(const rc__conv_geom *g, int backward) {
  return col_floats(g) + (backward ? (size_t)g->M * (size_t)(g->Cg * g->K) : 0);
}

/* Threads for the sample loop: no more than samples, cores, or workspace
 * copies. One means the plain serial loop (OpenBLAS may then thread). */
static int sample_threads(const rc_kernel *k, const rc__conv_geom *g, size_t per) {
  int64_t t = omp_get_max_threads();
  if (t > g->N) t = g->N;
  if (per && (size_t)t > k->work_bytes / (sizeof(float) * per)) t = (int64_t)(k->work_bytes / (sizeof(float) * per));
  return t > 1 ? (int)t : 1;
}

/* Whether oneDNN is asked to take this Conv (it may still refuse a shape). */
static int dnnl_chosen(const rc__conv_geom *g) {
  return rc__conv_path_choice() == RC_CONV_PATH_DNNL && rc__conv_dnnl_fits(g) && !rc__depthwise_fits(g);
}

/* The weight pattern when the sparse kernels serve this Conv (sparse_conv.c). */
static const rc__wpattern *sparse_of(const rc_kernel *k, const rc__conv_geom *g) {
  const rc__wpattern *p = rc__sparse_pick(k, rc__sparse_conv_density_limit(g));
  return rc__sparse_conv_fits(g, p) ? p : NULL;
}

static int mm_chosen(const rc_kernel *k, const rc__conv_geom *g, int data_grad);

static size_t conv_workspace(const rc_kernel *k, int backward) {
  rc__conv_geom g;
  geometry_of(k, &g);
  const conv_params *cp = k->params;
  if (cp->transpose) {
    /* One sample's column matrix, all groups: unfolding and folding then
     * run once per sample over every channel. */
    if (g.direct) return 0;
    return sizeof(float) * (size_t)(g.M * g.K) * (size_t)rc__prod3(g.p.pos);
  }
  if (rc__conv_depthwise(&g))
    return rc__depthwise_fits(&g) ? rc__depthwise_workspace(&g, backward, omp_get_max_threads()) : 0;
  /* oneDNN's primitives are made here, once per plan, when its path is
   * chosen; a layer the sparse kernels serve never takes it (the plan hands
   * patterns over before sizing), so it keeps no primitives or reorder room. */
  size_t dnnl = dnnl_chosen(&g) && !sparse_of(k, &g)
                    ? rc__conv_dnnl_workspace(k->state, &g, opt_in(k, 2) != NULL, backward)
                    : 0;
  const size_t mm = mm_chosen(k, &g, backward) ? rc__conv_mm_workspace(k->state, &g, backward) : 0;
  if (mm > dnnl) dnnl = mm;
  int64_t t = omp_get_max_threads();
  if (t > g.N) t = g.N;
  if (t < 1) t = 1;
  /* Room for both paths, so that the reference path stays selectable. */
  const size_t per_sample = sizeof(float) * (size_t)t * thread_floats(&g, backward);
  const int64_t nb = rc__conv_chunk(&g);
  const size_t chunk = nb > 1 ? rc__conv_chunk_bytes(&g, nb, backward, (int)t) : 0;
  size_t own = chunk > per_sample ? chunk : per_sample;
  /* A depthwise Conv with several output channels per group: the direct
   * kernels, or the per-sample path (reference) */
  const size_t direct = rc__depthwise_fits(&g) ? rc__depthwise_workspace(&g, backward, omp_get_max_threads()) : 0;
  if (direct > own) own = direct;
  return dnnl > own ? dnnl : own;
}

/* Whether the direct depthwise kernels run (they need one thread's workspace). */
static int depthwise_direct(const rc_kernel *k, const rc__conv_geom *g, int backward) {
  return rc__depthwise_fits(g) && !rc__conv_reference() &&
         k->work_bytes >= rc__depthwise_workspace(g, backward, 1);
}

/* Whether the N:M kernels (nm_conv.c) are chosen for this Conv's pass:
 * the switch, a pattern they fit, and a shape where they were measured to pay. */
static int nm_wanted(const rc_kernel *k, const rc__conv_geom *g, int backward) {
  const rc__sparse_mode mode = rc__nm_choice();
  return mode != RC_SPARSE_NEVER && rc__nm_conv_fits(g, k->pattern) &&
         (mode == RC_SPARSE_ALWAYS || rc__nm_conv_pays(g, backward, dnnl_chosen(g)));
}

/* The N:M pattern when those kernels serve this pass and T threads'
 * workspace fits; T is then set. */
static const rc__wpattern *nm_of(const rc_kernel *k, const rc__conv_geom *g, int backward, int *T) {
  if (!nm_wanted(k, g, backward)) return NULL;
  const size_t per = rc__nm_conv_thread_floats(g, backward);
  *T = sample_threads(k, g, per);
  return k->work_bytes >= sizeof(float) * per ? k->pattern : NULL;
}

/* Whether the 1x1 batched matmul serves this Conv's forward (data_grad =
 * 0) or input gradient (1) (conv_dnnl_1x1.c): oneDNN's path, a shape where
 * it was measured to pay (any shape it fits under RECOUP_CONV_PATH=dnnl),
 * and weights that neither the sparse nor the N:M kernels take in either
 * pass, so that their layers get no primitives. */
static int mm_chosen(const rc_kernel *k, const rc__conv_geom *g, int data_grad) {
  return rc__conv_path_choice() == RC_CONV_PATH_DNNL && rc__conv_mm_fits(g) &&
         (rc__conv_dnnl_everywhere() || rc__conv_mm_pays(g, data_grad)) && !sparse_of(k, g) &&
         !nm_wanted(k, g, 0) && !nm_wanted(k, g, 1);
}

/* Samples per GEMM for the chunked path, or 1 for the per-sample path. */
static int64_t chunk_of(const rc_kernel *k, const rc__conv_geom *g, int backward) {
  if (rc__conv_reference()) return 1;
  const int64_t nb = rc__conv_chunk(g);
  return nb > 1 && k->work_bytes >= rc__conv_chunk_bytes(g, nb, backward, 1) ? nb : 1;
}

/* Set each of the `channels` rows of y (length len) to its bias, or to zero. */
static void fill_bias(float *y, const float *b, int64_t channels, int64_t len) {
  for (int64_t c = 0; c < channels; c++) {
    float v = b ? b[c] : 0.0f;
    float *row = y + c * len;
    for (int64_t i = 0; i < len; i++) row[i] = v;
  }
}

/* db (M) += sum of dy (N, M, len) over batch and space, in double. */
static void bias_grad(float *db, const float *dy, int64_t N, int64_t M, int64_t len) {
  for (int64_t m = 0; m < M; m++) {
    double acc = 0;
    for (int64_t nn = 0; nn < N; nn++) {
      const float *row = dy + (nn * M + m) * len;
      float part = 0;
      for (int64_t i = 0; i < len; i++) part += row[i];
      acc += part;
    }
    db[m] += (float)acc;
  }
}

/* Depthwise convolution (one input and one output channel per group): each
 * plane is a K-tap stencil of its own channel. Planes are independent, so one
 * thread team covers the whole batch and no column matrix is needed. This
 * tap walk is the plain path: depthwise.c serves one and two spatial axes. */

/* y (N,C,P) = b + sum_k w[c,k] * x shifted by tap k */
static void depthwise_forward(const rc__conv_geom *g, float *y, const float *x, const float *w, const float *b) {
  const int64_t P = g->out_sp, S = g->in_sp, K = g->K, planes = g->N * g->C;
#pragma omp parallel for schedule(static) if (planes * K * P > 32768)
  for (int64_t pl = 0; pl < planes; pl++) {
    const int64_t c = pl % g->C;
    float *yp = y + pl * P;
    const float bias = b ? b[c] : 0.0f;
    for (int64_t i = 0; i < P; i++) yp[i] = bias;
    for (int64_t kr = 0; kr < K; kr++)
      rc__tap_walk(RC_TAP_ACCUMULATE, yp, (float *)(x + pl * S), &g->p, kr, w[c * K + kr]);
  }
}

/* dx += w-weighted scatter of dy; dw[c,k] += sum over the batch (in order) of
 * <dy plane, x shifted by tap k>. */
static void depthwise_backward(const rc__conv_geom *g, float *dx, float *dw, const float *x, const float *w,
                               const float *dy) {
  const int64_t P = g->out_sp, S = g->in_sp, K = g->K, planes = g->N * g->C;
  if (dx) {
#pragma omp parallel for schedule(static) if (planes * K * P > 32768)
    for (int64_t pl = 0; pl < planes; pl++)
      for (int64_t kr = 0; kr < K; kr++)
        rc__tap_walk(RC_TAP_SCATTER, (float *)(dy + pl * P), dx + pl * S, &g->p, kr, w[(pl % g->C) * K + kr]);
  }
  if (dw) {
#pragma omp parallel for schedule(static) if (planes * K * P > 32768)
    for (int64_t r = 0; r < g->C * K; r++) {
      const int64_t c = r / K;
      double acc = 0;
      for (int64_t n = 0; n < g->N; n++)
        acc += rc__tap_walk(RC_TAP_DOT, (float *)(dy + (n * g->C + c) * P), (float *)(x + (n * g->C + c) * S),
                            &g->p, r % K, 1.0f);
      dw[r] += (float)acc;
    }
  }
}

/* x (N,C,D...), W (M,C/G,k...), B (M) -> y (N,M,O...).
 * Per sample: col (C*K, P) = unfold(x_n); per group
 * y_g (Mg, P) = W_g (Mg, Cg*K) . col_g (Cg*K, P). */
/* y_n (M, P) = b + W . unfold(x_n), group by group. */
static void forward_sample(const rc__conv_geom *g, float *yn, const float *xn, const float *w, const float *b,
                           float *work) {
  const int64_t CgK = g->Cg * g->K, P = g->out_sp;
  const float *col = xn;
  if (!g->direct && CgK) {
    rc__unfold(work, P, xn, &g->p, g->C);
    col = work;
  }
  fill_bias(yn, b, g->M, P);
  if (!CgK) return;
  for (int64_t grp = 0; grp < g->G; grp++)
    cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, (int)g->Mg, (int)P, (int)CgK, 1.0f, w + grp * g->Mg * CgK,
                (int)CgK, col + grp * CgK * P, (int)P, 1.0f, yn + grp * g->Mg * P, (int)P);
}

/* The plain depthwise, sparse and oneDNN paths write all of y before the
 * epilogue can run: it then takes one pass over the batch, a sample per
 * thread. */
static void epilogue_pass(const rc__epilogue *ep, const rc__conv_geom *g, const float *y) {
  if (!ep) return;
#pragma omp parallel for schedule(static) if (g->N * g->M * g->out_sp > 32768)
  for (int64_t n = 0; n < g->N; n++) rc__epilogue_apply(ep, y, n * g->M, (n + 1) * g->M, g->M, g->out_sp);
}

/* The 1x1 matmul writes W . x for the whole batch: the bias and the
 * epilogue then take one pass, a sample per thread, each sample's rows
 * biased and finished while in cache. */
static void bias_epilogue_pass(const rc__epilogue *ep, const rc__conv_geom *g, float *y, const float *b) {
  if (!ep && !b) return;
  const int64_t P = g->out_sp;
#pragma omp parallel for schedule(static) if (g->N * g->M * P > 32768)
  for (int64_t n = 0; n < g->N; n++) {
    for (int64_t m = 0; b && m < g->M; m++) {
      float *row = y + (n * g->M + m) * P;
      for (int64_t i = 0; i < P; i++) row[i] += b[m];
    }
    if (ep) rc__epilogue_apply(ep, y, n * g->M, (n + 1) * g->M, g->M, P);
  }
}

static rc_status conv_forward(const rc_kernel *k, rc_err *e) { return rc__conv_forward_epilogue(k, NULL, e); }

rc_status rc__conv_forward_epilogue(const rc_kernel *k, const rc__epilogue *ep, rc_err *e) {
  (void)e;
  rc__conv_geom g;
  geometry_of(k, &g);
  const float *x = k->in[0]->data, *w = k->in[1]->data;
  const rc_tensor *bt = opt_in(k, 2);
  const float *b = bt ? bt->data : NULL;
  float *y = k->out[0]->data;
  if (!g.N || !g.M || !g.out_sp) return RC_OK;
  const rc__wpattern *sp = sparse_of(k, &g);
  if (sp) {
    rc__sparse_conv_forward(&g, sp, y, x, w, b);
    epilogue_pass(ep, &g, y);
    return RC_OK;
  }
  int nm_threads = 1;
  if ((sp = nm_of(k, &g, 0, &nm_threads))) {
    rc__nm_conv_forward(&g, sp, nm_threads, y, x, w, b, k->work, k->work_bytes, ep);
    return RC_OK;
  }
  if (depthwise_direct(k, &g, 0)) {
    rc__depthwise_forward(&g, y, x, w, b, k->work, k->work_bytes, ep);
    return RC_OK;
  }
  if (rc__conv_depthwise(&g)) {
    depthwise_forward(&g, y, x, w, b);
    epilogue_pass(ep, &g, y);
    return RC_OK;
  }
  if (dnnl_chosen(&g) && rc__conv_dnnl_forward(k->state, &g, y, x, w, b, k->work, k->work_bytes)) {
    epilogue_pass(ep, &g, y);
    return RC_OK;
  }
  if (mm_chosen(k, &g, 0) && rc__conv_mm_forward(k->state, &g, y, x, w, k->work, k->work_bytes)) {
    bias_epilogue_pass(ep, &g, y, b);
    return RC_OK;
  }
  const int64_t nb = chunk_of(k, &g, 0);
  if (nb > 1) {
    rc__conv_chunk_forward(&g, nb, rc__conv_chunk_threads(&g, nb, 0, k->work_bytes), y, x, w, b, k->work, ep);
    return RC_OK;
  }
  const size_t per = col_floats(&g);
  const int T = sample_threads(k, &g, per);
#pragma omp parallel for num_threads(T) schedule(static) if (T > 1)
  for (int64_t n = 0; n < g.N; n++) {
    forward_sample(&g, y + n * g.M * g.out_sp, x + n * g.C * g.in_sp, w, b,
                   (float *)k->work + (size_t)omp_get_thread_num() * per);
    if (ep) rc__epilogue_apply(ep, y, n * g.M, (n + 1) * g.M, g.M, g.out_sp); /* rows still in cache */
  }
  return RC_OK;
}

/* What both backward passes start from: geometry, data and the gradients
 * wanted; the bias gradient is taken here. Returns 0 when x and W need no
 * gradient (or there is none to give). */
typedef struct conv_grads {
  rc__conv_geom g;
  const float *x, *w, *dy;
  float *dx, *dw;
} conv_grads;

static int begin_backward(const rc_kernel *k, conv_grads *cg) {
  if (!k->dout[0]) return 0;
  rc__conv_geom *g = &cg->g;
  geometry_of(k, g);
  cg->x = k->in[0]->data;
  cg->w = k->in[1]->data;
  cg->dy = k->dout[0]->data;
  cg->dx = k->din[0] ? k->din[0]->data : NULL;
  cg->dw = k->din[1] ? k->din[1]->data : NULL;
  float *db = k->n_in > 2 && k->in[2] && k->din[2] ? k->din[2]->data : NULL;
  if (!g->N || !g->M || !g->out_sp) return 0;
  if (db) bias_grad(db, cg->dy, g->N, g->M, g->out_sp);
  return (cg->dx || cg->dw) && g->Cg && g->K && g->in_sp;
}

/* One sample's share of backward: dw (M, CgK) += dy_n . unfold(x_n)^T and
 * dx_n += fold(W^T . dy_n), group by group. */
static void backward_sample(const rc__conv_geom *g, int64_t n, const float *x, const float *w, const float *dy,
                            float *dx, float *dw, float *work) {
  const int64_t CgK = g->Cg * g->K, P = g->out_sp;
  const float *dyn = dy + n * g->M * P;
  if (dw) {
    const float *col = x + n * g->C * g->in_sp;
    if (!g->direct) {
      rc__unfold(work, P, col, &g->p, g->C);
      col = work;
    }
    for (int64_t grp = 0; grp < g->G; grp++)
      cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasTrans, (int)g->Mg, (int)CgK, (int)P, 1.0f, dyn + grp * g->Mg * P,
                  (int)P, col + grp * CgK * P, (int)P, 1.0f, dw + grp * g->Mg * CgK, (int)CgK);
  }
  if (!dx) return;
  float *dxn = dx + n * g->C * g->in_sp;
  if (g->direct) {
    /* The column matrix is x itself: dx_g (Cg, P) += W_g^T . dy_g. */
    for (int64_t grp = 0; grp < g->G; grp++)
      cblas_sgemm(CblasRowMajor, CblasTrans, CblasNoTrans, (int)g->Cg, (int)P, (int)g->Mg, 1.0f,
                  w + grp * g->Mg * CgK, (int)CgK, dyn + grp * g->Mg * P, (int)P, 1.0f, dxn + grp * g->Cg * P, (int)P);
    return;
  }
  /* dcol_g (CgK, P) = W_g^T . dy_g, then folded back onto dx */
  for (int64_t grp = 0; grp < g->G; grp++)
    cblas_sgemm(CblasRowMajor, CblasTrans, CblasNoTrans, (int)CgK, (int)P, (int)g->Mg, 1.0f, w + grp * g->Mg * CgK,
                (int)CgK, dyn + grp * g->Mg * P, (int)P, 0.0f, work + grp * CgK * P, (int)P);
  rc__fold_add(dxn, work, P, &g->p, g->C);
}

static void conv_backward(const rc_kernel *k) {
  conv_grads cg;
  if (!begin_backward(k, &cg)) return;
  const rc__conv_geom g = cg.g;
  const rc__wpattern *sp = sparse_of(k, &g);
  if (sp) {
    rc__sparse_conv_backward(&g, sp, cg.dx, cg.dw, cg.x, cg.w, cg.dy);
    return;
  }
  int nm_threads = 1;
  if ((sp = nm_of(k, &g, 1, &nm_threads))) {
    rc__nm_conv_backward(&g, sp, nm_threads, cg.dx, cg.dw, cg.x, cg.w, cg.dy, k->work);
    return;
  }
  if (depthwise_direct(k, &g, 1)) {
    rc__depthwise_backward(&g, cg.dx, cg.dw, cg.x, cg.w, cg.dy, k->work, k->work_bytes);
    return;
  }
  if (rc__conv_depthwise(&g)) {
    depthwise_backward(&g, cg.dx, cg.dw, cg.x, cg.w, cg.dy);
    return;
  }
  if (dnnl_chosen(&g) && rc__conv_dnnl_backward(k->state, &g, opt_in(k, 2) != NULL, cg.dx, cg.dw, cg.x, cg.w,
                                                cg.dy, k->work, k->work_bytes))
    return;
  /* The 1x1 matmul gives the input gradient; the weight gradient, a sum
   * over the batch, stays on the OpenBLAS paths below. */
  if (cg.dx && mm_chosen(k, &g, 1) &&
      rc__conv_mm_backward_data(k->state, &g, cg.dx, cg.w, cg.dy, k->work, k->work_bytes)) {
    cg.dx = NULL;
    if (!cg.dw) return;
  }
  const int64_t nb = chunk_of(k, &g, 1);
  if (nb > 1) {
    rc__conv_chunk_backward(&g, nb, rc__conv_chunk_threads(&g, nb, 1, k->work_bytes), cg.dx, cg.dw, cg.x, cg.w,
                            cg.dy, k->work);
    return;
  }
  const size_t col = col_floats(&g), per = thread_floats(&g, 1), dw_n = per - col;
  const int T = sample_threads(k, &g, per);
  if (T == 1) {
    for (int64_t n = 0; n < g.N; n++) backward_sample(&g, n, cg.x, cg.w, cg.dy, cg.dx, cg.dw, k->work);
    return;
  }
#pragma omp parallel num_threads(T)
  {
    float *work = (float *)k->work + (size_t)omp_get_thread_num() * per, *dw = cg.dw ? work + col : NULL;
    if (dw) memset(dw, 0, sizeof(float) * dw_n);
#pragma omp for schedule(static)
    for (int64_t n = 0; n < g.N; n++) backward_sample(&g, n, cg.x, cg.w, cg.dy, cg.dx, dw, work);
  }
  if (cg.dw)
    for (int t = 0; t < T; t++) {
      const float *part = (float *)k->work + (size_t)t * per + col;
      for (size_t i = 0; i < dw_n; i++) cg.dw[i] += part[i];
    }
}

/* x (N,C,D...), W (C,M/G,k...), B (M) -> y (N,M,O...).
 * Per sample and group: col_g (Mg*K, D) = W_g^T . x_g (Cg, D); the column
 * matrix of all groups is then folded onto y_n at once. */
static rc_status convt_forward(const rc_kernel *k, rc_err *e) {
  rc__conv_geom g;
  geometry_of(k, &g);
  const float *x = k->in[0]->data, *w = k->in[1]->data;
  const rc_tensor *bt = opt_in(k, 2);
  const float *b = bt ? bt->data : NULL;
  float *y = k->out[0]->data, *col = k->work;
  const int64_t MgK = g.Mg * g.K, D = g.in_sp, P = g.out_sp;
  if (!g.N || !g.M || !P) return RC_OK;
  for (int64_t n = 0; n < g.N; n++) {
    float *yn = y + n * g.M * P;
    fill_bias(yn, b, g.M, P);
    if (!g.Cg || !D) continue;
    for (int64_t grp = 0; grp < g.G; grp++) {
      const float *xg = x + (n * g.C + grp * g.Cg) * D, *wg = w + grp * g.Cg * MgK;
      /* direct: y_g += W_g^T x_g without a column matrix */
      cblas_sgemm(CblasRowMajor, CblasTrans, CblasNoTrans, (int)MgK, (int)D, (int)g.Cg, 1.0f, wg, (int)MgK,
                  xg, (int)D, g.direct ? 1.0f : 0.0f, g.direct ? yn + grp * g.Mg * P : col + grp * MgK * D,
                  (int)D);
    }
    if (!g.direct) rc__fold_add(yn, col, D, &g.p, g.M);
  }
  return RC_OK;
}

static void convt_backward(const rc_kernel *k) {
  conv_grads cg;
  if (!begin_backward(k, &cg)) return;
  const rc__conv_geom g = cg.g;
  const float *x = cg.x, *w = cg.w, *dy = cg.dy;
  float *dx = cg.dx, *dw = cg.dw;
  const int64_t MgK = g.Mg * g.K, D = g.in_sp, P = g.out_sp;
  for (int64_t n = 0; n < g.N; n++) {
    const float *col = dy + n * g.M * P;
    if (!g.direct) {
      rc__unfold(k->work, D, col, &g.p, g.M);
      col = k->work;
    }
    for (int64_t grp = 0; grp < g.G; grp++) {
      const float *colg = col + grp * MgK * D;
      /* dx_g (Cg, D) += W_g (Cg, MgK) . col_g (MgK, D) */
      if (dx)
        cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, (int)g.Cg, (int)D, (int)MgK, 1.0f,
                    w + grp * g.Cg * MgK, (int)MgK, colg, (int)D, 1.0f, dx + (n * g.C + grp * g.Cg) * D, (int)D);
      /* dW_g (Cg, MgK) += x_g (Cg, D) . col_g^T */
      if (dw)
        cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasTrans, (int)g.Cg, (int)MgK, (int)D, 1.0f,
                    x + (n * g.C + grp * g.Cg) * D, (int)D, colg, (int)D, 1.0f, dw + grp * g.Cg * MgK, (int)MgK);
    }
  }
}

const rc_op_def rc__ops_conv[] = {
    {"Conv", "", 1, 21, RC_OP_SPARSE_WEIGHT, conv_parse, conv_infer, conv_workspace, NULL, conv_forward, conv_backward},
    {"ConvTranspose", "", 1, 21, 0, conv_parse, conv_infer, conv_workspace, NULL, convt_forward,
     convt_backward},
};
const int rc__ops_conv_count = (int)(sizeof rc__ops_conv / sizeof rc__ops_conv[0]);
