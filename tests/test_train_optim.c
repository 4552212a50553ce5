/* The flat parameter store, optimizers, clipping and schedules
 * (src/train/params.c, src/train/optim.c). PyTorch comparisons live in
 * test_train_ref.c; here: layout, masks, guards, snapshots, closed-form
 * steps, schedule formulas, refusals and out-of-memory handling. */
#include <stdint.h>

#include "recoup/alloc.h"
#include "train/optim.h"
#include "train/params.h"
#include "test.h"

static uint32_t rng_state = 777u;
static float frand(float scale) {
  rng_state = rng_state * 1664525u + 1013904223u;
  return scale * ((float)(rng_state >> 8) / (float)(1u << 24) * 2.0f - 1.0f);
}

static int bits_zero(float x) {
  uint32_t b;
  memcpy(&b, &x, 4);
  return b == 0;
}

/* Three entries: a conv weight with planted zeros, a norm scale, a bias. */
enum { NW = 40, NS = 5, NB = 5 };
static float w_init[NW], s_init[NS], b_init[NB];

static rc_params *make_store(int n_moments) {
  for (int j = 0; j < NW; j++) w_init[j] = (j % 3 == 0) ? 0.0f : frand(1.0f);
  for (int j = 0; j < NS; j++) s_init[j] = 1.0f + frand(0.1f);
  for (int j = 0; j < NB; j++) b_init[j] = frand(0.1f);
  rc_params *ps = NULL;
  rc_err e;
  int iw = -1, is = -1, ib = -1;
  CHECK_INT(rc_params_init(&ps, &e), RC_OK);
  CHECK_INT(rc_params_add(ps, &iw, "conv.weight", NW, w_init, RC_PARAM_KEEP_ZEROS, &e), RC_OK);
  CHECK_INT(rc_params_add(ps, &is, "bn.scale", NS, s_init, RC_PARAM_NORM, &e), RC_OK);
  CHECK_INT(rc_params_add(ps, &ib, "conv.bias", NB, b_init, RC_PARAM_NO_DECAY, &e), RC_OK);
  CHECK_EQ(iw, 0);
  CHECK_EQ(is, 1);
  CHECK_EQ(ib, 2);
  CHECK_INT(rc_params_finalize(ps, n_moments, &e), RC_OK);
  return ps;
}

static void fill_grads(rc_params *ps) {
  for (int i = 0; i < rc_params_count(ps); i++) {
    float *g = rc_params_grad(ps, i);
    for (int64_t j = 0; j < rc_params_entry(ps, i)->numel; j++) g[j] = frand(1.0f);
  }
}

static void store_layout(void) {
  rc_params *ps = make_store(2);
  rc_err e;
  CHECK_INT(rc_params_count(ps), 3);
  CHECK_INT(rc_params_find(ps, "bn.scale"), 1);
  CHECK_INT(rc_params_find(ps, "nope"), -1);
  for (int i = 0; i < 3; i++) {
    const rc_param_entry *en = rc_params_entry(ps, i);
    CHECK_INT(en->offset % 16, 0);
    CHECK_INT((uintptr_t)rc_params_value(ps, i) % 64, 0);
    CHECK_EQ(rc_params_grad(ps, i) - rc_params_grad(ps, -1), (ptrdiff_t)en->offset);
    CHECK_NOT_NULL(rc_params_block(ps, RC_BLOCK_MOMENT2, i));
  }
  CHECK_INT(rc_params_total(ps), 48 + 16 + 16);
  CHECK_MEM_EQ(rc_params_value(ps, 0), w_init, sizeof w_init);
  CHECK_MEM_EQ(rc_params_value(ps, 2), b_init, sizeof b_init);
  CHECK_EQ(rc_params_grad(ps, 1)[3], 0.0f);
  CHECK_STR_EQ(rc_params_entry(ps, 0)->name, "conv.weight");
  CHECK_NULL(rc_params_entry(ps, 3));
  /* no more entries after finalize; no second finalize */
  CHECK_INT(rc_params_add(ps, NULL, "late", 3, NULL, 0, &e), RC_ERR_INVALID);
  CHECK_STR_CONTAINS(e.msg, "late");
  CHECK_INT(rc_params_finalize(ps, 2, &e), RC_ERR_INVALID);
  rc_params_free(ps);

  /* refusals before finalize */
  CHECK_INT(rc_params_init(&ps, &e), RC_OK);
  CHECK_INT(rc_params_add(ps, NULL, "empty", 0, NULL, 0, &e), RC_ERR_SHAPE);
  CHECK_INT(rc_params_add(ps, NULL, "huge", INT64_MAX / 2, NULL, 0, &e), RC_ERR_LIMIT);
  CHECK_INT(rc_params_finalize(ps, 3, &e), RC_ERR_INVALID);
  CHECK_INT(rc_params_add(ps, NULL, "zeros", 7, NULL, 0, &e), RC_OK);
  CHECK_INT(rc_params_finalize(ps, 0, &e), RC_OK);
  CHECK_EQ(rc_params_value(ps, 0)[6], 0.0f);
  CHECK_NULL(rc_params_block(ps, RC_BLOCK_MOMENT1, 0));
  rc_params_free(ps);
}

