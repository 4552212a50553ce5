/* ONNX conformance: every case of ONNX's own backend test data (Debian
 * package libonnx-testdata: data/{node,pytorch-converted,pytorch-operator,
 * simple}/<case>/model.onnx with test_data_set_N/{input,output}_K.pb) run
 * through the reader, the planner and the kernels, each output compared
 * with the expected one.
 *
 * A case is skipped only when recoup refuses it at load or plan time with
 * RC_ERR_UNSUPPORTED (an op, dtype or attribute value it does not
 * implement); anything else that goes wrong is a failure: a wrong value, a
 * crash, another error code, a forward error. Each case runs in a child
 * process so that a crash or a hang in one kernel is reported against that
 * case and the run goes on.
 *
 * Usage: test_conformance [-v] [substring...]  (-v lists every case; the
 * substrings select cases by name). RECOUP_ONNX_TESTDATA overrides the
 * data folder. */
#define _POSIX_C_SOURCE 200809L
#include <dirent.h>
#include <errno.h>
#include <math.h>
#include <signal.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <sys/wait.h>
#include <unistd.h>

#include "core/alloc.h"
#include "data/tensorproto.h"
#include "onnx/model.h"
#include "plan/inspect.h"
#include "plan/load.h"
#include "plan/plan.h"
#include "test.h"

#define DEFAULT_DATA_DIR "/usr/share/libonnx-testdata/data"

/* Tolerance of ONNX's backend test runner: onnx/backend/test/loader/__init__.py
 * sets rtol = 1e-3, atol = 1e-7 for every case that ships its model.onnx
 * (per-case values come from data.json, which only the downloaded "real"
 * models have), and onnx/backend/test/runner/__init__.py compares with
 * numpy.testing.assert_allclose(actual, desired, rtol, atol), i.e.
 * |actual - desired| <= atol + rtol * |desired|, NaN equal to NaN, after
 * asserting the dtypes are equal. */
static const double RTOL = 1e-3;
static const double ATOL = 1e-7;

/* No case in the package comes near this; a bigger file is refused as
 * broken data rather than skipped. */
static const size_t MAX_PB_BYTES = (size_t)256 << 20;
/* A case that runs longer than this is killed and counted as failed. */
static const unsigned CASE_TIMEOUT_S = 60;

/* OUT_BAD_DATA: the test data contradicts the model's own declared input
 * shapes (checked here, before recoup sees the data); recoup rightly
 * refuses such input, so the case cannot run. */
enum { OUT_PASS = 0, OUT_SKIP = 1, OUT_FAIL = 2, OUT_BAD_DATA = 3 };

typedef struct case_result {
  int outcome;
  int bound;         /* ran with its graph inputs bound as constants (see bind_inputs) */
  int grad_checked;  /* its reverse pass was compared with finite differences */
  char reason[200];  /* skips: the refusal, with file and node names removed */
  char detail[1200]; /* the full message, or the worst element of a mismatch */
} case_result;

/* ---- element access ---------------------------------------------------- */

static double half_to_double(uint16_t h) {
  int s = h >> 15, ex = (h >> 10) & 31, m = h & 1023;
  double v;
  if (ex == 0) v = ldexp(m, -24);
  else if (ex == 31) v = m ? NAN : INFINITY;
  else v = ldexp(m + 1024, ex - 25);
  return s ? -v : v;
}

static double bf16_to_double(uint16_t b) {
  uint32_t u = (uint32_t)b << 16;
  float f;
  memcpy(&f, &u, 4);
  return f;
}

/* Element i as a double; 0 with *ok = 0 for dtypes that hold no numbers. */
static double elem(const rc_tensor *t, int64_t i, int *ok) {
  const void *d = t->data;
  *ok = 1;
  switch (t->dtype) {
    case RC_DTYPE_FLOAT: return ((const float *)d)[i];
    case RC_DTYPE_DOUBLE: return ((const double *)d)[i];
    case RC_DTYPE_FLOAT16: return half_to_double(((const uint16_t *)d)[i]);
    case RC_DTYPE_BFLOAT16: return bf16_to_double(((const uint16_t *)d)[i]);
    case RC_DTYPE_INT8: case RC_DTYPE_INT4: return ((const int8_t *)d)[i];
    case RC_DTYPE_UINT8: case RC_DTYPE_UINT4: case RC_DTYPE_BOOL: return ((const uint8_t *)d)[i];
    case RC_DTYPE_INT16: return ((const int16_t *)d)[i];
    case RC_DTYPE_UINT16: return ((const uint16_t *)d)[i];
    case RC_DTYPE_INT32: return ((const int32_t *)d)[i];
    case RC_DTYPE_UINT32: return ((const uint32_t *)d)[i];
    case RC_DTYPE_INT64: return (double)((const int64_t *)d)[i];
    case RC_DTYPE_UINT64: return (double)((const uint64_t *)d)[i];
    default: *ok = 0; return 0;
  }
}

