/* Conv -> BatchNormalization (running statistics) -> Relu/Clip chains run as
 * one step (plan/fuse.h) against the same steps run one by one and against
 * PyTorch (Debian python3-torch).
 *
 * scripts/ref_ops_fuse.py writes each chain as an ONNX model with its input,
 * upstream gradients, PyTorch's outputs and PyTorch's gradients of
 * L = sum(out * dz) (a ctest fixture). Here recoup plans each model for
 * training with the input and every parameter trainable (and once for
 * inference, whose buffers share memory), and runs it three ways: fused
 * (the default), RECOUP_CONV_PATH=unfused (fast Conv paths, separate steps)
 * and RECOUP_CONV_PATH=reference (the plain Conv path).
 * - fused and unfused give the same bits, outputs and every gradient
 *   (the epilogue repeats the separate ops' float expressions; the running
 *   mean and variance are trainable here so that their gradients count too);
 * - every path against PyTorch: outputs |ours - torch| <= 1e-4 * (1 + |torch|),
 *   gradients <= 1e-3 * (1 + |torch|), the tolerances of test_ops_conv_ref;
 * - the plan absorbs the steps it should and no more: a BatchNormalization
 *   output that is a graph output, or kept for a loss, stays a step of its own
 *   and its value is the one the separate op computes.
 * The bntrain_ cases run BatchNormalization with batch statistics
 * (training_mode=1), which fuses with the activation after it instead: the
 * same checks, plus the running mean and variance where the model outputs
 * them, batch 1, and activations with a mean of 1e4 (variance accuracy). */
#define _POSIX_C_SOURCE 200112L /* setenv, unsetenv */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core/alloc.h"
#include "onnx/model.h"
#include "plan/load.h"
#include "plan/plan.h"
#include "recoup/data.h"
#include "test.h"

#define MAX_VALUES 32

static char ref_root[1024];

/* What one run gives: each graph output and each trainable value's gradient. */
typedef struct run_out {
  int n;
  int value[MAX_VALUES];
  float *data[MAX_VALUES];
  int64_t numel[MAX_VALUES];
  int absorbed;
} run_out;

static void run_out_free(run_out *r) {
  for (int i = 0; i < r->n; i++) free(r->data[i]);
  memset(r, 0, sizeof *r);
}

static void keep_copy(run_out *r, int value, const rc_tensor *t) {
  if (r->n >= MAX_VALUES || !t) return;
  r->value[r->n] = value;
  r->numel[r->n] = rc_tensor_numel(t);
  r->data[r->n] = malloc(rc_tensor_nbytes(t) + 1);
  memcpy(r->data[r->n], t->data, rc_tensor_nbytes(t));
  r->n++;
}

static int read_npy(const char *dir, const char *file, rc_array *a) {
  char path[1400];
  snprintf(path, sizeof path, "%s/%s", dir, file);
  rc_err e = {0};
  if (rc_array_read(a, path, NULL, 0, &e) != RC_OK) {
    fprintf(stderr, "cannot read %s: %s\n", path, e.msg);
    return 0;
  }
  return 1;
}

/* Plans the model for training with `trainable` (and `keep`, or NULL), runs
 * forward, seeds each output's gradient with dz_<output>.npy, runs backward;
 * the outputs go into r first (graph output order), then the kept values,
 * then the gradients of the trainable values (value order). */
static int run_chain(const char *dir, const rc_graph *g, const rc_array *x, const unsigned char *trainable,
                     const unsigned char *keep, run_out *r) {
  rc_err e = {0};
  rc_plan *p = NULL;
  rc_tensor shape = x->t;
  shape.data = NULL;
  rc_plan_opts o = {.training = trainable != NULL, .trainable = trainable, .keep = keep, .bn_batch_stats = 0};
  int ok = 0;
  memset(r, 0, sizeof *r);
  if (rc_plan_init(&p, g, &shape, &o, &e) != RC_OK) goto fail;
  memcpy(rc_plan_tensor(p, g->inputs[0])->data, x->t.data, rc_tensor_nbytes(&x->t));
  if (rc_plan_forward(p, &e) != RC_OK) goto fail;
  if (!trainable) { /* an inference plan: outputs only (its buffers share memory) */
    for (int i = 0; i < g->n_outputs; i++) keep_copy(r, g->outputs[i], rc_plan_tensor(p, g->outputs[i]));
    r->absorbed = rc__plan_absorbed_steps(p);
    ok = 1;
    goto out;
  }
  rc_plan_zero_grad(p);
  for (int i = 0; i < g->n_outputs; i++) {
    char file[300];
    snprintf(file, sizeof file, "dz_%s.npy", g->values[g->outputs[i]].name);
    rc_array dz = {0};
    if (!read_npy(dir, file, &dz)) goto out;
    rc_tensor *gy = rc_plan_grad(p, g->outputs[i]);
    CHECK(gy != NULL);
    if (gy && rc_tensor_numel(gy) == rc_tensor_numel(&dz.t)) memcpy(gy->data, dz.t.data, rc_tensor_nbytes(&dz.t));
    rc_array_free(&dz);
  }
  if (rc_plan_backward(p, &e) != RC_OK) goto fail;
  for (int i = 0; i < g->n_outputs; i++) keep_copy(r, g->outputs[i], rc_plan_tensor(p, g->outputs[i]));
  for (int v = 0; keep && v < g->n_values; v++)
    if (keep[v]) keep_copy(r, v, rc_plan_tensor(p, v));
  for (int v = 0; v < g->n_values; v++)
    if (trainable[v]) keep_copy(r, v, rc_plan_grad(p, v));
  r->absorbed = rc__plan_absorbed_steps(p);
  ok = 1;
  goto out;
fail:
  fprintf(stderr, "%s: %s\n", dir, e.msg);
out:
  rc_plan_free(p);
  return ok;
}

