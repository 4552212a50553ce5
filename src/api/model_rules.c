/* recoup/model.h: what distill makes of a model's weights and grids, for
 * inspection: the integer range of every grid and what each weight's zeros
 * mean under a mask mode (the rules of plan/grid_range.h and
 * plan/mask_rule.h, read with the file's own notes). */
#include <string.h>

#include "core/alloc.h"
#include "core/status.h"
#include "onnx/model.h"
#include "ops/op.h"
#include "plan/grid_range.h"
#include "plan/inspect.h"
#include "plan/mask_rule.h"
#include "recoup/model.h"

const char *rc_mask_mode_name(rc_mask_mode m) { return rc__mask_mode_name(m); }

int rc_mask_mode_parse(const char *s, rc_mask_mode *m) { return rc__mask_mode_parse(s, m); }

static rc_status notes_of(rc_file_notes *notes, const rc_model *m, rc_err *e) {
  return rc__file_notes_parse(notes, rc_model_metadata(m, RC_RANGES_METADATA),
                              rc_model_metadata(m, RC_PRUNED_METADATA), m->path, e);
}

static rc_status ranges_of(const rc_model *m, const rc_file_notes *notes, const rc_grid_info *gr, int n_gr,
                           rc_int_range *out, rc_err *e) {
  const rc_graph *g = &m->graph;
  for (int i = 0; i < n_gr; i++) {
    RC_TRY(rc__grid_range(g, notes, gr[i].is_weight ? gr[i].value : -1, gr[i].dtype, g->values[gr[i].value].name,
                          &out[i], e));
    int q = g->values[gr[i].value].producer; /* a float weight quantized at run time */
    if (!gr[i].is_weight && q >= 0 && !strcmp(g->nodes[q].op_type, "QuantizeLinear") &&
        out[i].source == RC_RANGE_DTYPE)
      rc__grid_range_of_float_weight(g, q, &out[i]);
  }
  return RC_OK;
}

rc_status rc_model_grid_ranges(const rc_model *m, rc_int_range **out, int *n, rc_err *e) {
  *out = NULL;
  *n = 0;
  rc_grid_info *gr = NULL;
  int n_gr = 0;
  RC_TRY(rc__grids_collect(&m->graph, &gr, &n_gr, e));
  rc_file_notes notes;
  rc_status s = notes_of(&notes, m, e);
  if (s != RC_OK) {
    rc__free(gr);
    return s;
  }
  rc_int_range *r = rc__calloc((size_t)n_gr + 1, sizeof *r);
  if (!r) s = rc__fail(e, RC_ERR_NOMEM, "%s: out of memory listing grid ranges", m->path);
  if (s == RC_OK) s = ranges_of(m, &notes, gr, n_gr, r, e);
  rc__file_notes_free(&notes);
  rc__free(gr);
  if (s != RC_OK) {
    rc__free(r);
    return s;
  }
  *out = r;
  *n = n_gr;
  return RC_OK;
}

/* Grid i, or an error naming the index. */
static rc_status grid_at(const rc_model *m, int i, rc_grid_info *out, rc_err *e) {
  rc_grid_info *gr = NULL;
  int n_gr = 0;
  RC_TRY(rc__grids_collect(&m->graph, &gr, &n_gr, e));
  rc_status s = RC_OK;
  if (i < 0 || i >= n_gr)
    s = rc__fail(e, RC_ERR_INVALID, "%s: grid %d requested, the model has %d", m->path, i, n_gr);
  else
    *out = gr[i];
  rc__free(gr);
  return s;
}

rc_status rc_model_grid_zero_points(const rc_model *m, int i, int64_t *out, rc_err *e) {
  rc_grid_info g;
  memset(&g, 0, sizeof g);
  RC_TRY(grid_at(m, i, &g, e));
  const rc_tensor *zp = g.zero_point;
  for (int64_t k = 0; k < g.n_scale; k++)
    out[k] = zp && zp->data ? rc__int_at(zp, rc_tensor_numel(zp) > 1 ? k : 0) : 0;
  return RC_OK;
}

static const rc_grid_info *grid_of_value(const rc_grid_info *gr, int n_gr, int v) {
  for (int i = 0; i < n_gr; i++)
    if (gr[i].is_weight && gr[i].value == v) return &gr[i];
  return NULL;
}

static void masks_of(const rc_model *m, rc_mask_mode mode, const rc_file_notes *notes, const rc_weight_info *w,
                     int n_w, const rc_grid_info *gr, int n_gr, rc_mask_choice *out) {
  const rc_graph *g = &m->graph;
  for (int i = 0; i < n_w; i++) {
    if (w[i].role != RC_ROLE_WEIGHT) continue;
    const rc_value *v = &g->values[w[i].value];
    const rc_grid_info *q = w[i].quantized ? grid_of_value(gr, n_gr, w[i].value) : NULL;
    int64_t channels = 1, inner = 1;
    if (q && q->axis >= 0) {
      channels = q->n_scale;
      for (int d = q->axis + 1; d < v->decl.rank; d++) inner *= v->decl.dims[d];
    }
    rc__mask_choose(mode, notes, v->name, &v->decl, q != NULL, q ? q->zero_point : NULL, channels, inner, &out[i]);
  }
}

rc_status rc_model_masks(const rc_model *m, rc_mask_mode mode, rc_mask_choice **out, int *n, rc_err *e) {
  *out = NULL;
  *n = 0;
  rc_weight_info *w = NULL;
  rc_grid_info *gr = NULL;
  int n_w = 0, n_gr = 0;
  rc_file_notes notes;
  memset(&notes, 0, sizeof notes);
  rc_status s = rc__weights_collect(&m->graph, &w, &n_w, e);
  if (s == RC_OK) s = rc__grids_collect(&m->graph, &gr, &n_gr, e);
  if (s == RC_OK) s = notes_of(&notes, m, e);
  rc_mask_choice *c = NULL;
  if (s == RC_OK && !(c = rc__calloc((size_t)n_w + 1, sizeof *c)))
    s = rc__fail(e, RC_ERR_NOMEM, "%s: out of memory listing masks", m->path);
  if (s == RC_OK) {
    masks_of(m, mode, &notes, w, n_w, gr, n_gr, c);
    *out = c;
    *n = n_w;
  }
  rc__file_notes_free(&notes);
  rc__free(w);
  rc__free(gr);
  return s;
}