static void index_str(const rc_tensor *t, int64_t i, char *buf, size_t n) {
  int64_t idx[RC_MAX_RANK];
  for (int d = t->rank - 1; d >= 0; d--) {
    idx[d] = t->dims[d] ? i % t->dims[d] : 0;
    i = t->dims[d] ? i / t->dims[d] : 0;
  }
  size_t used = (size_t)snprintf(buf, n, "[");
  for (int d = 0; d < t->rank && used < n; d++)
    used += (size_t)snprintf(buf + used, n - used, "%s%lld", d ? "," : "", (long long)idx[d]);
  if (used < n) snprintf(buf + used, n - used, "]");
}

/* Compare got with want as numpy.testing.assert_allclose does (see RTOL).
 * Returns 1 when they agree; else writes the worst element into msg. */
static int compare_output(const char *what, const rc_tensor *got, const rc_tensor *want, char *msg,
                          size_t n) {
  char sa[128], sb[128];
  if (got->dtype != want->dtype) {
    snprintf(msg, n, "%s: dtype %s, expected %s", what, rc_dtype_name(got->dtype),
             rc_dtype_name(want->dtype));
    return 0;
  }
  if (!rc_shape_equal(got, want)) {
    snprintf(msg, n, "%s: shape %s, expected %s", what, rc_shape_str(got, sa, sizeof sa),
             rc_shape_str(want, sb, sizeof sb));
    return 0;
  }
  int64_t numel = rc_tensor_numel(want);
  if (numel > 0 && !got->data) {
    snprintf(msg, n, "%s: the plan holds no data for this output", what);
    return 0;
  }
  int64_t bad = 0, worst = -1;
  double worst_ratio = -1;
  for (int64_t i = 0; i < numel; i++) {
    int ok_a, ok_b;
    double a = elem(got, i, &ok_a), b = elem(want, i, &ok_b);
    if (!ok_a || !ok_b) {
      snprintf(msg, n, "%s: cannot compare elements of dtype %s", what, rc_dtype_name(want->dtype));
      return 0;
    }
    double ratio;
    if (isnan(a) || isnan(b)) {
      ratio = isnan(a) && isnan(b) ? 0 : INFINITY;
    } else if (isinf(a) || isinf(b)) {
      ratio = a == b ? 0 : INFINITY;
    } else {
      double diff = fabs(a - b), allowed = ATOL + RTOL * fabs(b);
      ratio = diff <= allowed ? 0 : diff / allowed;
    }
    if (ratio > 0) {
      bad++;
      if (ratio > worst_ratio) {
        worst_ratio = ratio;
        worst = i;
      }
    }
  }
  if (!bad) return 1;
  int ok;
  double a = elem(got, worst, &ok), b = elem(want, worst, &ok);
  char idx[160];
  index_str(want, worst, idx, sizeof idx);
  snprintf(msg, n, "%s %s: %lld of %lld elements off; worst at %s: got %.9g, expected %.9g (|diff| %.3g, allowed %.3g)",
           what, rc_shape_str(want, sa, sizeof sa), (long long)bad, (long long)numel, idx, a, b, fabs(a - b),
           ATOL + RTOL * fabs(b));
  return 0;
}

/* ---- one case, in the child process ------------------------------------ */

static int is_dir(const char *p) {
  struct stat st;
  return stat(p, &st) == 0 && S_ISDIR(st.st_mode);
}

static int is_file(const char *p) {
  struct stat st;
  return stat(p, &st) == 0 && S_ISREG(st.st_mode);
}

/* The refusal without the file path and without quoted node/value names, so
 * that the same reason from different cases counts once. */
static void refusal_reason(const char *msg, const char *model_path, char *out, size_t n) {
  size_t plen = strlen(model_path);
  while (!strncmp(msg, model_path, plen) && !strncmp(msg + plen, ": ", 2)) msg += plen + 2;
  const char *op = strstr(msg, "op '");
  if (op && strstr(op, "is not supported")) {
    /* "node 'x': op 'Foo' (opset 13) is not supported" -> "op Foo" */
    const char *s = op + 4, *q = strchr(s, '\'');
    snprintf(out, n, "op %.*s", q ? (int)(q - s) : 40, s);
    return;
  }
  size_t o = 0;
  int skip_quoted = 0;
  for (const char *c = msg; *c && o + 1 < n; c++) {
    if (*c == '\'') {
      /* Keep quoted text that names an attribute value; drop names of nodes
       * and values, which follow "node ", "input ", "output ", "value ". */
      if (!skip_quoted) {
        int name = 0;
        const char *keys[] = {"node ", "input ", "output ", "value ", "initializer ", "tensor "};
        for (size_t k = 0; k < sizeof keys / sizeof keys[0]; k++) {
          size_t kl = strlen(keys[k]);
          if ((size_t)(c - msg) >= kl && !strncmp(c - kl, keys[k], kl)) name = 1;
        }
        if (name) {
          skip_quoted = 1;
          out[o++] = '*';
          continue;
        }
      } else {
        skip_quoted = 0;
        continue;
      }
    }
    if (!skip_quoted) out[o++] = *c;
  }
  out[o] = '\0';
}

typedef struct data_set {
  int n_in, n_out;
  rc_tensor in[16], out[16];
  void *in_owned[16], *out_owned[16];
} data_set;

