/* The shape, reduce, resize and quant kernels on ONNX's own backend node
 * test data (Debian package libonnx-testdata: data/node/<case>/model.onnx
 * with test_data_set_0/{input,output}_K.pb).
 *
 * Most of these cases feed shapes, axes, pads, scales or sizes as graph
 * inputs, which a plan rightly refuses (it needs them before the first
 * batch), so the whole-model conformance run skips them. Here the single
 * node of each case runs by itself with every input known, as the planner
 * would see it after folding a constant subgraph: infer computes the output
 * shape from the input values, forward the output, and both are compared
 * with the expected output using the tolerance of ONNX's backend runner
 * (|got - want| <= 1e-7 + 1e-3 |want|; integers exactly).
 *
 * Only RC_ERR_UNSUPPORTED at load, parse or infer counts as a skip (cubic
 * resize, float16 casts, ...); any other error or any wrong value fails. */
#define _POSIX_C_SOURCE 200809L
#include <dirent.h>
#include <errno.h>

#include "core/alloc.h"
#include "data/tensorproto.h"
#include "onnx/model.h"
#include "ops/layout.h"
#include "plan/load.h"
#include "ops_expect.h"

#define DATA_DIR "/usr/share/libonnx-testdata/data/node"

/* Case-name prefixes of the ops this test covers. */
static const char *const PREFIXES[] = {
    "test_resize_", "test_upsample_", "test_slice", "test_pad", "test_reflect_pad", "test_edge_pad",
    "test_constant_pad", "test_wrap_pad", "test_reshape_", "test_expand_", "test_tile", "test_split_",
    "test_squeeze", "test_unsqueeze", "test_constantofshape_", "test_reduce_sum_", "test_reduce_mean_",
    "test_reduce_max_", "test_dropout_", "test_gather_", "test_quantizelinear", "test_dequantizelinear",
    "test_cast_", "test_transpose_", "test_concat_", "test_flatten_", "test_shape", "test_size",
    "test_identity"};

static int n_pass, n_skip, n_fail;

static int covered(const char *name) {
  if (strstr(name, "_expanded")) return 0; /* several nodes: the whole-model run covers them */
  if (!strncmp(name, "test_gather_elements", 20)) return 0;
  for (size_t i = 0; i < sizeof PREFIXES / sizeof PREFIXES[0]; i++)
    if (!strncmp(name, PREFIXES[i], strlen(PREFIXES[i]))) return 1;
  return 0;
}

/* got vs want: dtype, shape, values. Returns 1 when they agree. */
static int same_tensor(const char *name, int o, const rc_tensor *got, const rc_tensor *want) {
  char sg[96], sw[96];
  if (got->dtype != want->dtype || !rc_shape_equal(got, want)) {
    fprintf(stderr, "FAIL %s output %d: %s %s, expected %s %s\n", name, o, rc_dtype_name(got->dtype),
            rc_shape_str(got, sg, sizeof sg), rc_dtype_name(want->dtype), rc_shape_str(want, sw, sizeof sw));
    return 0;
  }
  int64_t n = rc_tensor_numel(got);
  for (int64_t i = 0; i < n; i++) {
    if (rc_dtype_is_float(got->dtype)) {
      double a = rc__load_f64(got->data, got->dtype, i), b = rc__load_f64(want->data, want->dtype, i);
      if ((a != a && b != b) || fabs(a - b) <= 1e-7 + 1e-3 * fabs(b)) continue;
      fprintf(stderr, "FAIL %s output %d [%lld]: %.9g, expected %.9g\n", name, o, (long long)i, a, b);
      return 0;
    }
    if (rc__int_at(got, i) != rc__int_at(want, i)) {
      fprintf(stderr, "FAIL %s output %d [%lld]: %lld, expected %lld\n", name, o, (long long)i,
              (long long)rc__int_at(got, i), (long long)rc__int_at(want, i));
      return 0;
    }
  }
  return 1;
}

enum { R_PASS, R_SKIP, R_FAIL };