/* Zeros at load stay exactly zero through ten steps of each optimizer with
 * momentum and weight decay, even with non-zero gradients there; moments at
 * those positions are never written. */
static void masks_hold_through_steps(void) {
  rc_optim_config cfg[3];
  rc_optim_defaults(&cfg[0], RC_OPTIM_SGD);
  cfg[0].weight_decay = 0.05f;
  rc_optim_defaults(&cfg[1], RC_OPTIM_SGD);
  cfg[1].nesterov = 0;
  cfg[1].weight_decay = 0.05f;
  rc_optim_defaults(&cfg[2], RC_OPTIM_ADAMW);
  cfg[2].weight_decay = 0.1f;
  for (int o = 0; o < 3; o++) {
    rc_params *ps = make_store(rc_optim_moments(&cfg[o]));
    rc_err e;
    CHECK_INT(rc_params_build_masks(ps, &e), RC_OK);
    const rc_param_entry *w = rc_params_entry(ps, 0);
    CHECK_NOT_NULL(w->mask);
    CHECK_INT(w->n_frozen, (NW + 2) / 3);
    CHECK_NULL(rc_params_entry(ps, 1)->mask); /* not flagged */
    CHECK_INT(rc_params_build_masks(ps, &e), RC_ERR_INVALID);
    for (int s = 0; s < 10; s++) {
      fill_grads(ps);
      CHECK_INT(rc_optim_step(ps, &cfg[o], 0.1f, &e), RC_OK);
    }
    const float *v = rc_params_value(ps, 0);
    const float *m1 = rc_params_block(ps, RC_BLOCK_MOMENT1, 0);
    int moved = 0;
    for (int j = 0; j < NW; j++) {
      if (j % 3 == 0) {
        CHECK(bits_zero(v[j]));
        CHECK(bits_zero(m1[j]));
      } else {
        moved += v[j] != w_init[j];
      }
    }
    CHECK_INT(moved, NW - (NW + 2) / 3);
    int entry = -1;
    int64_t pos = -1;
    CHECK(rc_params_mask_intact(ps, &entry, &pos));
    rc_params_value(ps, 0)[9] = 1e-30f;
    CHECK(!rc_params_mask_intact(ps, &entry, &pos));
    CHECK_INT(entry, 0);
    CHECK_INT(pos, 9);
    rc_params_free(ps);
  }
}