static void data_set_free(data_set *s) {
  for (int i = 0; i < s->n_in; i++) rc__free(s->in_owned[i]);
  for (int i = 0; i < s->n_out; i++) rc__free(s->out_owned[i]);
  memset(s, 0, sizeof *s);
}

/* Reads input_K.pb and output_K.pb for K = 0, 1, ... until one is missing. */
static rc_status data_set_read(data_set *s, const char *dir, rc_err *e) {
  memset(s, 0, sizeof *s);
  char p[4300];
  for (int k = 0; k < 16; k++) {
    snprintf(p, sizeof p, "%s/input_%d.pb", dir, k);
    if (!is_file(p)) break;
    RC_TRY(rc__tensorproto_file_read(p, &s->in[k], &s->in_owned[k], MAX_PB_BYTES, e));
    s->n_in++;
  }
  for (int k = 0; k < 16; k++) {
    snprintf(p, sizeof p, "%s/output_%d.pb", dir, k);
    if (!is_file(p)) break;
    RC_TRY(rc__tensorproto_file_read(p, &s->out[k], &s->out_owned[k], MAX_PB_BYTES, e));
    s->n_out++;
  }
  return RC_OK;
}

static int fail(case_result *r, const char *fmt, const char *a, const char *b) {
  r->outcome = OUT_FAIL;
  snprintf(r->detail, sizeof r->detail, fmt, a, b);
  return OUT_FAIL;
}

/* recoup needs shape-like inputs (Reshape's shape, Slice's starts, Resize's
 * sizes, ...) known when planning, and refuses them as graph inputs; ONNX's
 * node tests feed them as graph inputs. To run those kernels anyway, the
 * data set's inputs become initializers of the loaded graph (the kernels
 * then run while the plan folds constants, through the same forward
 * functions). Undone by unbind_inputs. */
typedef struct bound_inputs {
  int n_inputs;
  rc_value saved[16];
} bound_inputs;

static void bind_inputs(rc_graph *g, const data_set *s, bound_inputs *b) {
  b->n_inputs = g->n_inputs;
  for (int i = 0; i < g->n_inputs; i++) {
    rc_value *v = &g->values[g->inputs[i]];
    b->saved[i] = *v;
    v->kind = RC_VALUE_INITIALIZER;
    v->decl = s->in[i];
  }
  g->n_inputs = 0;
}

static void unbind_inputs(rc_graph *g, const bound_inputs *b) {
  g->n_inputs = b->n_inputs;
  for (int i = 0; i < g->n_inputs; i++) g->values[g->inputs[i]] = b->saved[i];
}

static int needs_known_inputs(const char *msg) {
  return strstr(msg, "must be computable before the first batch") != NULL;
}

/* Forward through plan p (inputs already written) and compare every output.
 * `what` names the data set and the kind of plan in messages. */
static int forward_and_compare(rc_plan *p, const rc_graph *g, data_set *s, const char *what, case_result *r) {
  rc_err e = {0};
  char msg[1100], label[400];
  rc_status st = rc_plan_forward(p, &e);
  if (st != RC_OK) {
    snprintf(msg, sizeof msg, "%s (%s)", e.msg, rc_strerror(st));
    return fail(r, "%s: forward: %s", what, msg);
  }
  /* Kernels never write into their inputs: the graph inputs must still
   * hold the data set's values. */
  for (int i = 0; i < g->n_inputs; i++) {
    const rc_tensor *t = rc_plan_tensor(p, g->inputs[i]);
    size_t nb = rc_tensor_nbytes(&s->in[i]);
    if (nb && memcmp(t->data, s->in[i].data, nb))
      return fail(r, "%s: forward changed graph input '%s'", what, g->values[g->inputs[i]].name);
  }
  for (int k = 0; k < g->n_outputs; k++) {
    snprintf(label, sizeof label, "%s output %d '%.200s'", what, k, g->values[g->outputs[k]].name);
    rc_tensor *got = rc_plan_tensor(p, g->outputs[k]);
    if (got->dtype == RC_DTYPE_BFLOAT16 && s->out[k].dtype == RC_DTYPE_UINT16)
      s->out[k].dtype = RC_DTYPE_BFLOAT16; /* the same bit patterns, as for inputs */
    if (!compare_output(label, got, &s->out[k], msg, sizeof msg)) return fail(r, "%s%s", msg, "");
  }
  return OUT_PASS;
}

/* Fixed weights in [-1, 1] for the loss and the perturbation direction. */
static double pattern(int64_t i, int salt) { return (double)((i * 7919 + salt * 104729) % 13 - 6) / 6.0; }

/* L = sum over the float outputs that carry a gradient of pattern . output,
 * accumulated in double. */
static double weighted_loss(rc_plan *p, const rc_graph *g) {
  double l = 0;
  for (int k = 0; k < g->n_outputs; k++) {
    const rc_tensor *t = rc_plan_tensor(p, g->outputs[k]);
    if (t->dtype != RC_DTYPE_FLOAT || !rc_plan_grad(p, g->outputs[k])) continue;
    int64_t n = rc_tensor_numel(t);
    for (int64_t i = 0; i < n; i++) l += pattern(i, k) * ((const float *)t->data)[i];
  }
  return l;
}

