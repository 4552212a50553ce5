/* Feature-level distillation losses (see feature_loss.h for the formulas).
 * Scalar sums run in double in a fixed order; GEMMs go through OpenBLAS. */
#include "train/feature_loss.h"

#include <cblas.h>
#include <limits.h>
#include <math.h>
#include <stdint.h>
#include <string.h>

#include "core/rng.h"

/* Elements per feature tensor: far above any real activation, far below
 * int64 overflow in the products formed here. */
#define MAX_ELEMENTS ((int64_t)1 << 40)

static const char *layout_name(rc_feat_layout l) {
  return l == RC_FEAT_CHANNELS_FIRST ? "channels-first" : "channels-last";
}

static rc_status check_view(const char *term, const char *what, const rc_feat_view *v,
                            rc_err *e) {
  if (!v) return rc__fail(e, RC_ERR_INVALID, "%s: missing %s view", term, what);
  if (v->layout != RC_FEAT_CHANNELS_FIRST && v->layout != RC_FEAT_CHANNELS_LAST)
    return rc__fail(e, RC_ERR_INVALID, "%s: %s has an unknown layout %d", term, what,
                    (int)v->layout);
  if (v->n < 1 || v->c < 1 || v->positions < 1)
    return rc__fail(e, RC_ERR_SHAPE, "%s: %s must have N, C, positions >= 1, got (%lld, %lld, %lld)",
                    term, what, (long long)v->n, (long long)v->c, (long long)v->positions);
  /* Every GEMM dimension formed below is at most n*positions or c. */
  if (v->c > INT_MAX || v->positions > INT_MAX / v->n || v->n * v->positions > MAX_ELEMENTS / v->c)
    return rc__fail(e, RC_ERR_LIMIT, "%s: %s of (%lld, %lld, %lld) is too large", term, what,
                    (long long)v->n, (long long)v->c, (long long)v->positions);
  return RC_OK;
}

static int64_t view_numel(const rc_feat_view *v) { return v->n * v->c * v->positions; }

static int work_aligned(const float *work) { return ((uintptr_t)work % 8) == 0; }

static rc_status check_work(const char *term, const float *work, rc_err *e) {
  if (!work) return rc__fail(e, RC_ERR_INVALID, "%s: missing workspace", term);
  if (!work_aligned(work))
    return rc__fail(e, RC_ERR_INVALID, "%s: workspace is not 8-byte aligned", term);
  return RC_OK;
}

rc_status rc_feat_view_from_dims(rc_feat_view *v, const int64_t *dims, int rank, rc_err *e) {
  if (rank < 2 || rank > 8)
    return rc__fail(e, RC_ERR_SHAPE, "feature: rank %d is not a batch of features (need 2..8)", rank);
  for (int i = 0; i < rank; i++)
    if (dims[i] < 1)
      return rc__fail(e, RC_ERR_SHAPE, "feature: dimension %d is %lld (need >= 1)", i,
                      (long long)dims[i]);
  rc_feat_view r;
  r.n = dims[0];
  if (rank == 2) {
    r.c = dims[1], r.positions = 1, r.layout = RC_FEAT_CHANNELS_LAST;
  } else if (rank == 3) {
    r.c = dims[2], r.positions = dims[1], r.layout = RC_FEAT_CHANNELS_LAST;
  } else {
    r.c = dims[1], r.positions = 1, r.layout = RC_FEAT_CHANNELS_FIRST;
    for (int i = 2; i < rank; i++) {
      if (r.positions > MAX_ELEMENTS / dims[i])
        return rc__fail(e, RC_ERR_LIMIT, "feature: spatial size is too large");
      r.positions *= dims[i];
    }
  }
  RC_TRY(check_view("feature", "tensor", &r, e));
  *v = r;
  return RC_OK;
}

rc_status rc_feat_projector_init(float *weight, float *bias, int64_t ct, int64_t cs,
                                 rc_feat_init init, uint64_t seed, rc_err *e) {
  if (!weight) return rc__fail(e, RC_ERR_INVALID, "projector init: missing weight");
  if (ct < 1 || cs < 1 || ct > INT_MAX || cs > INT_MAX || ct > MAX_ELEMENTS / cs)
    return rc__fail(e, RC_ERR_SHAPE, "projector init: bad size (%lld, %lld)", (long long)ct,
                    (long long)cs);
  if (init != RC_FEAT_INIT_AUTO && init != RC_FEAT_INIT_UNIFORM)
    return rc__fail(e, RC_ERR_INVALID, "projector init: unknown scheme %d", (int)init);
  if (init == RC_FEAT_INIT_AUTO && ct == cs) {
    memset(weight, 0, sizeof(float) * (size_t)(ct * cs));
    for (int64_t i = 0; i < ct; i++) weight[i * cs + i] = 1.0f;
  } else {
    rc_rng r;
    rc__rng_seed(&r, seed, 0x70726f6aULL); /* a stream of its own for projectors */
    double bound = sqrt(3.0 / (double)cs);
    for (int64_t i = 0; i < ct * cs; i++)
      weight[i] = (float)((2.0 * rc__rng_uniform(&r) - 1.0) * bound);
  }
  if (bias) memset(bias, 0, sizeof(float) * (size_t)ct);
  return RC_OK;
}

/* ---- Projected elementwise terms (hint, boundary) ---------------------- */