static void finite_guard(void) {
  rc_params *ps = make_store(1);
  int entry = -1;
  int64_t pos = -1;
  fill_grads(ps);
  CHECK(rc_params_all_finite(ps, RC_BLOCK_VALUE, &entry, &pos));
  CHECK(rc_params_all_finite(ps, RC_BLOCK_GRAD, &entry, &pos));
  CHECK(rc_params_all_finite(ps, RC_BLOCK_MOMENT2, &entry, &pos)); /* not allocated */
  rc_params_grad(ps, 2)[4] = NAN;
  CHECK(!rc_params_all_finite(ps, RC_BLOCK_GRAD, &entry, &pos));
  CHECK_INT(entry, 2);
  CHECK_INT(pos, 4);
  rc_params_value(ps, 1)[0] = -INFINITY;
  CHECK(!rc_params_all_finite(ps, RC_BLOCK_VALUE, &entry, &pos));
  CHECK_INT(entry, 1);
  CHECK_INT(pos, 0);
  /* large but finite values are fine */
  rc_params_value(ps, 1)[0] = 3e38f;
  rc_params_value(ps, 1)[1] = 3e38f;
  CHECK(rc_params_all_finite(ps, RC_BLOCK_VALUE, NULL, NULL));
  rc_params_free(ps);
}

/* Roll back after a bad step: values, moments and the step counter come back
 * bit for bit; a values-only slot keeps moments as they are. */
static void snapshots(void) {
  rc_optim_config c;
  rc_optim_defaults(&c, RC_OPTIM_ADAMW);
  rc_params *ps = make_store(2);
  rc_err e;
  int full = -1, best = -1;
  CHECK_INT(rc_params_add_snapshot(ps, &full, 1, &e), RC_OK);
  CHECK_INT(rc_params_add_snapshot(ps, &best, 0, &e), RC_OK);
  CHECK_INT(rc_params_restore(ps, full, &e), RC_ERR_INVALID); /* never saved */
  CHECK_INT(rc_params_save(ps, 7, &e), RC_ERR_INVALID);
  fill_grads(ps);
  CHECK_INT(rc_optim_step(ps, &c, 1e-2f, &e), RC_OK);
  size_t total = rc_params_total(ps);
  float *saved = malloc(3 * total * sizeof(float));
  memcpy(saved, rc_params_value(ps, -1), total * sizeof(float));
  memcpy(saved + total, rc_params_block(ps, RC_BLOCK_MOMENT1, -1), total * sizeof(float));
  memcpy(saved + 2 * total, rc_params_block(ps, RC_BLOCK_MOMENT2, -1), total * sizeof(float));
  CHECK_INT(rc_params_save(ps, full, &e), RC_OK);
  CHECK_INT(rc_params_save(ps, best, &e), RC_OK);
  for (int s = 0; s < 3; s++) {
    fill_grads(ps);
    CHECK_INT(rc_optim_step(ps, &c, 1e-2f, &e), RC_OK);
  }
  CHECK_INT(rc_params_steps(ps), 4);
  fill_grads(ps);
  CHECK_INT(rc_params_restore(ps, full, &e), RC_OK);
  CHECK_INT(rc_params_steps(ps), 1);
  CHECK_MEM_EQ(saved, rc_params_value(ps, -1), total * sizeof(float));
  CHECK_MEM_EQ(saved + total, rc_params_block(ps, RC_BLOCK_MOMENT1, -1), total * sizeof(float));
  CHECK_MEM_EQ(saved + 2 * total, rc_params_block(ps, RC_BLOCK_MOMENT2, -1), total * sizeof(float));
  CHECK_EQ(rc_params_grad(ps, 0)[1], 0.0f); /* gradients cleared */
  fill_grads(ps);
  CHECK_INT(rc_optim_step(ps, &c, 1e-2f, &e), RC_OK);
  float m_after = rc_params_block(ps, RC_BLOCK_MOMENT1, 0)[1];
  CHECK_INT(rc_params_restore(ps, best, &e), RC_OK);
  CHECK_MEM_EQ(saved, rc_params_value(ps, -1), total * sizeof(float));
  CHECK_EQ(rc_params_block(ps, RC_BLOCK_MOMENT1, 0)[1], m_after);
  CHECK_INT(rc_params_steps(ps), 2);
  free(saved);
  rc_params_free(ps);
}

/* torch.optim.SGD's documented update with momentum 0.9, lr 0.1, constant
 * gradient 1, p0 = 1: buf1 = 1, p1 = 0.9; buf2 = 1.9, p2 = 0.71 (worked by
 * hand); with Nesterov p1 = 1 - 0.1 * (1 + 0.9) = 0.81. Weight decay 0.5
 * adds 0.5 p to the gradient: p1 = 1 - 0.1 * 1.5 = 0.85. */
