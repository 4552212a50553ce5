/* recoup/outputs.h: per-output terms with their side data read and checked
 * against the model's planned outputs, and evaluation with them (the bound
 * terms of train/outputs.h). */
#include "recoup/outputs.h"

#include <stdio.h>
#include <string.h>

#include "api/eval_outputs.h"
#include "core/alloc.h"
#include "core/status.h"
#include "onnx/model.h"
#include "plan/plan.h"
#include "train/outputs.h"

void rc_output_set_init(rc_output_set *o) {
  memset(o, 0, sizeof *o);
  o->ignore = RC_OUTPUT_DEFAULT_IGNORE;
}

void rc_output_set_free(rc_output_set *o) {
  for (int i = 0; i < RC_DISTILL_OUTPUTS_MAX; i++) {
    rc_array_free(&o->target_arrays[i]);
    rc_array_free(&o->val_target_arrays[i]);
  }
  rc_array_free(&o->labels);
  rc_array_free(&o->val_labels);
}

rc_status rc_output_set_add(rc_output_set *o, const char *spec, rc_err *e) {
  if (o->n == RC_DISTILL_OUTPUTS_MAX)
    return rc_err_set(e, RC_ERR_LIMIT, "at most %d per-output terms", RC_DISTILL_OUTPUTS_MAX);
  RC_TRY(rc_output_loss_parse(&o->specs[o->n], spec, e));
  o->n++;
  return RC_OK;
}

rc_status rc_output_set_add_targets(rc_output_set *o, const char *text, int val, rc_err *e) {
  int *n = val ? &o->n_val_targets : &o->n_targets;
  const char **list = val ? o->val_targets : o->targets;
  if (!strchr(text, '=') || text[0] == '=')
    return rc_err_set(e, RC_ERR_INVALID, "expected OUTPUT=FILE, got '%s'", text);
  if (*n == RC_DISTILL_OUTPUTS_MAX)
    return rc_err_set(e, RC_ERR_LIMIT, "more than %d target files", RC_DISTILL_OUTPUTS_MAX);
  list[(*n)++] = text;
  return RC_OK;
}

rc_status rc_output_labels_read(rc_array *out, const char *path, int64_t n, const int64_t *dims, int rank,
                                int axis, long ignore, rc_err *e) {
  rc_array raw = {0};
  memset(out, 0, sizeof *out);
  RC_TRY(rc_array_read(&raw, path, NULL, 0, e));
  rc_status s = rc_eval_dense_labels(out, &raw, path, n, dims, rank, axis, (int32_t)ignore, e);
  rc_array_free(&raw);
  return s;
}

static rc_status read_targets(rc_array *out, const char *path, int64_t n, const rc_tensor *want, rc_err *e) {
  rc_array raw = {0};
  RC_TRY(rc_array_read(&raw, path, NULL, 0, e));
  rc_status s = rc__check_per_sample(&raw, path, n, want, "targets", e);
  if (s == RC_OK && raw.t.dtype == RC_DTYPE_FLOAT) {
    *out = raw; /* float32 as is: NaN marks a position without a target */
    return RC_OK;
  }
  if (s == RC_OK && (s = rc_data_to_float_array(out, &raw, NULL, e)) != RC_OK) rc_err_prefix(e, "%s", path);
  rc_array_free(&raw);
  return s;
}

static int spec_of(const rc_output_set *o, const char *name, int need_targets) {
  for (int i = 0; i < o->n; i++)
    if (!strcmp(o->specs[i].output, name) && (!need_targets || rc_out_term_needs_targets(o->specs[i].term)))
      return i;
  return -1;
}

static int find_value(const rc_graph *g, const char *name) {
  for (int j = 0; j < g->n_outputs; j++)
    if (!strcmp(g->values[g->outputs[j]].name, name)) return g->outputs[j];
  return -1;
}

