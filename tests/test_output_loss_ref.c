/* Per-output losses against PyTorch (Debian's python3-torch):
 * scripts/ref_output_loss.py writes, into $RECOUP_BINARY_DIR/output_loss_ref
 * (the fixture of tests/output_loss_ref.cmake), each term written from its
 * paper's formula in float64 with autograd gradients, on odd shapes and axes.
 * Here the same float32 inputs go through src/train/output_loss.c. Values:
 * relative 1e-5; gradients: relative 1e-4 plus 1e-6 of the largest entry.
 * Both sides are printed for every case. */
#include <stdint.h>

#include "train/output_loss.h"
#include "train/synthesize.h"
#include "test.h"
#include "ref_arrays.h"

/* One term on dims; spec as the command line writes it, target optional. */
static void one(const char *name, const char *spec, const int64_t *dims, int rank, const float *target) {
  long n = 1;
  for (int d = 0; d < rank; d++) n *= (long)dims[d];
  char k[96];
  snprintf(k, sizeof k, "%s_s", name);
  const float *s = ref(k, n);
  snprintf(k, sizeof k, "%s_t", name);
  const float *t = ref(k, n);
  snprintf(k, sizeof k, "%s_loss", name);
  const float *want = ref(k, 1);
  snprintf(k, sizeof k, "%s_g", name);
  const float *gw = ref(k, n);
  if (!s || !t || !want || !gw) return;
  rc_output_loss o;
  rc_err e = {0};
  CHECK_INT(rc_output_loss_parse(&o, spec, &e), RC_OK);
  CHECK_INT(rc_output_loss_resolve(&o, dims, rank, 4.0f, &e), RC_OK);
  float *g = calloc((size_t)n, sizeof(float));
  double loss = -1;
  CHECK_INT(rc_output_loss_compute(&loss, g, 1.0f, &o, dims, rank, s, t, target, &e), RC_OK);
  printf("%-12s %-40s recoup %.9g  PyTorch %.9g\n", name, spec, loss, (double)want[0]);
  CHECK_NEAR(loss, want[0], 1e-7, 1e-5);
  ref_check_grad(name, g, gw, n);
  free(g);
}

static void kd_matches_torch(void) {
  int64_t d4[] = {3, 5, 4, 7};
  one("kd_axis1", "y=kd:axis=1:t=2", d4, 4, NULL);
  one("kd_weighted", "y=kd:axis=1:t=2:weights=0.25,1,2,0.5,1.5", d4, 4, NULL);
  int64_t d3[] = {2, 3, 6};
  one("kd_last", "y=kd:axis=-1:t=1", d3, 3, NULL);
}

static void kd_sigmoid_matches_torch(void) {
  int64_t d[] = {3, 4, 5};
  one("kds", "y=kd-sigmoid:t=1.5", d, 3, NULL);
}

static void regression_matches_torch(void) {
  int64_t d[] = {2, 7, 3};
  one("mse", "y=mse", d, 3, NULL);
  one("sl1", "y=smooth-l1:beta=0.5", d, 3, NULL);
  int64_t b[] = {3, 4, 5};
  const float *y = ref("bl2_y", 60);
  if (y) one("bl2", "y=bounded-l2:axis=1:margin=0.1", b, 3, y);
}

static void edge_kd_matches_torch(void) {
  int64_t d[] = {2, 3, 20};
  one("ekd", "y=edge-kd:axis=2:bins=5:t=3", d, 3, NULL);
}

static void dense_ce_matches_torch(void) {
  int64_t d[] = {2, 4, 3, 5};
  const float *s = ref("ce_s", 120), *lf = ref("ce_labels", 30), *want = ref("ce_loss", 1), *gw = ref("ce_g", 120);
  if (!s || !lf || !want || !gw) return;
  int32_t lab[30];
  for (int i = 0; i < 30; i++) lab[i] = (int32_t)lf[i];
  float g[120] = {0};
  double loss = -1;
  int64_t counted = 0;
  rc_err e = {0};
  CHECK_INT(rc_output_ce(&loss, &counted, g, 1.0f, d, 4, 1, s, lab, 255, &e), RC_OK);
  printf("%-12s %-40s recoup %.9g  PyTorch %.9g\n", "ce", "cross_entropy(ignore_index=255)", loss, (double)want[0]);
  CHECK_NEAR(loss, want[0], 1e-7, 1e-5);
  CHECK_INT(counted, 28);
  ref_check_grad("ce", g, gw, 120);
}

