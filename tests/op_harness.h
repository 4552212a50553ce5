/* Runs one op kernel by hand, without a file or a plan: build a node with
 * attributes and inputs, then parse, infer, forward, and check backward
 * against central finite differences. Shared by every tests/test_ops_*.c. */
#ifndef RC_OP_HARNESS_H
#define RC_OP_HARNESS_H

#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core/alloc.h"
#include "core/arena.h"
#include "ops/op.h"

#define OH_MAX_IO 8
#define OH_MAX_ATTRS 16

typedef struct oh_case {
  rc_arena arena;
  rc_node node;
  rc_attr attrs[OH_MAX_ATTRS];
  int in_idx[OH_MAX_IO], out_idx[OH_MAX_IO];
  rc_tensor in_t[OH_MAX_IO], out_t[OH_MAX_IO];
  rc_tensor *in[OH_MAX_IO], *out[OH_MAX_IO];
  rc_tensor din_t[OH_MAX_IO], dout_t[OH_MAX_IO];
  rc_tensor *din[OH_MAX_IO], *dout[OH_MAX_IO];
  void *work, *saved;
  size_t work_bytes; /* what oh_run sized for forward and backward */
  int training;
  int n_out; /* outputs to create (default 1) */
  const struct rc__wpattern *pattern; /* the weight pattern kernels see (sparse.h), or NULL */
} oh_case;

static void oh_init(oh_case *c, const char *op, int opset) {
  memset(c, 0, sizeof *c);
  rc__arena_init(&c->arena, 1 << 16);
  c->node.name = op;
  c->node.label = op;
  c->node.op_type = op;
  c->node.domain = "";
  c->node.opset = opset;
  c->node.attrs = c->attrs;
  c->node.in = c->in_idx;
  c->node.out = c->out_idx;
  c->n_out = 1;
}

static rc_attr *oh_attr(oh_case *c, const char *name, rc_attr_type type) {
  rc_attr *a = &c->attrs[c->node.n_attrs++];
  memset(a, 0, sizeof *a);
  a->name = name;
  a->type = type;
  return a;
}
static void oh_attr_int(oh_case *c, const char *name, int64_t v) { oh_attr(c, name, RC_ATTR_INT)->i = v; }
static void oh_attr_float(oh_case *c, const char *name, float v) { oh_attr(c, name, RC_ATTR_FLOAT)->f = v; }
static void oh_attr_string(oh_case *c, const char *name, const char *s) { oh_attr(c, name, RC_ATTR_STRING)->s = s; }
static void oh_attr_ints(oh_case *c, const char *name, int n, const int64_t *v) {
  rc_attr *a = oh_attr(c, name, RC_ATTR_INTS);
  a->n = n;
  a->ints = rc__arena_memdup(&c->arena, v, sizeof(int64_t) * (size_t)(n ? n : 1));
}
static void oh_attr_floats(oh_case *c, const char *name, int n, const float *v) {
  rc_attr *a = oh_attr(c, name, RC_ATTR_FLOATS);
  a->n = n;
  a->floats = rc__arena_memdup(&c->arena, v, sizeof(float) * (size_t)(n ? n : 1));
}
/* Attribute tensor (Constant's value, ConstantOfShape's value). */
static void oh_attr_tensor(oh_case *c, const char *name, rc_dtype dt, int rank, const int64_t *dims,
                           const void *data) {
  rc_attr *a = oh_attr(c, name, RC_ATTR_TENSOR);
  a->t.dtype = dt;
  a->t.rank = rank;
  for (int i = 0; i < rank; i++) a->t.dims[i] = dims[i];
  a->t.data = rc__arena_memdup(&c->arena, data, rc_tensor_nbytes(&a->t));
}

/* Add an input; data is copied. known=1 marks it as known at plan time
 * (the data is always available to forward either way). */
static void oh_input(oh_case *c, rc_dtype dt, int rank, const int64_t *dims, const void *data) {
  int i = c->node.n_in++;
  c->in_idx[i] = i;
  rc_tensor *t = &c->in_t[i];
  t->dtype = dt;
  t->rank = rank;
  for (int d = 0; d < rank; d++) t->dims[d] = dims[d];
  size_t nb = rc_tensor_nbytes(t);
  t->data = rc__arena_zalloc(&c->arena, nb);
  if (data) memcpy(t->data, data, nb);
  c->in[i] = t;
}
static void oh_input_absent(oh_case *c) {
  int i = c->node.n_in++;
  c->in_idx[i] = -1;
  c->in[i] = NULL;
}
static float *oh_in_f(oh_case *c, int i) { return (float *)c->in_t[i].data; }
static float *oh_out_f(oh_case *c, int i) { return (float *)c->out_t[i].data; }

