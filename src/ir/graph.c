/* Graph checks done once at load time: references and topological order.
 * Looking up ops and parsing their attributes is the planner's part
 * (plan/load.c), so the IR never depends on the kernels. */
#include <string.h>

#include "core/alloc.h"
#include "ir/ir.h"

int rc__graph_find_value(const rc_graph *g, const char *name) {
  for (int i = 0; i < g->n_values; i++)
    if (!strcmp(g->values[i].name, name)) return i;
  return -1;
}

int rc__graph_find_in(const rc_graph *g, const int *vals, int n, const char *name) {
  for (int i = 0; i < n; i++)
    if (!strcmp(g->values[vals[i]].name, name)) return i;
  return -1;
}

const rc_attr *rc__attr_find(const rc_node *n, const char *name) {
  for (int i = 0; i < n->n_attrs; i++)
    if (!strcmp(n->attrs[i].name, name)) return &n->attrs[i];
  return NULL;
}

int64_t rc__attr_int(const rc_node *n, const char *name, int64_t dflt) {
  const rc_attr *a = rc__attr_find(n, name);
  return a && a->type == RC_ATTR_INT ? a->i : dflt;
}

float rc__attr_float(const rc_node *n, const char *name, float dflt) {
  const rc_attr *a = rc__attr_find(n, name);
  return a && a->type == RC_ATTR_FLOAT ? a->f : dflt;
}

const char *rc__attr_string(const rc_node *n, const char *name, const char *dflt) {
  const rc_attr *a = rc__attr_find(n, name);
  return a && a->type == RC_ATTR_STRING ? a->s : dflt;
}

static rc_status check_references(const rc_graph *g, rc_err *e) {
  for (int i = 0; i < g->n_nodes; i++) {
    const rc_node *n = &g->nodes[i];
    for (int k = 0; k < n->n_in; k++) {
      int v = n->in[k];
      if (v < 0) continue;
      const rc_value *val = &g->values[v];
      if (val->kind == RC_VALUE_ACTIVATION && val->producer < 0)
        return rc__fail(e, RC_ERR_FORMAT,
                        "%s: node '%s' (%s): input '%s' is not produced by any node, graph input "
                        "or initializer",
                        g->path, n->label, n->op_type, val->name);
    }
  }
  for (int i = 0; i < g->n_outputs; i++) {
    const rc_value *val = &g->values[g->outputs[i]];
    if (val->kind == RC_VALUE_ACTIVATION && val->producer < 0)
      return rc__fail(e, RC_ERR_FORMAT, "%s: graph output '%s' is not produced by any node", g->path,
                      val->name);
  }
  return RC_OK;
}

/* Kahn's algorithm over consumer lists. Ready nodes are taken lowest file
 * index first (a min-heap would be exact; a rescan from the lowest ready
 * index keeps files that are already in order unchanged and stays linear for
 * them). */
static rc_status sort_nodes(rc_graph *g, rc_err *e) {
  int nn = g->n_nodes, nv = g->n_values;
  if (nn == 0) return RC_OK;
  size_t n_edges = 0;
  for (int i = 0; i < nn; i++) n_edges += (size_t)g->nodes[i].n_in;
  int *pending = rc__calloc((size_t)nn, sizeof(int));
  int *order = rc__malloc(sizeof(int) * (size_t)nn);
  int *start = rc__calloc((size_t)nv + 1, sizeof(int));
  int *fill = rc__calloc((size_t)nv + 1, sizeof(int));
  int *users = rc__malloc(sizeof(int) * (n_edges + 1));
  int *queue = rc__malloc(sizeof(int) * (size_t)nn);
  rc_node *sorted = rc__arena_alloc(&g->arena, sizeof(rc_node) * (size_t)nn);
  rc_status st = RC_OK;
  if (!pending || !order || !start || !fill || !users || !queue || !sorted) {
    st = rc__fail(e, RC_ERR_NOMEM, "%s: out of memory while ordering nodes", g->path);
    goto out;
  }
  for (int i = 0; i < nn; i++)
    for (int k = 0; k < g->nodes[i].n_in; k++) {
      int v = g->nodes[i].in[k];
      if (v < 0) continue;
      start[v + 1]++;
      if (g->values[v].producer >= 0) pending[i]++;
    }
  for (int v = 0; v < nv; v++) start[v + 1] += start[v];
  for (int i = 0; i < nn; i++)
    for (int k = 0; k < g->nodes[i].n_in; k++) {
      int v = g->nodes[i].in[k];
      if (v >= 0) users[start[v] + fill[v]++] = i;
    }
  int head = 0, tail = 0, placed = 0;
  for (int i = 0; i < nn; i++)
    if (!pending[i]) queue[tail++] = i;
  while (head < tail) {
    int i = queue[head++];
    order[placed++] = i;
    const rc_node *n = &g->nodes[i];
    for (int o = 0; o < n->n_out; o++) {
      int v = n->out[o];
      if (v < 0) continue;
      for (int u = start[v]; u < start[v + 1]; u++)
        if (--pending[users[u]] == 0) queue[tail++] = users[u];
    }
  }
  if (placed < nn) {
    for (int i = 0; i < nn; i++)
      if (pending[i] > 0) {
        st = rc__fail(e, RC_ERR_FORMAT, "%s: the graph has a cycle through node '%s' (%s)", g->path,
                      g->nodes[i].label, g->nodes[i].op_type);
        goto out;
      }
  }
  int *new_index = pending; /* reused: old node index -> new */
  for (int i = 0; i < nn; i++) {
    sorted[i] = g->nodes[order[i]];
    new_index[order[i]] = i;
  }
  for (int v = 0; v < nv; v++)
    if (g->values[v].producer >= 0) g->values[v].producer = new_index[g->values[v].producer];
  g->nodes = sorted;
out:
  rc__free(pending);
  rc__free(order);
  rc__free(start);
  rc__free(fill);
  rc__free(users);
  rc__free(queue);
  return st;
}

rc_status rc__graph_order(rc_graph *g, rc_err *e) {
  RC_TRY(check_references(g, e));
  return sort_nodes(g, e);
}
