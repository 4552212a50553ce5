/* Feature-level distillation losses (src/train/feature_loss.c): hand-checked
 * values where the answer is obvious from the paper's definition, central
 * finite differences as a second opinion on every analytic gradient, the
 * ADD-with-scale convention, workspace bounds, and refusals. The PyTorch
 * comparison lives in test_feature_loss_ref.c. */
#include <stdint.h>

#include "train/feature_loss.h"
#include "test.h"

static const rc_feat_layout CF = RC_FEAT_CHANNELS_FIRST, CL = RC_FEAT_CHANNELS_LAST;

static rc_feat_view view(int64_t n, int64_t c, int64_t p, rc_feat_layout l) {
  rc_feat_view v = {n, c, p, l};
  return v;
}

static int64_t numel(const rc_feat_view *v) { return v->n * v->c * v->positions; }

/* Deterministic values in [-1, 1). */
static void fill(float *x, int64_t n, uint32_t seed) {
  for (int64_t i = 0; i < n; i++) {
    seed = seed * 1664525u + 1013904223u;
    x[i] = (float)((seed >> 8) / 8388608.0 - 1.0);
  }
}

static float *alloc_fill(int64_t n, uint32_t seed) {
  float *x = malloc(sizeof(float) * (size_t)(n > 0 ? n : 1));
  fill(x, n, seed);
  return x;
}

/* ---- One evaluation context for every term ---------------------------- */

typedef enum kind { HINT, BOUNDARY, ATTENTION, FSP, RKD_DIST, RKD_ANGLE, ATTN_MAP, ANCHOR } kind;

#define GUARD 16
#define GUARD_VALUE 12345.0f

typedef struct ctx {
  kind k;
  rc_feat_view sv, tv, s2v, t2v;
  float *s, *t, *s2, *t2, *w, *b; /* inputs; w NULL = no projector */
  float *gs, *gs2, *gw, *gb;      /* gradients, filled by eval(.., 1) */
  int64_t n, ds, dt, heads, lq, lk;
  float param; /* beta, margin */
  uint8_t *mask;
  float *work;
  size_t work_n;
} ctx;

static size_t workspace(const ctx *c) {
  switch (c->k) {
  case HINT: return rc_loss_hint_workspace_floats(&c->sv, &c->tv);
  case BOUNDARY: return rc_loss_boundary_workspace_floats(&c->sv, &c->tv);
  case ATTENTION: return rc_loss_attention_workspace_floats(&c->sv, &c->tv);
  case FSP: return rc_loss_fsp_workspace_floats(&c->sv, &c->s2v);
  case RKD_DIST:
  case RKD_ANGLE: return rc_loss_rkd_workspace_floats(c->n);
  default: return 0;
  }
}

static int64_t student_count(const ctx *c) {
  switch (c->k) {
  case RKD_DIST:
  case RKD_ANGLE: return c->n * c->ds;
  case ATTN_MAP: return c->n * c->heads * c->lq * c->lk;
  case ANCHOR: return c->n;
  default: return numel(&c->sv);
  }
}

/* Allocate gradients and a workspace of exactly the advertised size plus a
 * guard band that must survive every call. */
static void ctx_ready(ctx *c) {
  int64_t ns = student_count(c);
  c->gs = calloc((size_t)ns, sizeof(float));
  if (c->s2) c->gs2 = calloc((size_t)numel(&c->s2v), sizeof(float));
  if (c->w) {
    c->gw = calloc((size_t)(c->tv.c * c->sv.c), sizeof(float));
    c->gb = calloc((size_t)c->tv.c, sizeof(float));
  }
  c->work_n = workspace(c);
  c->work = (float *)calloc((c->work_n + GUARD + 1) / 2, sizeof(double));
  for (size_t i = 0; i < GUARD; i++) c->work[c->work_n + i] = GUARD_VALUE;
}

static void ctx_free(ctx *c) {
  free(c->s), free(c->t), free(c->s2), free(c->t2), free(c->w), free(c->b);
  free(c->gs), free(c->gs2), free(c->gw), free(c->gb), free(c->work), free(c->mask);
}

static void zero_grads(ctx *c) {
  memset(c->gs, 0, sizeof(float) * (size_t)student_count(c));
  if (c->gs2) memset(c->gs2, 0, sizeof(float) * (size_t)numel(&c->s2v));
  if (c->gw) memset(c->gw, 0, sizeof(float) * (size_t)(c->tv.c * c->sv.c));
  if (c->gb) memset(c->gb, 0, sizeof(float) * (size_t)c->tv.c);
}

/* The term's loss; with grads, its gradients (scaled by `scale`) are added
 * to the context's buffers (not zeroed here). */