/* The reverse pass of a training plan against central differences of the
 * whole graph along one direction d over every trainable weight:
 * sum(grad . d) ~ (L(w + h d) - L(w - h d)) / 2h, the loss weighting the
 * outputs with a fixed pattern. Kernels' own gradients are checked op by
 * op in test_ops_*; this checks how the planner chains them (fan-out,
 * broadcasting, folded constants in between) on real graphs. */
static int check_gradients(rc_plan *p, const rc_graph *g, const unsigned char *trainable, const char *what,
                           case_result *r) {
  rc_err e = {0};
  char msg[600];
  int any_out = 0;
  rc_plan_zero_grad(p);
  for (int k = 0; k < g->n_outputs; k++) {
    rc_tensor *gt = rc_plan_grad(p, g->outputs[k]);
    const rc_tensor *t = rc_plan_tensor(p, g->outputs[k]);
    if (!gt || t->dtype != RC_DTYPE_FLOAT) continue;
    int64_t n = rc_tensor_numel(gt);
    for (int64_t i = 0; i < n; i++) {
      float v = ((const float *)t->data)[i];
      if (!isfinite(v)) return OUT_PASS; /* no derivative to check through inf/NaN */
      ((float *)gt->data)[i] = (float)pattern(i, k);
    }
    any_out = 1;
  }
  if (!any_out) return OUT_PASS;
  if (rc_plan_backward(p, &e) != RC_OK) return fail(r, "%s: backward: %s", what, e.msg);
  double analytic = 0, scale = 0;
  for (int v = 0; v < g->n_values; v++) {
    if (!trainable[v]) continue;
    const rc_tensor *gt = rc_plan_grad(p, v);
    if (!gt) continue;
    int64_t n = rc_tensor_numel(gt);
    for (int64_t i = 0; i < n; i++) {
      double gv = ((const float *)gt->data)[i];
      if (!isfinite(gv)) {
        snprintf(msg, sizeof msg, "%s: gradient of '%.200s' is not finite at %lld", what, g->values[v].name,
                 (long long)i);
        return fail(r, "%s%s", msg, "");
      }
      analytic += gv * pattern(i, v);
      scale += fabs(gv * pattern(i, v));
    }
  }
  /* A step of 1e-3 along d; central differences of a float32 forward
   * agree to about 1e-4 of sum|grad . d| on these graphs (measured), so
   * 2e-3 leaves room and still catches a gradient off by a percent. */
  double losses[2];
  for (int side = 0; side < 2; side++) {
    for (int v = 0; v < g->n_values; v++) {
      if (!trainable[v] || !rc_plan_grad(p, v)) continue;
      float *w = g->values[v].decl.data;
      int64_t n = rc_tensor_numel(&g->values[v].decl);
      for (int64_t i = 0; i < n; i++) w[i] += (float)((side ? -2e-3 : 1e-3) * pattern(i, v));
    }
    if (rc_plan_forward(p, &e) != RC_OK) return fail(r, "%s: forward in the gradient check: %s", what, e.msg);
    losses[side] = weighted_loss(p, g);
  }
  for (int v = 0; v < g->n_values; v++) {
    if (!trainable[v] || !rc_plan_grad(p, v)) continue;
    float *w = g->values[v].decl.data;
    int64_t n = rc_tensor_numel(&g->values[v].decl);
    for (int64_t i = 0; i < n; i++) w[i] += (float)(1e-3 * pattern(i, v));
  }
  double numeric = (losses[0] - losses[1]) / 2e-3;
  r->grad_checked = 1;
  if (fabs(numeric - analytic) <= 2e-3 * fmax(scale, 1e-3) + 1e-4) return OUT_PASS;
  snprintf(msg, sizeof msg, "%s: backward disagrees with central differences: sum(grad . d) = %.6g, "
           "numeric %.6g (scale %.3g)", what, analytic, numeric, scale);
  return fail(r, "%s%s", msg, "");
}

/* A plan built with opts at the data set's shapes, run twice (a second run
 * catches kernels that depend on what the previous batch left behind). */
static int run_plan(const rc_graph *g, data_set *s, const rc_plan_opts *opts, const char *what,
                    case_result *r, rc_err *e) {
  rc_plan *p = NULL;
  char msg[1100];
  rc_status st = rc_plan_init(&p, g, s->in, opts, e);
  if (st == RC_ERR_UNSUPPORTED) return OUT_SKIP;
  if (st != RC_OK) {
    snprintf(msg, sizeof msg, "%s (%s)", e->msg, rc_strerror(st));
    return fail(r, "%s: plan: %s", what, msg);
  }
  int result = OUT_PASS;
  for (int i = 0; i < g->n_inputs && result == OUT_PASS; i++) {
    rc_tensor *t = rc_plan_tensor(p, g->inputs[i]);
    size_t nb = rc_tensor_nbytes(&s->in[i]);
    if (nb && (!t || !t->data || rc_tensor_nbytes(t) != nb))
      result = fail(r, "%s: input '%s' has no buffer of the right size in the plan", what,
                    g->values[g->inputs[i]].name);
    else if (nb)
      memcpy(t->data, s->in[i].data, nb);
  }
  for (int run = 0; run < 2 && result == OUT_PASS; run++) {
    char label[300];
    snprintf(label, sizeof label, "%s%s", what, run ? ", second run" : "");
    result = forward_and_compare(p, g, s, label, r);
  }
  if (result == OUT_PASS && opts && opts->training && opts->trainable)
    result = check_gradients(p, g, opts->trainable, what, r);
  rc_plan_free(p);
  return result;
}