typedef enum elem_kind { ELEM_HINT, ELEM_BOUNDARY } elem_kind;

static rc_status check_projected(const char *term, const float *student, const float *teacher,
                                 const float *weight, const rc_feat_view *sv,
                                 const rc_feat_view *tv, const float *work, rc_err *e) {
  if (!student || !teacher) return rc__fail(e, RC_ERR_INVALID, "%s: missing features", term);
  RC_TRY(check_view(term, "student feature", sv, e));
  RC_TRY(check_view(term, "teacher feature", tv, e));
  if (sv->n != tv->n || sv->positions != tv->positions || sv->layout != tv->layout)
    return rc__fail(e, RC_ERR_SHAPE,
                    "%s: student (N %lld, %lld positions, %s) and teacher (N %lld, %lld positions, "
                    "%s) features must agree in batch, positions and layout",
                    term, (long long)sv->n, (long long)sv->positions, layout_name(sv->layout),
                    (long long)tv->n, (long long)tv->positions, layout_name(tv->layout));
  if (!weight && sv->c != tv->c)
    return rc__fail(e, RC_ERR_SHAPE,
                    "%s: student has %lld channels, teacher %lld: a projector is needed", term,
                    (long long)sv->c, (long long)tv->c);
  if (weight) RC_TRY(check_work(term, work, e));
  return RC_OK;
}

/* y = W x + b at every position; y in the teacher's layout.
 * x (N, Cs, P) or (N, P, Cs); W (Ct, Cs); b (Ct); y (N, Ct, P) or (N, P, Ct). */
static void project_forward(float *y, const float *x, const float *w, const float *b,
                            const rc_feat_view *sv, int64_t ct) {
  int cs = (int)sv->c, p = (int)sv->positions, ict = (int)ct;
  if (sv->layout == RC_FEAT_CHANNELS_FIRST) {
    for (int64_t i = 0; i < sv->n; i++) {
      float *yi = y + i * ct * p;
      cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, ict, p, cs, 1.0f, w, cs,
                  x + i * sv->c * p, p, 0.0f, yi, p);
      if (b)
        for (int64_t c = 0; c < ct; c++)
          for (int j = 0; j < p; j++) yi[c * p + j] += b[c];
    }
  } else {
    int m = (int)(sv->n * sv->positions);
    cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasTrans, m, ict, cs, 1.0f, x, cs, w, cs, 0.0f,
                y, ict);
    if (b)
      for (int64_t r = 0; r < m; r++)
        for (int64_t c = 0; c < ct; c++) y[r * ct + c] += b[c];
  }
}

/* Given dy (already scaled), ADD dW = sum dy x^T, db = sum dy, dx = W^T dy. */
static void project_backward(float *gx, float *gw, float *gb, const float *dy, const float *x,
                             const float *w, const rc_feat_view *sv, int64_t ct) {
  int cs = (int)sv->c, p = (int)sv->positions, ict = (int)ct;
  if (sv->layout == RC_FEAT_CHANNELS_FIRST) {
    for (int64_t i = 0; i < sv->n; i++) {
      const float *dyi = dy + i * ct * p, *xi = x + i * sv->c * p;
      if (gw)
        cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasTrans, ict, cs, p, 1.0f, dyi, p, xi, p,
                    1.0f, gw, cs);
      if (gx)
        cblas_sgemm(CblasRowMajor, CblasTrans, CblasNoTrans, cs, p, ict, 1.0f, w, cs, dyi, p,
                    1.0f, gx + i * sv->c * p, p);
    }
    if (gb)
      for (int64_t c = 0; c < ct; c++) {
        double s = 0.0;
        for (int64_t i = 0; i < sv->n; i++)
          for (int j = 0; j < p; j++) s += dy[(i * ct + c) * p + j];
        gb[c] += (float)s;
      }
  } else {
    int m = (int)(sv->n * sv->positions);
    if (gw)
      cblas_sgemm(CblasRowMajor, CblasTrans, CblasNoTrans, ict, cs, m, 1.0f, dy, ict, x, cs, 1.0f,
                  gw, cs);
    if (gx)
      cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, m, cs, ict, 1.0f, dy, ict, w, cs,
                  1.0f, gx, cs);
    if (gb)
      for (int64_t c = 0; c < ct; c++) {
        double s = 0.0;
        for (int64_t r = 0; r < m; r++) s += dy[r * ct + c];
        gb[c] += (float)s;
      }
  }
}

/* Sum of the elementwise term over y against t; when dy is not NULL, writes
 * (overwrite = 1) or adds (overwrite = 0) k * dl/dy into it. dy may alias y. */
static double elementwise(float *dy, int overwrite, const float *y, const float *t, int64_t count,
                          elem_kind kind, double margin, double k) {
  double sum = 0.0;
  for (int64_t i = 0; i < count; i++) {
    double v = y[i], g;
    if (kind == ELEM_HINT) {
      double d = v - t[i];
      sum += d * d;
      g = 2.0 * d;
    } else if (t[i] > 0.0f) { /* teacher neuron active: push y above +margin */
      double a = margin - v;
      if (a < 0.0) a = 0.0; /* written so that a NaN y stays NaN */
      sum += a * a;
      g = -2.0 * a;
    } else if (t[i] <= 0.0f) { /* inactive: push y below -margin */
      double a = margin + v;
      if (a < 0.0) a = 0.0;
      sum += a * a;
      g = 2.0 * a;
    } else { /* a NaN teacher must not pass for an inactive neuron */
      sum += NAN;
      g = NAN;
    }
    if (dy) {
      if (overwrite)
        dy[i] = (float)(k * g);
      else
        dy[i] += (float)(k * g);
    }
  }
  return sum;
}

