/* Op family: matmul (Gemm, MatMul). Forward and backward side by side, every
 * product through cblas_sgemm. */
#include <cblas.h>
#include <string.h>

#include "ops/op.h"
#include "ops/sparse.h"

static rc_status need_float(const rc_node *n, const rc_tensor *t, const char *what, rc_err *e) {
  if (t->dtype != RC_DTYPE_FLOAT)
    return rc__fail(e, RC_ERR_UNSUPPORTED, "node '%s' (%s): input %s has dtype %s; only float is supported",
                    n->label, n->op_type, what, rc_dtype_name(t->dtype));
  return RC_OK;
}

static int big_int(int64_t v) { return v > 0x7fffffff; }

/* ---- Gemm ---- */

typedef struct gemm_params {
  int trans_a, trans_b;
  float alpha, beta;
} gemm_params;

static rc_status gemm_parse(rc_node *n, rc_arena *a, rc_err *e) {
  gemm_params *p = rc__arena_zalloc(a, sizeof *p);
  if (!p) return rc__fail(e, RC_ERR_NOMEM, "node '%s' (%s): out of memory", n->label, n->op_type);
  p->trans_a = rc__attr_int(n, "transA", 0) != 0;
  p->trans_b = rc__attr_int(n, "transB", 0) != 0;
  p->alpha = rc__attr_float(n, "alpha", 1.0f);
  p->beta = rc__attr_float(n, "beta", 1.0f);
  if (n->opset < 7 && rc__attr_find(n, "broadcast"))
    return rc__fail(e, RC_ERR_UNSUPPORTED, "node '%s' (%s): the pre-opset-7 'broadcast' attribute is not "
                    "supported", n->label, n->op_type);
  n->params = p;
  return RC_OK;
}

/* C viewed as (cm, cn) with cm in {1, M} and cn in {1, N}. */
static void c_view(const rc_tensor *c, int64_t *cm, int64_t *cn) {
  *cm = c->rank == 2 ? c->dims[0] : 1;
  *cn = c->rank >= 1 ? c->dims[c->rank - 1] : 1;
}

static rc_status gemm_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  const gemm_params *p = n->params;
  if (n->n_in < 2 || !in[0] || !in[1])
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): inputs A and B are required", n->label, n->op_type);
  const rc_tensor *a = in[0], *b = in[1], *c = n->n_in > 2 ? in[2] : NULL;
  if (!c && n->opset < 11)
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): input C is required before opset 11", n->label,
                    n->op_type);
  RC_TRY(need_float(n, a, "A", e));
  RC_TRY(need_float(n, b, "B", e));
  if (c) RC_TRY(need_float(n, c, "C", e));
  if (a->rank != 2 || b->rank != 2)
    return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): A and B must be matrices (ranks %d and %d)", n->label,
                    n->op_type, a->rank, b->rank);
  int64_t M = p->trans_a ? a->dims[1] : a->dims[0], K = p->trans_a ? a->dims[0] : a->dims[1];
  int64_t Kb = p->trans_b ? b->dims[1] : b->dims[0], N = p->trans_b ? b->dims[0] : b->dims[1];
  if (K != Kb)
    return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): inner dimensions differ (%lld vs %lld)", n->label,
                    n->op_type, (long long)K, (long long)Kb);
  if (big_int(M) || big_int(N) || big_int(K))
    return rc__fail(e, RC_ERR_LIMIT, "node '%s' (%s): matrix too large", n->label, n->op_type);
  if (c) {
    int64_t cm, cn;
    c_view(c, &cm, &cn);
    if (c->rank > 2 || (cm != 1 && cm != M) || (cn != 1 && cn != N)) {
      char sc[96];
      return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): C of shape %s does not broadcast to (%lld, %lld)",
                      n->label, n->op_type, rc_shape_str(c, sc, sizeof sc), (long long)M, (long long)N);
    }
  }
  out[0].dtype = RC_DTYPE_FLOAT;
  out[0].rank = 2;
  out[0].dims[0] = M;
  out[0].dims[1] = N;
  return rc__check_shape(n, &out[0], e);
}

typedef struct gemm_dims {
  int64_t M, N, K, lda, ldb;
} gemm_dims;