static void sgd_by_hand(void) {
  const float one = 1.0f;
  rc_err e;
  struct {
    int nesterov;
    float wd, p1, p2;
  } cases[] = {{0, 0.0f, 0.9f, 0.71f}, {1, 0.0f, 0.81f, 0.81f - 0.1f * (1.0f + 0.9f * 1.9f)},
               {0, 0.5f, 0.85f, 0.85f - 0.1f * (0.9f * 1.5f + 1.0f + 0.5f * 0.85f)}};
  for (int k = 0; k < 3; k++) {
    rc_optim_config c;
    rc_optim_defaults(&c, RC_OPTIM_SGD);
    c.lr = 0.1f;
    c.momentum = 0.9f;
    c.nesterov = cases[k].nesterov;
    c.weight_decay = cases[k].wd;
    rc_params *ps = NULL;
    CHECK_INT(rc_params_init(&ps, &e), RC_OK);
    CHECK_INT(rc_params_add(ps, NULL, "p", 1, &one, 0, &e), RC_OK);
    CHECK_INT(rc_params_finalize(ps, rc_optim_moments(&c), &e), RC_OK);
    rc_params_grad(ps, 0)[0] = 1.0f;
    CHECK_INT(rc_optim_step(ps, &c, c.lr, &e), RC_OK);
    CHECK_NEAR(rc_params_value(ps, 0)[0], cases[k].p1, 1e-6, 0);
    CHECK_INT(rc_optim_step(ps, &c, c.lr, &e), RC_OK);
    CHECK_NEAR(rc_params_value(ps, 0)[0], cases[k].p2, 1e-6, 0);
    rc_params_free(ps);
  }
}

/* AdamW (Loshchilov and Hutter 2019, decoupled decay; Kingma and Ba 2015,
 * bias correction): after the bias-corrected first step m / sqrt(v) = sign(g),
 * so p1 = p0 (1 - lr wd) - lr g / (|g| + eps) whatever the size of g. Norm and
 * no-decay entries are not decayed: with a zero gradient they do not move. */
static void adamw_first_step(void) {
  rc_optim_config c;
  rc_optim_defaults(&c, RC_OPTIM_ADAMW);
  c.weight_decay = 0.1f;
  rc_params *ps = make_store(2);
  rc_err e;
  float *g = rc_params_grad(ps, 0);
  for (int j = 0; j < NW; j++) g[j] = (j % 2 ? 1e-3f : -50.0f);
  float lr = 1e-2f;
  CHECK_INT(rc_optim_step(ps, &c, lr, &e), RC_OK);
  for (int j = 0; j < NW; j++) {
    double want = w_init[j] * (1.0 - 1e-3) - 1e-2 * g[j] / (fabs(g[j]) + 1e-8);
    CHECK_NEAR(rc_params_value(ps, 0)[j], want, 1e-6, 1e-5);
  }
  CHECK_MEM_EQ(rc_params_value(ps, 1), s_init, sizeof s_init);
  CHECK_MEM_EQ(rc_params_value(ps, 2), b_init, sizeof b_init);
  /* decay_norm: the norm scale shrinks by (1 - lr wd), the bias still not */
  c.decay_norm = 1;
  rc_params_zero_grad(ps);
  CHECK_INT(rc_optim_step(ps, &c, lr, &e), RC_OK);
  CHECK_NEAR(rc_params_value(ps, 1)[2], s_init[2] * (1.0 - 1e-3), 1e-7, 1e-6);
  CHECK_MEM_EQ(rc_params_value(ps, 2), b_init, sizeof b_init);
  rc_params_free(ps);
}

