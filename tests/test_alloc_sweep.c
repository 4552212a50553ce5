/* Out-of-memory sweep: load a reference model (exported by PyTorch through
 * scripts/export_reference_models.py, the reference_models fixture), build
 * an inference plan and a training plan for it, and make the N-th heap
 * allocation fail for every N from 1 up to the number a successful run
 * makes (rc_alloc_set_fail_after counts them). Each run must end in
 * RC_ERR_NOMEM with a message, leave no model or plan behind and leak
 * nothing (the sanitizer build's LeakSanitizer checks that at exit).
 *
 * RECOUP_SWEEP_STRIDE=k (set for the sanitizer build, where each load is
 * several times slower) tries every k-th N of the large models, plus every
 * N of the first and last 256; the small models are always swept whole. */
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core/alloc.h"
#include "onnx/model.h"
#include "plan/load.h"
#include "plan/plan.h"
#include "recoup/alloc.h"
#include "test.h"

static uint8_t *read_file(const char *path, size_t *n) {
  FILE *f = fopen(path, "rb");
  if (!f) return NULL;
  uint8_t *buf = NULL;
  long len = -1;
  if (fseek(f, 0, SEEK_END) == 0) len = ftell(f);
  if (len >= 0 && fseek(f, 0, SEEK_SET) == 0) buf = malloc((size_t)len + 1);
  if (buf && fread(buf, 1, (size_t)len, f) != (size_t)len) {
    free(buf);
    buf = NULL;
  }
  fclose(f);
  *n = buf ? (size_t)len : 0;
  return buf;
}

/* Load from memory, then plan for inference and for training (every float
 * initializer of rank 2 or more trainable) at the declared shapes, symbolic
 * dims taken as 2. */
static rc_status load_and_plan(const uint8_t *bytes, size_t n, const char *name, rc_err *e) {
  rc_model *m = NULL;
  rc_plan *p = NULL, *tp = NULL;
  unsigned char *trainable = NULL;
  rc_tensor ins[8];
  rc_status st = rc_model_load_mem(&m, bytes, n, name, NULL, e);
  if (st != RC_OK) return st;
  const rc_graph *g = &m->graph;
  if (g->n_inputs > 8) {
    rc_model_free(m);
    return rc__fail(e, RC_ERR_INVALID, "%s: more inputs than the test handles", name);
  }
  for (int i = 0; i < g->n_inputs; i++) {
    ins[i] = g->values[g->inputs[i]].decl;
    for (int d = 0; d < ins[i].rank; d++)
      if (ins[i].dims[d] < 0) ins[i].dims[d] = 2;
  }
  st = rc_plan_init(&p, g, ins, NULL, e);
  if (st == RC_OK) {
    trainable = rc__calloc((size_t)g->n_values, 1);
    if (!trainable) st = rc__fail(e, RC_ERR_NOMEM, "%s: out of memory", name);
  }
  if (st == RC_OK) {
    for (int v = 0; v < g->n_values; v++)
      trainable[v] = g->values[v].kind == RC_VALUE_INITIALIZER && g->values[v].decl.dtype == RC_DTYPE_FLOAT &&
                     g->values[v].decl.rank >= 2;
    rc_plan_opts o = {0};
    o.training = 1;
    o.trainable = trainable;
    st = rc_plan_init(&tp, g, ins, &o, e);
  }
  rc_plan_free(tp);
  rc_plan_free(p);
  rc__free(trainable);
  rc_model_free(m);
  return st;
}

static long sweep_stride(void) {
  const char *s = getenv("RECOUP_SWEEP_STRIDE");
  long k = s ? strtol(s, NULL, 10) : 1;
  return k > 1 ? k : 1;
}

/* Returns the number of failure points tried, 0 if the model is missing. */
static long sweep_model(const char *case_name, int large) {
  const char *bin = getenv("RECOUP_BINARY_DIR");
  char path[4096];
  snprintf(path, sizeof path, "%s/reference/%s/model.onnx", bin ? bin : ".", case_name);
  size_t n;
  uint8_t *bytes = read_file(path, &n);
  if (!bytes) {
    fprintf(stderr, "missing %s: the reference_models fixture (scripts/export_reference_models.py) did not run\n",
            path);
    CHECK_NOT_NULL(bytes);
    return 0;
  }
  rc_err e;
  rc_alloc_set_fail_after(0);
  rc_status st = load_and_plan(bytes, n, path, &e);
  long total = rc_alloc_set_fail_after(0);
  if (st != RC_OK) fprintf(stderr, "%s: %s\n", path, e.msg);
  CHECK_INT(st, RC_OK);
  CHECK_GT(total, 10);
  long stride = large ? sweep_stride() : 1, tried = 0, wrong = 0;
  for (long k = 1; k <= total; k++) {
    if (stride > 1 && k > 256 && k <= total - 256 && k % stride) continue;
    memset(&e, 0, sizeof e);
    rc_alloc_set_fail_after(k);
    st = load_and_plan(bytes, n, path, &e);
    rc_alloc_set_fail_after(0);
    tried++;
    if (st != RC_ERR_NOMEM || !e.msg[0]) {
      if (wrong++ < 5)
        fprintf(stderr, "%s: allocation %ld of %ld failing gave status %d (%s): %s\n", case_name, k, total, st,
                rc_strerror(st), e.msg);
    }
  }
  CHECK_INT(wrong, 0);
  printf("%s: %ld allocations, %ld failure points tried\n", case_name, total, tried);
  free(bytes);
  return tried;
}

/* The file path too: its first allocations (the file buffer, names). */
static void path_load_fails_cleanly(void) {
  const char *bin = getenv("RECOUP_BINARY_DIR");
  char path[4096];
  snprintf(path, sizeof path, "%s/reference/resnet8_op13_bn/model.onnx", bin ? bin : ".");
  for (long k = 1; k <= 8; k++) {
    rc_err e;
    rc_model *m = NULL;
    rc_alloc_set_fail_after(k);
    rc_status st = rc_model_load(&m, path, NULL, &e);
    rc_alloc_set_fail_after(0);
    CHECK_INT(st, RC_ERR_NOMEM);
    CHECK_NULL(m);
    rc_model_free(m);
  }
}

static void resnet8_every_allocation(void) {
  CHECK_GT(sweep_model("resnet8_op13_bn", 0), 0);
  CHECK_GT(sweep_model("resnet8_op17_fused", 0), 0);
}

static void mobilenet_v2_every_allocation(void) {
  CHECK_GT(sweep_model("mobilenet_v2_op17_bn", 1), 0);
}

int main(void) {
  RUN(path_load_fails_cleanly);
  RUN(resnet8_every_allocation);
  RUN(mobilenet_v2_every_allocation);
  return TEST_REPORT();
}