/* Worst |ours - torch| / (1 + |torch|) over n values. */
static double worst_error(const float *ours, const float *torch, int64_t n, int64_t *at) {
  double worst = 0;
  *at = 0;
  for (int64_t i = 0; i < n; i++) {
    double err = fabs((double)ours[i] - torch[i]) / (1.0 + fabs(torch[i]));
    if (!(err <= worst)) {
      worst = err;
      *at = i;
    }
  }
  return worst;
}

/* The tolerance for values computed from activations near 1e4
 * (bntrain_large_mean): float32's spacing there is 2^-10 (IEEE 754), so the
 * Conv's output, its float batch mean and everything normalised from them
 * carry up to ~5e-4 of rounding that PyTorch's float64 does not; four
 * spacings. The running statistics keep the tight tolerance: they show that
 * the variance (about 1.5, beside a mean of 3e3 to 1e4) is not lost to
 * cancellation. */
#define LARGE_MEAN_TOL 4e-3

/* Each output against want_<name>.npy and each gradient with a
 * grad_<name>.npy against it. */
static void check_torch(const char *dir, const char *path, const rc_graph *g, const run_out *r) {
  const int large_mean = strstr(dir, "large_mean") != NULL;
  for (int i = 0; i < r->n; i++) {
    const char *name = g->values[r->value[i]].name;
    const int is_out = i < g->n_outputs;
    char file[300];
    snprintf(file, sizeof file, "%s_%s.npy", is_out ? "want" : "grad", name);
    char full[1400];
    snprintf(full, sizeof full, "%s/%s", dir, file);
    FILE *f = fopen(full, "rb");
    if (!f) continue; /* no PyTorch gradient for it (running statistics, bounds) */
    fclose(f);
    rc_array want = {0};
    if (!read_npy(dir, file, &want)) {
      CHECK(0);
      continue;
    }
    CHECK_EQ(r->numel[i], rc_tensor_numel(&want.t));
    if (r->numel[i] == rc_tensor_numel(&want.t)) {
      int64_t at;
      const float *t = want.t.data;
      double err = worst_error(r->data[i], t, r->numel[i], &at), tol = is_out ? 1e-4 : 1e-3;
      if (large_mean && strncmp(name, "running_", 8)) tol = LARGE_MEAN_TOL;
      printf("  %-10s %-8s %-6s worst %.2e at %lld: recoup %.7g, PyTorch %.7g\n", path,
             is_out ? "output" : "gradient", name, err, (long long)at, r->data[i][at], t[at]);
      CHECK_LE(err, tol);
    }
    rc_array_free(&want);
  }
}

static void check_same_bits(const rc_graph *g, const run_out *fused, const run_out *plain) {
  CHECK_EQ(fused->n, plain->n);
  int64_t total = 0, differ = 0;
  for (int i = 0; i < fused->n && i < plain->n; i++) {
    CHECK_EQ(fused->value[i], plain->value[i]);
    CHECK_EQ(fused->numel[i], plain->numel[i]);
    if (fused->numel[i] != plain->numel[i]) continue;
    int64_t diff = 0;
    for (int64_t j = 0; j < fused->numel[i]; j++)
      diff += memcmp(&fused->data[i][j], &plain->data[i][j], sizeof(float)) != 0;
    if (diff)
      printf("  fused vs unfused: %s differs in %lld of %lld values\n", g->values[fused->value[i]].name,
             (long long)diff, (long long)fused->numel[i]);
    CHECK_EQ(diff, 0);
    total += fused->numel[i];
    differ += diff;
  }
  printf("  fused vs unfused: %lld of %lld output and gradient values differ in any bit\n", (long long)differ,
         (long long)total);
}

/* The same plan run fused (the default) and with RECOUP_CONV_PATH=unfused. */
static void run_both(const char *dir, const rc_graph *g, const rc_array *x, const unsigned char *trainable,
                     const unsigned char *keep, run_out *fused, run_out *plain) {
  unsetenv("RECOUP_CONV_PATH");
  CHECK(run_chain(dir, g, x, trainable, keep, fused));
  setenv("RECOUP_CONV_PATH", "unfused", 1);
  CHECK(run_chain(dir, g, x, trainable, keep, plain));
  unsetenv("RECOUP_CONV_PATH");
}