static rc_status projected_term(const char *term, elem_kind kind, double *loss, float *gs,
                                float *gw, float *gb, float grad_scale, const float *student,
                                const float *teacher, const float *weight, const float *bias,
                                const rc_feat_view *sv, const rc_feat_view *tv, double margin,
                                float *work, rc_err *e) {
  RC_TRY(check_projected(term, student, teacher, weight, sv, tv, work, e));
  if (!weight) gw = NULL, gb = NULL;
  int64_t count = view_numel(tv);
  double k = (double)grad_scale / (double)count;
  double sum;
  if (!weight) {
    /* No projector: y is the student itself; its gradient goes straight in. */
    sum = elementwise(gs, 0, student, teacher, count, kind, margin, k);
  } else {
    project_forward(work, student, weight, bias, sv, tv->c);
    int want = gs || gw || gb;
    sum = elementwise(want ? work : NULL, 1, work, teacher, count, kind, margin, k);
    if (want) project_backward(gs, gw, gb, work, student, weight, sv, tv->c);
  }
  *loss = sum / (double)count;
  return RC_OK;
}

size_t rc_loss_hint_workspace_floats(const rc_feat_view *sv, const rc_feat_view *tv) {
  (void)sv;
  return (size_t)view_numel(tv);
}

rc_status rc_loss_hint(double *loss, float *grad_student, float *grad_weight, float *grad_bias,
                       float grad_scale, const float *student, const float *teacher,
                       const float *weight, const float *bias, const rc_feat_view *sv,
                       const rc_feat_view *tv, float *work, rc_err *e) {
  return projected_term("hint", ELEM_HINT, loss, grad_student, grad_weight, grad_bias, grad_scale,
                        student, teacher, weight, bias, sv, tv, 0.0, work, e);
}

size_t rc_loss_boundary_workspace_floats(const rc_feat_view *sv, const rc_feat_view *tv) {
  return rc_loss_hint_workspace_floats(sv, tv);
}

rc_status rc_loss_boundary(double *loss, float *grad_student, float *grad_weight,
                           float *grad_bias, float grad_scale, const float *student,
                           const float *teacher, const float *weight, const float *bias,
                           const rc_feat_view *sv, const rc_feat_view *tv, float margin,
                           float *work, rc_err *e) {
  if (!(margin > 0.0f) || !isfinite(margin))
    return rc__fail(e, RC_ERR_INVALID, "boundary: margin must be a positive number, got %g",
                    (double)margin);
  return projected_term("boundary", ELEM_BOUNDARY, loss, grad_student, grad_weight, grad_bias,
                        grad_scale, student, teacher, weight, bias, sv, tv, margin, work, e);
}

/* ---- Attention transfer ------------------------------------------------ */

/* q[p] = sum_c x[c, p]^2 for sample i, in double, walking memory in order;
 * returns ||q||_2. */
static double attention_map(double *q, const float *x, const rc_feat_view *v, int64_t i) {
  int64_t np = v->positions, nc = v->c;
  const float *xi = x + i * nc * np;
  if (v->layout == RC_FEAT_CHANNELS_FIRST) {
    for (int64_t p = 0; p < np; p++) q[p] = 0.0;
    for (int64_t c = 0; c < nc; c++)
      for (int64_t p = 0; p < np; p++) q[p] += (double)xi[c * np + p] * xi[c * np + p];
  } else {
    for (int64_t p = 0; p < np; p++) {
      double s = 0.0;
      for (int64_t c = 0; c < nc; c++) s += (double)xi[p * nc + c] * xi[p * nc + c];
      q[p] = s;
    }
  }
  double norm2 = 0.0;
  for (int64_t p = 0; p < np; p++) norm2 += q[p] * q[p];
  return sqrt(norm2);
}

#define AT_NORM_FLOOR 1e-12

size_t rc_loss_attention_workspace_floats(const rc_feat_view *sv, const rc_feat_view *tv) {
  (void)tv;
  return 4 * (size_t)sv->positions; /* two maps in double */
}