/* parse + infer + allocate outputs + forward. */
static rc_status oh_run(oh_case *c, rc_err *e) {
  rc_node *n = &c->node;
  if (!n->def) {
    n->def = rc__op_find(n->op_type, n->domain, n->opset);
    if (!n->def) return rc__fail(e, RC_ERR_UNSUPPORTED, "op %s opset %d not found", n->op_type, n->opset);
    n->n_out = c->n_out;
    for (int o = 0; o < n->n_out; o++) c->out_idx[o] = OH_MAX_IO + o;
    if (n->def->parse) RC_TRY(n->def->parse(n, &c->arena, e));
    RC_TRY(n->def->infer(n, (const rc_tensor *const *)c->in, c->out_t, e));
    for (int o = 0; o < n->n_out; o++) {
      size_t nb = rc_tensor_nbytes(&c->out_t[o]);
      c->out_t[o].data = rc__arena_zalloc(&c->arena, nb ? nb : 1);
      c->out[o] = &c->out_t[o];
    }
  }
  rc_kernel k = {n, n->params, n->n_in, n->n_out, c->in, c->out, c->din, c->dout, NULL, NULL, c->training};
  size_t ws = n->def->workspace ? n->def->workspace(&k, 0) : 0;
  size_t wb = n->def->workspace ? n->def->workspace(&k, 1) : 0;
  if (!c->work) c->work = rc__arena_zalloc(&c->arena, (ws > wb ? ws : wb) + 64);
  if (!c->saved) c->saved = rc__arena_zalloc(&c->arena, (n->def->saved ? n->def->saved(&k) : 0) + 64);
  k.work = c->work;
  k.work_bytes = ws > wb ? ws : wb;
  if (!c->work_bytes) c->work_bytes = k.work_bytes;
  k.saved = c->saved;
  k.pattern = c->pattern;
  return n->def->forward(&k, e);
}

static double oh_weighted_sum(oh_case *c, const float *w) {
  double s = 0;
  int64_t m = rc_tensor_numel(&c->out_t[0]);
  const float *y = oh_out_f(c, 0);
  for (int64_t i = 0; i < m; i++) s += (double)w[i] * y[i];
  return s;
}

/* Backward of L = sum(out0 * w) for a fixed pseudo-random w, compared with
 * central differences for every float input listed in `check` (-1 ends).
 * Returns the worst error |analytic - numeric| / (1 + |numeric|), printing it. */
static double oh_gradcheck(oh_case *c, const int *check, double eps) {
  rc_err e = {0};
  if (oh_run(c, &e) != RC_OK) {
    fprintf(stderr, "gradcheck %s: forward failed: %s\n", c->node.op_type, e.msg);
    return INFINITY;
  }
  rc_node *n = &c->node;
  int64_t m = rc_tensor_numel(&c->out_t[0]);
  float *w = rc__arena_alloc(&c->arena, sizeof(float) * (size_t)(m ? m : 1));
  uint32_t s = 12345;
  for (int64_t i = 0; i < m; i++) {
    s = s * 1664525u + 1013904223u;
    w[i] = (float)((s >> 8) / 16777216.0 - 0.5);
  }
  for (int o = 0; o < OH_MAX_IO; o++) c->dout[o] = NULL;
  c->dout_t[0] = c->out_t[0];
  c->dout_t[0].data = w;
  c->dout[0] = &c->dout_t[0];
  for (int i = 0; i < OH_MAX_IO; i++) c->din[i] = NULL;
  for (int k = 0; check[k] >= 0; k++) {
    int i = check[k];
    c->din_t[i] = c->in_t[i];
    c->din_t[i].data = rc__arena_zalloc(&c->arena, rc_tensor_nbytes(&c->in_t[i]));
    c->din[i] = &c->din_t[i];
  }
  rc_kernel k = {n,      n->params, n->n_in, n->n_out, c->in,       c->out,
                 c->din, c->dout,   c->work, c->saved, c->training, c->work_bytes};
  k.pattern = c->pattern;
  n->def->backward(&k);
  double worst = 0, worst_g = 0, worst_num = 0;
  int worst_in = -1;
  int64_t worst_at = -1;
  for (int kk = 0; check[kk] >= 0; kk++) {
    int i = check[kk];
    float *x = oh_in_f(c, i);
    const float *g = (const float *)c->din_t[i].data;
    int64_t cnt = rc_tensor_numel(&c->in_t[i]);
    for (int64_t j = 0; j < cnt; j++) {
      float keep = x[j];
      x[j] = keep + (float)eps;
      oh_run(c, &e);
      double up = oh_weighted_sum(c, w);
      x[j] = keep - (float)eps;
      oh_run(c, &e);
      double down = oh_weighted_sum(c, w);
      x[j] = keep;
      double num = (up - down) / (2 * eps);
      double err = fabs(g[j] - num) / (1 + fabs(num));
      if (err > worst || worst_at < 0)
        worst = err, worst_g = g[j], worst_num = num, worst_in = i, worst_at = j;
    }
  }
  /* Always printed, so a drift that still passes shows before it fails. */
  printf("gradcheck %s: worst input %d [%lld]: analytic %.6g numeric %.6g relative error %.3g\n",
         n->op_type, worst_in, (long long)worst_at, worst_g, worst_num, worst);
  oh_run(c, &e);
  return worst;
}

static void oh_free(oh_case *c) { rc__arena_free(&c->arena); }

/* Deterministic pseudo-random floats in [-1, 1). */
static void oh_fill(float *x, int64_t n, uint32_t seed) {
  for (int64_t i = 0; i < n; i++) {
    seed = seed * 1664525u + 1013904223u;
    x[i] = (float)((seed >> 8) / 8388608.0 - 1.0);
  }
}

#endif
