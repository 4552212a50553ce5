/* recoup/eval.h per output: the terms of train/output_loss.h parsed from
 * text, bound to the model's plan and the reference's, and measured over a
 * dataset with dense labels. */
#include "api/eval_outputs.h"

#include <math.h>
#include <stdio.h>
#include <string.h>

#include "core/alloc.h"
#include "core/status.h"
#include "onnx/model.h"
#include "plan/plan.h"
#include "train/outputs.h"

rc_status rc_eval_output_term_check(const char *text, rc_err *e) {
  rc_output_loss o;
  return rc_output_loss_parse(&o, text, e);
}

void rc__output_sample_shape(rc_tensor *t, const int64_t *dims, int rank, int skip_axis) {
  memset(t, 0, sizeof *t);
  t->dtype = RC_DTYPE_FLOAT;
  for (int d = 1; d < rank; d++)
    if (d != skip_axis) t->dims[t->rank++] = dims[d];
}

rc_status rc__check_per_sample(const rc_array *a, const char *name, int64_t n, const rc_tensor *want,
                               const char *what, rc_err *e) {
  char sa[128], sb[128];
  rc_tensor got = a->t;
  int ok = got.rank == want->rank + 1 && got.dims[0] == n;
  for (int d = 0; ok && d < want->rank; d++) ok = got.dims[d + 1] == want->dims[d];
  if (ok) return RC_OK;
  rc_tensor full = *want;
  full.rank = want->rank + 1;
  memmove(full.dims + 1, want->dims, sizeof(int64_t) * (size_t)want->rank);
  full.dims[0] = n;
  return rc__fail(e, RC_ERR_SHAPE, "%s: %s of shape %s, expected %s", name, what, rc_shape_str(&got, sa, sizeof sa),
                  rc_shape_str(&full, sb, sizeof sb));
}

rc_status rc_eval_dense_labels(rc_array *out, const rc_array *raw, const char *name, int64_t n,
                               const int64_t *dims, int rank, int axis, int32_t ignore, rc_err *e) {
  memset(out, 0, sizeof *out);
  rc_tensor want;
  rc__output_sample_shape(&want, dims, rank, axis);
  RC_TRY(rc__check_per_sample(raw, name, n, &want, "dense labels", e));
  rc_array f = {0};
  if (rc_data_to_float_array(&f, raw, NULL, e) != RC_OK) return rc_err_prefix(e, "%s", name);
  int64_t count = rc_tensor_numel(&f.t), k = dims[axis];
  int32_t *lab = rc__malloc(sizeof(int32_t) * (size_t)count + 1);
  if (!lab) {
    rc_array_free(&f);
    return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory", name);
  }
  rc_status s = RC_OK;
  const float *v = f.t.data;
  for (int64_t i = 0; i < count; i++) {
    if (v[i] != floorf(v[i]) || ((v[i] < 0 || v[i] >= (float)k) && v[i] != (float)ignore)) {
      s = rc__fail(e, RC_ERR_INVALID,
                   "%s: label %g at element %lld is not a class in [0, %lld) nor the ignore value %ld", name,
                   (double)v[i], (long long)i, (long long)k, (long)ignore);
      break;
    }
    lab[i] = (int32_t)v[i];
  }
  out->t = f.t;
  out->t.dtype = RC_DTYPE_INT32;
  out->t.data = lab;
  out->owned = lab;
  rc_array_free(&f);
  if (s != RC_OK) rc_array_free(out);
  return s;
}

static int find_output(const rc_graph *g, const char *name) {
  for (int j = 0; j < g->n_outputs; j++)
    if (!strcmp(g->values[g->outputs[j]].name, name)) return g->outputs[j];
  return -1;
}

/* The default terms: kd over axis 1 of every float output of rank >= 3. */
static rc_status default_terms(rc_output_loss *specs, int *n, rc_plan *p, const rc_model *m, rc_err *e) {
  const rc_graph *g = &m->graph;
  for (int j = 0; j < g->n_outputs && *n < RC_OUTPUTS_MAX; j++) {
    const rc_tensor *t = rc_plan_tensor(p, g->outputs[j]);
    if (t->dtype != RC_DTYPE_FLOAT || t->rank < 3) continue;
    char spec[200];
    snprintf(spec, sizeof spec, "%s=kd:axis=1", g->values[g->outputs[j]].name);
    if (strlen(g->values[g->outputs[j]].name) > 120) continue;
    RC_TRY(rc_output_loss_parse(&specs[*n], spec, e));
    (*n)++;
  }
  if (!*n)
    return rc__fail(e, RC_ERR_INVALID, "%s: no float output of rank 3 or more; name the outputs with output terms",
                    m->path);
  return RC_OK;
}

