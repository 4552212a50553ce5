/* Whole-model forward passes against PyTorch (Debian python3-torch).
 *
 * scripts/export_reference_models.py (the reference_models fixture) exports
 * random-initialised models at opsets 13 and 17, with BatchNormalization
 * folded into Conv by torch's default export and kept as nodes, and stores
 * PyTorch's output for a fixed input. For every case in its manifest recoup
 * loads model.onnx, plans it at the input's shape, runs forward and checks
 * each output element: |ours - torch| <= 1e-4 * (1 + |torch|). */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "onnx/model.h"
#include "plan/load.h"
#include "plan/plan.h"
#include "recoup/data.h"
#include "reference_cases.h"
#include "test.h"

#define TOL 1e-4

/* Compares one output; prints the worst element. Returns 1 when it passes. */
static int compare_output(const char *cas, const rc_tensor *ours, const rc_tensor *ref) {
  char a[128], b[128];
  if (ours->dtype != RC_DTYPE_FLOAT || !rc_shape_equal(ours, ref)) {
    fprintf(stderr, "%s: output is %s %s, PyTorch's is %s %s\n", cas, rc_dtype_name(ours->dtype),
            rc_shape_str(ours, a, sizeof a), rc_dtype_name(ref->dtype), rc_shape_str(ref, b, sizeof b));
    return 0;
  }
  if (!ours->data) {
    fprintf(stderr, "%s: the plan keeps no data for the graph output\n", cas);
    return 0;
  }
  const float *o = ours->data, *t = ref->data;
  int64_t n = rc_tensor_numel(ref), worst = 0, bad = 0;
  double worst_ratio = -1;
  for (int64_t i = 0; i < n; i++) {
    /* ratio > 1: beyond tolerance; NaN on either side counts as beyond. */
    double d = fabs((double)o[i] - t[i]), allowed = TOL * (1.0 + fabs((double)t[i]));
    double ratio = isnan(d) ? INFINITY : d / allowed;
    if (ratio > 1) bad++;
    if (ratio > worst_ratio) {
      worst_ratio = ratio;
      worst = i;
    }
  }
  int ok = bad == 0;
  printf("%-34s %s worst element %lld: recoup %.9g, PyTorch (Debian python3-torch) %.9g, |diff| %.3g%s\n",
         cas, ok ? "ok  " : "FAIL", (long long)worst, n ? o[worst] : 0.0, n ? t[worst] : 0.0,
         n ? fabs((double)o[worst] - t[worst]) : 0.0, ok ? "" : " (beyond 1e-4*(1+|torch|))");
  if (!ok) fprintf(stderr, "%s: %lld of %lld output elements differ from PyTorch\n", cas, (long long)bad, (long long)n);
  return ok;
}

/* Returns 1 when the case passes. */
static int check_case(const char *dir, const char *cas) {
  char path[1400];
  rc_err e = {0};
  rc_model *m = NULL;
  rc_array x = {0}, y = {0};
  rc_plan *p = NULL;
  int ok = 0;
  snprintf(path, sizeof path, "%s/model.onnx", dir);
  if (rc_model_load(&m, path, NULL, &e) != RC_OK) goto fail;
  const rc_graph *g = &m->graph;
  if (g->n_inputs != 1 || g->n_outputs != 1) {
    fprintf(stderr, "%s: expected one input and one output, the graph has %d and %d\n", cas, g->n_inputs,
            g->n_outputs);
    goto out;
  }
  snprintf(path, sizeof path, "%s/input_0.npy", dir);
  if (rc_array_read(&x, path, NULL, 0, &e) != RC_OK) goto fail;
  snprintf(path, sizeof path, "%s/output_0.npy", dir);
  if (rc_array_read(&y, path, NULL, 0, &e) != RC_OK) goto fail;
  rc_tensor shape = x.t;
  shape.data = NULL;
  rc_plan_opts opts = {0};
  if (rc_plan_init(&p, g, &shape, &opts, &e) != RC_OK) goto fail;
  rc_tensor *in = rc_plan_tensor(p, g->inputs[0]);
  if (!in || !in->data || rc_tensor_nbytes(in) != rc_tensor_nbytes(&x.t)) {
    fprintf(stderr, "%s: the plan's input buffer does not match input_0.npy\n", cas);
    goto out;
  }
  memcpy(in->data, x.t.data, rc_tensor_nbytes(&x.t));
  if (rc_plan_forward(p, &e) != RC_OK) goto fail;
  ok = compare_output(cas, rc_plan_tensor(p, g->outputs[0]), &y.t);
  goto out;
fail:
  fprintf(stderr, "%s: %s\n", cas, e.msg);
out:
  rc_plan_free(p);
  rc_array_free(&x);
  rc_array_free(&y);
  rc_model_free(m);
  return ok;
}

static int run_case(const char *dir, const char *model, int opset, const char *variant) {
  (void)model, (void)opset, (void)variant;
  int ok = check_case(dir, strrchr(dir, '/') + 1);
  CHECK(ok);
  return ok;
}

static void every_case_matches_pytorch(void) {
  int passed;
  int ran = ref_each_case(NULL, run_case, &passed);
  CHECK_GE(ran, 0);
  printf("%d of %d reference models match PyTorch (Debian python3-torch)\n", passed, ran);
  /* Eleven models x two opsets x two variants. */
  CHECK_GE(ran, 44);
}

int main(void) {
  RUN(every_case_matches_pytorch);
  return TEST_REPORT();
}