/* Steps the fused plan should absorb into its Conv: the BatchNormalization
 * and the activation, unless a value between them is read elsewhere. With
 * batch statistics (bntrain_) the normalisation heads the chain and absorbs
 * the activation, unless its output is read elsewhere. */
static int expected_absorbed(const char *name) {
  if (!strcmp(name, "bntrain_output_is_graph_output")) return 0;
  if (!strncmp(name, "bntrain_", 8)) return 1;
  if (!strcmp(name, "bias_relu") || !strcmp(name, "bn_only_then_add") ||
      !strcmp(name, "bn_output_is_graph_output"))
    return 1;
  return 2;
}

static void one_case(const char *name) {
  char dir[1400];
  snprintf(dir, sizeof dir, "%s/%s", ref_root, name);
  char path[1500];
  snprintf(path, sizeof path, "%s/model.onnx", dir);
  rc_err e = {0};
  rc_model *m = NULL;
  rc_array x = {0};
  unsigned char trainable[256] = {0};
  if (rc_model_load(&m, path, NULL, &e) != RC_OK) {
    fprintf(stderr, "%s: %s\n", path, e.msg);
    CHECK(0);
    return;
  }
  const rc_graph *g = &m->graph;
  CHECK_LT(g->n_values, 256);
  if (!read_npy(dir, "x.npy", &x) || g->n_values >= 256) {
    CHECK(0);
    rc_model_free(m);
    return;
  }
  printf("%s\n", name);
  trainable[g->inputs[0]] = 1;
  for (int v = 0; v < g->n_values; v++)
    if (g->values[v].kind == RC_VALUE_INITIALIZER && strcmp(g->values[v].name, "lo") &&
        strcmp(g->values[v].name, "hi"))
      trainable[v] = 1;
  run_out fused, plain, ref;
  run_both(dir, g, &x, trainable, NULL, &fused, &plain);
  setenv("RECOUP_CONV_PATH", "reference", 1);
  CHECK(run_chain(dir, g, &x, trainable, NULL, &ref));
  unsetenv("RECOUP_CONV_PATH");
  printf("  steps absorbed into the Conv: %d (expected %d)\n", fused.absorbed, expected_absorbed(name));
  CHECK_EQ(fused.absorbed, expected_absorbed(name));
  check_same_bits(g, &fused, &plain);
  check_torch(dir, "fused", g, &fused);
  check_torch(dir, "unfused", g, &plain);
  check_torch(dir, "reference", g, &ref);
  run_out_free(&fused);
  run_out_free(&plain);
  run_out_free(&ref);

  /* An inference plan (teacher, evaluation), whose buffers share memory. */
  run_both(dir, g, &x, NULL, NULL, &fused, &plain);
  printf("  inference plan: steps absorbed %d (expected %d)\n", fused.absorbed, expected_absorbed(name));
  CHECK_EQ(fused.absorbed, expected_absorbed(name));
  check_same_bits(g, &fused, &plain);
  check_torch(dir, "inference", g, &fused);
  run_out_free(&fused);
  run_out_free(&plain);

  /* A feature-loss tap on the BatchNormalization output: the chain must end
   * there and the tap hold what the separate op computes. */
  const int bn_out = rc__graph_find_value(g, "bn_out");
  const int chain = expected_absorbed(name) == 2 || (!strncmp(name, "bntrain_", 8) && expected_absorbed(name));
  if (bn_out >= 0 && chain) {
    unsigned char keep[256] = {0};
    keep[bn_out] = 1;
    run_both(dir, g, &x, trainable, keep, &fused, &plain);
    const int want = expected_absorbed(name) - 1;
    printf("  with bn_out kept: steps absorbed %d (expected %d)\n", fused.absorbed, want);
    CHECK_EQ(fused.absorbed, want);
    check_same_bits(g, &fused, &plain);
    run_out_free(&fused);
    run_out_free(&plain);
  }
  rc_array_free(&x);
  rc_model_free(m);
}

static void chains_agree(void) {
  FILE *f = test_ref_open(ref_root, sizeof ref_root, "ref_ops_fuse", "cases.txt", "scripts/ref_ops_fuse.py",
                          "ops_fuse_ref_data");
  if (!f) {
    CHECK(0);
    return;
  }
  char line[256];
  int n = 0;
  while (fgets(line, sizeof line, f)) {
    line[strcspn(line, "\r\n")] = 0;
    if (!*line) continue;
    const int before = test_failed_checks_;
    one_case(line);
    if (test_failed_checks_ != before) fprintf(stderr, "FAIL case %s\n", line);
    n++;
  }
  fclose(f);
  printf("%d chains\n", n);
  CHECK_GE(n, 10);
}

int main(void) {
  unsetenv("RECOUP_KERNEL_ISA");
  RUN(chains_agree);
  return TEST_REPORT();
}