/* One data set: an inference plan, then a training plan (which keeps every
 * activation, gives kernels their saved-state buffers and leaves the layer
 * weights live) at the same shapes; both must give the expected outputs,
 * and the training plan's reverse pass must agree with finite differences. */
static int run_data_set(rc_model *m, const char *set_dir, const char *set_name, case_result *r) {
  rc_graph *g = &m->graph;
  rc_err e = {0};
  data_set s;
  char msg[1100];
  if (data_set_read(&s, set_dir, &e) != RC_OK) {
    data_set_free(&s);
    return fail(r, "%s: test data unreadable: %s", set_name, e.msg);
  }
  if (s.n_in != g->n_inputs || s.n_out != g->n_outputs) {
    snprintf(msg, sizeof msg, "%d inputs and %d outputs, the graph has %d and %d", s.n_in, s.n_out,
             g->n_inputs, g->n_outputs);
    data_set_free(&s);
    return fail(r, "%s: the data set gives %s", set_name, msg);
  }
  /* numpy has no bfloat16: ONNX's generator (onnx/backend/test/case/node/
   * cast.py) writes bfloat16 tensors as uint16 bit patterns, and its runner
   * hands those bits to the backend. Read them as what the graph declares. */
  for (int i = 0; i < s.n_in; i++)
    if (g->values[g->inputs[i]].decl.dtype == RC_DTYPE_BFLOAT16 && s.in[i].dtype == RC_DTYPE_UINT16)
      s.in[i].dtype = RC_DTYPE_BFLOAT16;
  for (int i = 0; i < s.n_in; i++) {
    const rc_tensor *decl = &g->values[g->inputs[i]].decl;
    int agree = decl->rank < 0 || decl->rank == s.in[i].rank;
    for (int d = 0; agree && decl->rank >= 0 && d < decl->rank; d++)
      if (decl->dims[d] >= 0 && decl->dims[d] != s.in[i].dims[d]) agree = 0;
    if (!agree) {
      char sa[128], sb[128];
      r->outcome = OUT_BAD_DATA;
      snprintf(r->detail, sizeof r->detail, "%s: input_%d.pb has shape %s, the model declares '%.200s' as %s",
               set_name, i, rc_shape_str(&s.in[i], sa, sizeof sa), g->values[g->inputs[i]].name,
               rc_shape_str(decl, sb, sizeof sb));
      data_set_free(&s);
      return OUT_BAD_DATA;
    }
  }
  bound_inputs bound;
  int is_bound = 0;
  char what[300];
  snprintf(what, sizeof what, "%s", set_name);
  int result = run_plan(g, &s, NULL, what, r, &e);
  if (result == OUT_SKIP && needs_known_inputs(e.msg)) {
    bind_inputs(g, &s, &bound);
    is_bound = r->bound = 1;
    snprintf(what, sizeof what, "%s [inputs bound as constants]", set_name);
    result = run_plan(g, &s, NULL, what, r, &e);
  }
  if (result == OUT_PASS) {
    /* The weights distillation trains by default (float weights of Conv,
     * Gemm, MatMul, PRelu and normalisation layers) become trainable, so
     * they stay live instead of folding, as in a distillation run. */
    unsigned char *trainable = rc__calloc((size_t)g->n_values + 1, 1);
    rc_weight_info *w = NULL;
    int n_w = 0;
    if (!trainable || rc__weights_collect(g, &w, &n_w, &e) != RC_OK) {
      rc__free(trainable);
      data_set_free(&s);
      return fail(r, "%s: cannot collect the weights: %s", set_name, e.msg);
    }
    for (int i = 0; i < n_w; i++)
      if (!w[i].quantized && g->values[w[i].value].decl.dtype == RC_DTYPE_FLOAT) trainable[w[i].value] = 1;
    rc__free(w);
    rc_plan_opts train = {0};
    train.training = 1;
    train.trainable = trainable;
    char twhat[340];
    snprintf(twhat, sizeof twhat, "%s, training plan", what);
    result = run_plan(g, &s, &train, twhat, r, &e);
    rc__free(trainable);
    if (result == OUT_SKIP) { /* refused only for training: not a refusal of the case */
      snprintf(msg, sizeof msg, "%s", e.msg);
      result = fail(r, "%s: plan: %s", twhat, msg);
    }
  }
  if (result == OUT_SKIP) {
    r->outcome = OUT_SKIP;
    refusal_reason(e.msg, m->path, r->reason, sizeof r->reason);
    snprintf(r->detail, sizeof r->detail, "plan: %s", e.msg);
  }
  if (is_bound) unbind_inputs(g, &bound);
  data_set_free(&s);
  return result;
}

static int name_cmp(const void *a, const void *b) {
  return strcmp(*(char *const *)a, *(char *const *)b);
}

/* Sorted names of the sub-folders of dir starting with prefix; *n their
 * count. Returns a malloc'd array of malloc'd strings. */
