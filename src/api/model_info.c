/* Inspection of a loaded model for recoup/model.h: inputs and outputs,
 * counts, weights and grids, as plain lists over the internal graph. */
#include <string.h>

#include "core/alloc.h"
#include "core/status.h"
#include "onnx/io_decl.h"
#include "onnx/model.h"
#include "plan/count.h"
#include "plan/inspect.h"
#include "plan/plan.h"
#include "recoup/model.h"

const char *rc_model_path(const rc_model *m) { return m->path; }

int64_t rc_model_file_bytes(const rc_model *m) { return (int64_t)m->file_bytes; }

int64_t rc_model_ir_version(const rc_model *m) { return m->graph.ir_version; }

int rc_model_opset(const rc_model *m) { return m->graph.opset; }

int64_t rc_model_params(const rc_model *m) { return rc__graph_params(&m->graph); }

rc_status rc_model_macs(const rc_model *m, int64_t *macs, rc_err *e) {
  rc_err local = {0};
  *macs = rc__graph_macs_batch1(&m->graph, e ? e : &local);
  if (*macs >= 0) return RC_OK;
  return e ? e->code : local.code;
}

rc_status rc_model_declared(const rc_model *m, int is_output, int i, rc_io_decl *d, rc_err *e) {
  const rc_graph *g = &m->graph;
  int n = is_output ? g->n_outputs : g->n_inputs;
  if (i < 0 || i >= n)
    return rc__fail(e, RC_ERR_INVALID, "%s: %s %d requested, the model has %d", m->path,
                    is_output ? "output" : "input", i, n);
  const char *name = g->values[is_output ? g->outputs[i] : g->inputs[i]].name;
  RC_TRY(rc_model_io_decl(m, is_output, i, name, d, e));
  d->name = name;
  return RC_OK;
}

void rc_model_batch_inputs(const rc_model *m, int64_t b, rc_tensor *out) {
  rc__input_shapes_declared(&m->graph, b, out);
}

int rc_model_n_inputs(const rc_model *m) { return m->graph.n_inputs; }

int rc_model_n_outputs(const rc_model *m) { return m->graph.n_outputs; }

static rc_model_io io_of(const rc_graph *g, int value) {
  rc_model_io io;
  io.name = g->values[value].name;
  io.shape = g->values[value].decl;
  io.shape.data = NULL;
  return io;
}

rc_status rc_model_input(const rc_model *m, int i, rc_model_io *out, rc_err *e) {
  const rc_graph *g = &m->graph;
  if (i < 0 || i >= g->n_inputs)
    return rc__fail(e, RC_ERR_INVALID, "%s: input %d requested, the model has %d", m->path, i, g->n_inputs);
  *out = io_of(g, g->inputs[i]);
  return RC_OK;
}

rc_status rc_model_output(const rc_model *m, int i, rc_model_io *out, rc_err *e) {
  const rc_graph *g = &m->graph;
  if (i < 0 || i >= g->n_outputs)
    return rc__fail(e, RC_ERR_INVALID, "%s: output %d requested, the model has %d", m->path, i, g->n_outputs);
  *out = io_of(g, g->outputs[i]);
  rc_plan *p = NULL;
  rc_err ignored;
  /* A model that does not plan still has a name and a declared shape. */
  if (rc__plan_batch1(&p, g, &ignored) == RC_OK) {
    out->shape = *rc_plan_tensor(p, g->outputs[i]);
    out->shape.data = NULL;
  }
  rc_plan_free(p);
  return RC_OK;
}

rc_status rc_model_output_shapes(const rc_model *m, const rc_tensor *inputs, rc_tensor *out, rc_err *e) {
  const rc_graph *g = &m->graph;
  rc_plan *p = NULL;
  RC_TRY(rc_plan_init(&p, g, inputs, NULL, e));
  for (int j = 0; j < g->n_outputs; j++) {
    out[j] = *rc_plan_tensor(p, g->outputs[j]);
    out[j].data = NULL;
  }
  rc_plan_free(p);
  return RC_OK;
}

rc_status rc_model_summarize(const rc_model *m, rc_model_summary *out, rc_err *e) {
  const rc_graph *g = &m->graph;
  memset(out, 0, sizeof *out);
  out->n_nodes = g->n_nodes;
  for (int v = 0; v < g->n_values; v++) out->n_initializers += g->values[v].kind == RC_VALUE_INITIALIZER;
  out->params = rc__graph_params(g);
  rc_err ignored;
  out->macs = rc__graph_macs_batch1(g, &ignored);
  rc_weight_info *w = NULL;
  rc_grid_info *gr = NULL;
  int n_w = 0, n_gr = 0;
  RC_TRY(rc__weights_collect(g, &w, &n_w, e));
  for (int i = 0; i < n_w; i++) {
    if (w[i].role != RC_ROLE_WEIGHT) continue;
    out->weights_total += w[i].numel;
    out->weights_zero += w[i].zeros;
  }
  rc__free(w);
  RC_TRY(rc__grids_collect(g, &gr, &n_gr, e));
  out->n_grids = n_gr;
  rc__free(gr);
  return RC_OK;
}