static double eval_scaled(ctx *c, int grads, float scale) {
  double loss = NAN;
  rc_err e;
  rc_status st = RC_ERR_INVALID;
  float *gs = grads ? c->gs : NULL, *gw = grads ? c->gw : NULL, *gb = grads ? c->gb : NULL;
  switch (c->k) {
  case HINT:
    st = rc_loss_hint(&loss, gs, gw, gb, scale, c->s, c->t, c->w, c->b, &c->sv, &c->tv, c->work, &e);
    break;
  case BOUNDARY:
    st = rc_loss_boundary(&loss, gs, gw, gb, scale, c->s, c->t, c->w, c->b, &c->sv, &c->tv,
                          c->param, c->work, &e);
    break;
  case ATTENTION:
    st = rc_loss_attention(&loss, gs, scale, c->s, c->t, &c->sv, &c->tv, c->param, c->work, &e);
    break;
  case FSP:
    st = rc_loss_fsp(&loss, gs, grads ? c->gs2 : NULL, scale, c->s, c->s2, c->t, c->t2, &c->sv,
                     &c->s2v, &c->tv, &c->t2v, c->work, &e);
    break;
  case RKD_DIST:
    st = rc_loss_rkd_distance(&loss, gs, scale, c->s, c->t, c->n, c->ds, c->dt, c->work, &e);
    break;
  case RKD_ANGLE:
    st = rc_loss_rkd_angle(&loss, gs, scale, c->s, c->t, c->n, c->ds, c->dt, c->work, &e);
    break;
  case ATTN_MAP:
    st = rc_loss_attention_map(&loss, gs, scale, c->s, c->t, c->n, c->heads, c->lq, c->lk, &e);
    break;
  case ANCHOR:
    st = rc_loss_weight_anchor(&loss, gs, scale, c->s, c->t, c->mask, c->n, &e);
    break;
  }
  if (st != RC_OK) fprintf(stderr, "loss failed: %s\n", e.msg);
  CHECK_INT(st, RC_OK);
  for (size_t i = 0; i < GUARD; i++) CHECK_EQ(c->work[c->work_n + i], GUARD_VALUE);
  return loss;
}

static double eval(ctx *c, int grads) { return eval_scaled(c, grads, 1.0f); }

/* Central differences of the loss in each entry of x against the analytic
 * gradient g; error relative to the largest analytic entry. */
static void fd_check(ctx *c, const char *what, float *x, const float *g, int64_t n, double eps,
                     double tol) {
  double big = 1e-12, worst = 0.0, worst_num = 0.0;
  int64_t at = -1;
  for (int64_t i = 0; i < n; i++)
    if (fabs(g[i]) > big) big = fabs(g[i]);
  for (int64_t i = 0; i < n; i++) {
    float keep = x[i];
    x[i] = keep + (float)eps;
    double up = eval(c, 0);
    x[i] = keep - (float)eps;
    double down = eval(c, 0);
    x[i] = keep;
    double num = (up - down) / (2.0 * eps);
    double err = fabs(num - g[i]) / big;
    if (err > worst) worst = err, at = i;
  }
  if (worst > tol)
    fprintf(stderr, "gradcheck %s: worst relative error %.3g at [%lld] (analytic %.6g)\n", what,
            worst, (long long)at, at >= 0 ? g[at] : 0.0);
  CHECK_LE(worst, tol);
}

/* Analytic gradients, then every differentiated input against finite
 * differences; also that a second call with scale 2 adds twice as much. */
static void gradcheck(ctx *c, const char *what) {
  ctx_ready(c);
  zero_grads(c);
  double l0 = eval(c, 1);
  CHECK(isfinite(l0));
  int64_t ns = student_count(c);
  float *gs1 = malloc(sizeof(float) * (size_t)ns);
  memcpy(gs1, c->gs, sizeof(float) * (size_t)ns);
  /* The loss does not depend on whether gradients were asked for. */
  CHECK_EQ(eval(c, 0), l0);
  /* ADD semantics with grad_scale: g + 2 g = 3 g. */
  eval_scaled(c, 1, 2.0f);
  for (int64_t i = 0; i < ns; i++) CHECK_NEAR(c->gs[i], 3.0 * gs1[i], 1e-6, 1e-5);
  zero_grads(c);
  eval(c, 1);
  fd_check(c, what, c->s, c->gs, ns, 1e-3, 2e-3);
  if (c->s2) fd_check(c, what, c->s2, c->gs2, numel(&c->s2v), 1e-3, 2e-3);
  if (c->w) {
    fd_check(c, what, c->w, c->gw, c->tv.c * c->sv.c, 1e-3, 2e-3);
    fd_check(c, what, c->b, c->gb, c->tv.c, 1e-3, 2e-3);
  }
  free(gs1);
  ctx_free(c);
}