static int run_case(const char *name) {
  char path[1024];
  rc_err e = {0};
  rc_model *m = NULL;
  snprintf(path, sizeof path, "%s/%s/model.onnx", DATA_DIR, name);
  rc_status s = rc_model_load(&m, path, NULL, &e);
  if (s != RC_OK) {
    if (s == RC_ERR_UNSUPPORTED) return R_SKIP;
    fprintf(stderr, "FAIL %s: load: %s\n", name, e.msg);
    return R_FAIL;
  }
  rc_graph *g = &m->graph;
  int result = R_FAIL;
  void *owned[OH_MAX_IO] = {0}, *want_owned[OH_MAX_IO] = {0};
  rc_tensor vals[OH_MAX_IO], want[OH_MAX_IO], outs[OH_MAX_IO];
  memset(outs, 0, sizeof outs);
  const rc_tensor *in[OH_MAX_IO] = {0};
  rc_tensor *inp[OH_MAX_IO] = {0}, *outp[OH_MAX_IO] = {0};
  void *work = NULL, *saved = NULL;
  if (g->n_nodes != 1 || g->n_inputs > OH_MAX_IO || g->n_outputs > OH_MAX_IO) {
    result = R_SKIP;
    goto done;
  }
  const rc_node *n = &g->nodes[0];
  for (int i = 0; i < g->n_inputs; i++) {
    snprintf(path, sizeof path, "%s/%s/test_data_set_0/input_%d.pb", DATA_DIR, name, i);
    if (rc__tensorproto_file_read(path, &vals[i], &owned[i], (size_t)64 << 20, &e) != RC_OK) {
      fprintf(stderr, "FAIL %s: %s\n", name, e.msg);
      goto done;
    }
  }
  for (int k = 0; k < n->n_in && k < OH_MAX_IO; k++) {
    int v = n->in[k];
    in[k] = NULL;
    if (v < 0) continue;
    for (int i = 0; i < g->n_inputs; i++)
      if (g->inputs[i] == v) in[k] = &vals[i];
    if (!in[k]) in[k] = &g->values[v].decl; /* an initializer */
    inp[k] = (rc_tensor *)in[k];
  }
  s = n->def->infer(n, in, outs, &e);
  if (s != RC_OK) {
    if (s == RC_ERR_UNSUPPORTED) {
      result = R_SKIP;
      goto done;
    }
    fprintf(stderr, "FAIL %s: infer: %s\n", name, e.msg);
    goto done;
  }
  for (int o = 0; o < n->n_out; o++) {
    size_t nb = rc_tensor_nbytes(&outs[o]);
    outs[o].data = rc__calloc(1, nb ? nb : 1);
    outp[o] = n->out[o] >= 0 ? &outs[o] : NULL;
  }
  rc_kernel k = {n, n->params, n->n_in, n->n_out, inp, outp, NULL, NULL, NULL, NULL, 0};
  size_t ws = n->def->workspace ? n->def->workspace(&k, 0) : 0;
  size_t sv = n->def->saved ? n->def->saved(&k) : 0;
  k.work = work = rc__calloc(1, ws + 64);
  k.saved = saved = rc__calloc(1, sv + 64);
  s = n->def->forward(&k, &e);
  if (s != RC_OK) {
    fprintf(stderr, "FAIL %s: forward: %s\n", name, e.msg);
    goto done;
  }
  result = R_PASS;
  for (int j = 0; j < g->n_outputs; j++) {
    snprintf(path, sizeof path, "%s/%s/test_data_set_0/output_%d.pb", DATA_DIR, name, j);
    if (rc__tensorproto_file_read(path, &want[j], &want_owned[j], (size_t)64 << 20, &e) != RC_OK) {
      fprintf(stderr, "FAIL %s: %s\n", name, e.msg);
      result = R_FAIL;
      break;
    }
    for (int o = 0; o < n->n_out; o++)
      if (n->out[o] == g->outputs[j] && !same_tensor(name, o, &outs[o], &want[j])) result = R_FAIL;
  }
done:
  for (int i = 0; i < OH_MAX_IO; i++) {
    rc__free(owned[i]);
    rc__free(want_owned[i]);
    rc__free(outs[i].data);
  }
  rc__free(work);
  rc__free(saved);
  rc_model_free(m);
  return result;
}

static int by_name(const void *a, const void *b) { return strcmp(*(char *const *)a, *(char *const *)b); }

static void test_node_cases(void) {
  DIR *d = opendir(DATA_DIR);
  if (!d) SKIP_CASE("%s: %s (Debian package libonnx-testdata)", DATA_DIR, strerror(errno));
  char *names[2048];
  int count = 0;
  struct dirent *ent;
  while ((ent = readdir(d)) && count < 2048)
    if (covered(ent->d_name)) names[count++] = strdup(ent->d_name);
  closedir(d);
  qsort(names, (size_t)count, sizeof names[0], by_name);
  for (int i = 0; i < count; i++) {
    int r = run_case(names[i]);
    n_pass += r == R_PASS;
    n_skip += r == R_SKIP;
    n_fail += r == R_FAIL;
    if (getenv("RECOUP_TEST_VERBOSE")) printf("%s %s\n", r == R_PASS ? "pass" : r == R_SKIP ? "skip" : "FAIL", names[i]);
    free(names[i]);
  }
  printf("ONNX backend node cases (libonnx-testdata): %d passed, %d skipped (unsupported), %d failed\n", n_pass,
         n_skip, n_fail);
  CHECK_INT(n_fail, 0);
  /* the data covers well over a hundred cases of these ops: a collapse in
   * coverage (everything skipped) is a failure too */
  CHECK_GE(n_pass, 120);
}

int main(void) {
  RUN(test_node_cases);
  return TEST_REPORT();
}
