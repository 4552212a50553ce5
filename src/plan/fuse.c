/* See fuse.h. */
#include "plan/fuse.h"

#include <omp.h>
#include <string.h>

#include "core/alloc.h"

static int is_op(const rc_node *n, const char *op) { return !strcmp(n->op_type, op) && !*n->domain; }

/* The single node that reads value v and is a step, or -1 when v is held,
 * read by several nodes or by none. */
static int only_reader(const int *readers, const int *reader_node, const unsigned char *held, int v) {
  if (v < 0 || held[v] || readers[v] != 1) return -1;
  return reader_node[v];
}

/* Relu, or Clip whose bounds are absent or known at plan time. */
static int fusable_act(const rc_node *n, const unsigned char *is_const) {
  if (is_op(n, "Relu")) return 1;
  if (!is_op(n, "Clip")) return 0;
  for (int i = 1; i < n->n_in && i < 3; i++)
    if (n->in[i] >= 0 && !is_const[n->in[i]]) return 0;
  return 1;
}

/* The BatchNormalization's outputs past the first are absent. */
static int bn_single_output(const rc_node *n) {
  for (int j = 1; j < n->n_out; j++)
    if (n->out[j] >= 0) return 0;
  return n->n_in >= 5;
}

/* The chain that starts at node conv_node: bn and act node indices (-1 when
 * absent); returns 0 when there is no chain. */
static int match(const rc_graph *g, int conv_node, const int *readers, const int *reader_node,
                 const unsigned char *held, const unsigned char *is_const, const int *step_of_node,
                 rc_kernel *const *step_k, int *bn, int *act) {
  *bn = *act = -1;
  const rc_node *n = &g->nodes[conv_node];
  if (!is_op(n, "Conv") || n->n_out != 1) return 0;
  int v = n->out[0];
  int r = only_reader(readers, reader_node, held, v);
  if (r < 0 || step_of_node[r] < 0) return 0;
  const rc_node *m = &g->nodes[r];
  if (is_op(m, "BatchNormalization") && m->in[0] == v && bn_single_output(m) &&
      rc__bn_frozen(step_k[step_of_node[r]])) {
    *bn = r;
    v = m->out[0];
    r = only_reader(readers, reader_node, held, v);
    if (r < 0 || step_of_node[r] < 0) return 1;
    m = &g->nodes[r];
  }
  if (m->in[0] == v && m->n_out == 1 && fusable_act(m, is_const)) *act = r;
  return *bn >= 0 || *act >= 0;
}

/* A BatchNormalization with batch statistics whose output only a Relu or
 * Clip reads: the normalisation applies the activation in its own passes.
 * Its further outputs (running statistics) it writes as always. */
static int match_bn_act(const rc_graph *g, int bn_node, const int *readers, const int *reader_node,
                        const unsigned char *held, const unsigned char *is_const, const int *step_of_node,
                        rc_kernel *const *step_k, int *act) {
  *act = -1;
  const rc_node *n = &g->nodes[bn_node];
  if (!is_op(n, "BatchNormalization") || n->n_in < 5 || rc__bn_frozen(step_k[step_of_node[bn_node]])) return 0;
  const int v = n->out[0], r = only_reader(readers, reader_node, held, v);
  if (r < 0 || step_of_node[r] < 0) return 0;
  const rc_node *m = &g->nodes[r];
  if (m->in[0] != v || m->n_out != 1 || !fusable_act(m, is_const)) return 0;
  *act = r;
  return 1;
}

/* Readers per value, and the last node seen reading it. */
static rc_status count_readers(const rc_graph *g, int **readers, int **reader_node, rc_err *e) {
  *readers = rc__calloc((size_t)g->n_values + 1, sizeof(int));
  *reader_node = rc__calloc((size_t)g->n_values + 1, sizeof(int));
  if (!*readers || !*reader_node) return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory while planning", g->path);
  for (int ni = 0; ni < g->n_nodes; ni++)
    for (int i = 0; i < g->nodes[ni].n_in; i++) {
      int v = g->nodes[ni].in[i];
      if (v < 0) continue;
      /* A node reading the same value twice counts twice: not a chain. */
      (*readers)[v]++;
      (*reader_node)[v] = ni;
    }
  return RC_OK;
}

static rc_status chain_buffers(rc__chain *c, rc_arena *a) {
  const rc_tensor *y = c->conv->out[0];
  const int64_t M = y->dims[1];
  int64_t P = 1;
  for (int d = 2; d < y->rank; d++) P *= y->dims[d];
  c->threads = omp_get_max_threads();
  if (c->threads > M) c->threads = M > 0 ? (int)M : 1;
  float *ac = rc__arena_zalloc(a, sizeof(float) * (size_t)(3 * M + 1));
  c->sums = rc__arena_zalloc(a, sizeof(double) * (size_t)(2 * M + 1));
  c->rows = rc__arena_zalloc(a, sizeof(float) * (size_t)(P * c->threads + 1));
  if (!ac || !c->sums || !c->rows) return RC_ERR_NOMEM;
  c->mean = ac + 2 * M;
  if (c->conv && c->bn) {
    c->ep.a = ac;
    c->ep.c = ac + M;
  }
  return RC_OK;
}