static char **list_dirs(const char *dir, const char *prefix, int *n) {
  *n = 0;
  DIR *d = opendir(dir);
  if (!d) return NULL;
  char **names = NULL;
  int cap = 0;
  struct dirent *de;
  char p[4300];
  while ((de = readdir(d))) {
    if (de->d_name[0] == '.' || strncmp(de->d_name, prefix, strlen(prefix))) continue;
    snprintf(p, sizeof p, "%s/%s", dir, de->d_name);
    if (!is_dir(p)) continue;
    if (*n == cap) {
      cap = cap ? cap * 2 : 64;
      char **grown = realloc(names, sizeof(char *) * (size_t)cap);
      if (!grown) break;
      names = grown;
    }
    names[(*n)++] = strdup(de->d_name);
  }
  closedir(d);
  if (names) qsort(names, (size_t)*n, sizeof(char *), name_cmp);
  return names;
}

static void free_names(char **names, int n) {
  for (int i = 0; i < n; i++) free(names[i]);
  free(names);
}

static void run_case(const char *case_dir, case_result *r) {
  char model_path[4300];
  snprintf(model_path, sizeof model_path, "%s/model.onnx", case_dir);
  rc_model *m = NULL;
  rc_err e = {0};
  rc_status st = rc_model_load(&m, model_path, NULL, &e);
  if (st == RC_ERR_UNSUPPORTED) {
    r->outcome = OUT_SKIP;
    refusal_reason(e.msg, model_path, r->reason, sizeof r->reason);
    snprintf(r->detail, sizeof r->detail, "load: %s", e.msg);
    return;
  }
  if (st != RC_OK) {
    char msg[700];
    snprintf(msg, sizeof msg, "%s (%s)", e.msg, rc_strerror(st));
    fail(r, "load: %s%s", msg, "");
    return;
  }
  int n_sets;
  char **sets = list_dirs(case_dir, "test_data_set_", &n_sets);
  r->outcome = OUT_PASS;
  for (int i = 0; i < n_sets && r->outcome == OUT_PASS; i++) {
    char set_dir[4400];
    snprintf(set_dir, sizeof set_dir, "%s/%s", case_dir, sets[i]);
    run_data_set(m, set_dir, sets[i], r);
  }
  free_names(sets, n_sets);
  rc_model_free(m);
}

/* ---- the parent: one child per case ------------------------------------- */

static void run_case_isolated(const char *case_dir, case_result *r) {
  memset(r, 0, sizeof *r);
  int fd[2];
  if (pipe(fd) != 0) {
    fail(r, "cannot create a pipe: %s%s", strerror(errno), "");
    return;
  }
  fflush(stdout);
  fflush(stderr);
  pid_t pid = fork();
  if (pid < 0) {
    close(fd[0]);
    close(fd[1]);
    fail(r, "cannot fork: %s%s", strerror(errno), "");
    return;
  }
  if (pid == 0) {
    close(fd[0]);
    alarm(CASE_TIMEOUT_S);
    case_result cr;
    memset(&cr, 0, sizeof cr);
    run_case(case_dir, &cr);
    const char *b = (const char *)&cr;
    size_t left = sizeof cr;
    while (left) {
      ssize_t w = write(fd[1], b, left);
      if (w <= 0) _exit(3);
      b += w;
      left -= (size_t)w;
    }
    _exit(0);
  }
  close(fd[1]);
  /* Read before waiting: the result is bigger than nothing, and the pipe
   * buffer holds it, but reading first never depends on that. */
  size_t got = 0;
  char *b = (char *)r;
  while (got < sizeof *r) {
    ssize_t n = read(fd[0], b + got, sizeof *r - got);
    if (n < 0 && errno == EINTR) continue;
    if (n <= 0) break;
    got += (size_t)n;
  }
  close(fd[0]);
  int status = 0;
  while (waitpid(pid, &status, 0) < 0 && errno == EINTR) {
  }
  if (got == sizeof *r && WIFEXITED(status) && WEXITSTATUS(status) == 0) return;
  memset(r, 0, sizeof *r);
  char why[64];
  if (WIFSIGNALED(status))
    snprintf(why, sizeof why, "signal %d (%s)", WTERMSIG(status),
             WTERMSIG(status) == SIGALRM ? "timed out" : strsignal(WTERMSIG(status)));
  else
    snprintf(why, sizeof why, "exit status %d", WIFEXITED(status) ? WEXITSTATUS(status) : -1);
  fail(r, "the case process died: %s%s", why, "");
}

#define MAX_REASONS 512
typedef struct tally {
  int ran, passed, skipped, failed, no_data, bad_data, bound, not_converted, grad_checked;
  int n_reasons;
  char reasons[MAX_REASONS][200];
  int reason_count[MAX_REASONS];
} tally;

static void count_reason(tally *t, const char *reason) {
  for (int i = 0; i < t->n_reasons; i++)
    if (!strcmp(t->reasons[i], reason)) {
      t->reason_count[i]++;
      return;
    }
  int i = t->n_reasons < MAX_REASONS ? t->n_reasons++ : MAX_REASONS - 1;
  snprintf(t->reasons[i], sizeof t->reasons[i], "%s", i == MAX_REASONS - 1 ? "(other reasons)" : reason);
  t->reason_count[i]++;
}