static void optimizer_refusals(void) {
  rc_err e;
  rc_optim_config c;
  rc_optim_defaults(&c, RC_OPTIM_SGD);
  CHECK_INT(rc_optim_check(&c, &e), RC_OK);
  c.momentum = 1.0f;
  CHECK_INT(rc_optim_check(&c, &e), RC_ERR_INVALID);
  CHECK_STR_CONTAINS(e.msg, "momentum");
  c.momentum = 0.0f;
  CHECK_INT(rc_optim_check(&c, &e), RC_ERR_INVALID); /* Nesterov without momentum */
  c.nesterov = 0;
  CHECK_INT(rc_optim_check(&c, &e), RC_OK);
  CHECK_INT(rc_optim_moments(&c), 0);
  c.weight_decay = -1.0f;
  CHECK_INT(rc_optim_check(&c, &e), RC_ERR_INVALID);
  rc_optim_defaults(&c, RC_OPTIM_ADAMW);
  CHECK_INT(rc_optim_check(&c, &e), RC_OK);
  c.eps = 0.0f;
  CHECK_INT(rc_optim_check(&c, &e), RC_ERR_INVALID);
  c.eps = 1e-8f;
  c.beta2 = 1.0f;
  CHECK_INT(rc_optim_check(&c, &e), RC_ERR_INVALID);
  c.beta2 = 0.999f;
  c.lr = NAN;
  CHECK_INT(rc_optim_check(&c, &e), RC_ERR_INVALID);
  /* a store without the moment blocks AdamW needs */
  rc_optim_defaults(&c, RC_OPTIM_ADAMW);
  rc_params *ps = make_store(1);
  CHECK_INT(rc_optim_step(ps, &c, 1e-3f, &e), RC_ERR_INVALID);
  CHECK_INT(rc_optim_step(ps, &c, INFINITY, &e), RC_ERR_INVALID);
  rc_params_free(ps);
}

/* Global L2 norm over all entries, scaled by max_norm / (norm + 1e-6) as
 * torch.nn.utils.clip_grad_norm_ does; masked positions do not count. */
static void clipping(void) {
  rc_params *ps = make_store(0);
  rc_err e;
  CHECK_INT(rc_params_build_masks(ps, &e), RC_OK);
  for (int j = 0; j < NW; j++) rc_params_grad(ps, 0)[j] = (j % 3 == 0) ? 100.0f : 0.0f;
  rc_params_grad(ps, 0)[1] = 3.0f;
  rc_params_grad(ps, 2)[4] = 4.0f;
  CHECK_NEAR(rc_clip_grad_norm(ps, 0.0), 5.0, 1e-12, 0); /* measure only */
  CHECK_EQ(rc_params_grad(ps, 0)[1], 3.0f);
  CHECK_NEAR(rc_clip_grad_norm(ps, 10.0), 5.0, 1e-12, 0); /* below the cap */
  CHECK_EQ(rc_params_grad(ps, 0)[1], 3.0f);
  CHECK_NEAR(rc_clip_grad_norm(ps, 1.0), 5.0, 1e-12, 0);
  CHECK_NEAR(rc_params_grad(ps, 0)[1], 3.0 / (5.0 + 1e-6), 1e-7, 0);
  CHECK_NEAR(rc_params_grad(ps, 2)[4], 4.0 / (5.0 + 1e-6), 1e-7, 0);
  CHECK_NEAR(rc_clip_grad_norm(ps, 0.0), 1.0, 1e-6, 0);
  rc_params_grad(ps, 1)[0] = INFINITY;
  CHECK(isinf(rc_clip_grad_norm(ps, 1.0)));
  CHECK_NEAR(rc_params_grad(ps, 2)[4], 4.0 / (5.0 + 1e-6), 1e-7, 0); /* untouched */
  rc_params_free(ps);
}