rc_status rc_loss_attention(double *loss, float *grad_student, float grad_scale,
                            const float *student, const float *teacher, const rc_feat_view *sv,
                            const rc_feat_view *tv, float beta, float *work, rc_err *e) {
  const char *term = "attention";
  if (!student || !teacher) return rc__fail(e, RC_ERR_INVALID, "%s: missing features", term);
  RC_TRY(check_view(term, "student feature", sv, e));
  RC_TRY(check_view(term, "teacher feature", tv, e));
  if (sv->n != tv->n)
    return rc__fail(e, RC_ERR_SHAPE, "%s: student batch %lld, teacher batch %lld", term,
                    (long long)sv->n, (long long)tv->n);
  if (sv->positions != tv->positions)
    return rc__fail(e, RC_ERR_SHAPE,
                    "%s: student has %lld spatial positions, teacher %lld: attention maps need "
                    "equal spatial sizes (pair layers of the same resolution)",
                    term, (long long)sv->positions, (long long)tv->positions);
  if (!(beta >= 0.0f) || !isfinite(beta))
    return rc__fail(e, RC_ERR_INVALID, "%s: beta must be >= 0, got %g", term, (double)beta);
  RC_TRY(check_work(term, work, e));
  int64_t n = sv->n, np = sv->positions, nc = sv->c;
  double *qs = (double *)(void *)work, *qt = qs + np;
  double total = 0.0;
  for (int64_t i = 0; i < n; i++) {
    double ns = attention_map(qs, student, sv, i);
    double nt = attention_map(qt, teacher, tv, i);
    double ds = ns > AT_NORM_FLOOR ? ns : AT_NORM_FLOOR;
    double dt = nt > AT_NORM_FLOOR ? nt : AT_NORM_FLOOR;
    /* qs becomes u_s, qt the difference u_s - u_t. */
    double dn2 = 0.0;
    for (int64_t p = 0; p < np; p++) {
      qs[p] /= ds;
      qt[p] = qs[p] - qt[p] / dt;
      dn2 += qt[p] * qt[p];
    }
    double dn = sqrt(dn2);
    total += 0.5 * beta * dn;
    if (!grad_student || dn == 0.0) continue;
    /* g_u = k d with k = beta/2 * scale / (N ||d||); through u = q / ||q||:
     * g_q = (g_u - u (u . g_u)) / ||q|| (g_u / floor when the norm was
     * floored, as then only the numerator varies); dA = 2 A g_q. */
    double k = 0.5 * beta * (double)grad_scale / (double)n / dn;
    double ug = 0.0;
    if (ns > AT_NORM_FLOOR)
      for (int64_t p = 0; p < np; p++) ug += qs[p] * k * qt[p];
    for (int64_t p = 0; p < np; p++) qt[p] = 2.0 * (k * qt[p] - qs[p] * ug) / ds;
    const float *xi = student + i * nc * np;
    float *gi = grad_student + i * nc * np;
    if (sv->layout == RC_FEAT_CHANNELS_FIRST) {
      for (int64_t c = 0; c < nc; c++)
        for (int64_t p = 0; p < np; p++) gi[c * np + p] += (float)(xi[c * np + p] * qt[p]);
    } else {
      for (int64_t p = 0; p < np; p++)
        for (int64_t c = 0; c < nc; c++) gi[p * nc + c] += (float)(xi[p * nc + c] * qt[p]);
    }
  }
  *loss = total / (double)n;
  return RC_OK;
}

/* ---- FSP matrices ------------------------------------------------------ */

/* G (c1, c2) = F1 F2^T / P for sample i, computed in float by OpenBLAS. */
static void fsp_matrix(float *g, const float *f1, const float *f2, const rc_feat_view *v1,
                       const rc_feat_view *v2, int64_t i) {
  int c1 = (int)v1->c, c2 = (int)v2->c, p = (int)v1->positions;
  float inv = (float)(1.0 / (double)p);
  const float *a = f1 + i * v1->c * p, *b = f2 + i * v2->c * p;
  if (v1->layout == RC_FEAT_CHANNELS_FIRST) /* a (c1, p), b (c2, p) */
    cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasTrans, c1, c2, p, inv, a, p, b, p, 0.0f, g, c2);
  else /* a (p, c1), b (p, c2) */
    cblas_sgemm(CblasRowMajor, CblasTrans, CblasNoTrans, c1, c2, p, inv, a, c1, b, c2, 0.0f, g, c2);
}

size_t rc_loss_fsp_workspace_floats(const rc_feat_view *s1, const rc_feat_view *s2) {
  return 2 * (size_t)s1->c * (size_t)s2->c;
}

