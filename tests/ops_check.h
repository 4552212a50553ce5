/* Small helpers on top of op_harness.h shared by the pointwise, softmax and
 * normalisation op tests. */
#ifndef RC_OPS_CHECK_H
#define RC_OPS_CHECK_H

#include "op_harness.h"
#include "ops/conv_impl.h"
#include "test.h"

/* parse + infer + forward; prints the error on failure. */
static int run_ok(oh_case *c) {
  rc_err e = {0};
  rc_status s = oh_run(c, &e);
  if (s != RC_OK) fprintf(stderr, "unexpected failure: %s\n", e.msg);
  return s == RC_OK;
}

/* Expect oh_run to fail with `code` and a message naming the node and containing `needle`. */
#define CHECK_REFUSED(c, code, needle)              \
  do {                                              \
    rc_err e_ = {0};                                \
    CHECK_INT(oh_run((c), &e_), (code));            \
    CHECK_STR_CONTAINS(e_.msg, (c)->node.label);    \
    CHECK_STR_CONTAINS(e_.msg, (needle));           \
  } while (0)

/* Finite-difference check of every listed input (-1 terminated); the worst
 * element is printed either way (oh_gradcheck). */
#define CHECK_GRAD(c, tol, ...)                            \
  do {                                                     \
    const int in_[] = {__VA_ARGS__, -1};                   \
    double grad_error = oh_gradcheck((c), in_, 1e-3);      \
    CHECK_LE(grad_error, (tol));                           \
  } while (0)

/* Backward with d(out0) = g (NULL: all ones); gradients of the listed inputs
 * land in c->din_t[i].data (zeroed first). */
static void run_backward(oh_case *c, const float *g, const int *inputs) {
  int64_t m = rc_tensor_numel(&c->out_t[0]);
  float *w = rc__arena_alloc(&c->arena, sizeof(float) * (size_t)(m ? m : 1));
  for (int64_t i = 0; i < m; i++) w[i] = g ? g[i] : 1.0f;
  for (int o = 0; o < OH_MAX_IO; o++) c->dout[o] = NULL;
  c->dout_t[0] = c->out_t[0];
  c->dout_t[0].data = w;
  c->dout[0] = &c->dout_t[0];
  for (int i = 0; i < OH_MAX_IO; i++) c->din[i] = NULL;
  for (int k = 0; inputs[k] >= 0; k++) {
    int i = inputs[k];
    c->din_t[i] = c->in_t[i];
    c->din_t[i].data = rc__arena_zalloc(&c->arena, rc_tensor_nbytes(&c->in_t[i]));
    c->din[i] = &c->din_t[i];
  }
  rc_node *n = &c->node;
  rc_kernel k = {n,      n->params, n->n_in, n->n_out, c->in,       c->out,
                 c->din, c->dout,   c->work, c->saved, c->training, c->work_bytes};
  k.pattern = c->pattern;
  n->def->backward(&k);
}
static const float *grad_of(oh_case *c, int i) { return (const float *)c->din_t[i].data; }

/* Results of one forward and backward kept for comparing paths: y, then the
 * gradients of inputs 0..2; whether oneDNN's primitives were made and kept
 * for the node. */
typedef struct run_out {
  float *v[4];
  int64_t n[4];
  int dnnl_kept;
  int mm_kept;   /* the state holds conv_dnnl_1x1.c's batched matmuls */
} run_out;

static void run_out_free(run_out *r) {
  for (int i = 0; i < 4; i++) free(r->v[i]);
}

static float *copy_of(const float *p, int64_t n) {
  float *q = malloc(sizeof(float) * (size_t)(n ? n : 1));
  memcpy(q, p, sizeof(float) * (size_t)n);
  return q;
}

/* Forward, then backward with dy drawn from a fixed seed, keeping y and the
 * gradients of inputs 0..n_grads-1 in r. The gradient buffers start from
 * fixed non-zero values (seeds 505 + i), so that "adds into" is checked. */
static int run_and_keep(oh_case *c, int n_grads, run_out *r) {
  memset(r, 0, sizeof *r);
  if (!run_ok(c)) return 0;
  const int64_t ny = rc_tensor_numel(&c->out_t[0]);
  float *dy = malloc(sizeof(float) * (size_t)(ny ? ny : 1));
  oh_fill(dy, ny, 404);
  const int wanted[] = {0, 1, 2, -1}, wanted_nb[] = {0, 1, -1};
  r->v[0] = copy_of(oh_out_f(c, 0), ny);
  r->n[0] = ny;
  /* run_backward zeroes the gradients; seed them instead and run again. */
  run_backward(c, dy, n_grads > 2 ? wanted : wanted_nb);
  for (int i = 0; i < n_grads; i++) oh_fill(c->din_t[i].data, rc_tensor_numel(&c->in_t[i]), 505 + (uint32_t)i);
  /* This time with a state kept for the node, as a plan keeps it: a path
   * that keeps primitives makes them here and reuses them below. */
  rc_node *nd = &c->node;
  rc_op_state state = {0};
  rc_kernel k = {nd,     nd->params, nd->n_in, nd->n_out, c->in,       c->out,
                 c->din, c->dout,    c->work,  c->saved,  c->training, c->work_bytes};
  k.pattern = c->pattern;
  k.state = &state;
  nd->def->backward(&k);
  for (int i = 0; i < n_grads; i++) {
    r->n[1 + i] = rc_tensor_numel(&c->in_t[i]);
    r->v[1 + i] = copy_of(grad_of(c, i), r->n[1 + i]);
  }
  /* Forward again through the kept state gives the first forward's bits. */
  rc_err e = {0};
  CHECK_INT(nd->def->forward(&k, &e), RC_OK);
  CHECK_MEM_EQ(oh_out_f(c, 0), r->v[0], sizeof(float) * (size_t)ny);
  r->dnnl_kept = rc__conv_dnnl_ready(&state);
  r->mm_kept = rc__conv_mm_ready(&state);
  if (state.release) state.release(state.data);
  free(dy);
  return 1;
}

/* One path's result against another's (got_name, want_name): prints
 * both sides of the worst element and returns the number of elements off by
 * more than tol * (1 + |want|); with keep, only kept positions count. */
static int64_t compare_paths(const char *label, const char *what, const char *got_name, const char *want_name,
                             const float *got, const float *want, int64_t n, double tol, const uint8_t *keep) {
  int64_t bad = 0, worst_at = -1;
  double worst = -1;
  for (int64_t j = 0; j < n; j++) {
    if (keep && !keep[j]) continue;
    const double diff = fabs((double)got[j] - want[j]), lim = tol * (1 + fabs(want[j]));
    if (!(diff <= lim)) bad++;
    if (!(diff <= worst)) worst = diff, worst_at = j;
  }
  if (worst_at >= 0)
    printf("%-30s %-5s worst at %6lld: %s %.9g, %s %.9g (|diff| %.3g, tolerance %.1e), %lld off\n", label, what,
           (long long)worst_at, got_name, got[worst_at], want_name, want[worst_at], worst, tol, (long long)bad);
  return bad;
}

#endif