static ctx projected_ctx(kind k, rc_feat_view sv, int64_t ct, int proj, uint32_t seed) {
  ctx c = {0};
  c.k = k;
  c.sv = sv;
  c.tv = sv;
  c.tv.c = ct;
  c.s = alloc_fill(numel(&c.sv), seed);
  c.t = alloc_fill(numel(&c.tv), seed + 1);
  if (proj) {
    c.w = alloc_fill(ct * sv.c, seed + 2);
    c.b = alloc_fill(ct, seed + 3);
  }
  c.param = RC_AB_DEFAULT_MARGIN;
  return c;
}

/* ---- Gradient checks, one per term and layout --------------------------- */

/* FitNets hint (Romero et al. 2015). */
static void hint_gradients(void) {
  ctx c = projected_ctx(HINT, view(2, 3, 5, CF), 4, 1, 11);
  gradcheck(&c, "hint channels-first");
  c = projected_ctx(HINT, view(2, 3, 4, CL), 2, 1, 21);
  gradcheck(&c, "hint channels-last");
  c = projected_ctx(HINT, view(3, 4, 1, CL), 4, 0, 31);
  gradcheck(&c, "hint without projector");
}

/* Activation-boundary transfer (Heo et al. 2019); inputs scaled up so both
 * sides of the margin occur. */
static void boundary_gradients(void) {
  ctx c = projected_ctx(BOUNDARY, view(2, 3, 5, CF), 4, 1, 41);
  for (int i = 0; i < 30; i++) c.s[i] *= 2.0f;
  gradcheck(&c, "boundary channels-first");
  c = projected_ctx(BOUNDARY, view(2, 4, 3, CL), 4, 0, 51);
  c.param = 0.5f;
  gradcheck(&c, "boundary without projector");
}

/* Attention transfer (Zagoruyko and Komodakis 2017). */
static void attention_gradients(void) {
  ctx c = {0};
  c.k = ATTENTION;
  c.sv = view(2, 3, 6, CF);
  c.tv = view(2, 5, 6, CF);
  c.s = alloc_fill(numel(&c.sv), 61);
  c.t = alloc_fill(numel(&c.tv), 62);
  c.param = RC_AT_DEFAULT_BETA;
  gradcheck(&c, "attention channels-first");
  memset(&c, 0, sizeof c);
  c.k = ATTENTION;
  c.sv = view(3, 4, 5, CL);
  c.tv = view(3, 2, 5, CL);
  c.s = alloc_fill(numel(&c.sv), 63);
  c.t = alloc_fill(numel(&c.tv), 64);
  c.param = 2.0f;
  gradcheck(&c, "attention channels-last");
}

/* FSP matrices (Yim et al. 2017). */
static void fsp_gradients(void) {
  for (int l = 0; l < 2; l++) {
    rc_feat_layout lay = l ? CL : CF;
    ctx c = {0};
    c.k = FSP;
    c.sv = view(2, 3, 6, lay);
    c.s2v = view(2, 4, 6, lay);
    c.tv = view(2, 3, 4, lay);
    c.t2v = view(2, 4, 4, lay);
    c.s = alloc_fill(numel(&c.sv), 71 + l);
    c.s2 = alloc_fill(numel(&c.s2v), 73 + l);
    c.t = alloc_fill(numel(&c.tv), 75 + l);
    c.t2 = alloc_fill(numel(&c.t2v), 77 + l);
    gradcheck(&c, l ? "fsp channels-last" : "fsp channels-first");
  }
}

/* Relational KD (Park et al. 2019), with one far-off sample so the linear
 * branch of the Huber loss occurs. */
static void rkd_gradients(void) {
  for (int a = 0; a < 2; a++) {
    ctx c = {0};
    c.k = a ? RKD_ANGLE : RKD_DIST;
    c.n = 6, c.ds = 4, c.dt = 7;
    c.s = alloc_fill(c.n * c.ds, 81 + a);
    c.t = alloc_fill(c.n * c.dt, 83 + a);
    for (int i = 0; i < c.ds; i++) c.s[i] *= 6.0f;
    gradcheck(&c, a ? "rkd angle" : "rkd distance");
  }
}

/* Attention-probability KL: softmax rows as inputs. */
static void attention_map_gradients(void) {
  ctx c = {0};
  c.k = ATTN_MAP;
  c.n = 2, c.heads = 2, c.lq = 3, c.lk = 4;
  int64_t cnt = c.n * c.heads * c.lq * c.lk;
  c.s = alloc_fill(cnt, 91);
  c.t = alloc_fill(cnt, 92);
  for (int64_t r = 0; r < cnt / c.lk; r++) {
    double zs = 0, zt = 0;
    for (int64_t j = 0; j < c.lk; j++) {
      c.s[r * c.lk + j] = expf(c.s[r * c.lk + j]), zs += c.s[r * c.lk + j];
      c.t[r * c.lk + j] = expf(2 * c.t[r * c.lk + j]), zt += c.t[r * c.lk + j];
    }
    for (int64_t j = 0; j < c.lk; j++) c.s[r * c.lk + j] /= zs, c.t[r * c.lk + j] /= zt;
  }
  gradcheck(&c, "attention map");
}