/* Targets given as OUTPUT=FILE for one set of samples. */
static rc_status load_targets(rc_output_set *o, const char *const *list, int n_list, rc_array *arrays, int64_t n,
                              rc_plan *p, const rc_graph *g, rc_output_side *side, rc_err *e) {
  for (int t = 0; t < n_list; t++) {
    const char *eq = strchr(list[t], '=');
    char name[128];
    snprintf(name, sizeof name, "%.*s", (int)(eq - list[t]), list[t]);
    int i = spec_of(o, name, 1);
    if (i < 0)
      return rc_err_set(e, RC_ERR_INVALID,
                        "targets for output '%s': no output loss term on it takes targets "
                        "(bounded-l2)",
                        name);
    int v = find_value(g, name);
    if (v < 0)
      return rc_err_set(e, RC_ERR_INVALID, "targets for output '%s': %s has no such output", name, g->path);
    const rc_tensor *shape = rc_plan_tensor(p, v);
    rc_tensor want;
    rc__output_sample_shape(&want, shape->dims, shape->rank, -1);
    RC_TRY(read_targets(&arrays[i], eq + 1, n, &want, e));
    for (int j = 0; j < o->n; j++)
      if (!strcmp(o->specs[j].output, name) && rc_out_term_needs_targets(o->specs[j].term))
        side->targets[j] = arrays[i].t.data;
  }
  return RC_OK;
}

/* Dense labels belong to the first kd output. */
static rc_status load_labels(rc_output_set *o, rc_plan *p, const rc_graph *g, const char *path, int64_t n,
                             rc_array *out, rc_err *e) {
  for (int i = 0; i < o->n; i++) {
    if (o->specs[i].term != RC_OUT_KD) continue;
    int v = find_value(g, o->specs[i].output);
    const rc_tensor *t = rc_plan_tensor(p, v);
    rc_output_loss r = o->specs[i];
    RC_TRY(rc_output_loss_resolve(&r, t->dims, t->rank, 1.0f, e));
    snprintf(o->label_output, sizeof o->label_output, "%s", r.output);
    return rc_output_labels_read(out, path, n, t->dims, t->rank, r.axis, o->ignore, e);
  }
  return rc_err_set(e, RC_ERR_INVALID, "dense labels need a kd output loss term on the output they label");
}

rc_status rc_output_set_load(rc_output_set *o, rc_model *m, const rc_tensor *input_shapes, int n_inputs,
                             int64_t n_train, const char *labels_path, int64_t n_val, const char *val_labels_path,
                             rc_output_side *side, rc_output_side *val_side, rc_err *e) {
  (void)n_inputs; /* the plan reads one shape per graph input */
  const rc_graph *g = &m->graph;
  int val = n_val >= 0;
  memset(side, 0, sizeof *side);
  memset(val_side, 0, sizeof *val_side);
  side->ignore = val_side->ignore = (int32_t)o->ignore;
  o->failed = RC_OUTPUT_PART_NONE; /* a plan failure is the model's */
  rc_plan *p = NULL;
  RC_TRY(rc_plan_init(&p, g, input_shapes, NULL, e));
  rc_status s = RC_OK;
  o->failed = RC_OUTPUT_PART_TERMS;
  for (int i = 0; i < o->n && s == RC_OK; i++) {
    int v = find_value(g, o->specs[i].output);
    if (v < 0) {
      s = rc_err_set(e, RC_ERR_INVALID, "output loss term on '%s': %s has no such output", o->specs[i].output,
                     g->path);
      break;
    }
    const rc_tensor *t = rc_plan_tensor(p, v);
    rc_output_loss r = o->specs[i];
    s = rc_output_loss_resolve(&r, t->dims, t->rank, 1.0f, e);
  }
  if (s == RC_OK) {
    o->failed = RC_OUTPUT_PART_TARGETS;
    s = load_targets(o, o->targets, o->n_targets, o->target_arrays, n_train, p, g, side, e);
  }
  if (s == RC_OK && val) {
    o->failed = RC_OUTPUT_PART_VAL_TARGETS;
    s = load_targets(o, o->val_targets, o->n_val_targets, o->val_target_arrays, n_val, p, g, val_side, e);
  }
  if (s == RC_OK && labels_path) {
    o->failed = RC_OUTPUT_PART_LABELS;
    if ((s = load_labels(o, p, g, labels_path, n_train, &o->labels, e)) == RC_OK) side->labels = o->labels.t.data;
  }
  if (s == RC_OK && val && val_labels_path) {
    o->failed = RC_OUTPUT_PART_VAL_LABELS;
    if ((s = load_labels(o, p, g, val_labels_path, n_val, &o->val_labels, e)) == RC_OK)
      val_side->labels = o->val_labels.t.data;
  }
  for (int i = 0; i < o->n && s == RC_OK; i++) {
    int has = side->targets[i] != NULL, has_val = !val || val_side->targets[i] != NULL;
    if (!rc_out_term_needs_targets(o->specs[i].term) || (has && has_val)) continue;
    o->failed = has ? RC_OUTPUT_PART_VAL_TARGETS : RC_OUTPUT_PART_TARGETS;
    s = rc_err_set(e, RC_ERR_INVALID, "output '%s': %s needs targets of the %s samples", o->specs[i].output,
                   rc_out_term_name(o->specs[i].term), has ? "validation" : "training");
  }
  if (s == RC_OK && val && !labels_path != !val_labels_path) {
    o->failed = labels_path ? RC_OUTPUT_PART_VAL_LABELS : RC_OUTPUT_PART_LABELS;
    s = rc_err_set(e, RC_ERR_INVALID,
                   "dense labels of the %s samples but none of the %s samples: give both or neither",
                   labels_path ? "training" : "validation", labels_path ? "validation" : "training");
  }
  if (s == RC_OK) o->failed = RC_OUTPUT_PART_NONE;
  rc_plan_free(p);
  return s;
}

