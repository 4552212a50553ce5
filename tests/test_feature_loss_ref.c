/* Feature-level distillation losses against PyTorch (Debian's python3-torch
 * 1.13): scripts/ref_feature_loss.py writes, into
 * $RECOUP_BINARY_DIR/feature_loss_ref (the fixture of
 * tests/feature_loss_ref.cmake), each term written from its paper's formula
 * in float64 with autograd gradients. Here the same float32 inputs go
 * through src/train/feature_loss.c. Values: relative 1e-5; gradients:
 * relative 1e-4 (plus 1e-6 of the array's largest entry, for entries that
 * cancel to near zero). */
#include <stdint.h>

#include "train/feature_loss.h"
#include "test.h"
#include "ref_arrays.h"

/* Workspace for every case here, 8-byte aligned as the API asks. */
static double work_store[2048];
#define work ((float *)work_store)
#define WORK_FLOATS (2 * sizeof work_store / sizeof(double))

static void check_value(double got, const float *want) {
  if (want) CHECK_NEAR(got, want[0], 1e-7, 1e-5);
}

static float *zeros(long n) { return calloc((size_t)n, sizeof(float)); }

/* hint (Romero et al. 2015, FitNets) or boundary (Heo et al. 2019): one
 * case named `name`, student view sv, teacher channels ct. */
static void projected(const char *name, int boundary, rc_feat_view sv, int64_t ct, int proj,
                      float margin) {
  rc_feat_view tv = sv;
  tv.c = ct;
  long ns = (long)(sv.n * sv.c * sv.positions), nt = (long)(tv.n * tv.c * tv.positions);
  char k[96];
#define R(suffix, count) (snprintf(k, sizeof k, "%s_%s", name, suffix), ref(k, count))
  const float *s = R("s", ns), *t = R("t", nt), *l = R("loss", 1), *gs = R("gs", ns);
  const float *w = proj ? R("w", ct * sv.c) : NULL, *b = proj ? R("b", ct) : NULL;
  const float *gw = proj ? R("gw", ct * sv.c) : NULL, *gb = proj ? R("gb", ct) : NULL;
#undef R
  if (!s || !t || (proj && (!w || !b))) return;
  CHECK_LE(rc_loss_hint_workspace_floats(&sv, &tv), WORK_FLOATS);
  float *ggs = zeros(ns), *ggw = zeros(ct * sv.c), *ggb = zeros(ct);
  double loss = -1;
  rc_err e;
  rc_status st = boundary ? rc_loss_boundary(&loss, ggs, proj ? ggw : NULL, proj ? ggb : NULL, 1.0f,
                                             s, t, w, b, &sv, &tv, margin, work, &e)
                          : rc_loss_hint(&loss, ggs, proj ? ggw : NULL, proj ? ggb : NULL, 1.0f, s,
                                         t, w, b, &sv, &tv, work, &e);
  CHECK_INT(st, RC_OK);
  check_value(loss, l);
  ref_check_grad(name, ggs, gs, ns);
  if (proj) {
    ref_check_grad("weight", ggw, gw, (long)(ct * sv.c));
    ref_check_grad("bias", ggb, gb, (long)ct);
  }
  free(ggs), free(ggw), free(ggb);
}

static rc_feat_view view(int64_t n, int64_t c, int64_t p, rc_feat_layout l) {
  rc_feat_view v = {n, c, p, l};
  return v;
}

static void hint_matches_torch(void) {
  projected("hint_cf", 0, view(3, 4, 6, RC_FEAT_CHANNELS_FIRST), 5, 1, 0);
  projected("hint_tok", 0, view(2, 4, 3, RC_FEAT_CHANNELS_LAST), 3, 1, 0);
  projected("hint_vec", 0, view(4, 6, 1, RC_FEAT_CHANNELS_LAST), 5, 1, 0);
  projected("hint_same", 0, view(2, 3, 4, RC_FEAT_CHANNELS_FIRST), 3, 0, 0);
}

static void boundary_matches_torch(void) {
  projected("ab_cf", 1, view(3, 4, 6, RC_FEAT_CHANNELS_FIRST), 5, 1, 1.0f);
  projected("ab_tok", 1, view(2, 4, 3, RC_FEAT_CHANNELS_LAST), 3, 1, 0.5f);
  projected("ab_same", 1, view(2, 3, 4, RC_FEAT_CHANNELS_FIRST), 3, 0, 1.0f);
}