rc_status rc_loss_fsp(double *loss, float *grad_s1, float *grad_s2, float grad_scale,
                      const float *s1, const float *s2, const float *t1, const float *t2,
                      const rc_feat_view *s1v, const rc_feat_view *s2v, const rc_feat_view *t1v,
                      const rc_feat_view *t2v, float *work, rc_err *e) {
  const char *term = "fsp";
  if (!s1 || !s2 || !t1 || !t2) return rc__fail(e, RC_ERR_INVALID, "%s: missing features", term);
  RC_TRY(check_view(term, "first student feature", s1v, e));
  RC_TRY(check_view(term, "second student feature", s2v, e));
  RC_TRY(check_view(term, "first teacher feature", t1v, e));
  RC_TRY(check_view(term, "second teacher feature", t2v, e));
  if (s1v->n != s2v->n || s1v->n != t1v->n || s1v->n != t2v->n)
    return rc__fail(e, RC_ERR_SHAPE, "%s: the four features must have the same batch size", term);
  if (s2v->layout != s1v->layout || t1v->layout != s1v->layout || t2v->layout != s1v->layout)
    return rc__fail(e, RC_ERR_SHAPE, "%s: the four features must share one layout", term);
  if (s1v->positions != s2v->positions || t1v->positions != t2v->positions)
    return rc__fail(e, RC_ERR_SHAPE,
                    "%s: paired layers need equal spatial sizes: student %lld vs %lld positions, "
                    "teacher %lld vs %lld",
                    term, (long long)s1v->positions, (long long)s2v->positions,
                    (long long)t1v->positions, (long long)t2v->positions);
  if (s1v->c != t1v->c || s2v->c != t2v->c)
    return rc__fail(e, RC_ERR_SHAPE,
                    "%s: FSP matrices differ in size: student (%lld, %lld), teacher (%lld, %lld)",
                    term, (long long)s1v->c, (long long)s2v->c, (long long)t1v->c,
                    (long long)t2v->c);
  if ((double)s1v->c * (double)s2v->c > (double)MAX_ELEMENTS)
    return rc__fail(e, RC_ERR_LIMIT, "%s: FSP matrix too large", term);
  RC_TRY(check_work(term, work, e));
  int64_t n = s1v->n, c1 = s1v->c, c2 = s2v->c, p = s1v->positions;
  float *gs = work, *gt = work + c1 * c2;
  double total = 0.0;
  double k = 2.0 * (double)grad_scale / (double)n;
  for (int64_t i = 0; i < n; i++) {
    fsp_matrix(gs, s1, s2, s1v, s2v, i);
    fsp_matrix(gt, t1, t2, t1v, t2v, i);
    double sum = 0.0;
    for (int64_t j = 0; j < c1 * c2; j++) {
      double d = (double)gs[j] - gt[j];
      sum += d * d;
      gs[j] = (float)(k * d); /* dL/dG_s */
    }
    total += sum;
    /* dF1 = dG F2 / P, dF2 = dG^T F1 / P. */
    int ic1 = (int)c1, ic2 = (int)c2, ip = (int)p;
    float inv = (float)(1.0 / (double)p);
    const float *a = s1 + i * c1 * p, *b = s2 + i * c2 * p;
    if (s1v->layout == RC_FEAT_CHANNELS_FIRST) {
      if (grad_s1)
        cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, ic1, ip, ic2, inv, gs, ic2, b, ip,
                    1.0f, grad_s1 + i * c1 * p, ip);
      if (grad_s2)
        cblas_sgemm(CblasRowMajor, CblasTrans, CblasNoTrans, ic2, ip, ic1, inv, gs, ic2, a, ip,
                    1.0f, grad_s2 + i * c2 * p, ip);
    } else {
      if (grad_s1) /* (p, c1) += b (p, c2) dG^T */
        cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasTrans, ip, ic1, ic2, inv, b, ic2, gs, ic2,
                    1.0f, grad_s1 + i * c1 * p, ic1);
      if (grad_s2) /* (p, c2) += a (p, c1) dG */
        cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, ip, ic2, ic1, inv, a, ic1, gs, ic2,
                    1.0f, grad_s2 + i * c2 * p, ic2);
    }
  }
  *loss = total / (double)n;
  return RC_OK;
}

/* ---- Relational knowledge distillation -------------------------------- */

/* Workspace layout, n*n entries each: doubles gram_s, gram_t, dist_s,
 * dist_t, dgram, ddist; then floats sym (n*n) for the final GEMM. */
typedef struct rkd_work {
  double *gs, *gt, *rs, *rt, *dg, *dr;
  float *sym;
} rkd_work;

size_t rc_loss_rkd_workspace_floats(int64_t n) {
  if (n < 1) return 0;
  return 13 * (size_t)n * (size_t)n;
}

static rkd_work rkd_split(float *work, int64_t n) {
  double *d = (double *)(void *)work;
  size_t nn = (size_t)(n * n);
  rkd_work w = {d, d + nn, d + 2 * nn, d + 3 * nn, d + 4 * nn, d + 5 * nn, (float *)(d + 6 * nn)};
  return w;
}

/* Gram matrix in double and the pairwise distances from it. A squared
 * distance below 1e-12 of the squared norms is rounding, not geometry:
 * such samples coincide (distance 0). */
static void gram_and_distances(double *g, double *r, const float *x, int64_t n, int64_t d) {
#pragma omp parallel for schedule(static) if (n * n * d > 1000000)
  for (int64_t i = 0; i < n; i++)
    for (int64_t j = i; j < n; j++) {
      const float *a = x + i * d, *b = x + j * d;
      double s = 0.0;
      for (int64_t k = 0; k < d; k++) s += (double)a[k] * b[k];
      g[i * n + j] = s;
      g[j * n + i] = s;
    }
  for (int64_t i = 0; i < n; i++)
    for (int64_t j = 0; j < n; j++) {
      double q = g[i * n + i] + g[j * n + j] - 2.0 * g[i * n + j];
      double tiny = 1e-12 * (g[i * n + i] + g[j * n + j]);
      r[i * n + j] = i == j || q <= tiny ? 0.0 : sqrt(q);
    }
}

static double huber(double x) { return fabs(x) < 1.0 ? 0.5 * x * x : fabs(x) - 0.5; }
static double huber_grad(double x) { return fabs(x) < 1.0 ? x : (x > 0 ? 1.0 : -1.0); }

static rc_status check_rkd(const char *term, const float *s, const float *t, int64_t n,
                           int64_t ds, int64_t dt, const float *work, rc_err *e) {
  if (!s || !t) return rc__fail(e, RC_ERR_INVALID, "%s: missing embeddings", term);
  if (n < 1 || ds < 1 || dt < 1)
    return rc__fail(e, RC_ERR_SHAPE, "%s: embeddings (N %lld, student %lld, teacher %lld) need sizes >= 1",
                    term, (long long)n, (long long)ds, (long long)dt);
  if (n > 65536 || ds > MAX_ELEMENTS / n || dt > MAX_ELEMENTS / n || ds > INT_MAX)
    return rc__fail(e, RC_ERR_LIMIT, "%s: batch of %lld embeddings is too large", term, (long long)n);
  return check_work(term, work, e);
}