static gemm_dims gemm_dims_of(const rc_kernel *k) {
  const gemm_params *p = k->params;
  const rc_tensor *a = k->in[0], *b = k->in[1];
  gemm_dims d;
  d.M = p->trans_a ? a->dims[1] : a->dims[0];
  d.K = p->trans_a ? a->dims[0] : a->dims[1];
  d.N = p->trans_b ? b->dims[0] : b->dims[1];
  d.lda = a->dims[1];
  d.ldb = b->dims[1];
  return d;
}

static const rc_tensor *gemm_c(const rc_kernel *k) { return k->n_in > 2 ? k->in[2] : NULL; }

/* B's pattern when the sparse kernels serve this Gemm: A untransposed (its
 * rows are the samples), the pattern shaped as B is stored. */
static const rc__wpattern *gemm_pattern(const rc_kernel *k) {
  const gemm_params *p = k->params;
  const rc__wpattern *sp = rc__sparse_pick(k, rc__sparse_gemm_max_density);
  const rc_tensor *b = k->in[1];
  return sp && !p->trans_a && sp->rows == b->dims[0] && sp->cols == b->dims[1] ? sp : NULL;
}

/* Gemm's backward products through B's pattern (A untransposed). */
static void gemm_sparse_backward(const rc_kernel *k, const rc__wpattern *sp, const gemm_dims *d) {
  const gemm_params *p = k->params;
  const float *dy = k->dout[0]->data, *a = k->in[0]->data, *b = k->in[1]->data;
  float *da = k->din[0] ? k->din[0]->data : NULL, *db = k->din[1] ? k->din[1]->data : NULL;
  if (p->trans_b) { /* B (N, K): y_i = B a_i */
    if (da) rc__sparse_rows_scatter(sp, b, p->alpha, d->M, dy, d->N, da, d->K);
    if (db) rc__sparse_rows_wgrad(sp, db, p->alpha, d->M, dy, d->N, a, d->K);
  } else { /* B (K, N): y_i = B^T a_i */
    if (da) rc__sparse_rows_gather(sp, b, p->alpha, d->M, dy, d->N, da, d->K);
    if (db) rc__sparse_rows_wgrad(sp, db, p->alpha, d->M, a, d->K, dy, d->N);
  }
}

/* A (M,K) or (K,M), B (K,N) or (N,K), C broadcast to (M,N) -> y (M,N). */
static rc_status gemm_forward(const rc_kernel *k, rc_err *e) {
  const gemm_params *p = k->params;
  gemm_dims d = gemm_dims_of(k);
  float *y = k->out[0]->data;
  const rc_tensor *c = gemm_c(k);
  if (!d.M || !d.N) return RC_OK;
  float beta = 0.0f;
  if (c) {
    int64_t cm, cn;
    c_view(c, &cm, &cn);
    const float *cv = c->data;
    for (int64_t i = 0; i < d.M; i++)
      for (int64_t j = 0; j < d.N; j++) y[i * d.N + j] = cv[(cm == 1 ? 0 : i) * cn + (cn == 1 ? 0 : j)];
    beta = p->beta;
  }
  if (!d.K) {
    for (int64_t i = 0; i < d.M * d.N; i++) y[i] *= beta;
    return RC_OK;
  }
  const rc__wpattern *sp = gemm_pattern(k);
  if (sp) {
    if (!c) memset(y, 0, sizeof(float) * (size_t)(d.M * d.N));
    else if (beta != 1.0f)
      for (int64_t i = 0; i < d.M * d.N; i++) y[i] *= beta;
    if (p->trans_b) rc__sparse_rows_gather(sp, k->in[1]->data, p->alpha, d.M, k->in[0]->data, d.K, y, d.N);
    else rc__sparse_rows_scatter(sp, k->in[1]->data, p->alpha, d.M, k->in[0]->data, d.K, y, d.N);
    return RC_OK;
  }
  cblas_sgemm(CblasRowMajor, p->trans_a ? CblasTrans : CblasNoTrans, p->trans_b ? CblasTrans : CblasNoTrans,
              (int)d.M, (int)d.N, (int)d.K, p->alpha, k->in[0]->data, (int)d.lda, k->in[1]->data, (int)d.ldb,
              beta, y, (int)d.N);
  return RC_OK;
}