/* The default terms of eval: kd over axis 1 of every float output of rank >= 3. */
static rc_status default_specs(rc_output_set *o, rc_plan *p, const rc_graph *g, rc_err *e) {
  for (int j = 0; j < g->n_outputs && o->n < RC_DISTILL_OUTPUTS_MAX; j++) {
    const rc_tensor *t = rc_plan_tensor(p, g->outputs[j]);
    if (t->dtype != RC_DTYPE_FLOAT || t->rank < 3) continue;
    char spec[200];
    snprintf(spec, sizeof spec, "%s=kd:axis=1", g->values[g->outputs[j]].name);
    if (strlen(g->values[g->outputs[j]].name) > 120) continue;
    RC_TRY(rc_output_loss_parse(&o->specs[o->n], spec, e));
    o->n++;
  }
  if (!o->n)
    return rc_err_set(e, RC_ERR_INVALID,
                      "%s: no float output of rank 3 or more; name the outputs in output loss "
                      "terms",
                      g->path);
  return RC_OK;
}

rc_status rc_output_set_eval(rc_metrics *m, rc_output_set *o, rc_model *model, rc_model *ref,
                             const rc_tensor *input_shapes, int n_inputs, const rc_dataset *d,
                             const char *labels_path, rc_err *e) {
  const rc_graph *g = &model->graph;
  rc_tensor b1[RC_DATASET_MAX_INPUTS];
  for (int i = 0; i < n_inputs && i < RC_DATASET_MAX_INPUTS; i++) {
    b1[i] = input_shapes[i];
    b1[i].dims[0] = 1;
  }
  rc_plan *pm = NULL, *pr = NULL;
  rc_outputs *bound = NULL;
  rc_output_side side, val_side;
  rc_status st = rc_plan_init(&pm, g, input_shapes, NULL, e);
  if (st == RC_OK && ref) st = rc_plan_init(&pr, &ref->graph, input_shapes, NULL, e);
  if (st == RC_OK && !o->n) st = default_specs(o, pm, g, e);
  /* eval has no targets: bounded-l2 is a training term; its output is measured as values. */
  for (int i = 0; i < o->n && st == RC_OK; i++)
    if (rc_out_term_needs_targets(o->specs[i].term)) o->specs[i].term = RC_OUT_MSE;
  if (st == RC_OK)
    st = rc_output_set_load(o, model, b1, n_inputs, d->n, labels_path, -1, NULL, &side, &val_side, e);
  if (st == RC_OK)
    st = rc__outputs_create(&bound, o->specs, o->n, 1.0f, pr ? pr : pm, pm,
                            o->label_output[0] ? o->label_output : NULL, e);
  if (st == RC_OK) st = rc__outputs_validate(bound, pr ? pr : pm, pm, d, &side, d->index, m, e);
  if (st == RC_OK && !ref) m->has_ref = 0;
  rc__outputs_free(bound);
  rc_plan_free(pm);
  rc_plan_free(pr);
  return st;
}