/* Chain rule through dist_ij = sqrt(G_ii + G_jj - 2 G_ij): ADDS the Gram
 * gradient of dr = dL/d(dist) into dg. Zero distances pass nothing. */
static void distance_grad_to_gram(double *dg, const double *dr, const double *r, int64_t n) {
  for (int64_t i = 0; i < n; i++)
    for (int64_t j = 0; j < n; j++) {
      double rij = r[i * n + j], g = dr[i * n + j];
      if (rij <= 0.0 || g == 0.0) continue;
      dg[i * n + i] += g / (2.0 * rij);
      dg[j * n + j] += g / (2.0 * rij);
      dg[i * n + j] -= g / rij;
    }
}

/* G = E E^T, so dE = (dG + dG^T) E: one GEMM ADDING grad_scale times it. */
static void gram_grad_to_embeddings(float *grad, float grad_scale, const float *x, int64_t n,
                                    int64_t d, const double *dg, float *sym) {
  for (int64_t i = 0; i < n; i++)
    for (int64_t j = 0; j < n; j++)
      sym[i * n + j] = (float)(grad_scale * (dg[i * n + j] + dg[j * n + i]));
  cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasNoTrans, (int)n, (int)d, (int)n, 1.0f, sym, (int)n,
              x, (int)d, 1.0f, grad, (int)d);
}

/* Mean of the distances over distinct pairs. */
static double mean_distance(const double *r, int64_t n) {
  double s = 0.0;
  for (int64_t i = 0; i < n * n; i++) s += r[i];
  return s / (double)(n * (n - 1));
}

rc_status rc_loss_rkd_distance(double *loss, float *grad_student, float grad_scale,
                               const float *student, const float *teacher, int64_t n,
                               int64_t ds, int64_t dt, float *work, rc_err *e) {
  RC_TRY(check_rkd("rkd-distance", student, teacher, n, ds, dt, work, e));
  *loss = 0.0;
  if (n < 2) return RC_OK;
  rkd_work w = rkd_split(work, n);
  gram_and_distances(w.gs, w.rs, student, n, ds);
  gram_and_distances(w.gt, w.rt, teacher, n, dt);
  double mus = mean_distance(w.rs, n), mut = mean_distance(w.rt, n);
  double pairs = (double)(n * (n - 1));
  double total = 0.0, weighted = 0.0; /* weighted = sum c_ij r_ij */
  for (int64_t i = 0; i < n; i++)
    for (int64_t j = 0; j < n; j++) {
      if (i == j) {
        w.dr[i * n + j] = 0.0;
        continue;
      }
      /* mu = 0: all samples coincide. A NaN mu must reach the loss. */
      double ps = mus == 0.0 ? 0.0 : w.rs[i * n + j] / mus;
      double pt = mut == 0.0 ? 0.0 : w.rt[i * n + j] / mut;
      total += huber(ps - pt);
      double c = huber_grad(ps - pt) / pairs; /* dL/d psi_s(i, j) */
      w.dr[i * n + j] = c;
      weighted += c * w.rs[i * n + j];
    }
  *loss = total / pairs;
  if (!grad_student || !(mus > 0.0)) return RC_OK;
  /* psi = r / mu with mu the mean of all r: dL/dr_ab = c_ab / mu -
   * (sum c r) / (mu^2 * pairs). */
  double shared = weighted / (mus * mus * pairs);
  for (int64_t i = 0; i < n; i++)
    for (int64_t j = 0; j < n; j++)
      if (i != j) w.dr[i * n + j] = w.dr[i * n + j] / mus - shared;
  memset(w.dg, 0, sizeof(double) * (size_t)(n * n));
  distance_grad_to_gram(w.dg, w.dr, w.rs, n);
  gram_grad_to_embeddings(grad_student, grad_scale, student, n, ds, w.dg, w.sym);
  return RC_OK;
}

/* cos of the angle at j between i and k from the Gram matrix:
 * <e_i - e_j, e_k - e_j> / (r_ij r_kj); 0 when a distance is zero. */
static double angle_cos(const double *g, const double *r, int64_t n, int64_t i, int64_t j,
                        int64_t k) {
  double den = r[i * n + j] * r[k * n + j];
  if (den == 0.0) return 0.0; /* NaN goes on into the loss */
  return (g[i * n + k] - g[i * n + j] - g[j * n + k] + g[j * n + j]) / den;
}