rc_status rc_model_op_counts(const rc_model *m, rc_model_op_count **out, int *n, rc_err *e) {
  const rc_graph *g = &m->graph;
  *out = NULL;
  *n = 0;
  rc_model_op_count *c = rc__calloc((size_t)g->n_nodes + 1, sizeof *c);
  if (!c) return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory counting ops", m->path);
  int k = 0;
  for (int i = 0; i < g->n_nodes; i++) {
    const rc_node *nd = &g->nodes[i];
    int j = 0;
    while (j < k && (strcmp(c[j].op_type, nd->op_type) || strcmp(c[j].domain, nd->domain))) j++;
    if (j == k) {
      c[k].op_type = nd->op_type;
      c[k].domain = nd->domain;
      k++;
    }
    c[j].count++;
  }
  *out = c;
  *n = k;
  return RC_OK;
}

static rc_weight_kind kind_of(rc_weight_role r) {
  switch (r) {
    case RC_ROLE_BIAS: return RC_WEIGHT_BIAS;
    case RC_ROLE_NORM: return RC_WEIGHT_NORM;
    case RC_ROLE_AFFINE: return RC_WEIGHT_AFFINE;
    default: return RC_WEIGHT_KERNEL;
  }
}

rc_status rc_model_weights(const rc_model *m, rc_model_weight **out, int *n, rc_err *e) {
  const rc_graph *g = &m->graph;
  *out = NULL;
  *n = 0;
  rc_weight_info *w = NULL;
  int n_w = 0;
  RC_TRY(rc__weights_collect(g, &w, &n_w, e));
  rc_model_weight *r = rc__calloc((size_t)n_w + 1, sizeof *r);
  if (!r) {
    rc__free(w);
    return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory listing weights", m->path);
  }
  for (int i = 0; i < n_w; i++) {
    const rc_value *v = &g->values[w[i].value];
    const rc_node *nd = &g->nodes[w[i].node];
    r[i].name = v->name;
    r[i].layer = nd->label;
    r[i].op_type = nd->op_type;
    r[i].kind = kind_of(w[i].role);
    r[i].shape = v->decl;
    r[i].shape.data = NULL;
    r[i].quantized = w[i].quantized;
    r[i].in_axis = w[i].in_axis;
    r[i].numel = w[i].numel;
    r[i].zeros = w[i].zeros;
    r[i].sparsity = w[i].numel ? (double)w[i].zeros / (double)w[i].numel : 0;
    r[i].nm_n = w[i].nm_n;
    r[i].nm_m = w[i].nm_m;
  }
  rc__free(w);
  *out = r;
  *n = n_w;
  return RC_OK;
}

rc_status rc_model_grids(const rc_model *m, rc_model_grid **out, int *n, rc_err *e) {
  const rc_graph *g = &m->graph;
  *out = NULL;
  *n = 0;
  rc_grid_info *gi = NULL;
  int n_g = 0;
  RC_TRY(rc__grids_collect(g, &gi, &n_g, e));
  rc_model_grid *r = rc__calloc((size_t)n_g + 1, sizeof *r);
  if (!r) {
    rc__free(gi);
    return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory listing grids", m->path);
  }
  for (int i = 0; i < n_g; i++) {
    r[i].tensor = g->values[gi[i].value].name;
    r[i].node = g->nodes[gi[i].node].label;
    r[i].is_weight = gi[i].is_weight;
    r[i].dtype = gi[i].dtype;
    r[i].axis = gi[i].axis;
    r[i].n_scale = gi[i].n_scale;
    r[i].scale = gi[i].scale;
    r[i].scale_min = r[i].scale_max = gi[i].n_scale ? gi[i].scale[0] : 0;
    for (int64_t k = 1; k < gi[i].n_scale; k++) {
      if (gi[i].scale[k] < r[i].scale_min) r[i].scale_min = gi[i].scale[k];
      if (gi[i].scale[k] > r[i].scale_max) r[i].scale_max = gi[i].scale[k];
    }
  }
  rc__free(gi);
  *out = r;
  *n = n_g;
  return RC_OK;
}

void rc_model_list_free(void *list) { rc__free(list); }
