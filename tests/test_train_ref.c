/* Training numerics against PyTorch (Debian's python3-torch 1.13): values
 * written by scripts/ref_train.py into $RECOUP_BINARY_DIR/train_ref (the
 * fixture run before this test by tests/train_ref.cmake). Losses and their
 * autograd gradients; ten steps of torch.optim.SGD and torch.optim.AdamW with
 * the same per-step gradients replayed through rc_optim_step; and
 * torch.nn.utils.clip_grad_norm_. */
#include <stdint.h>

#include "train/loss.h"
#include "train/optim.h"
#include "train/params.h"
#include "test.h"
#include "ref_arrays.h"

enum { N = 6, K = 7 };

/* KLDivLoss(batchmean)(log_softmax(s/T), softmax(t/T)) * T^2 and its
 * autograd gradient (PyTorch). */
static void kd_matches_torch(void) {
  const float *s = ref("student", N * K), *t = ref("teacher", N * K);
  if (!s || !t) return;
  const int temps[] = {1, 4, 20};
  for (int ti = 0; ti < 3; ti++) {
    char ln[32], gn[32];
    snprintf(ln, sizeof ln, "kd_loss_T%d", temps[ti]);
    snprintf(gn, sizeof gn, "kd_grad_T%d", temps[ti]);
    const float *rl = ref(ln, 1), *rg = ref(gn, N * K);
    if (!rl || !rg) return;
    double loss;
    float grad[N * K] = {0};
    rc_err e;
    CHECK_INT(rc_loss_kd(&loss, NULL, grad, 1.0f, s, t, N, K, (float)temps[ti], &e), RC_OK);
    CHECK_NEAR(loss, rl[0], 1e-7, 1e-5);
    for (int j = 0; j < N * K; j++) CHECK_NEAR(grad[j], rg[j], 1e-7, 1e-5);
  }
}

/* F.cross_entropy and F.mse_loss (mean) with autograd gradients (PyTorch). */
static void ce_and_mse_match_torch(void) {
  const float *s = ref("student", N * K), *t = ref("teacher", N * K);
  const float *lf = ref("labels", N);
  const float *cl = ref("ce_loss", 1), *cg = ref("ce_grad", N * K);
  const float *ml = ref("mse_loss", 1), *mg = ref("mse_grad", N * K);
  if (!s || !t || !lf || !cl || !cg || !ml || !mg) return;
  int32_t labels[N];
  for (int i = 0; i < N; i++) labels[i] = (int32_t)lf[i];
  rc_err e;
  double loss;
  float grad[N * K] = {0};
  CHECK_INT(rc_loss_cross_entropy(&loss, NULL, grad, 1.0f, s, labels, N, K, &e), RC_OK);
  CHECK_NEAR(loss, cl[0], 1e-7, 1e-5);
  for (int j = 0; j < N * K; j++) CHECK_NEAR(grad[j], cg[j], 1e-7, 1e-5);
  memset(grad, 0, sizeof grad);
  CHECK_INT(rc_loss_logit_mse(&loss, NULL, grad, 1.0f, s, t, N, K, &e), RC_OK);
  CHECK_NEAR(loss, ml[0], 1e-7, 1e-5);
  for (int j = 0; j < N * K; j++) CHECK_NEAR(grad[j], mg[j], 1e-7, 1e-5);
}

enum { NW = 12, NB = 3, NP = NW + NB, STEPS = 10 };

/* A store shaped like the reference model: W (4, 3) decayed, b (3) not. */
static rc_params *linear_store(const float *init, const rc_optim_config *c, unsigned w_flags) {
  rc_params *ps = NULL;
  rc_err e;
  CHECK_INT(rc_params_init(&ps, &e), RC_OK);
  CHECK_INT(rc_params_add(ps, NULL, "W", NW, init, w_flags, &e), RC_OK);
  CHECK_INT(rc_params_add(ps, NULL, "b", NB, init + NW, RC_PARAM_NO_DECAY, &e), RC_OK);
  CHECK_INT(rc_params_finalize(ps, rc_optim_moments(c), &e), RC_OK);
  return ps;
}

/* Replay the gradients torch saw and compare the parameters after each of
 * ten steps with torch's (torch.optim.SGD / torch.optim.AdamW). */
static void replay(const char *name, const rc_optim_config *c) {
  char n1[64], n2[64], n3[64];
  snprintf(n1, sizeof n1, "%s_init", name);
  snprintf(n2, sizeof n2, "%s_grads", name);
  snprintf(n3, sizeof n3, "%s_params", name);
  const float *init = ref(n1, NP), *grads = ref(n2, NP * STEPS), *want = ref(n3, NP * STEPS);
  if (!init || !grads || !want) return;
  rc_params *ps = linear_store(init, c, 0);
  rc_err e;
  for (int s = 0; s < STEPS; s++) {
    memcpy(rc_params_grad(ps, 0), grads + s * NP, NW * sizeof(float));
    memcpy(rc_params_grad(ps, 1), grads + s * NP + NW, NB * sizeof(float));
    CHECK_INT(rc_optim_step(ps, c, c->lr, &e), RC_OK);
    const float *w = rc_params_value(ps, 0), *b = rc_params_value(ps, 1);
    for (int j = 0; j < NW; j++) CHECK_NEAR(w[j], want[s * NP + j], 1e-6, 1e-5);
    for (int j = 0; j < NB; j++) CHECK_NEAR(b[j], want[s * NP + NW + j], 1e-6, 1e-5);
  }
  CHECK_INT(rc_params_steps(ps), STEPS);
  rc_params_free(ps);
}