rc_status rc_loss_rkd_angle(double *loss, float *grad_student, float grad_scale,
                            const float *student, const float *teacher, int64_t n, int64_t ds,
                            int64_t dt, float *work, rc_err *e) {
  RC_TRY(check_rkd("rkd-angle", student, teacher, n, ds, dt, work, e));
  *loss = 0.0;
  if (n < 3) return RC_OK;
  rkd_work w = rkd_split(work, n);
  gram_and_distances(w.gs, w.rs, student, n, ds);
  gram_and_distances(w.gt, w.rt, teacher, n, dt);
  double triples = (double)n * (double)(n - 1) * (double)(n - 2);
  size_t nn = (size_t)(n * n);
  /* The numerator <e_i - e_j, e_k - e_j> = G_ik - G_ij - G_jk + G_jj sends
   * its gradient to dg directly; the two distances of the denominator to
   * dr, turned into Gram gradients afterwards. */
  if (grad_student) {
    memset(w.dr, 0, sizeof(double) * nn);
    memset(w.dg, 0, sizeof(double) * nn);
  }
  double total = 0.0;
  for (int64_t j = 0; j < n; j++)
    for (int64_t i = 0; i < n; i++) {
      if (i == j) continue;
      for (int64_t k = 0; k < n; k++) {
        if (k == j || k == i) continue;
        double ps = angle_cos(w.gs, w.rs, n, i, j, k);
        double pt = angle_cos(w.gt, w.rt, n, i, j, k);
        total += huber(ps - pt);
        if (!grad_student) continue;
        double den = w.rs[i * n + j] * w.rs[k * n + j];
        if (!(den > 0.0)) continue;
        double c = huber_grad(ps - pt) / triples, dn = c / den;
        w.dg[i * n + k] += dn;
        w.dg[i * n + j] -= dn;
        w.dg[j * n + k] -= dn;
        w.dg[j * n + j] += dn;
        w.dr[i * n + j] -= c * ps / w.rs[i * n + j];
        w.dr[k * n + j] -= c * ps / w.rs[k * n + j];
      }
    }
  *loss = total / triples;
  if (!grad_student) return RC_OK;
  distance_grad_to_gram(w.dg, w.dr, w.rs, n);
  gram_grad_to_embeddings(grad_student, grad_scale, student, n, ds, w.dg, w.sym);
  return RC_OK;
}

/* ---- Attention-map KL --------------------------------------------------- */

rc_status rc_loss_attention_map(double *loss, float *grad_student, float grad_scale,
                                const float *student, const float *teacher, int64_t n,
                                int64_t heads, int64_t lq, int64_t lk, rc_err *e) {
  const char *term = "attention-map";
  if (!student || !teacher) return rc__fail(e, RC_ERR_INVALID, "%s: missing attention probabilities", term);
  if (n < 1 || heads < 1 || lq < 1 || lk < 1)
    return rc__fail(e, RC_ERR_SHAPE, "%s: attention (%lld, %lld, %lld, %lld) needs sizes >= 1", term,
                    (long long)n, (long long)heads, (long long)lq, (long long)lk);
  if (heads > MAX_ELEMENTS / n || lq > MAX_ELEMENTS / (n * heads) ||
      lk > MAX_ELEMENTS / (n * heads * lq))
    return rc__fail(e, RC_ERR_LIMIT, "%s: attention tensor too large", term);
  int64_t rows = n * heads * lq;
  double k = (double)grad_scale / (double)rows;
  double total = 0.0;
  for (int64_t r = 0; r < rows; r++) {
    const float *s = student + r * lk, *t = teacher + r * lk;
    double row = 0.0;
    for (int64_t j = 0; j < lk; j++) {
      double tj = t[j];
      if (tj == 0.0) continue; /* 0 log 0 = 0, and no gradient */
      double sj = s[j];
      int clamped = sj < RC_ATTN_KL_EPS; /* NaN is not clamped: it shows in the loss */
      double ls = log(clamped ? (double)RC_ATTN_KL_EPS : sj);
      row += tj * (log(tj) - ls);
      if (grad_student && !clamped) grad_student[r * lk + j] += (float)(-k * tj / sj);
    }
    total += row;
  }
  *loss = total / (double)rows;
  return RC_OK;
}

/* ---- Weight anchor ------------------------------------------------------- */

rc_status rc_loss_weight_anchor(double *loss, float *grad, float grad_scale, const float *student,
                                const float *teacher, const uint8_t *mask, int64_t count,
                                rc_err *e) {
  if (!student || !teacher) return rc__fail(e, RC_ERR_INVALID, "weight-anchor: missing weights");
  if (count < 0) return rc__fail(e, RC_ERR_SHAPE, "weight-anchor: negative count %lld", (long long)count);
  double total = 0.0;
  for (int64_t i = 0; i < count; i++) {
    if (mask && !mask[i]) continue;
    double d = (double)student[i] - teacher[i];
    total += d * d;
    if (grad) grad[i] += (float)(grad_scale * d);
  }
  *loss = 0.5 * total;
  return RC_OK;
}

/* ---- Least-squares start of a projector -------------------------------- */

size_t rc_feat_projector_fit_workspace_doubles(int64_t cs, int64_t ct) {
  size_t a = (size_t)(cs + 1) * (size_t)(cs + 1), b = (size_t)(cs + 1) * (size_t)ct;
  /* Doubles for the normal equations, then floats for the GEMM sums. */
  return a + b + ((size_t)cs * (size_t)cs + (size_t)cs * (size_t)ct + 1) / 2 + 1;
}

/* G (Cs, Cs) = sum s s^T and C (Cs, Ct) = sum s t^T over samples and
 * positions, through OpenBLAS. */