/* L2-SP weight anchor (Li, Grandvalet and Davoine 2018). */
static void weight_anchor_gradients(void) {
  ctx c = {0};
  c.k = ANCHOR;
  c.n = 20;
  c.s = alloc_fill(c.n, 101);
  c.t = alloc_fill(c.n, 102);
  c.mask = malloc((size_t)c.n);
  for (int i = 0; i < c.n; i++) c.mask[i] = i % 3 != 0;
  gradcheck(&c, "weight anchor");
}

/* ---- Hand-checked values -------------------------------------------------- */

static double call_hint(float *gs, const float *s, const float *t, const float *w, const float *b,
                        rc_feat_view sv, rc_feat_view tv) {
  double wk[128];
  float *work = (float *)wk;
  double loss = NAN;
  rc_err e;
  CHECK_LE(rc_loss_hint_workspace_floats(&sv, &tv), 2 * sizeof wk / sizeof wk[0]);
  CHECK_INT(rc_loss_hint(&loss, gs, NULL, NULL, 1.0f, s, t, w, b, &sv, &tv, work, &e), RC_OK);
  return loss;
}

/* Identical features give 0 with no projector and with the identity one;
 * (N, C) = (1, 1) with s = 3, t = 1 gives (3 - 1)^2 = 4, gradient 2 (3 - 1). */
static void hint_by_hand(void) {
  float x[12], g[12] = {0}, w[9], b[3];
  fill(x, 12, 5);
  rc_feat_view v = view(2, 3, 2, CF);
  CHECK_EQ(call_hint(g, x, x, NULL, NULL, v, v), 0.0);
  for (int i = 0; i < 12; i++) CHECK_EQ(g[i], 0.0f);
  rc_err e;
  CHECK_INT(rc_feat_projector_init(w, b, 3, 3, RC_FEAT_INIT_AUTO, 1, &e), RC_OK);
  CHECK_NEAR(call_hint(g, x, x, w, b, v, v), 0.0, 1e-12, 0);
  float s = 3.0f, t = 1.0f, gs = 0.5f;
  rc_feat_view one = view(1, 1, 1, CL);
  CHECK_NEAR(call_hint(&gs, &s, &t, NULL, NULL, one, one), 4.0, 1e-12, 0);
  CHECK_NEAR(gs, 0.5 + 4.0, 1e-6, 0);
  /* A projector doubling one channel into two: y = (2s, 2s) + (1, 0),
   * t = (7, 6) for s = 3: loss = ((7-7)^2 + (6-6)^2) / 2 = 0. */
  float w2[2] = {2, 2}, b2[2] = {1, 0}, t2[2] = {7, 6};
  CHECK_NEAR(call_hint(NULL, &s, t2, w2, b2, one, view(1, 2, 1, CL)), 0.0, 1e-12, 0);
}

/* Projector initialisation: identity when square (AUTO), otherwise
 * Kaiming-uniform with linear gain: inside sqrt(3/Cs), variance about 1/Cs,
 * the same for the same seed, different for another; bias zero. */
static void projector_init(void) {
  enum { CT = 64, CS = 48 };
  static float w1[CT * CS], w2[CT * CS], w3[CT * CS];
  float b[CT];
  rc_err e;
  for (int i = 0; i < CT; i++) b[i] = 1.0f;
  CHECK_INT(rc_feat_projector_init(w1, b, CT, CS, RC_FEAT_INIT_AUTO, 7, &e), RC_OK);
  CHECK_INT(rc_feat_projector_init(w2, NULL, CT, CS, RC_FEAT_INIT_UNIFORM, 7, &e), RC_OK);
  CHECK_INT(rc_feat_projector_init(w3, NULL, CT, CS, RC_FEAT_INIT_UNIFORM, 8, &e), RC_OK);
  CHECK_MEM_EQ(w1, w2, sizeof w1);
  CHECK_MEM_NE(w1, w3, sizeof w1);
  double bound = sqrt(3.0 / CS), mean = 0, var = 0;
  for (int i = 0; i < CT * CS; i++) {
    CHECK_LE(fabs(w1[i]), bound);
    mean += w1[i];
    var += (double)w1[i] * w1[i];
  }
  mean /= CT * CS, var /= CT * CS;
  CHECK_NEAR(mean, 0.0, 0.02, 0);
  CHECK_NEAR(var, 1.0 / CS, 0, 0.1);
  for (int i = 0; i < CT; i++) CHECK_EQ(b[i], 0.0f);
  float id[9];
  CHECK_INT(rc_feat_projector_init(id, NULL, 3, 3, RC_FEAT_INIT_AUTO, 7, &e), RC_OK);
  for (int i = 0; i < 9; i++) CHECK_EQ(id[i], (i % 4 == 0 ? 1.0f : 0.0f));
  CHECK_INT(rc_feat_projector_init(id, NULL, 0, 3, RC_FEAT_INIT_AUTO, 7, &e), RC_ERR_SHAPE);
}