/* The synthesis objective's terms (train/synthesize.h). */
static void synthesis_terms_match_torch(void) {
  int64_t d[] = {3, 4, 5, 6};
  const float *x = ref("bnstat_x", 360), *m = ref("bnstat_m", 4), *v = ref("bnstat_v", 4);
  const float *want = ref("bnstat_loss", 1), *gw = ref("bnstat_g", 360);
  const float *pwant = ref("prior_loss", 1), *pgw = ref("prior_g", 360);
  if (!x || !m || !v || !want || !gw || !pwant || !pgw) return;
  float g[360] = {0}, pg[360] = {0};
  double acc[8];
  double loss = rc_synth_bn_term(g, x, d, 4, m, v, 1e-5f, acc, NULL, NULL);
  printf("%-12s %-40s recoup %.9g  PyTorch %.9g\n", "bnstat", "|mu - m| + |var - v|", loss, (double)want[0]);
  CHECK_NEAR(loss, want[0], 1e-7, 1e-5);
  ref_check_grad("bnstat", g, gw, 360);
  double prior = rc_synth_priors(pg, x, d, 4, 0.05f, 0.001f);
  printf("%-12s %-40s recoup %.9g  PyTorch %.9g\n", "prior", "0.05 tv + 0.001 l2", prior, (double)pwant[0]);
  CHECK_NEAR(prior, pwant[0], 1e-7, 1e-5);
  ref_check_grad("prior", pg, pgw, 360);
}

/* Refusals before any computing: each prints its message. */
static void bad_specs_are_refused(void) {
  rc_output_loss o;
  rc_err e = {0};
  const char *bad[] = {"y=nope", "y=kd:beta=1", "y=edge-kd:axis=-1", "kd", "y=smooth-l1:beta=x", "y=kd:t=0"};
  for (size_t i = 0; i < sizeof bad / sizeof bad[0]; i++) {
    CHECK(rc_output_loss_parse(&o, bad[i], &e) != RC_OK);
    printf("refused %-22s: %s\n", bad[i], e.msg);
  }
  int64_t d[] = {2, 5, 3};
  CHECK_INT(rc_output_loss_parse(&o, "y=kd:axis=3", &e), RC_OK);
  CHECK_INT(rc_output_loss_resolve(&o, d, 3, 4.0f, &e), RC_ERR_SHAPE);
  printf("refused axis 3 of rank 3: %s\n", e.msg);
  CHECK_INT(rc_output_loss_parse(&o, "y=kd:axis=0", &e), RC_OK);
  CHECK_INT(rc_output_loss_resolve(&o, d, 3, 4.0f, &e), RC_ERR_SHAPE);
  CHECK_INT(rc_output_loss_parse(&o, "y=kd:weights=1,2", &e), RC_OK);
  CHECK_INT(rc_output_loss_resolve(&o, d, 3, 4.0f, &e), RC_ERR_SHAPE);
  printf("refused 2 weights for 5 classes: %s\n", e.msg);
  CHECK_INT(rc_output_loss_parse(&o, "y=edge-kd:bins=2", &e), RC_OK);
  CHECK_INT(rc_output_loss_resolve(&o, d, 3, 4.0f, &e), RC_ERR_SHAPE);
}

/* mIoU by hand: classes 0 and 1 with IoU 1/2 and 2/3, class 2 absent. */
static void miou_by_hand(void) {
  int64_t conf[9] = {1, 1, 0, 0, 2, 0, 0, 0, 0};
  double got = rc_output_miou(conf, 3);
  printf("mIoU recoup %.9g, by hand (1/2 + 2/3) / 2 = %.9g\n", got, (0.5 + 2.0 / 3.0) / 2);
  CHECK_NEAR(got, (0.5 + 2.0 / 3.0) / 2, 1e-12, 0);
}

int main(void) {
  if (!ref_load("output_loss_ref", "output_loss_ref_data")) return 1;
  RUN(kd_matches_torch);
  RUN(kd_sigmoid_matches_torch);
  RUN(regression_matches_torch);
  RUN(edge_kd_matches_torch);
  RUN(dense_ce_matches_torch);
  RUN(synthesis_terms_match_torch);
  RUN(bad_specs_are_refused);
  RUN(miou_by_hand);
  ref_free();
  return TEST_REPORT();
}