static int selected(const char *name, char **filters, int n_filters) {
  if (!n_filters) return 1;
  for (int i = 0; i < n_filters; i++)
    if (strstr(name, filters[i])) return 1;
  return 0;
}

static int has_data_set(const char *case_dir) {
  int n;
  char **sets = list_dirs(case_dir, "test_data_set_", &n);
  free_names(sets, n);
  return n > 0;
}

static void print_reasons(const tally *t) {
  /* Most frequent first. */
  int order[MAX_REASONS];
  for (int i = 0; i < t->n_reasons; i++) order[i] = i;
  for (int i = 1; i < t->n_reasons; i++)
    for (int j = i; j > 0 && t->reason_count[order[j]] > t->reason_count[order[j - 1]]; j--) {
      int tmp = order[j];
      order[j] = order[j - 1];
      order[j - 1] = tmp;
    }
  for (int i = 0; i < t->n_reasons; i++)
    printf("    %4d  %s\n", t->reason_count[order[i]], t->reasons[order[i]]);
}

/* `title` names the suite in the summary (the suite folder when NULL). */
static int run_suite(const char *root, const char *suite, const char *title, int verbose, char **filters,
                     int n_filters) {
  if (!title) title = suite;
  char dir[4200];
  snprintf(dir, sizeof dir, "%s/%s", root, suite);
  if (!is_dir(dir)) {
    printf("%s: folder %s is missing\n", title, dir);
    return -1;
  }
  tally *t = calloc(1, sizeof *t);
  if (!t) return -1;
  int n;
  char **cases = list_dirs(dir, "test_", &n);
  for (int i = 0; i < n; i++) {
    if (!selected(cases[i], filters, n_filters)) continue;
    char case_dir[4400], model[4500];
    snprintf(case_dir, sizeof case_dir, "%s/%s", dir, cases[i]);
    snprintf(model, sizeof model, "%s/model.onnx", case_dir);
    /* Cases without a model (downloaded ones) or without data cannot run. */
    char not_converted[4500];
    snprintf(not_converted, sizeof not_converted, "%s/NOT_CONVERTED", case_dir);
    if (is_file(not_converted)) {
      t->not_converted++;
      printf("  conv  %s/%s: ONNX's version converter could not upgrade the model\n", title, cases[i]);
      continue;
    }
    if (!is_file(model) || !has_data_set(case_dir)) {
      t->no_data++;
      continue;
    }
    case_result r;
    run_case_isolated(case_dir, &r);
    if (r.outcome != OUT_BAD_DATA) t->ran++;
    if (r.outcome == OUT_PASS) {
      t->passed++;
      t->bound += r.bound;
      t->grad_checked += r.grad_checked;
      if (verbose) printf("  pass  %s/%s%s\n", title, cases[i], r.bound ? " (inputs bound as constants)" : "");
    } else if (r.outcome == OUT_SKIP) {
      t->skipped++;
      count_reason(t, r.reason);
      if (verbose) printf("  skip  %s/%s: %s\n", title, cases[i], r.detail);
    } else if (r.outcome == OUT_BAD_DATA) {
      t->bad_data++;
      printf("  data  %s/%s: %s\n", title, cases[i], r.detail);
    } else {
      t->failed++;
      printf("  FAIL  %s/%s: %s\n", title, cases[i], r.detail);
    }
    fflush(stdout);
  }
  free_names(cases, n);
  printf("%s: ran %d, passed %d, skipped %d (unsupported), failed %d", title, t->ran, t->passed, t->skipped,
         t->failed);
  if (t->bound) printf(" (%d of the passes with graph inputs bound as plan-time constants)", t->bound);
  if (t->grad_checked) printf("; %d passes include a reverse-pass check", t->grad_checked);
  if (t->not_converted) printf("; %d models the version converter could not upgrade", t->not_converted);
  if (t->no_data) printf("; %d folders without model.onnx or test data not counted", t->no_data);
  if (t->bad_data) printf("; %d cases not run: their data contradicts the model (listed above)", t->bad_data);
  printf("\n");
  if (t->skipped) {
    printf("  skipped (unsupported), by reason:\n");
    print_reasons(t);
  }
  fflush(stdout);
  int failed = t->failed;
  free(t);
  return failed;
}

/* The comparison itself, on hand-made tensors: what numpy's assert_allclose
 * accepts and refuses at rtol 1e-3, atol 1e-7. */
