/* Losses and batch metrics (src/train/loss.c): closed forms, finite
 * differences, stability for large logits, label checks, metric ties. */
#include <stdint.h>

#include "train/loss.h"
#include "test.h"

/* A fixed pseudo-random generator so failures reproduce. */
static uint32_t rng_state = 12345u;
static float frand(float scale) {
  rng_state = rng_state * 1664525u + 1013904223u;
  return scale * ((float)(rng_state >> 8) / (float)(1u << 24) * 2.0f - 1.0f);
}

static void softmax_ref(double *p, const float *x, int k, double temp) {
  double m = x[0], z = 0.0;
  for (int j = 1; j < k; j++) m = x[j] > m ? x[j] : m;
  for (int j = 0; j < k; j++) z += exp((x[j] - m) / temp);
  for (int j = 0; j < k; j++) p[j] = exp((x[j] - m) / temp) / z;
}

/* Softmax of logits (5, 1) is (0.982, 0.018) and of (3, 2) is (0.731,
 * 0.269) (common practice; 3-digit values). Read back through
 * cross-entropy: per-sample loss -log p[label], gradient p - onehot. */
static void softmax_known_values(void) {
  const float logits[4] = {5, 1, 3, 2};
  const int32_t labels[2] = {0, 0};
  float per[2], grad[4] = {0};
  double loss;
  rc_err e;
  CHECK_INT(rc_loss_cross_entropy(&loss, per, grad, 2.0f, logits, labels, 2, 2, &e), RC_OK);
  CHECK_NEAR(exp(-per[0]), 0.982, 5e-4, 0);
  CHECK_NEAR(exp(-per[1]), 0.731, 5e-4, 0);
  /* grad_scale 2 cancels the batch mean 1/2: grad = p - onehot. */
  CHECK_NEAR(grad[1], 0.018, 5e-4, 0);
  CHECK_NEAR(grad[3], 0.269, 5e-4, 0);
  CHECK_NEAR(grad[0], 0.982 - 1.0, 5e-4, 0);
  CHECK_NEAR(loss, (per[0] + per[1]) / 2.0, 1e-7, 1e-6);
}

enum { N = 5, K = 9 };

/* Hinton, Vinyals and Dean 2015, eq. 2: d/ds of the soft cross-entropy is
 * (1/T)(softmax(s/T) - softmax(t/T)); with the T^2 factor and the batch mean
 * the gradient is T (p_s - p_t) / N, and the loss T^2 mean KL(p_t || p_s). */
static void kd_closed_form(void) {
  float s[N * K], t[N * K];
  for (int i = 0; i < N * K; i++) {
    s[i] = frand(4.0f);
    t[i] = frand(4.0f);
  }
  const float temps[] = {1.0f, 4.0f, 20.0f};
  for (int ti = 0; ti < 3; ti++) {
    double temp = temps[ti], want = 0.0, loss;
    float grad[N * K], per[N];
    for (int j = 0; j < N * K; j++) grad[j] = 0.25f; /* the term adds to it */
    rc_err e;
    CHECK_INT(rc_loss_kd(&loss, per, grad, 1.0f, s, t, N, K, temps[ti], &e), RC_OK);
    double mean_per = 0.0;
    for (int i = 0; i < N; i++) {
      double ps[K], pt[K], kl = 0.0;
      softmax_ref(ps, s + i * K, K, temp);
      softmax_ref(pt, t + i * K, K, temp);
      for (int j = 0; j < K; j++) {
        kl += pt[j] * log(pt[j] / ps[j]);
        CHECK_NEAR(grad[i * K + j], 0.25 + temp * (ps[j] - pt[j]) / N, 1e-7, 1e-5);
      }
      CHECK_NEAR(per[i], temp * temp * kl, 1e-6, 1e-5);
      want += temp * temp * kl / N;
      mean_per += per[i] / N;
    }
    CHECK_NEAR(loss, want, 1e-9, 1e-6);
    CHECK_NEAR(mean_per, loss, 1e-7, 1e-6);
  }
  /* KL of a distribution with itself is zero, and so is the gradient. */
  double loss;
  float grad[N * K] = {0};
  rc_err e;
  CHECK_INT(rc_loss_kd(&loss, NULL, grad, 1.0f, s, s, N, K, 4.0f, &e), RC_OK);
  CHECK_NEAR(loss, 0.0, 1e-12, 0);
  for (int j = 0; j < N * K; j++) CHECK_NEAR(grad[j], 0.0, 1e-8, 0);
}

typedef rc_status (*loss_fn)(double *loss, float *grad, const float *s, rc_err *e);
static float fd_teacher[N * K];
static int32_t fd_labels[N] = {0, 8, 3, 3, 5};
static rc_status kd_t1(double *l, float *g, const float *s, rc_err *e) {
  return rc_loss_kd(l, NULL, g, 1.0f, s, fd_teacher, N, K, 1.0f, e);
}
static rc_status kd_t4(double *l, float *g, const float *s, rc_err *e) {
  return rc_loss_kd(l, NULL, g, 1.0f, s, fd_teacher, N, K, 4.0f, e);
}
static rc_status kd_t20(double *l, float *g, const float *s, rc_err *e) {
  return rc_loss_kd(l, NULL, g, 1.0f, s, fd_teacher, N, K, 20.0f, e);
}
static rc_status mse(double *l, float *g, const float *s, rc_err *e) {
  return rc_loss_logit_mse(l, NULL, g, 1.0f, s, fd_teacher, N, K, e);
}
static rc_status ce(double *l, float *g, const float *s, rc_err *e) {
  return rc_loss_cross_entropy(l, NULL, g, 1.0f, s, fd_labels, N, K, e);
}