static void feature_moments(float *g, float *c, const float *s, const float *t, const rc_feat_view *sv,
                            int64_t ct) {
  int cs = (int)sv->c, p = (int)sv->positions, ict = (int)ct;
  if (sv->layout == RC_FEAT_CHANNELS_FIRST) {
    memset(g, 0, sizeof(float) * (size_t)cs * (size_t)cs);
    memset(c, 0, sizeof(float) * (size_t)cs * (size_t)ict);
    for (int64_t i = 0; i < sv->n; i++) {
      const float *si = s + i * cs * p, *ti = t + i * ct * p;
      cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasTrans, cs, cs, p, 1.0f, si, p, si, p, 1.0f, g, cs);
      cblas_sgemm(CblasRowMajor, CblasNoTrans, CblasTrans, cs, ict, p, 1.0f, si, p, ti, p, 1.0f, c, ict);
    }
  } else {
    int m = (int)(sv->n * sv->positions);
    cblas_sgemm(CblasRowMajor, CblasTrans, CblasNoTrans, cs, cs, m, 1.0f, s, cs, s, cs, 0.0f, g, cs);
    cblas_sgemm(CblasRowMajor, CblasTrans, CblasNoTrans, cs, ict, m, 1.0f, s, cs, t, ict, 0.0f, c, ict);
  }
}

/* Sum over samples and positions of every channel of x. */
static void channel_sums(double *sum, const float *x, const rc_feat_view *v) {
  memset(sum, 0, sizeof(double) * (size_t)v->c);
  for (int64_t i = 0; i < v->n; i++)
    if (v->layout == RC_FEAT_CHANNELS_FIRST) {
      for (int64_t c = 0; c < v->c; c++)
        for (int64_t j = 0; j < v->positions; j++) sum[c] += x[(i * v->c + c) * v->positions + j];
    } else {
      for (int64_t j = 0; j < v->positions; j++)
        for (int64_t c = 0; c < v->c; c++) sum[c] += x[(i * v->positions + j) * v->c + c];
    }
}

/* In-place Cholesky factor (lower) of the symmetric positive definite
 * a (n, n); 0 when a is not positive definite (or holds NaN). */
static int cholesky(double *a, int64_t n) {
  for (int64_t j = 0; j < n; j++) {
    double d = a[j * n + j];
    for (int64_t k = 0; k < j; k++) d -= a[j * n + k] * a[j * n + k];
    if (!(d > 0)) return 0;
    a[j * n + j] = sqrt(d);
    for (int64_t i = j + 1; i < n; i++) {
      double v = a[i * n + j];
      for (int64_t k = 0; k < j; k++) v -= a[i * n + k] * a[j * n + k];
      a[i * n + j] = v / a[j * n + j];
    }
  }
  return 1;
}

/* Solve L L^T x = b for every column of b (n, m), in place. */
static void cholesky_solve(const double *l, double *b, int64_t n, int64_t m) {
  for (int64_t col = 0; col < m; col++) {
    for (int64_t i = 0; i < n; i++) {
      double v = b[i * m + col];
      for (int64_t k = 0; k < i; k++) v -= l[i * n + k] * b[k * m + col];
      b[i * m + col] = v / l[i * n + i];
    }
    for (int64_t i = n - 1; i >= 0; i--) {
      double v = b[i * m + col];
      for (int64_t k = i + 1; k < n; k++) v -= l[k * n + i] * b[k * m + col];
      b[i * m + col] = v / l[i * n + i];
    }
  }
}

rc_status rc_feat_projector_fit(int *fitted, float *weight, float *bias, const float *student,
                                const float *teacher, const rc_feat_view *sv,
                                const rc_feat_view *tv, double *work, rc_err *e) {
  *fitted = 0;
  RC_TRY(check_projected("projector fit", student, teacher, weight, sv, tv, (const float *)work, e));
  if (!weight || !bias) return rc__fail(e, RC_ERR_INVALID, "projector fit: missing weight or bias");
  int64_t cs = sv->c, ct = tv->c, n1 = cs + 1;
  double *a = work, *b = a + n1 * n1;
  float *g = (float *)(b + n1 * ct), *c = g + cs * cs;
  feature_moments(g, c, student, teacher, sv, ct);
  /* Normal equations of [s, 1] -> t: a = [G, sum s; sum s^T, count]. */
  double *ss = a + cs * n1, *st = b + cs * ct; /* the last rows, filled first */
  channel_sums(ss, student, sv);
  channel_sums(st, teacher, tv);
  double count = (double)(sv->n * sv->positions), trace = 0;
  for (int64_t i = 0; i < cs; i++) trace += g[i * cs + i];
  /* The ridge on W (not on the bias): see feature_loss.h. */
  double ridge = 1e-1 * trace / (double)cs + 1e-12;
  for (int64_t i = 0; i < cs; i++) {
    for (int64_t j = 0; j < cs; j++) a[i * n1 + j] = g[i * cs + j] + (i == j ? ridge : 0.0);
    a[i * n1 + cs] = ss[i];
    for (int64_t o = 0; o < ct; o++) b[i * ct + o] = c[i * ct + o];
  }
  a[cs * n1 + cs] = count;
  if (!cholesky(a, n1)) return RC_OK; /* degenerate or non-finite: keep the given start */
  cholesky_solve(a, b, n1, ct);
  for (int64_t i = 0; i < n1 * ct; i++)
    if (!isfinite(b[i])) return RC_OK;
  for (int64_t o = 0; o < ct; o++) {
    for (int64_t i = 0; i < cs; i++) weight[o * cs + i] = (float)b[i * ct + o];
    bias[o] = (float)b[cs * ct + o];
  }
  *fitted = 1;
  return RC_OK;
}