static rc_optim_config sgd(float lr, float momentum, int nesterov, float wd) {
  rc_optim_config c;
  rc_optim_defaults(&c, RC_OPTIM_SGD);
  c.lr = lr;
  c.momentum = momentum;
  c.nesterov = nesterov;
  c.weight_decay = wd;
  return c;
}

static rc_optim_config adamw(float lr, float b1, float b2, float eps, float wd) {
  rc_optim_config c;
  rc_optim_defaults(&c, RC_OPTIM_ADAMW);
  c.lr = lr;
  c.beta1 = b1;
  c.beta2 = b2;
  c.eps = eps;
  c.weight_decay = wd;
  return c;
}

static void sgd_matches_torch(void) {
  rc_optim_config c = sgd(0.05f, 0.9f, 0, 1e-2f);
  replay("sgd_momentum", &c);
  c = sgd(0.05f, 0.9f, 1, 1e-2f);
  replay("sgd_nesterov", &c);
  c = sgd(0.1f, 0.0f, 0, 0.0f);
  replay("sgd_plain", &c);
}

static void adamw_matches_torch(void) {
  rc_optim_config c = adamw(0.02f, 0.9f, 0.999f, 1e-8f, 0.1f);
  replay("adamw", &c);
  c = adamw(0.01f, 0.8f, 0.99f, 1e-6f, 0.5f);
  replay("adamw_betas", &c);
}

/* The same runs with zeros planted in W and the mask on: torch's gradients
 * are non-zero there, momentum and decay are on, yet the zeros stay exactly
 * 0.0f for ten steps of each optimizer (the pruning mask contract). */
static void masked_zeros_survive_torch_gradients(void) {
  const char *names[] = {"sgd_momentum", "sgd_nesterov", "adamw"};
  rc_optim_config cfgs[3] = {sgd(0.05f, 0.9f, 0, 1e-2f), sgd(0.05f, 0.9f, 1, 1e-2f),
                             adamw(0.02f, 0.9f, 0.999f, 1e-8f, 0.1f)};
  const int zeros[] = {0, 4, 5, 11};
  for (int o = 0; o < 3; o++) {
    char n1[64], n2[64];
    snprintf(n1, sizeof n1, "%s_init", names[o]);
    snprintf(n2, sizeof n2, "%s_grads", names[o]);
    const float *init = ref(n1, NP), *grads = ref(n2, NP * STEPS);
    if (!init || !grads) return;
    float start[NP];
    memcpy(start, init, sizeof start);
    for (int z = 0; z < 4; z++) start[zeros[z]] = 0.0f;
    rc_params *ps = linear_store(start, &cfgs[o], RC_PARAM_KEEP_ZEROS);
    rc_err e;
    CHECK_INT(rc_params_build_masks(ps, &e), RC_OK);
    CHECK_INT(rc_params_entry(ps, 0)->n_frozen, 4);
    for (int s = 0; s < STEPS; s++) {
      memcpy(rc_params_grad(ps, 0), grads + s * NP, NW * sizeof(float));
      memcpy(rc_params_grad(ps, 1), grads + s * NP + NW, NB * sizeof(float));
      CHECK_INT(rc_optim_step(ps, &cfgs[o], cfgs[o].lr, &e), RC_OK);
      CHECK(rc_params_mask_intact(ps, NULL, NULL));
    }
    const float *w = rc_params_value(ps, 0);
    for (int z = 0; z < 4; z++) {
      uint32_t bits;
      memcpy(&bits, &w[zeros[z]], 4);
      CHECK_INT(bits, 0);
    }
    /* ...while the other weights did move. */
    CHECK_NE(w[1], start[1]);
    rc_params_free(ps);
  }
}

/* torch.nn.utils.clip_grad_norm_(max_norm=0.5): returned norm and the
 * scaled gradients. */
static void clipping_matches_torch(void) {
  const float *in = ref("clip_grad_in", NP), *norm = ref("clip_norm", 1),
              *out = ref("clip_grad_out", NP);
  if (!in || !norm || !out) return;
  rc_optim_config c = sgd(0.1f, 0.0f, 0, 0.0f);
  rc_params *ps = linear_store(in, &c, 0);
  memcpy(rc_params_grad(ps, 0), in, NW * sizeof(float));
  memcpy(rc_params_grad(ps, 1), in + NW, NB * sizeof(float));
  CHECK_NEAR(rc_clip_grad_norm(ps, 0.5), norm[0], 1e-7, 1e-5);
  for (int j = 0; j < NW; j++) CHECK_NEAR(rc_params_grad(ps, 0)[j], out[j], 1e-7, 1e-5);
  for (int j = 0; j < NB; j++) CHECK_NEAR(rc_params_grad(ps, 1)[j], out[NW + j], 1e-7, 1e-5);
  rc_params_free(ps);
}

int main(void) {
  if (!ref_load("train_ref", "train_ref_data")) return 1;
  RUN(kd_matches_torch);
  RUN(ce_and_mse_match_torch);
  RUN(sgd_matches_torch);
  RUN(adamw_matches_torch);
  RUN(masked_zeros_survive_torch_gradients);
  RUN(clipping_matches_torch);
  ref_free();
  return TEST_REPORT();
}