/* Central differences of the returned loss against the analytic gradient
 * (the definition of the derivative; h chosen for float inputs). */
static void gradcheck(loss_fn f, const char *name) {
  float s[N * K], grad[N * K] = {0};
  for (int i = 0; i < N * K; i++) s[i] = frand(3.0f);
  double base;
  rc_err e;
  CHECK_INT(f(&base, grad, s, &e), RC_OK);
  int worst_at = 0;
  double worst = -1, worst_fd = 0;
  for (int j = 0; j < N * K; j++) {
    float keep = s[j];
    const float h = 1e-2f;
    double lp, lm;
    s[j] = keep + h;
    f(&lp, NULL, s, &e);
    s[j] = keep - h;
    f(&lm, NULL, s, &e);
    s[j] = keep;
    double fd = (lp - lm) / (2.0 * h);
    /* the error beyond the tolerance (positive: outside it) */
    double excess = fabs(fd - grad[j]) - (2e-5 + 2e-3 * fabs(fd));
    if (excess > worst || j == 0) worst = excess, worst_at = j, worst_fd = fd;
  }
  /* Always printed, so a drift that still passes shows before it fails. */
  printf("%s: worst d/ds[%d]: analytic %.8g numeric %.8g\n", name, worst_at, grad[worst_at], worst_fd);
  CHECK_NEAR(grad[worst_at], worst_fd, 2e-5, 2e-3);
}

static void finite_differences(void) {
  for (int i = 0; i < N * K; i++) fd_teacher[i] = frand(3.0f);
  gradcheck(kd_t1, "kd T=1");
  gradcheck(kd_t4, "kd T=4");
  gradcheck(kd_t20, "kd T=20");
  gradcheck(mse, "logit-mse");
  gradcheck(ce, "cross-entropy");
}

/* mean over batch and classes; per-sample values average to the loss. */
static void mse_normalisation(void) {
  const float s[6] = {1, 2, 3, 0, 0, 0}, t[6] = {0, 0, 0, 0, 0, 2};
  float per[2], grad[6] = {0};
  double loss;
  rc_err e;
  CHECK_INT(rc_loss_logit_mse(&loss, per, grad, 0.5f, s, t, 2, 3, &e), RC_OK);
  CHECK_NEAR(loss, (1.0 + 4 + 9 + 4) / 6.0, 1e-12, 0);
  CHECK_NEAR(per[0], 14.0 / 3.0, 1e-6, 0);
  CHECK_NEAR(per[1], 4.0 / 3.0, 1e-6, 0);
  CHECK_NEAR(grad[2], 0.5 * 2.0 * 3.0 / 6.0, 1e-7, 0);
  CHECK_NEAR(grad[5], 0.5 * 2.0 * -2.0 / 6.0, 1e-7, 0);
}

/* log-sum-exp: logits far beyond float exp's range stay finite, shifting all
 * logits of a row changes nothing, and a teacher that rules a class out
 * (-inf) contributes 0 log 0 = 0. */
static void large_logits_are_stable(void) {
  const float s[3] = {1000.0f, 990.0f, -1000.0f}, t[3] = {2000.0f, 1999.0f, 0.0f};
  const float s0[3] = {10.0f, 0.0f, -1990.0f}, t0[3] = {1.0f, 0.0f, -1999.0f};
  double a, b;
  float ga[3] = {0}, gb[3] = {0};
  rc_err e;
  CHECK_INT(rc_loss_kd(&a, NULL, ga, 1.0f, s, t, 1, 3, 2.0f, &e), RC_OK);
  CHECK_INT(rc_loss_kd(&b, NULL, gb, 1.0f, s0, t0, 1, 3, 2.0f, &e), RC_OK);
  CHECK(isfinite(a));
  CHECK_NEAR(a, b, 1e-9, 1e-6);
  for (int j = 0; j < 3; j++) CHECK_NEAR(ga[j], gb[j], 1e-7, 1e-5);
  const int32_t label = 2;
  CHECK_INT(rc_loss_cross_entropy(&a, NULL, NULL, 1.0f, s, &label, 1, 3, &e), RC_OK);
  CHECK_NEAR(a, 2000.0 + log1p(exp(-10.0) + exp(-2000.0)), 1e-9, 1e-12);
  const float tinf[3] = {1.0f, 0.0f, -INFINITY};
  float g[3] = {0};
  CHECK_INT(rc_loss_kd(&a, NULL, g, 1.0f, s0, tinf, 1, 3, 1.0f, &e), RC_OK);
  CHECK(isfinite(a));
  CHECK(isfinite(g[0]) && isfinite(g[1]) && isfinite(g[2]));
}

