/* Pruning a dense model (see prune.h): the driver. It picks the prunable
 * layers, runs channel removal (prune_channels.c), then N:M and magnitude
 * sparsity (prune_sparsity.c), fills the report and, for files, proves the
 * written model loads and plans. */
#include "compress/prune.h"

#include <stdio.h>
#include <string.h>

#include <cJSON.h>

#include "compress/prune_internal.h"
#include "core/alloc.h"
#include "plan/count.h"
#include "plan/grid_range.h"
#include "plan/inspect.h"
#include "plan/load.h"
#include "plan/plan.h"

void rc_prune_report_free(rc_prune_report *r) {
  if (!r) return;
  rc__free(r->layers);
  rc__free(r->notes);
  memset(r, 0, sizeof *r);
}

/* Float weights of Conv, ConvTranspose, Gemm and MatMul, in node order; a
 * layer whose weight comes through DequantizeLinear is refused. */
static rc_status collect_layers(const rc_graph *g, layer **out, int *n, rc_err *e) {
  rc_weight_info *w;
  int nw;
  RC_TRY(rc__weights_collect(g, &w, &nw, e));
  static const char *const ops[] = {"Conv", "ConvTranspose", "Gemm", "MatMul", NULL};
  layer *l = rc__calloc((size_t)nw + 1, sizeof *l);
  if (!l) {
    rc__free(w);
    return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  }
  *n = 0;
  for (int i = 0; i < nw; i++)
    if (w[i].role == RC_ROLE_WEIGHT && w[i].quantized && op_in(&g->nodes[w[i].node], ops)) {
      /* Pruning on an integer grid would leave the float model it was
       * calibrated from behind; a pruned float model quantizes its zeros to
       * exact zeros, so that order loses nothing. */
      rc_status st = rc__fail(e, RC_ERR_UNSUPPORTED,
                              "%s: layer '%s' reads its weight '%s' through DequantizeLinear: the model is quantized "
                              "(QDQ) and prune works on float weights only; prune the float model, then quantize "
                              "the result (recoup prune, then recoup quantize)",
                              g->path, g->nodes[w[i].node].label, g->values[w[i].value].name);
      rc__free(w);
      rc__free(l);
      return st;
    }
  for (int i = 0; i < nw; i++)
    if (w[i].role == RC_ROLE_WEIGHT && !w[i].quantized && op_in(&g->nodes[w[i].node], ops) &&
        is_float_init(g, w[i].value) && g->values[w[i].value].decl.rank >= 1)
      l[(*n)++] = (layer){w[i].node, w[i].value, w[i].in_axis};
  rc__free(w);
  *out = l;
  return RC_OK;
}

static void layer_init(rc_prune_layer *pl, const rc_graph *g, const layer *l) {
  memset(pl, 0, sizeof *pl);
  const rc_node *n = &g->nodes[l->node];
  snprintf(pl->layer, sizeof pl->layer, "%s", n->label);
  snprintf(pl->op_type, sizeof pl->op_type, "%s", n->op_type);
  snprintf(pl->weight, sizeof pl->weight, "%s", g->values[l->value].name);
  pl->before = g->values[l->value].decl;
  pl->before.data = NULL;
}

static void note_append(rc_prune_layer *pl, const char *msg) {
  size_t len = strlen(pl->note);
  snprintf(pl->note + len, sizeof pl->note - len, "%s%s", len ? "; " : "", msg);
}

void rc_prune_opts_init(rc_prune_opts *o) {
  memset(o, 0, sizeof *o);
  o->scope = RC_PRUNE_GLOBAL;
}