/* Attention transfer (Zagoruyko and Komodakis 2017). */
static void attention_case(const char *name, rc_feat_view sv, rc_feat_view tv, float beta) {
  long ns = (long)(sv.n * sv.c * sv.positions), nt = (long)(tv.n * tv.c * tv.positions);
  char k1[64], k2[64], k3[64], k4[64];
  snprintf(k1, sizeof k1, "%s_s", name), snprintf(k2, sizeof k2, "%s_t", name);
  snprintf(k3, sizeof k3, "%s_loss", name), snprintf(k4, sizeof k4, "%s_gs", name);
  const float *s = ref(k1, ns), *t = ref(k2, nt), *l = ref(k3, 1), *gs = ref(k4, ns);
  if (!s || !t) return;
  float *g = zeros(ns);
  double loss;
  rc_err e;
  CHECK_INT(rc_loss_attention(&loss, g, 1.0f, s, t, &sv, &tv, beta, work, &e), RC_OK);
  check_value(loss, l);
  ref_check_grad(name, g, gs, ns);
  free(g);
}

static void attention_matches_torch(void) {
  attention_case("at_cf", view(3, 4, 20, RC_FEAT_CHANNELS_FIRST),
                 view(3, 6, 20, RC_FEAT_CHANNELS_FIRST), 1000.0f);
  attention_case("at_tok", view(2, 5, 7, RC_FEAT_CHANNELS_LAST),
                 view(2, 3, 7, RC_FEAT_CHANNELS_LAST), 10.0f);
}

/* FSP matrices (Yim et al. 2017). */
static void fsp_case(const char *name, int64_t n, int64_t c1, int64_t c2, int64_t ps, int64_t pt,
                     rc_feat_layout lay) {
  rc_feat_view s1v = view(n, c1, ps, lay), s2v = view(n, c2, ps, lay);
  rc_feat_view t1v = view(n, c1, pt, lay), t2v = view(n, c2, pt, lay);
  char k[8][64];
  const char *suf[8] = {"s1", "s2", "t1", "t2", "loss", "gs1", "gs2", ""};
  for (int i = 0; i < 7; i++) snprintf(k[i], sizeof k[i], "%s_%s", name, suf[i]);
  long n1 = (long)(n * c1 * ps), n2 = (long)(n * c2 * ps);
  const float *s1 = ref(k[0], n1), *s2 = ref(k[1], n2), *t1 = ref(k[2], (long)(n * c1 * pt)),
              *t2 = ref(k[3], (long)(n * c2 * pt)), *l = ref(k[4], 1), *g1 = ref(k[5], n1),
              *g2 = ref(k[6], n2);
  if (!s1 || !s2 || !t1 || !t2) return;
  CHECK_LE(rc_loss_fsp_workspace_floats(&s1v, &s2v), WORK_FLOATS);
  float *a = zeros(n1), *b = zeros(n2);
  double loss;
  rc_err e;
  CHECK_INT(rc_loss_fsp(&loss, a, b, 1.0f, s1, s2, t1, t2, &s1v, &s2v, &t1v, &t2v, work, &e), RC_OK);
  check_value(loss, l);
  ref_check_grad("fsp F1", a, g1, n1);
  ref_check_grad("fsp F2", b, g2, n2);
  free(a), free(b);
}

static void fsp_matches_torch(void) {
  fsp_case("fsp_cf", 2, 3, 5, 16, 4, RC_FEAT_CHANNELS_FIRST);
  fsp_case("fsp_tok", 3, 4, 2, 6, 5, RC_FEAT_CHANNELS_LAST);
}

/* Relational knowledge distillation (Park et al. 2019): distance and angle
 * potentials under smooth L1, on 7 samples (one far off, so both Huber
 * branches occur). */
static void rkd_matches_torch(void) {
  enum { N = 7, DS = 5, DT = 9 };
  const float *s = ref("rkd_s", N * DS), *t = ref("rkd_t", N * DT);
  const float *dl = ref("rkd_dist_loss", 1), *dg = ref("rkd_dist_gs", N * DS);
  const float *al = ref("rkd_angle_loss", 1), *ag = ref("rkd_angle_gs", N * DS);
  if (!s || !t) return;
  CHECK_LE(rc_loss_rkd_workspace_floats(N), WORK_FLOATS);
  float g[N * DS] = {0};
  double loss;
  rc_err e;
  CHECK_INT(rc_loss_rkd_distance(&loss, g, 1.0f, s, t, N, DS, DT, work, &e), RC_OK);
  check_value(loss, dl);
  ref_check_grad("rkd distance", g, dg, N * DS);
  memset(g, 0, sizeof g);
  CHECK_INT(rc_loss_rkd_angle(&loss, g, 1.0f, s, t, N, DS, DT, work, &e), RC_OK);
  check_value(loss, al);
  ref_check_grad("rkd angle", g, ag, N * DS);
}