/* Least-squares start: a student with all-zero features is explained by
 * the bias alone (W = 0, b = the teacher's channel means); a NaN leaves the
 * given projector as it was and says so; a hint after the fit is below the
 * hint with the random start it replaces. */
static void projector_fit(void) {
  enum { N = 4, CS = 3, CT = 5, P = 6 };
  static double fit_work[256];
  float s[N * CS * P] = {0}, t[N * CT * P], w[CT * CS], b[CT];
  fill(t, N * CT * P, 11);
  rc_feat_view sv = view(N, CS, P, CF), tv = view(N, CT, P, CF);
  CHECK_LE(rc_feat_projector_fit_workspace_doubles(CS, CT), 256);
  rc_err e;
  int fitted = 0;
  CHECK_INT(rc_feat_projector_fit(&fitted, w, b, s, t, &sv, &tv, fit_work, &e), RC_OK);
  CHECK_INT(fitted, 1);
  for (int i = 0; i < CT * CS; i++) CHECK_NEAR(w[i], 0.0, 1e-6, 0);
  for (int c = 0; c < CT; c++) {
    double mean = 0;
    for (int n = 0; n < N; n++)
      for (int j = 0; j < P; j++) mean += t[(n * CT + c) * P + j];
    CHECK_NEAR(b[c], mean / (N * P), 1e-5, 1e-5);
  }
  fill(s, N * CS * P, 12);
  CHECK_INT(rc_feat_projector_init(w, b, CT, CS, RC_FEAT_INIT_UNIFORM, 3, &e), RC_OK);
  double before = call_hint(NULL, s, t, w, b, sv, tv);
  CHECK_INT(rc_feat_projector_fit(&fitted, w, b, s, t, &sv, &tv, fit_work, &e), RC_OK);
  CHECK(fitted);
  CHECK_LT(call_hint(NULL, s, t, w, b, sv, tv), before);
  float kept[CT * CS];
  memcpy(kept, w, sizeof kept);
  s[4] = NAN;
  CHECK_INT(rc_feat_projector_fit(&fitted, w, b, s, t, &sv, &tv, fit_work, &e), RC_OK);
  CHECK_INT(fitted, 0);
  CHECK_MEM_EQ(kept, w, sizeof kept);
  CHECK_INT(rc_feat_projector_fit(&fitted, w, NULL, s, t, &sv, &tv, fit_work, &e), RC_ERR_INVALID);
}

/* Heo et al. 2019: active teacher neurons with y >= mu and inactive ones
 * with y <= -mu cost nothing; y = 0 costs mu^2 either way. */
static void boundary_by_hand(void) {
  float t[4] = {0.5f, 2.0f, -1.0f, 0.0f};
  float fine[4] = {1.0f, 3.0f, -1.0f, -2.0f}, zero[4] = {0}, g[4] = {0};
  double wk[2];
  float *work = (float *)wk;
  rc_feat_view v = view(1, 4, 1, CL);
  double loss;
  rc_err e;
  CHECK_INT(rc_loss_boundary(&loss, g, NULL, NULL, 1.0f, fine, t, NULL, NULL, &v, &v, 1.0f, work, &e),
            RC_OK);
  CHECK_EQ(loss, 0.0);
  for (int i = 0; i < 4; i++) CHECK_EQ(g[i], 0.0f);
  CHECK_INT(rc_loss_boundary(&loss, g, NULL, NULL, 1.0f, zero, t, NULL, NULL, &v, &v, 0.5f, work, &e),
            RC_OK);
  CHECK_NEAR(loss, 0.25, 1e-12, 0);
  /* d/dy of (mu - y)^2 / 4 at y = 0 is -2 mu / 4; of (mu + y)^2 / 4 is 2 mu / 4. */
  CHECK_NEAR(g[0], -0.25, 1e-7, 0);
  CHECK_NEAR(g[2], 0.25, 1e-7, 0);
  CHECK_INT(rc_loss_boundary(&loss, g, NULL, NULL, 1.0f, zero, t, NULL, NULL, &v, &v, 0.0f, work, &e),
            RC_ERR_INVALID);
}

/* Zagoruyko and Komodakis 2017: one-hot maps at different positions are
 * orthogonal unit vectors, ||u_s - u_t|| = sqrt(2), loss beta/2 sqrt(2); at
 * the same position the maps agree whatever the scale and channel: 0. */