static void gemm_backward(const rc_kernel *k) {
  const gemm_params *p = k->params;
  if (!k->dout[0]) return;
  gemm_dims d = gemm_dims_of(k);
  const float *dy = k->dout[0]->data, *a = k->in[0]->data, *b = k->in[1]->data;
  const rc_tensor *c = gemm_c(k);
  if (!d.M || !d.N) return;
  const rc__wpattern *sp = d.K ? gemm_pattern(k) : NULL;
  if (sp) gemm_sparse_backward(k, sp, &d);
  if (k->din[0] && d.K && !sp) {
    /* dA' = alpha dY B'^T; stored transposed when transA. */
    float *da = k->din[0]->data;
    if (!p->trans_a)
      cblas_sgemm(CblasRowMajor, CblasNoTrans, p->trans_b ? CblasNoTrans : CblasTrans, (int)d.M, (int)d.K,
                  (int)d.N, p->alpha, dy, (int)d.N, b, (int)d.ldb, 1.0f, da, (int)d.K);
    else
      cblas_sgemm(CblasRowMajor, p->trans_b ? CblasTrans : CblasNoTrans, CblasTrans, (int)d.K, (int)d.M,
                  (int)d.N, p->alpha, b, (int)d.ldb, dy, (int)d.N, 1.0f, da, (int)d.M);
  }
  if (k->din[1] && d.K && !sp) {
    /* dB' = alpha A'^T dY; stored transposed when transB. */
    float *db = k->din[1]->data;
    if (!p->trans_b)
      cblas_sgemm(CblasRowMajor, p->trans_a ? CblasNoTrans : CblasTrans, CblasNoTrans, (int)d.K, (int)d.N,
                  (int)d.M, p->alpha, a, (int)d.lda, dy, (int)d.N, 1.0f, db, (int)d.N);
    else
      cblas_sgemm(CblasRowMajor, CblasTrans, p->trans_a ? CblasTrans : CblasNoTrans, (int)d.N, (int)d.K,
                  (int)d.M, p->alpha, dy, (int)d.N, a, (int)d.lda, 1.0f, db, (int)d.K);
  }
  if (c && k->n_in > 2 && k->din[2]) {
    /* dC = beta dY summed over the axes C was broadcast along. */
    int64_t cm, cn;
    c_view(c, &cm, &cn);
    float *dc = k->din[2]->data;
    for (int64_t i = 0; i < d.M; i++) {
      float *dst = dc + (cm == 1 ? 0 : i) * cn;
      const float *row = dy + i * d.N;
      if (cn == 1) {
        float s = 0;
        for (int64_t j = 0; j < d.N; j++) s += row[j];
        dst[0] += p->beta * s;
      } else {
        for (int64_t j = 0; j < d.N; j++) dst[j] += p->beta * row[j];
      }
    }
  }
}

/* ---- MatMul (numpy matmul semantics) ---- */

/* Batch layout: output batch dims (broadcast of both batch shapes) and, for
 * each, the element strides of A and B (0 where broadcast). */
typedef struct mm_geom {
  int64_t M, K, N;
  int nbr;                                /* batch rank */
  int64_t nb;                             /* output batch count */
  int64_t bdims[RC_MAX_RANK], astr[RC_MAX_RANK], bstr[RC_MAX_RANK];
  int b_shared;                           /* B has no batch axes: one big GEMM */
} mm_geom;