/* KL(teacher || student) over attention probabilities, with a teacher zero
 * and a student zero (clamped at 1e-8) in the data. */
static void attention_map_matches_torch(void) {
  enum { N = 2, H = 3, LQ = 4, LK = 5, CNT = N * H * LQ * LK };
  const float *s = ref("attnmap_s", CNT), *t = ref("attnmap_t", CNT);
  const float *l = ref("attnmap_loss", 1), *gs = ref("attnmap_gs", CNT);
  if (!s || !t) return;
  float g[CNT] = {0};
  double loss;
  rc_err e;
  CHECK_INT(rc_loss_attention_map(&loss, g, 1.0f, s, t, N, H, LQ, LK, &e), RC_OK);
  check_value(loss, l);
  ref_check_grad("attention map", g, gs, CNT);
}

/* L2-SP (Li, Grandvalet and Davoine 2018) with a mask. */
static void weight_anchor_matches_torch(void) {
  enum { CNT = 40 };
  const float *s = ref("anchor_s", CNT), *t = ref("anchor_t", CNT), *m = ref("anchor_mask", CNT);
  const float *l = ref("anchor_loss", 1), *gs = ref("anchor_gs", CNT);
  if (!s || !t || !m) return;
  uint8_t mask[CNT];
  for (int i = 0; i < CNT; i++) mask[i] = m[i] > 0.5f;
  float g[CNT] = {0};
  double loss;
  rc_err e;
  CHECK_INT(rc_loss_weight_anchor(&loss, g, 1.0f, s, t, mask, CNT, &e), RC_OK);
  check_value(loss, l);
  ref_check_grad("weight anchor", g, gs, CNT);
}

/* The least-squares start of a projector against the normal equations
 * solved by torch.linalg.solve in float64 (GEMM sums here run in float32:
 * relative 1e-4). */
static void fit_case(const char *name, rc_feat_view sv, int64_t ct) {
  rc_feat_view tv = sv;
  tv.c = ct;
  long ns = (long)(sv.n * sv.c * sv.positions), nt = (long)(tv.n * tv.c * tv.positions);
  char k[96];
#define R(suffix, count) (snprintf(k, sizeof k, "%s_%s", name, suffix), ref(k, count))
  const float *s = R("s", ns), *t = R("t", nt), *w = R("w", ct * sv.c), *b = R("b", ct);
#undef R
  if (!s || !t || !w || !b) return;
  CHECK_LE(rc_feat_projector_fit_workspace_doubles(sv.c, ct), sizeof work_store / sizeof(double));
  float *gw = zeros(ct * sv.c), *gb = zeros(ct);
  int fitted = 0;
  rc_err e;
  CHECK_INT(rc_feat_projector_fit(&fitted, gw, gb, s, t, &sv, &tv, work_store, &e), RC_OK);
  CHECK_INT(fitted, 1);
  ref_check_grad("fitted weight", gw, w, (long)(ct * sv.c));
  ref_check_grad("fitted bias", gb, b, (long)ct);
  free(gw), free(gb);
}

static void projector_fit_matches_torch(void) {
  fit_case("fit_cf", view(3, 4, 10, RC_FEAT_CHANNELS_FIRST), 6);
  fit_case("fit_tok", view(2, 5, 9, RC_FEAT_CHANNELS_LAST), 3);
}

int main(void) {
  if (!ref_load("feature_loss_ref", "feature_loss_ref_data")) return 1;
  RUN(hint_matches_torch);
  RUN(boundary_matches_torch);
  RUN(attention_matches_torch);
  RUN(fsp_matches_torch);
  RUN(rkd_matches_torch);
  RUN(attention_map_matches_torch);
  RUN(weight_anchor_matches_torch);
  RUN(projector_fit_matches_torch);
  ref_free();
  return TEST_REPORT();
}