static void attention_by_hand(void) {
  rc_feat_view sv = view(1, 2, 4, CF), tv = view(1, 3, 4, CF);
  float s[8] = {0}, t[12] = {0}, g[8] = {0};
  double wk[8];
  float *work = (float *)wk;
  s[1] = 3.0f;      /* channel 0, position 1 */
  t[2 * 4 + 3] = -1; /* channel 2, position 3 */
  double loss;
  rc_err e;
  CHECK_INT(rc_loss_attention(&loss, g, 1.0f, s, t, &sv, &tv, 1000.0f, work, &e), RC_OK);
  CHECK_NEAR(loss, 500.0 * sqrt(2.0), 1e-9, 1e-7);
  memset(t, 0, sizeof t);
  t[4 + 1] = 0.25f; /* channel 1, position 1 */
  memset(g, 0, sizeof g);
  CHECK_INT(rc_loss_attention(&loss, g, 1.0f, s, t, &sv, &tv, 1000.0f, work, &e), RC_OK);
  CHECK_EQ(loss, 0.0);
  for (int i = 0; i < 8; i++) CHECK_EQ(g[i], 0.0f);
  CHECK_LE(rc_loss_attention_workspace_floats(&sv, &tv), 2 * sizeof wk / sizeof wk[0]);
  rc_feat_view bad = view(1, 3, 16, CF);
  CHECK_INT(rc_loss_attention(&loss, g, 1.0f, s, t, &sv, &bad, 1000.0f, work, &e), RC_ERR_SHAPE);
  CHECK_STR_CONTAINS(e.msg, "equal spatial sizes");
}

/* Yim et al. 2017: F1 = (1, 2), F2 = (3, 4) over two positions gives
 * G = (1*3 + 2*4) / 2 = 5.5; against a zero teacher the loss is 30.25, and
 * dL/dF1 = 2 * 5.5 * F2 / 2 = (16.5, 22). Identical features give 0. */
static void fsp_by_hand(void) {
  rc_feat_view v = view(1, 1, 2, CF);
  float f1[2] = {1, 2}, f2[2] = {3, 4}, z[2] = {0}, g1[2] = {0}, g2[2] = {0};
  double wk[1];
  float *work = (float *)wk;
  double loss;
  rc_err e;
  CHECK_INT(rc_loss_fsp(&loss, g1, g2, 1.0f, f1, f2, z, z, &v, &v, &v, &v, work, &e), RC_OK);
  CHECK_NEAR(loss, 30.25, 1e-9, 0);
  CHECK_NEAR(g1[0], 16.5, 1e-5, 0);
  CHECK_NEAR(g1[1], 22.0, 1e-5, 0);
  CHECK_NEAR(g2[0], 5.5, 1e-5, 0);
  CHECK_NEAR(g2[1], 11.0, 1e-5, 0);
  CHECK_INT(rc_loss_fsp(&loss, NULL, NULL, 1.0f, f1, f2, f1, f2, &v, &v, &v, &v, work, &e), RC_OK);
  CHECK_EQ(loss, 0.0);
  rc_feat_view wide = view(1, 2, 1, CF);
  float f3[2] = {1, 1};
  CHECK_INT(rc_loss_fsp(&loss, NULL, NULL, 1.0f, f1, f2, f3, f2, &v, &v, &wide, &v, work, &e),
            RC_ERR_SHAPE);
}

/* Park et al. 2019. Relations ignore scale, translation and extra zero
 * dimensions: such a teacher gives 0. An equilateral student (all angles
 * 60 degrees, all distances equal) against a right isosceles teacher has
 * values computable by hand. Fewer than 2 / 3 samples: 0. */
