/* Whole-model gradients against PyTorch autograd (Debian python3-torch).
 *
 * scripts/export_reference_models.py exports each reference model with
 * BatchNormalization kept as a node and writes, for L = sum(output * R),
 * d(L)/d(parameter) for every parameter (keyed by ONNX initializer name) and
 * d(L)/d(input) as "__input__". Here recoup plans the same file for training
 * with every one of those parameters trainable, seeds d(L)/d(output) = R,
 * runs the reverse pass and compares each gradient tensor:
 * ||ours - torch|| <= 1e-3 * ||torch|| + 1e-6 * sqrt(numel). */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core/alloc.h"
#include "onnx/model.h"
#include "plan/load.h"
#include "plan/plan.h"
#include "recoup/data.h"
#include "reference_cases.h"
#include "test.h"

static double rel_error(const float *a, const float *b, int64_t n, double *norm_b) {
  double d = 0, nb = 0;
  for (int64_t i = 0; i < n; i++) {
    double x = (double)a[i] - b[i];
    d += x * x;
    nb += (double)b[i] * b[i];
  }
  *norm_b = sqrt(nb);
  return sqrt(d);
}

/* Returns 1 when the case passes; prints the worst tensor either way. */
static int check_case(const char *dir) {
  char path[1024];
  rc_err e = {0};
  rc_model *m = NULL;
  rc_array x = {0}, r = {0};
  rc_plan *p = NULL;
  char **names = NULL;
  int n_names = 0, ok = 0;
  unsigned char *trainable = NULL;
  snprintf(path, sizeof path, "%s/model.onnx", dir);
  if (rc_model_load(&m, path, NULL, &e) != RC_OK) {
    fprintf(stderr, "%s: load failed: %s\n", dir, e.msg);
    goto out;
  }
  snprintf(path, sizeof path, "%s/input_0.npy", dir);
  if (rc_array_read(&x, path, NULL, 0, &e) != RC_OK) goto fail;
  snprintf(path, sizeof path, "%s/loss_weights.npy", dir);
  if (rc_array_read(&r, path, NULL, 0, &e) != RC_OK) goto fail;
  snprintf(path, sizeof path, "%s/grads.npz", dir);
  if (rc_npz_list(&names, &n_names, path, &e) != RC_OK) goto fail;
  const rc_graph *g = &m->graph;
  trainable = rc__calloc((size_t)g->n_values, 1);
  int input = g->inputs[0];
  trainable[input] = 1;
  for (int i = 0; i < n_names; i++) {
    char name[512];
    snprintf(name, sizeof name, "%s", names[i]);
    char *dot = strstr(name, ".npy");
    if (dot && dot[4] == 0) *dot = 0;
    if (!strcmp(name, "__input__")) continue;
    int v = rc__graph_find_value(g, name);
    if (v < 0 || g->values[v].kind != RC_VALUE_INITIALIZER) {
      fprintf(stderr, "%s: PyTorch parameter '%s' is not an initializer of the export\n", dir, name);
      goto out;
    }
    trainable[v] = 1;
  }
  rc_tensor shape = x.t;
  shape.data = NULL;
  rc_plan_opts o = {.training = 1, .trainable = trainable, .keep = NULL, .bn_batch_stats = 0};
  if (rc_plan_init(&p, g, &shape, &o, &e) != RC_OK) goto fail;
  memcpy(rc_plan_tensor(p, input)->data, x.t.data, rc_tensor_nbytes(&x.t));
  if (rc_plan_forward(p, &e) != RC_OK) goto fail;
  rc_plan_zero_grad(p);
  rc_tensor *gy = rc_plan_grad(p, g->outputs[0]);
  if (!gy || rc_tensor_numel(gy) != rc_tensor_numel(&r.t)) {
    fprintf(stderr, "%s: output gradient missing or of the wrong size\n", dir);
    goto out;
  }
  memcpy(gy->data, r.t.data, rc_tensor_nbytes(&r.t));
  if (rc_plan_backward(p, &e) != RC_OK) goto fail;
  double worst = 0;
  const char *worst_name = "";
  ok = 1;
  for (int i = 0; i < n_names; i++) {
    char name[512];
    snprintf(name, sizeof name, "%s", names[i]);
    char *dot = strstr(name, ".npy");
    if (dot && dot[4] == 0) *dot = 0;
    rc_array ref = {0};
    if (rc_array_read(&ref, path, names[i], 0, &e) != RC_OK) goto fail;
    int v = !strcmp(name, "__input__") ? input : rc__graph_find_value(g, name);
    rc_tensor *gv = rc_plan_grad(p, v);
    double nb, err;
    if (!gv) {
      /* A parameter that does not reach the output has zero gradient. */
      double s = 0;
      for (int64_t k = 0; k < rc_tensor_numel(&ref.t); k++) s += fabs(((float *)ref.t.data)[k]);
      err = s;
      nb = 0;
    } else if (rc_tensor_numel(gv) != rc_tensor_numel(&ref.t)) {
      fprintf(stderr, "%s: gradient of '%s' has %lld elements, PyTorch's %lld\n", dir, name,
              (long long)rc_tensor_numel(gv), (long long)rc_tensor_numel(&ref.t));
      ok = 0;
      rc_array_free(&ref);
      continue;
    } else {
      err = rel_error(gv->data, ref.t.data, rc_tensor_numel(&ref.t), &nb);
    }
    double bound = 1e-3 * nb + 1e-6 * sqrt((double)rc_tensor_numel(&ref.t));
    double rel = err / (nb > 0 ? nb : 1);
    if (rel > worst) {
      worst = rel;
      worst_name = names[i];
    }
    if (!(err <= bound)) {
      fprintf(stderr, "%s: gradient of '%s' differs from PyTorch's: |diff| %.3g, |torch| %.3g\n", dir, name, err, nb);
      ok = 0;
    }
    rc_array_free(&ref);
  }
  printf("%-44s %s  worst relative gradient error %.2e (%s) vs PyTorch (Debian python3-torch)\n", dir,
         ok ? "ok  " : "FAIL", worst, worst_name);
  goto out;
fail:
  fprintf(stderr, "%s: %s\n", dir, e.msg);
  ok = 0;
out:
  rc_data_names_free(names);
  rc__free(trainable);
  rc_plan_free(p);
  rc_array_free(&x);
  rc_array_free(&r);
  rc_model_free(m);
  return ok;
}

static int run_case(const char *dir, const char *model, int opset, const char *variant) {
  (void)model, (void)opset, (void)variant;
  int ok = check_case(dir);
  CHECK(ok);
  return ok;
}

static void every_bn_case_matches_pytorch(void) {
  int passed;
  int ran = ref_each_case("bn", run_case, &passed);
  CHECK_GE(ran, 0);
  printf("gradient cases: %d ran, %d matched PyTorch\n", ran, passed);
  CHECK_GE(ran, 10);
}

int main(void) {
  RUN(every_bn_case_matches_pytorch);
  return TEST_REPORT();
}
