/* Binding a graph's nodes to op kernels, and loading models ready to plan. */
#include "plan/load.h"

#include <string.h>

#include "ops/op.h"

static rc_status bind_ops(rc_graph *g, rc_err *e) {
  for (int i = 0; i < g->n_nodes; i++) {
    rc_node *n = &g->nodes[i];
    n->def = rc__op_find(n->op_type, n->domain, n->opset);
    if (!n->def) {
      if (n->domain && n->domain[0] && strcmp(n->domain, "ai.onnx"))
        return rc__fail(e, RC_ERR_UNSUPPORTED,
                        "%s: node '%s': op '%s' of domain '%s' is not supported", g->path, n->label,
                        n->op_type, n->domain);
      return rc__fail(e, RC_ERR_UNSUPPORTED, "%s: node '%s': op '%s' (opset %d) is not supported",
                      g->path, n->label, n->op_type, n->opset);
    }
    if (n->def->parse) {
      rc_status st = n->def->parse(n, &g->arena, e);
      if (st != RC_OK) return rc__wrap(e, "%s", g->path);
    }
  }
  return RC_OK;
}

rc_status rc__graph_finalize(rc_graph *g, rc_err *e) {
  RC_TRY(rc__graph_order(g, e));
  return bind_ops(g, e);
}

static rc_status finalize_or_free(rc_model **out, rc_model *m, rc_err *e) {
  rc_status st = rc__graph_finalize(&m->graph, e);
  if (st != RC_OK) {
    rc_model_free(m);
    return st;
  }
  *out = m;
  return RC_OK;
}

rc_status rc_model_load_mem(rc_model **out, const void *buf, size_t n, const char *name,
                            const rc_load_limits *limits, rc_err *e) {
  rc_model *m;
  RC_TRY(rc__model_load_mem_unbound(&m, buf, n, name, limits, e));
  return finalize_or_free(out, m, e);
}

rc_status rc_model_load(rc_model **out, const char *path, const rc_load_limits *limits, rc_err *e) {
  rc_model *m;
  RC_TRY(rc__model_load_unbound(&m, path, limits, e));
  return finalize_or_free(out, m, e);
}