static void rkd_by_hand(void) {
  enum { N = 5, D = 3 };
  double store[13 * N * N / 2 + 1];
  float *work = (float *)store;
  float s[N * D], t[N * (D + 2)] = {0};
  fill(s, N * D, 9);
  for (int i = 0; i < N; i++)
    for (int d = 0; d < D; d++) t[i * (D + 2) + d] = 3.0f * s[i * D + d] + 0.5f;
  double loss;
  rc_err e;
  CHECK_INT(rc_loss_rkd_distance(&loss, NULL, 1.0f, s, t, N, D, D + 2, work, &e), RC_OK);
  CHECK_NEAR(loss, 0.0, 1e-12, 0);
  CHECK_INT(rc_loss_rkd_angle(&loss, NULL, 1.0f, s, t, N, D, D + 2, work, &e), RC_OK);
  CHECK_NEAR(loss, 0.0, 1e-12, 0);

  float eq[6] = {0, 0, 1, 0, 0.5f, (float)(sqrt(3.0) / 2)}, ri[6] = {0, 0, 1, 0, 0, 1};
  CHECK_INT(rc_loss_rkd_angle(&loss, NULL, 1.0f, eq, ri, 3, 2, 2, work, &e), RC_OK);
  /* Per centre two ordered triples: the right angle (cos 0) once per
   * direction, the two 45-degree corners (cos sqrt(2)/2) twice each. */
  double d45 = 0.5 - sqrt(0.5);
  CHECK_NEAR(loss, (2 * 0.5 * 0.25 + 4 * 0.5 * d45 * d45) / 6.0, 1e-6, 1e-5);
  CHECK_INT(rc_loss_rkd_distance(&loss, NULL, 1.0f, eq, ri, 3, 2, 2, work, &e), RC_OK);
  double mu = (2.0 + sqrt(2.0)) / 3.0, a = 1.0 - 1.0 / mu, b = 1.0 - sqrt(2.0) / mu;
  CHECK_NEAR(loss, (2 * 0.5 * a * a + 0.5 * b * b) / 3.0, 1e-6, 1e-5);

  float g[6] = {0};
  CHECK_INT(rc_loss_rkd_angle(&loss, g, 1.0f, eq, ri, 2, 2, 2, work, &e), RC_OK);
  CHECK_EQ(loss, 0.0);
  CHECK_INT(rc_loss_rkd_distance(&loss, g, 1.0f, eq, ri, 1, 2, 2, work, &e), RC_OK);
  CHECK_EQ(loss, 0.0);
  for (int i = 0; i < 6; i++) CHECK_EQ(g[i], 0.0f);
  /* Two coinciding students: distance 0 there, finite loss and gradient. */
  float dup[6] = {1, 2, 1, 2, 0, 0};
  CHECK_INT(rc_loss_rkd_angle(&loss, g, 1.0f, dup, ri, 3, 2, 2, work, &e), RC_OK);
  CHECK(isfinite(loss));
  for (int i = 0; i < 6; i++) CHECK(isfinite(g[i]));
  /* A misaligned workspace is refused. */
  CHECK_INT(rc_loss_rkd_angle(&loss, g, 1.0f, eq, ri, 3, 2, 2, work + 1, &e), RC_ERR_INVALID);
}

/* KL(t || s): identical rows give 0 (and a constant gradient); a one-hot teacher against a uniform
 * student gives log(Lk); a student zero where the teacher has mass is
 * clamped at 1e-8 (finite loss, no gradient there). */
static void attention_map_by_hand(void) {
  float u[4] = {0.25f, 0.25f, 0.25f, 0.25f}, oh[4] = {0, 0, 1, 0}, g[4] = {0};
  double loss;
  rc_err e;
  CHECK_INT(rc_loss_attention_map(&loss, g, 1.0f, u, u, 1, 1, 1, 4, &e), RC_OK);
  CHECK_NEAR(loss, 0.0, 1e-12, 0);
  /* At equality d/ds = -t/s = -1 everywhere: a constant row, which the
   * Softmax backward maps to zero. */
  for (int i = 0; i < 4; i++) CHECK_NEAR(g[i], -1.0, 1e-6, 0);
  memset(g, 0, sizeof g);
  CHECK_INT(rc_loss_attention_map(&loss, g, 1.0f, u, oh, 1, 1, 1, 4, &e), RC_OK);
  CHECK_NEAR(loss, log(4.0), 1e-7, 0);
  CHECK_NEAR(g[2], -4.0, 1e-6, 0);
  CHECK_EQ(g[0], 0.0f);
  float s[4] = {0.5f, 0.5f, 0.0f, 0.0f};
  memset(g, 0, sizeof g);
  CHECK_INT(rc_loss_attention_map(&loss, g, 1.0f, s, oh, 1, 1, 1, 4, &e), RC_OK);
  CHECK_NEAR(loss, -log((double)RC_ATTN_KL_EPS), 1e-6, 1e-6);
  for (int i = 0; i < 4; i++) CHECK_EQ(g[i], 0.0f);
  CHECK_INT(rc_loss_attention_map(&loss, g, 1.0f, s, oh, 1, 0, 1, 4, &e), RC_ERR_SHAPE);
}

/* 1/2 sum of squared differences over unmasked entries. */
static void weight_anchor_by_hand(void) {
  float w[3] = {1, 2, 3}, w0[3] = {0, 0, 0}, g[3] = {0};
  uint8_t mask[3] = {1, 0, 1};
  double loss;
  rc_err e;
  CHECK_INT(rc_loss_weight_anchor(&loss, g, 1.0f, w, w0, mask, 3, &e), RC_OK);
  CHECK_NEAR(loss, 0.5 * (1 + 9), 1e-12, 0);
  CHECK_EQ(g[0], 1.0f);
  CHECK_EQ(g[1], 0.0f);
  CHECK_EQ(g[2], 3.0f);
  CHECK_INT(rc_loss_weight_anchor(&loss, NULL, 1.0f, w, w0, NULL, 3, &e), RC_OK);
  CHECK_NEAR(loss, 7.0, 1e-12, 0);
}

