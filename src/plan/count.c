/* Counting a model: parameters, and multiply-accumulates of a plan at batch
 * one. inspect and prune count through here. */
#include "plan/count.h"

#include <string.h>

#include "core/alloc.h"

static int is_op(const rc_node *n, const char *op) { return !strcmp(n->op_type, op); }

int64_t rc__node_macs(rc_plan *p, const rc_node *n) {
  if (n->n_out < 1 || n->out[0] < 0) return 0;
  const rc_tensor *y = rc_plan_tensor(p, n->out[0]);
  if (is_op(n, "Conv") && n->n_in >= 2) {
    const rc_tensor *w = rc_plan_tensor(p, n->in[1]);
    int64_t per = 1;
    for (int d = 1; d < w->rank; d++) per *= w->dims[d];
    return rc_tensor_numel(y) * per;
  }
  if (is_op(n, "ConvTranspose") && n->n_in >= 2) {
    const rc_tensor *x = rc_plan_tensor(p, n->in[0]);
    const rc_tensor *w = rc_plan_tensor(p, n->in[1]);
    int64_t per = 1;
    for (int d = 1; d < w->rank; d++) per *= w->dims[d];
    return rc_tensor_numel(x) * per;
  }
  if ((is_op(n, "Gemm") || is_op(n, "MatMul")) && n->n_in >= 2) {
    const rc_tensor *a = rc_plan_tensor(p, n->in[0]);
    int64_t k;
    if (is_op(n, "Gemm"))
      k = rc__attr_int(n, "transA", 0) ? a->dims[0] : a->dims[a->rank - 1];
    else
      k = a->dims[a->rank - 1];
    return rc_tensor_numel(y) * k;
  }
  return 0;
}

rc_tensor *rc__batch1_inputs(const rc_graph *g) { return rc__batch_inputs(g, 1); }

void rc__input_shapes_declared(const rc_graph *g, int64_t b, rc_tensor *ins) {
  for (int i = 0; i < g->n_inputs; i++) {
    ins[i] = g->values[g->inputs[i]].decl;
    ins[i].data = NULL;
    if (ins[i].rank < 0) ins[i].rank = 0;
    for (int d = 0; d < ins[i].rank; d++)
      if (ins[i].dims[d] < 0) ins[i].dims[d] = b;
  }
}

rc_tensor *rc__batch_inputs(const rc_graph *g, int64_t b) {
  rc_tensor *ins = rc__calloc((size_t)g->n_inputs + 1, sizeof(rc_tensor));
  if (ins) rc__input_shapes_declared(g, b, ins);
  return ins;
}

void rc__input_shapes(const rc_graph *g, const rc_tensor *data, int64_t b, rc_tensor *shapes) {
  for (int i = 0; i < g->n_inputs; i++) {
    shapes[i] = data[i];
    shapes[i].data = NULL;
    shapes[i].dims[0] = b;
    /* Raw sources converted per batch take the input's declared type. */
    if (g->values[g->inputs[i]].decl.dtype == RC_DTYPE_FLOAT) shapes[i].dtype = RC_DTYPE_FLOAT;
  }
}

rc_status rc__plan_batch1(rc_plan **p, const rc_graph *g, rc_err *e) {
  *p = NULL;
  rc_tensor *ins = rc__batch1_inputs(g);
  if (!ins) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  rc_status st = rc_plan_init(p, g, ins, NULL, e);
  rc__free(ins);
  return st;
}

int64_t rc__graph_macs_batch1(const rc_graph *g, rc_err *e) {
  rc_plan *p;
  if (rc__plan_batch1(&p, g, e) != RC_OK) return -1;
  int64_t total = 0;
  for (int i = 0; i < g->n_nodes; i++) total += rc__node_macs(p, &g->nodes[i]);
  rc_plan_free(p);
  return total;
}

int64_t rc__graph_params(const rc_graph *g) {
  int64_t n = 0;
  for (int v = 0; v < g->n_values; v++) {
    const rc_tensor *t = &g->values[v].decl;
    if (g->values[v].kind == RC_VALUE_INITIALIZER && t->rank > 0 &&
        (rc_dtype_is_float(t->dtype) || t->dtype == RC_DTYPE_INT8 || t->dtype == RC_DTYPE_UINT8 ||
         t->dtype == RC_DTYPE_INT4 || t->dtype == RC_DTYPE_UINT4))
      n += rc_tensor_numel(t);
  }
  return n;
}