static void bad_arguments_are_refused(void) {
  const float s[4] = {0, 1, 2, 3};
  const int32_t labels[2] = {1, 2};
  double loss;
  rc_err e;
  CHECK_INT(rc_loss_cross_entropy(&loss, NULL, NULL, 1.0f, s, labels, 2, 2, &e), RC_ERR_INVALID);
  CHECK_STR_CONTAINS(e.msg, "label 2 of sample 1");
  CHECK_INT(rc_metric_topk(NULL, NULL, s, labels, 2, 2, 1, &e), RC_ERR_INVALID);
  CHECK_INT(rc_loss_kd(&loss, NULL, NULL, 1.0f, s, s, 2, 2, 0.0f, &e), RC_ERR_INVALID);
  CHECK_STR_CONTAINS(e.msg, "temperature");
  CHECK_INT(rc_loss_kd(&loss, NULL, NULL, 1.0f, s, s, 2, 2, NAN, &e), RC_ERR_INVALID);
  CHECK_INT(rc_loss_logit_mse(&loss, NULL, NULL, 1.0f, s, s, 0, 2, &e), RC_ERR_SHAPE);
  const int32_t ok[2] = {1, 0};
  CHECK_INT(rc_metric_topk(NULL, NULL, s, ok, 2, 2, 0, &e), RC_ERR_INVALID);
}

/* top-k counts ties in the label's favour; NaN never counts as correct. */
static void topk_accuracy(void) {
  const float logits[4 * 4] = {
      0.1f, 0.9f, 0.3f, 0.2f, /* label 1: top-1 */
      0.5f, 0.4f, 0.6f, 0.0f, /* label 1: rank 3, in top-3 only */
      0.2f, 0.2f, 0.1f, 0.0f, /* label 1: tied first: top-1 */
      NAN,  0.0f, 1.0f, 2.0f, /* label 0 is NaN: never correct */
  };
  const int32_t labels[4] = {1, 1, 1, 0};
  int64_t c;
  uint8_t hit[4];
  rc_err e;
  CHECK_INT(rc_metric_topk(&c, hit, logits, labels, 4, 4, 1, &e), RC_OK);
  CHECK_INT(c, 2);
  CHECK(hit[0] && !hit[1] && hit[2] && !hit[3]);
  CHECK_INT(rc_metric_topk(&c, hit, logits, labels, 4, 4, 2, &e), RC_OK);
  CHECK_INT(c, 2);
  CHECK_INT(rc_metric_topk(&c, hit, logits, labels, 4, 4, 3, &e), RC_OK);
  CHECK_INT(c, 3);
  CHECK_INT(rc_metric_topk(&c, hit, logits, labels, 4, 4, 4, &e), RC_OK);
  CHECK_INT(c, 3);
  /* a NaN elsewhere in the row ranks above the label */
  const float nan_row[3] = {1.0f, NAN, 0.0f};
  const int32_t l0 = 0;
  CHECK_INT(rc_metric_topk(&c, NULL, nan_row, &l0, 1, 3, 1, &e), RC_OK);
  CHECK_INT(c, 0);
}

static void argmax_and_agreement(void) {
  const float a[3 * 3] = {1, 3, 3, NAN, 0, -1, 2, 1, 0};
  const float b[3 * 3] = {0, 5, 1, 0, -1, 1, 0, 1, 2};
  int32_t pred[3];
  rc_metric_argmax(pred, a, 3, 3);
  CHECK_INT(pred[0], 1); /* first of a tie */
  CHECK_INT(pred[1], 1); /* NaN never wins */
  CHECK_INT(pred[2], 0);
  uint8_t same[3];
  CHECK_INT(rc_metric_agreement(same, a, b, 3, 3), 1);
  CHECK(same[0] && !same[1] && !same[2]);
}

/* Mean KL(teacher || student) at T = 1 equals the kd loss at T = 1. */
static void kl_metric(void) {
  float s[N * K], t[N * K], per[N];
  for (int i = 0; i < N * K; i++) {
    s[i] = frand(2.0f);
    t[i] = frand(2.0f);
  }
  double kl, kd;
  rc_err e;
  CHECK_INT(rc_metric_kl(&kl, per, s, t, N, K, &e), RC_OK);
  CHECK_INT(rc_loss_kd(&kd, NULL, NULL, 0.0f, s, t, N, K, 1.0f, &e), RC_OK);
  CHECK_NEAR(kl, kd, 1e-12, 0);
  CHECK_GT(kl, 0.0);
  for (int i = 0; i < N; i++) CHECK_GE(per[i], 0.0f);
}

int main(void) {
  RUN(softmax_known_values);
  RUN(kd_closed_form);
  RUN(finite_differences);
  RUN(mse_normalisation);
  RUN(large_logits_are_stable);
  RUN(bad_arguments_are_refused);
  RUN(topk_accuracy);
  RUN(argmax_and_agreement);
  RUN(kl_metric);
  return TEST_REPORT();
}