static rc_status mm_geometry(const rc_node *n, const rc_tensor *a, const rc_tensor *b, mm_geom *g,
                             rc_tensor *out, rc_err *e) {
  memset(g, 0, sizeof *g);
  RC_TRY(need_float(n, a, "A", e));
  RC_TRY(need_float(n, b, "B", e));
  if (a->rank < 1 || b->rank < 1)
    return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): inputs must have rank >= 1", n->label, n->op_type);
  int64_t Ka;
  if (a->rank == 1) g->M = 1, Ka = a->dims[0];
  else g->M = a->dims[a->rank - 2], Ka = a->dims[a->rank - 1];
  int64_t Kb;
  if (b->rank == 1) Kb = b->dims[0], g->N = 1;
  else Kb = b->dims[b->rank - 2], g->N = b->dims[b->rank - 1];
  if (Ka != Kb) {
    char sa[96], sb[96];
    return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): shapes %s and %s: inner dimensions differ", n->label,
                    n->op_type, rc_shape_str(a, sa, sizeof sa), rc_shape_str(b, sb, sizeof sb));
  }
  g->K = Ka;
  if (big_int(g->M) || big_int(g->N) || big_int(g->K))
    return rc__fail(e, RC_ERR_LIMIT, "node '%s' (%s): matrix too large", n->label, n->op_type);
  int abr = a->rank > 2 ? a->rank - 2 : 0, bbr = b->rank > 2 ? b->rank - 2 : 0;
  g->nbr = abr > bbr ? abr : bbr;
  g->b_shared = bbr == 0;
  int64_t as = g->M * g->K, bs = g->K * g->N;
  g->nb = 1;
  for (int i = g->nbr - 1; i >= 0; i--) {
    int ia = i - (g->nbr - abr), ib = i - (g->nbr - bbr);
    int64_t da = ia >= 0 ? a->dims[ia] : 1, db = ib >= 0 ? b->dims[ib] : 1;
    if (da != db && da != 1 && db != 1) {
      char sa[96], sb[96];
      return rc__fail(e, RC_ERR_SHAPE, "node '%s' (%s): batch dimensions of %s and %s do not broadcast",
                      n->label, n->op_type, rc_shape_str(a, sa, sizeof sa), rc_shape_str(b, sb, sizeof sb));
    }
    g->bdims[i] = da == 1 ? db : da;
    g->astr[i] = da == 1 ? 0 : as;
    g->bstr[i] = db == 1 ? 0 : bs;
    as *= da;
    bs *= db;
    g->nb *= g->bdims[i];
  }
  /* The shared-B path multiplies (batch*M, K) as one matrix; GEMM sizes are ints. */
  if (big_int(g->nb * g->M))
    return rc__fail(e, RC_ERR_LIMIT, "node '%s' (%s): matrix too large", n->label, n->op_type);
  if (out) {
    out->dtype = RC_DTYPE_FLOAT;
    out->rank = 0;
    for (int i = 0; i < g->nbr; i++) out->dims[out->rank++] = g->bdims[i];
    if (a->rank >= 2) out->dims[out->rank++] = g->M;
    if (b->rank >= 2) out->dims[out->rank++] = g->N;
  }
  return RC_OK;
}

static rc_status matmul_infer(const rc_node *n, const rc_tensor *const *in, rc_tensor *out, rc_err *e) {
  if (n->n_in < 2 || !in[0] || !in[1])
    return rc__fail(e, RC_ERR_INVALID, "node '%s' (%s): inputs A and B are required", n->label, n->op_type);
  mm_geom g;
  RC_TRY(mm_geometry(n, in[0], in[1], &g, &out[0], e));
  return rc__check_shape(n, &out[0], e);
}

static void mm_geometry_of(const rc_kernel *k, mm_geom *g) {
  rc_err e;
  /* Validated by infer for these very shapes; cannot fail here. */
  mm_geometry(k->node, k->in[0], k->in[1], g, NULL, &e);
}

/* Element offsets of batch entry bi in A and B. */
static void batch_offsets(const mm_geom *g, int64_t bi, int64_t *ao, int64_t *bo) {
  int64_t oa = 0, ob = 0;
  for (int i = g->nbr - 1; i >= 0; i--) {
    int64_t idx = bi % g->bdims[i];
    bi /= g->bdims[i];
    oa += idx * g->astr[i];
    ob += idx * g->bstr[i];
  }
  *ao = oa;
  *bo = ob;
}

static void sgemm_rm(int ta, int tb, int64_t m, int64_t n, int64_t k, const float *a, int64_t lda,
                     const float *b, int64_t ldb, float beta, float *c) {
  cblas_sgemm(CblasRowMajor, ta ? CblasTrans : CblasNoTrans, tb ? CblasTrans : CblasNoTrans, (int)m, (int)n,
              (int)k, 1.0f, a, (int)lda, b, (int)ldb, beta, c, (int)n);
}

/* B's pattern when the sparse kernels serve this MatMul: B a (K, N) matrix
 * shared by every batch entry. */