/* Views from dims, and shape refusals naming the term. */
static void views_and_refusals(void) {
  rc_feat_view v;
  rc_err e;
  int64_t d4[4] = {8, 16, 7, 5}, d3[3] = {8, 10, 32}, d2[2] = {8, 100}, bad[2] = {8, 0};
  CHECK_INT(rc_feat_view_from_dims(&v, d4, 4, &e), RC_OK);
  CHECK_EQ(v.n, 8);
  CHECK_EQ(v.c, 16);
  CHECK_EQ(v.positions, 35);
  CHECK_EQ(v.layout, CF);
  CHECK_INT(rc_feat_view_from_dims(&v, d3, 3, &e), RC_OK);
  CHECK_EQ(v.n, 8);
  CHECK_EQ(v.c, 32);
  CHECK_EQ(v.positions, 10);
  CHECK_EQ(v.layout, CL);
  CHECK_INT(rc_feat_view_from_dims(&v, d2, 2, &e), RC_OK);
  CHECK_EQ(v.n, 8);
  CHECK_EQ(v.c, 100);
  CHECK_EQ(v.positions, 1);
  CHECK_EQ(v.layout, CL);
  CHECK_INT(rc_feat_view_from_dims(&v, bad, 2, &e), RC_ERR_SHAPE);
  CHECK_INT(rc_feat_view_from_dims(&v, d2, 1, &e), RC_ERR_SHAPE);
  int64_t huge[4] = {1 << 20, 1 << 20, 1 << 20, 1 << 20};
  CHECK_INT(rc_feat_view_from_dims(&v, huge, 4, &e), RC_ERR_LIMIT);

  float s[6] = {0}, t[8] = {0};
  double wk[4];
  float *work = (float *)wk;
  double loss;
  rc_feat_view sv = view(2, 3, 1, CL), tv = view(2, 4, 1, CL);
  CHECK_INT(rc_loss_hint(&loss, NULL, NULL, NULL, 1.0f, s, t, NULL, NULL, &sv, &tv, work, &e),
            RC_ERR_SHAPE);
  CHECK_STR_CONTAINS(e.msg, "hint");
  CHECK_STR_CONTAINS(e.msg, "projector");
  rc_feat_view tv2 = view(1, 3, 2, CL);
  CHECK_INT(rc_loss_hint(&loss, NULL, NULL, NULL, 1.0f, s, t, NULL, NULL, &sv, &tv2, work, &e),
            RC_ERR_SHAPE);
  float w[12] = {0};
  CHECK_INT(rc_loss_hint(&loss, NULL, NULL, NULL, 1.0f, s, t, w, NULL, &sv, &tv, NULL, &e),
            RC_ERR_INVALID);
}

/* A NaN anywhere in the student or teacher reaches the loss, so the
 * training driver's non-finite check sees it; no clamp or branch hides it. */
static void nan_reaches_the_loss(void) {
  for (int k = HINT; k <= ANCHOR; k++)
    for (int side = 0; side < 2; side++) {
      ctx c = {0};
      c.k = (kind)k;
      c.sv = view(2, 3, 4, CF);
      c.tv = c.sv;
      c.s2v = c.t2v = c.sv;
      c.n = k == ANCHOR ? 24 : (k == ATTN_MAP ? 2 : 4);
      c.ds = c.dt = 6;
      c.heads = 1, c.lq = 3, c.lk = 4;
      c.param = 1.0f;
      int64_t cnt = 24; /* every term's student and teacher hold 24 floats here */
      c.s = alloc_fill(cnt, 111);
      c.t = alloc_fill(cnt, 112);
      if (k == ATTN_MAP)
        for (int i = 0; i < cnt; i++) c.s[i] = fabsf(c.s[i]), c.t[i] = fabsf(c.t[i]);
      if (k == FSP) c.s2 = alloc_fill(cnt, 113), c.t2 = alloc_fill(cnt, 114);
      (side ? c.t : c.s)[5] = NAN;
      ctx_ready(&c);
      double loss = eval(&c, 1);
      if (!isnan(loss)) fprintf(stderr, "term %d, NaN in the %s: loss %g\n", k, side ? "teacher" : "student", loss);
      CHECK(isnan(loss));
      ctx_free(&c);
    }
}

int main(void) {
  RUN(hint_gradients);
  RUN(boundary_gradients);
  RUN(attention_gradients);
  RUN(fsp_gradients);
  RUN(rkd_gradients);
  RUN(attention_map_gradients);
  RUN(weight_anchor_gradients);
  RUN(hint_by_hand);
  RUN(projector_init);
  RUN(projector_fit);
  RUN(boundary_by_hand);
  RUN(attention_by_hand);
  RUN(fsp_by_hand);
  RUN(rkd_by_hand);
  RUN(attention_map_by_hand);
  RUN(weight_anchor_by_hand);
  RUN(views_and_refusals);
  RUN(nan_reaches_the_loss);
  return TEST_REPORT();
}