static void test_compare_rule(void) {
  float want[4] = {1.0f, -2.0f, NAN, INFINITY};
  float got[4] = {1.0f + 0.9e-3f, -2.0f, NAN, INFINITY};
  rc_tensor tw = {RC_DTYPE_FLOAT, 2, {2, 2}, want}, tg = {RC_DTYPE_FLOAT, 2, {2, 2}, got};
  char msg[512];
  CHECK(compare_output("x", &tg, &tw, msg, sizeof msg)); /* inside 1e-7 + 1e-3 * 1 */
  got[0] = 1.0f + 1.2e-3f;
  CHECK(!compare_output("x", &tg, &tw, msg, sizeof msg));
  CHECK_STR_CONTAINS(msg, "worst at [0,0]");
  got[0] = 1.0f;
  got[2] = 0.0f; /* NaN expected, a number given */
  CHECK(!compare_output("x", &tg, &tw, msg, sizeof msg));
  CHECK_STR_CONTAINS(msg, "worst at [1,0]");
  got[2] = NAN;
  got[3] = -INFINITY;
  CHECK(!compare_output("x", &tg, &tw, msg, sizeof msg));
  got[3] = INFINITY;
  want[1] = 0.0f;
  got[1] = 0.9e-7f; /* atol alone */
  CHECK(compare_output("x", &tg, &tw, msg, sizeof msg));
  got[1] = 3e-7f;
  CHECK(!compare_output("x", &tg, &tw, msg, sizeof msg));
  got[1] = 0.0f;
  tg.dims[0] = 4;
  tg.dims[1] = 1;
  CHECK(!compare_output("x", &tg, &tw, msg, sizeof msg)); /* shapes must agree */
  CHECK_STR_CONTAINS(msg, "shape");
  tg.dims[0] = tg.dims[1] = 2;
  int32_t iw[4] = {1, 2, 3, 4}, ig[4] = {1, 2, 3, 5};
  rc_tensor tiw = {RC_DTYPE_INT32, 1, {4}, iw}, tig = {RC_DTYPE_INT32, 1, {4}, ig};
  CHECK(!compare_output("x", &tig, &tiw, msg, sizeof msg));
  CHECK(!compare_output("x", &tig, &tw, msg, sizeof msg)); /* dtypes must agree */
  CHECK_STR_CONTAINS(msg, "dtype");
  uint16_t hw[1] = {0x3c00}; /* 1.0 in float16 */
  rc_tensor th = {RC_DTYPE_FLOAT16, 1, {1}, hw};
  int ok;
  CHECK_NEAR(elem(&th, 0, &ok), 1.0, 0, 0);
  hw[0] = 0xc000; /* -2.0 */
  CHECK_NEAR(elem(&th, 0, &ok), -2.0, 0, 0);
  hw[0] = 0x3f80; /* 1.0 in bfloat16 */
  th.dtype = RC_DTYPE_BFLOAT16;
  CHECK_NEAR(elem(&th, 0, &ok), 1.0, 0, 0);
}

static const char *data_root;
static int opt_verbose, opt_n_filters;
static char **opt_filters;
static const char *suite_root, *suite_now, *suite_title;

static void test_suite(void) {
  CHECK_INT(run_suite(suite_root, suite_now, suite_title, opt_verbose, opt_filters, opt_n_filters), 0);
}

int main(int argc, char **argv) {
  opt_filters = calloc((size_t)argc + 1, sizeof(char *));
  for (int i = 1; i < argc; i++) {
    if (!strcmp(argv[i], "-v")) opt_verbose = 1;
    else opt_filters[opt_n_filters++] = argv[i];
  }
  data_root = getenv("RECOUP_ONNX_TESTDATA");
  if (!data_root || !*data_root) data_root = DEFAULT_DATA_DIR;
  if (!is_dir(data_root)) {
    fprintf(stderr,
            "test_conformance: ONNX backend test data not found at %s.\n"
            "Install Debian's libonnx-testdata (scripts/setup.sh does) or set RECOUP_ONNX_TESTDATA.\n",
            data_root);
    free(opt_filters);
    return 1;
  }
  printf("ONNX backend test data from %s; outputs compared as numpy.testing.assert_allclose with "
         "rtol %g, atol %g (ONNX's backend test loader defaults)\n",
         data_root, RTOL, ATOL);
  RUN(test_compare_rule);
  const char *suites[] = {"node", "pytorch-converted", "pytorch-operator", "simple"};
  suite_root = data_root;
  for (size_t i = 0; i < sizeof suites / sizeof suites[0]; i++) {
    suite_now = suites[i];
    suite_title = NULL;
    RUN(test_suite);
  }
  /* The PyTorch-made suites are opset 6 and some node cases opset 1 to 8,
   * which recoup refuses; ONNX's version converter upgrades them (scripts/conformance_upgrade.py, run as
   * a ctest fixture from tests/conformance.cmake) so that their Conv,
   * BatchNormalization, pool and Gemm graphs run against the same expected
   * outputs. */
  const char *upgraded = getenv("RECOUP_CONFORMANCE_UPGRADED");
  if (upgraded && *upgraded) {
    const char *up[] = {"node", "pytorch-converted", "pytorch-operator"};
    const char *titles[] = {"node opsets 1-8 (upgraded to opset 13)", "pytorch-converted (upgraded to opset 13)",
                            "pytorch-operator (upgraded to opset 13)"};
    suite_root = upgraded;
    for (int i = 0; i < 3; i++) {
      suite_now = up[i];
      suite_title = titles[i];
      RUN(test_suite);
    }
  } else {
    printf("RECOUP_CONFORMANCE_UPGRADED is not set: the opset-upgraded PyTorch suites were not run "
           "(ctest runs them)\n");
  }
  free(opt_filters);
  return TEST_REPORT();
}