static const rc__wpattern *matmul_pattern(const rc_kernel *k, const mm_geom *g) {
  const rc__wpattern *sp = rc__sparse_pick(k, rc__sparse_gemm_max_density);
  return sp && g->b_shared && k->in[1]->rank == 2 && sp->rows == g->K && sp->cols == g->N ? sp : NULL;
}

/* a (..., M, K), b (..., K, N) -> y (..., M, N), batch axes broadcast; rank-1
 * operands promoted to (1, K) / (K, 1) with the added axis dropped. */
static rc_status matmul_forward(const rc_kernel *k, rc_err *e) {
  mm_geom g;
  mm_geometry_of(k, &g);
  const float *a = k->in[0]->data, *b = k->in[1]->data;
  float *y = k->out[0]->data;
  if (!g.nb || !g.M || !g.N) return RC_OK;
  if (!g.K) {
    memset(y, 0, sizeof(float) * (size_t)(g.nb * g.M * g.N));
    return RC_OK;
  }
  const rc__wpattern *sp = matmul_pattern(k, &g);
  if (sp) {
    memset(y, 0, sizeof(float) * (size_t)(g.nb * g.M * g.N));
    rc__sparse_rows_scatter(sp, b, 1.0f, g.nb * g.M, a, g.K, y, g.N);
    return RC_OK;
  }
  if (g.b_shared) {
    /* (batch*M, K) x (K, N) as one product: A's batch rows are contiguous. */
    sgemm_rm(0, 0, g.nb * g.M, g.N, g.K, a, g.K, b, g.N, 0.0f, y);
    return RC_OK;
  }
  for (int64_t bi = 0; bi < g.nb; bi++) {
    int64_t ao, bo;
    batch_offsets(&g, bi, &ao, &bo);
    sgemm_rm(0, 0, g.M, g.N, g.K, a + ao, g.K, b + bo, g.N, 0.0f, y + bi * g.M * g.N);
  }
  return RC_OK;
}

/* Gradients summed over broadcast batch entries in batch order, so the
 * result does not depend on threading. */
static void matmul_backward(const rc_kernel *k) {
  if (!k->dout[0]) return;
  mm_geom g;
  mm_geometry_of(k, &g);
  const float *a = k->in[0]->data, *b = k->in[1]->data, *dy = k->dout[0]->data;
  float *da = k->din[0] ? k->din[0]->data : NULL;
  float *db = k->din[1] ? k->din[1]->data : NULL;
  if (!g.nb || !g.M || !g.N || !g.K) return;
  const rc__wpattern *sp = matmul_pattern(k, &g);
  if (sp) {
    if (da) rc__sparse_rows_gather(sp, b, 1.0f, g.nb * g.M, dy, g.N, da, g.K);
    if (db) rc__sparse_rows_wgrad(sp, db, 1.0f, g.nb * g.M, a, g.K, dy, g.N);
    return;
  }
  if (g.b_shared) {
    const int64_t rows = g.nb * g.M;
    if (da) sgemm_rm(0, 1, rows, g.K, g.N, dy, g.N, b, g.N, 1.0f, da);  /* dA = dY B^T */
    if (db) sgemm_rm(1, 0, g.K, g.N, rows, a, g.K, dy, g.N, 1.0f, db);  /* dB = A^T dY */
    return;
  }
  for (int64_t bi = 0; bi < g.nb; bi++) {
    int64_t ao, bo;
    batch_offsets(&g, bi, &ao, &bo);
    const float *dyb = dy + bi * g.M * g.N;
    if (da) sgemm_rm(0, 1, g.M, g.K, g.N, dyb, g.N, b + bo, g.N, 1.0f, da + ao);
    if (db) sgemm_rm(1, 0, g.K, g.N, g.M, a + ao, g.K, dyb, g.N, 1.0f, db + bo);
  }
}

const rc_op_def rc__ops_matmul[] = {
    {"Gemm", "", 7, 21, RC_OP_SPARSE_WEIGHT, gemm_parse, gemm_infer, NULL, NULL, gemm_forward, gemm_backward},
    {"MatMul", "", 1, 21, RC_OP_SPARSE_WEIGHT, NULL, matmul_infer, NULL, NULL, matmul_forward, matmul_backward},
};
const int rc__ops_matmul_count = (int)(sizeof rc__ops_matmul / sizeof rc__ops_matmul[0]);