/* The formulas of optim.h, evaluated at chosen points. */
static void schedules(void) {
  rc_err e;
  rc_sched s = {RC_SCHED_COSINE, 1.0f, 0.1f, 10, 110, 1, 1.0f};
  CHECK_INT(rc_sched_check(&s, &e), RC_OK);
  CHECK_NEAR(rc_sched_lr(&s, 1), 0.1, 1e-7, 0);   /* 1 * 1/10 */
  CHECK_NEAR(rc_sched_lr(&s, 5), 0.5, 1e-7, 0);
  CHECK_NEAR(rc_sched_lr(&s, 10), 1.0, 1e-7, 0);  /* peak at t = W */
  CHECK_NEAR(rc_sched_lr(&s, 60), 0.55, 1e-6, 0); /* halfway: (lr + lr_min) / 2 */
  CHECK_NEAR(rc_sched_lr(&s, 110), 0.1, 1e-7, 0);
  CHECK_NEAR(rc_sched_lr(&s, 500), 0.1, 1e-7, 0);
  CHECK_NEAR(rc_sched_lr(&s, 35), 0.1 + 0.9 * (1 + cos(3.14159265358979323846 * 25 / 100.0)) / 2, 1e-6, 0);
  s.warmup = 0;
  CHECK_NEAR(rc_sched_lr(&s, 1), 1.0, 1e-7, 0);
  CHECK_NEAR(rc_sched_lr(&s, 110), 0.1, 1e-7, 0);
  rc_sched st = {RC_SCHED_STEP, 0.1f, 0.0f, 0, 0, 30, 0.5f};
  CHECK_INT(rc_sched_check(&st, &e), RC_OK);
  CHECK_NEAR(rc_sched_lr(&st, 1), 0.1, 1e-8, 0);
  CHECK_NEAR(rc_sched_lr(&st, 30), 0.1, 1e-8, 0);
  CHECK_NEAR(rc_sched_lr(&st, 31), 0.05, 1e-8, 0);
  CHECK_NEAR(rc_sched_lr(&st, 61), 0.025, 1e-8, 0);
  rc_sched c = {RC_SCHED_CONSTANT, 0.3f, 0.0f, 4, 0, 0, 0.0f};
  CHECK_NEAR(rc_sched_lr(&c, 2), 0.15, 1e-7, 0);
  CHECK_NEAR(rc_sched_lr(&c, 1000), 0.3, 1e-7, 0);
  st.step_size = 0;
  CHECK_INT(rc_sched_check(&st, &e), RC_ERR_INVALID);
  s.lr_min = 2.0f;
  CHECK_INT(rc_sched_check(&s, &e), RC_ERR_INVALID);
  s.lr_min = 0.0f;
  s.total = 0;
  CHECK_INT(rc_sched_check(&s, &e), RC_ERR_INVALID);
  rc_sched d;
  rc_sched_defaults(&d, 5e-4f, 1000);
  CHECK_INT(rc_sched_check(&d, &e), RC_OK);
  CHECK_INT(d.warmup, 30);
  CHECK_NEAR(rc_sched_lr(&d, 1000), 5e-6, 1e-10, 1e-5);
}

/* Every allocation failure in setup is reported and leaves nothing behind
 * (ASan builds catch leaks). */
static void out_of_memory(void) {
  int failures = 0;
  for (long k = 1; k < 40; k++) {
    rc_err e;
    rc_params *ps = NULL;
    rc_alloc_set_fail_after(k);
    rc_status st = rc_params_init(&ps, &e);
    for (int i = 0; st == RC_OK && i < 40; i++) {
      char name[16];
      snprintf(name, sizeof name, "t%d", i);
      st = rc_params_add(ps, NULL, name, 3 + i, NULL, RC_PARAM_KEEP_ZEROS, &e);
    }
    if (st == RC_OK) st = rc_params_finalize(ps, 2, &e);
    if (st == RC_OK) st = rc_params_build_masks(ps, &e);
    if (st == RC_OK) st = rc_params_add_snapshot(ps, NULL, 1, &e);
    rc_alloc_set_fail_after(0);
    if (st != RC_OK) {
      CHECK_INT(st, RC_ERR_NOMEM);
      failures++;
    }
    rc_params_free(ps);
  }
  CHECK_GT(failures, 5);
}

int main(void) {
  RUN(store_layout);
  RUN(masks_hold_through_steps);
  RUN(finite_guard);
  RUN(snapshots);
  RUN(sgd_by_hand);
  RUN(adamw_first_step);
  RUN(optimizer_refusals);
  RUN(clipping);
  RUN(schedules);
  RUN(out_of_memory);
  return TEST_REPORT();
}