/* The terms of s (or the default ones), checked against the model's outputs;
 * terms that need targets become mse (evaluation has no targets). */
static rc_status terms_of(rc_output_loss *specs, int *n, rc_plan *p, const rc_model *m, const rc_eval_settings *s,
                          rc_err *e) {
  *n = 0;
  if (s->n_output_terms > RC_OUTPUTS_MAX)
    return rc__fail(e, RC_ERR_INVALID, "at most %d output terms, got %d", RC_OUTPUTS_MAX, s->n_output_terms);
  for (int i = 0; i < s->n_output_terms; i++) RC_TRY(rc_output_loss_parse(&specs[(*n)++], s->output_terms[i], e));
  if (!*n) RC_TRY(default_terms(specs, n, p, m, e));
  for (int i = 0; i < *n; i++) {
    if (rc_out_term_needs_targets(specs[i].term)) specs[i].term = RC_OUT_MSE;
    int v = find_output(&m->graph, specs[i].output);
    if (v < 0)
      return rc__fail(e, RC_ERR_INVALID, "output term on '%s': %s has no such output", specs[i].output, m->path);
    const rc_tensor *t = rc_plan_tensor(p, v);
    rc_output_loss r = specs[i];
    RC_TRY(rc_output_loss_resolve(&r, t->dims, t->rank, 1.0f, e));
  }
  return RC_OK;
}

/* Dense labels belong to the first kd output: its name into label_output. */
static rc_status labels_of(rc_array *out, char *label_output, size_t cap, const rc_output_loss *specs, int n,
                           rc_plan *p, const rc_model *m, const rc_dataset *d, const rc_eval_settings *s,
                           rc_err *e) {
  for (int i = 0; i < n; i++) {
    if (specs[i].term != RC_OUT_KD) continue;
    const rc_tensor *t = rc_plan_tensor(p, find_output(&m->graph, specs[i].output));
    rc_output_loss r = specs[i];
    RC_TRY(rc_output_loss_resolve(&r, t->dims, t->rank, 1.0f, e));
    snprintf(label_output, cap, "%s", r.output);
    return rc_eval_dense_labels(out, s->dense_labels, s->dense_labels_name ? s->dense_labels_name : "dense labels",
                                d->inputs[0].dims[0], t->dims, t->rank, r.axis, s->ignore_label, e);
  }
  return rc__fail(e, RC_ERR_INVALID, "dense labels need a kd output term on the output they label");
}

rc_status rc__eval_outputs(rc_metrics *m, rc_model *model, rc_model *ref, const rc_dataset *d, int64_t batch,
                           const rc_eval_settings *s, rc_output_part *failed, rc_err *e) {
  rc_tensor shapes[RC_DATASET_MAX_INPUTS];
  rc__eval_batch_shapes(shapes, d, batch);
  rc_plan *pm = NULL, *pr = NULL;
  rc_outputs *bound = NULL;
  rc_output_loss specs[RC_OUTPUTS_MAX];
  int n = 0;
  rc_array labels = {0};
  char label_output[128] = "";
  rc_output_side side;
  memset(&side, 0, sizeof side);
  side.ignore = s->ignore_label;
  rc_status st = rc_plan_init(&pm, &model->graph, shapes, NULL, e);
  if (st == RC_OK && ref) st = rc_plan_init(&pr, &ref->graph, shapes, NULL, e);
  if (st == RC_OK && (st = terms_of(specs, &n, pm, model, s, e)) != RC_OK) *failed = RC_OUTPUT_PART_TERMS;
  if (st == RC_OK && s->dense_labels) {
    st = labels_of(&labels, label_output, sizeof label_output, specs, n, pm, model, d, s, e);
    if (st == RC_OK) side.labels = labels.t.data;
    else *failed = RC_OUTPUT_PART_LABELS;
  }
  if (st == RC_OK)
    st = rc__outputs_create(&bound, specs, n, 1.0f, pr ? pr : pm, pm, label_output[0] ? label_output : NULL, e);
  if (st == RC_OK) st = rc__outputs_validate(bound, pr ? pr : pm, pm, d, &side, d->index, m, e);
  if (st == RC_OK && !ref) m->has_ref = 0;
  rc__outputs_free(bound);
  rc_array_free(&labels);
  rc_plan_free(pm);
  rc_plan_free(pr);
  return st;
}