rc_status rc_prune_model(rc_model *m, const rc_prune_opts *o, rc_prune_report *r, int **changed,
                         int *n_changed, rc_err *e) {
  memset(r, 0, sizeof *r);
  *changed = NULL;
  *n_changed = 0;
  if (!(o->sparsity >= 0 && o->sparsity < 1) || !(o->channels >= 0 && o->channels < 1))
    return rc__fail(e, RC_ERR_INVALID, "sparsity and channel fractions must be in [0, 1)");
  if (o->nm_m && (o->nm_n < 1 || o->nm_n >= o->nm_m || o->nm_m > 256))
    return rc__fail(e, RC_ERR_INVALID, "N:M needs 1 <= N < M <= 256");
  rc_graph *g = &m->graph;
  layer *ls = NULL;
  int nl = 0;
  RC_TRY(collect_layers(g, &ls, &nl, e));
  rc_status st = RC_OK;
  int *sel = rc__malloc(sizeof(int) * (size_t)(nl + 1));
  r->layers = rc__calloc((size_t)nl + 1, sizeof *r->layers);
  if (!sel || !r->layers) {
    st = rc__fail(e, RC_ERR_NOMEM, "out of memory");
    goto out;
  }
  r->n_layers = nl;
  for (int i = 0; i < nl; i++) layer_init(&r->layers[i], g, &ls[i]);
  if (o->channels > 0 && (st = rc__prune_channels(m, o->channels, ls, nl, r, changed, n_changed, e)) != RC_OK)
    goto out;
  int ns = 0;
  for (int i = 0; i < nl; i++) {
    int edge = i == 0 || i == nl - 1;
    if (edge && !o->include_first_last) {
      if (o->sparsity > 0 || o->nm_m)
        note_append(&r->layers[i], i == 0 ? "first layer kept dense" : "last layer kept dense");
      continue;
    }
    sel[ns++] = i;
  }
  if (o->nm_m) {
    for (int k = 0; k < ns; k++) {
      const layer *l = &ls[sel[k]];
      rc_tensor *t = &g->values[l->value].decl;
      if (l->in_axis < 0 || !rc__prune_keep_n_of_m(t, l->in_axis, o->nm_n, o->nm_m)) {
        char msg[120];
        snprintf(msg, sizeof msg, "left dense: %lld input channels are not a multiple of %d",
                 l->in_axis < 0 ? 0LL : (long long)t->dims[l->in_axis], o->nm_m);
        note_append(&r->layers[sel[k]], msg);
      } else if (!rc__prune_changed_add(changed, n_changed, l->value)) {
        st = rc__fail(e, RC_ERR_NOMEM, "out of memory");
        goto out;
      }
    }
  }
  if (o->sparsity > 0 && ns > 0) {
    if (o->scope == RC_PRUNE_GLOBAL) st = rc__prune_zero_smallest(g, ls, sel, ns, o->sparsity, e);
    for (int k = 0; k < ns && st == RC_OK; k++) {
      if (o->scope == RC_PRUNE_LAYER) st = rc__prune_zero_smallest(g, ls, &sel[k], 1, o->sparsity, e);
      if (st == RC_OK && !rc__prune_changed_add(changed, n_changed, ls[sel[k]].value))
        st = rc__fail(e, RC_ERR_NOMEM, "out of memory");
    }
    if (st != RC_OK) goto out;
  }
  for (int i = 0; i < nl; i++) {
    rc_prune_layer *pl = &r->layers[i];
    const rc_tensor *t = &g->values[ls[i].value].decl;
    pl->after = *t;
    pl->after.data = NULL;
    rc__sparsity(t, ls[i].in_axis, 0, &pl->zeros, &pl->nm_n, &pl->nm_m);
    if (o->sparsity > 0 && pl->zeros == rc_tensor_numel(t) && pl->zeros > 0)
      note_append(pl, "every weight is zero: the layer passes no signal (try the per-layer scope)");
    r->weights_total += rc_tensor_numel(t);
    r->weights_zero += pl->zeros;
    if ((i == 0 || i == nl - 1) && !o->include_first_last && (o->sparsity > 0 || o->nm_m))
      r->weights_kept_dense += rc_tensor_numel(t);
  }
out:
  if (st != RC_OK) {
    rc__free(*changed);
    *changed = NULL;
    *n_changed = 0;
    rc_prune_report_free(r);
  }
  rc__free(sel);
  rc__free(ls);
  return st;
}

/* Output shapes of a graph planned at batch 1, into dims (n_outputs each). */
static rc_status output_shapes(const rc_graph *g, rc_tensor *shapes, int max, rc_err *e) {
  rc_plan *p;
  RC_TRY(rc__plan_batch1(&p, g, e));
  for (int i = 0; i < g->n_outputs && i < max; i++) {
    shapes[i] = *rc_plan_tensor(p, g->outputs[i]);
    shapes[i].data = NULL;
  }
  rc_plan_free(p);
  return RC_OK;
}

static int same_shape(const rc_tensor *a, const rc_tensor *b) {
  if (a->rank != b->rank) return 0;
  for (int d = 0; d < a->rank; d++)
    if (a->dims[d] != b->dims[d]) return 0;
  return 1;
}

enum { MAX_CHECKED_OUTPUTS = 16 };