rc_status rc__chains_find(rc__chain **chains, int *n_chains, int **role, const rc_graph *g,
                          rc_kernel *const *step_k, int n_steps, const int *step_of_node,
                          const unsigned char *held, const unsigned char *is_const, rc_arena *a, rc_err *e) {
  *chains = NULL;
  *n_chains = 0;
  *role = rc__arena_zalloc(a, sizeof(int) * (size_t)(n_steps + 1));
  if (!*role) return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory while planning", g->path);
  int *readers = NULL, *reader_node = NULL;
  rc_status st = count_readers(g, &readers, &reader_node, e);
  rc__chain *list = st == RC_OK ? rc__arena_zalloc(a, sizeof(rc__chain) * (size_t)(n_steps + 1)) : NULL;
  if (st == RC_OK && !list) st = rc__fail(e, RC_ERR_NOMEM, "%s: out of memory while planning", g->path);
  for (int s = 0; st == RC_OK && s < n_steps; s++) {
    int bn, act;
    const int node = (int)(step_k[s]->node - g->nodes);
    if ((*role)[s] < 0) continue; /* absorbed by an earlier chain */
    const int conv_head =
        match(g, node, readers, reader_node, held, is_const, step_of_node, step_k, &bn, &act);
    if (!conv_head) {
      if (!match_bn_act(g, node, readers, reader_node, held, is_const, step_of_node, step_k, &act)) continue;
      bn = node;
    }
    rc__chain *c = &list[*n_chains];
    c->conv = conv_head ? step_k[s] : NULL;
    c->bn = bn >= 0 ? step_k[step_of_node[bn]] : NULL;
    c->act = act >= 0 ? step_k[step_of_node[act]] : NULL;
    c->last = step_of_node[act >= 0 ? act : bn];
    c->ep.act = act < 0 ? RC_EPI_NONE : is_op(&g->nodes[act], "Relu") ? RC_EPI_RELU : RC_EPI_CLIP;
    if (conv_head && chain_buffers(c, a) != RC_OK) {
      st = rc__fail(e, RC_ERR_NOMEM, "%s: out of memory while planning", g->path);
      break;
    }
    (*role)[s] = ++*n_chains;
    if (conv_head && bn >= 0) (*role)[step_of_node[bn]] = -1;
    if (act >= 0) (*role)[step_of_node[act]] = -1;
  }
  rc__free(readers);
  rc__free(reader_node);
  *chains = list;
  return st;
}

static rc_kernel *chain_tail(const rc__chain *c) { return c->act ? c->act : c->bn; }

rc_status rc__chain_forward(rc__chain *c, rc_err *e) {
  if (c->act && c->ep.act == RC_EPI_CLIP) rc__clip_bounds(c->act, &c->ep.lo, &c->ep.hi);
  c->ep.z = chain_tail(c)->out[0]->data;
  if (!c->conv) return rc__bn_batch_forward_fused(c->bn, &c->ep, e);
  if (c->bn) rc__bn_fold(c->bn, (float *)c->ep.a, (float *)c->ep.c, c->mean);
  return rc__conv_forward_epilogue(c->conv, &c->ep, e);
}

int rc__chain_backward(rc__chain *c) {
  const rc_kernel *tail = chain_tail(c);
  if (!c->conv) {
    /* The chain is the normalisation's step: its own backward is this. */
    if (c->bn->din && tail->dout && tail->dout[0])
      rc__bn_batch_backward_fused(c->bn, &c->ep, tail->dout[0]->data);
    return 0;
  }
  if (!tail->dout || !tail->dout[0]) return 1;
  const rc_tensor *y = c->conv->out[0];
  int64_t P = 1;
  for (int d = 2; d < y->rank; d++) P *= y->dims[d];
  float *dy = c->conv->dout && c->conv->dout[0] ? c->conv->dout[0]->data : NULL;
  const int sums = c->bn && c->bn->din;
  rc__epilogue_backward(&c->ep, dy, sums ? c->sums : NULL, sums ? c->sums + y->dims[1] : NULL, c->mean, y->data,
                        tail->dout[0]->data, y->dims[0], y->dims[1], P, c->rows, c->threads);
  if (sums) rc__bn_frozen_param_grads(c->bn, c->sums, c->sums + y->dims[1]);
  return 1;
}