/* Record in the file which weights were pruned (RC_PRUNED_METADATA), joined
 * with what an earlier pruning recorded, so that distill knows these zeros
 * are pruned even after quantization. */
static rc_status record_pruned(rc_model *m, const int *changed, int n_changed, rc_err *e) {
  cJSON *root = NULL, *list = NULL;
  const char *old = rc_model_metadata(m, RC_PRUNED_METADATA);
  if (old && (root = cJSON_Parse(old)) && !cJSON_IsArray(list = cJSON_GetObjectItemCaseSensitive(root, "tensors"))) {
    cJSON_Delete(root);
    root = NULL;
  }
  if (!root) {
    root = cJSON_CreateObject();
    cJSON_AddNumberToObject(root, "schema", 1);
    list = cJSON_AddArrayToObject(root, "tensors");
  }
  int added = 0;
  for (int i = 0; i < n_changed && list; i++) {
    const rc_value *v = &m->graph.values[changed[i]];
    int64_t zeros, n = rc_tensor_numel(&v->decl);
    int nm_n, nm_m;
    if (v->decl.dtype != RC_DTYPE_FLOAT || !v->decl.data || !n) continue;
    rc__sparsity(&v->decl, -1, 0, &zeros, &nm_n, &nm_m);
    int known = 0;
    const cJSON *it;
    cJSON_ArrayForEach(it, list) known |= cJSON_IsString(it) && !strcmp(it->valuestring, v->name);
    if (zeros && !known) added += cJSON_AddItemToArray(list, cJSON_CreateString(v->name));
  }
  char *text = added ? cJSON_PrintUnformatted(root) : NULL;
  rc_status st = !added ? RC_OK : text ? rc_model_edit_set_metadata(m, RC_PRUNED_METADATA, text, e)
                                       : rc__fail(e, RC_ERR_NOMEM, "%s: out of memory", m->path);
  cJSON_free(text);
  cJSON_Delete(root);
  return st;
}

rc_status rc_prune_file(const char *in, const char *out, const rc_prune_opts *o, rc_prune_report *r,
                        rc_err *e) {
  memset(r, 0, sizeof *r);
  rc_model *m = NULL, *w = NULL;
  int *changed = NULL, n_changed = 0;
  rc_tensor before[MAX_CHECKED_OUTPUTS], after[MAX_CHECKED_OUTPUTS];
  RC_TRY(rc_model_load(&m, in, NULL, e));
  rc_status st = output_shapes(&m->graph, before, MAX_CHECKED_OUTPUTS, e);
  if (st != RC_OK) {
    rc__wrap(e, "%s: the dense model does not plan at batch 1", in);
    goto done;
  }
  r->params_before = rc__graph_params(&m->graph);
  r->macs_before = rc__graph_macs_batch1(&m->graph, e);
  rc_prune_report pr;
  if ((st = rc_prune_model(m, o, &pr, &changed, &n_changed, e)) != RC_OK) goto done;
  pr.params_before = r->params_before;
  pr.macs_before = r->macs_before;
  *r = pr;
  if ((st = record_pruned(m, changed, n_changed, e)) != RC_OK) goto done;
  if ((st = rc_model_save(m, out, changed, n_changed, e)) != RC_OK) goto done;
  /* Prove the written file is a model recoup can run. */
  if ((st = rc_model_load(&w, out, NULL, e)) != RC_OK ||
      (st = output_shapes(&w->graph, after, MAX_CHECKED_OUTPUTS, e)) != RC_OK) {
    rc__wrap(e, "%s: the pruned model written does not load and plan (a recoup bug; please report it)", out);
    goto done;
  }
  for (int i = 0; i < m->graph.n_outputs && i < MAX_CHECKED_OUTPUTS; i++)
    if (i >= w->graph.n_outputs || !same_shape(&before[i], &after[i])) {
      char a[96], b[96];
      st = rc__fail(e, RC_ERR_SHAPE, "%s: output %d has shape %s where the dense model's is %s (a recoup bug)",
                    out, i, rc_shape_str(&after[i], a, sizeof a), rc_shape_str(&before[i], b, sizeof b));
      goto done;
    }
  r->params_after = rc__graph_params(&w->graph);
  r->macs_after = rc__graph_macs_batch1(&w->graph, e);
done:
  if (st != RC_OK) rc_prune_report_free(r);
  rc__free(changed);
  rc_model_free(m);
  rc_model_free(w);
  return st;
}
