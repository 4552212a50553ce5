#include "cli/cli_outputs.h"

#include <cJSON.h>
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "cli/cli.h"
#include "core/alloc.h"
#include "plan/plan.h"

void cli_outputs_init(cli_outputs *o) {
  memset(o, 0, sizeof *o);
  o->ignore = CLI_DEFAULT_IGNORE_LABEL;
}

void cli_outputs_free(cli_outputs *o) {
  for (int i = 0; i < RC_OUTPUTS_MAX; i++) {
    rc_array_free(&o->target_arrays[i]);
    rc_array_free(&o->val_target_arrays[i]);
  }
  rc_array_free(&o->labels);
  rc_array_free(&o->val_labels);
}

int cli_outputs_add_spec(cli_outputs *o, const char *cmd, const char *text) {
  if (o->n == RC_OUTPUTS_MAX) return cli_usage_error(cmd, "at most %d --output-loss terms", RC_OUTPUTS_MAX);
  rc_err e = {0};
  if (rc_output_loss_parse(&o->specs[o->n], text, &e) != RC_OK) return cli_usage_error(cmd, "%s", e.msg);
  o->n++;
  return 0;
}

int cli_outputs_add_targets(cli_outputs *o, const char *cmd, const char *text, int val) {
  int *n = val ? &o->n_val_targets : &o->n_targets;
  const char **list = val ? o->val_targets : o->targets;
  if (!strchr(text, '=') || text[0] == '=')
    return cli_usage_error(cmd, "--%s expects OUTPUT=FILE, got '%s'", val ? "val-targets" : "targets", text);
  if (*n == RC_OUTPUTS_MAX) return cli_usage_error(cmd, "too many --%s", val ? "val-targets" : "targets");
  list[(*n)++] = text;
  return 0;
}

/* The output's per-sample shape as a tensor of rank - 1 (for messages and checks). */
static void sample_shape(rc_tensor *t, const int64_t *dims, int rank, int skip_axis) {
  memset(t, 0, sizeof *t);
  t->dtype = RC_DTYPE_FLOAT;
  for (int d = 1; d < rank; d++)
    if (d != skip_axis) t->dims[t->rank++] = dims[d];
}

static rc_status check_per_sample(const rc_array *a, const char *path, int64_t n, const rc_tensor *want,
                                  const char *what, rc_err *e) {
  char sa[128], sb[128];
  rc_tensor got = a->t;
  int ok = got.rank == want->rank + 1 && got.dims[0] == n;
  for (int d = 0; ok && d < want->rank; d++) ok = got.dims[d + 1] == want->dims[d];
  if (!ok) {
    rc_tensor full = *want;
    full.rank = want->rank + 1;
    memmove(full.dims + 1, want->dims, sizeof(int64_t) * (size_t)want->rank);
    full.dims[0] = n;
    return rc_err_set(e, RC_ERR_SHAPE, "%s: %s of shape %s, expected %s", path, what, rc_shape_str(&got, sa, sizeof sa),
                    rc_shape_str(&full, sb, sizeof sb));
  }
  return RC_OK;
}

/* Dense labels for an output of shape dims whose class axis is `axis`. */
static rc_status read_dense_labels(rc_array *out, const char *path, int64_t n, const int64_t *dims, int rank,
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
  rc_status s = check_per_sample(&raw, path, n, want, "targets", e);
  if (s == RC_OK && raw.t.dtype == RC_DTYPE_FLOAT) {
    *out = raw; /* float32 as is: NaN marks a position without a target */
    return RC_OK;
  }
  if (s == RC_OK && (s = rc_data_to_float_array(out, &raw, NULL, e)) != RC_OK) rc_err_prefix(e, "%s", path);
  rc_array_free(&raw);
  return s;
}

static int spec_of(const cli_outputs *o, const char *name, int need_targets) {
  for (int i = 0; i < o->n; i++)
    if (!strcmp(o->specs[i].output, name) && (!need_targets || rc_out_term_needs_targets(o->specs[i].term))) return i;
  return -1;
}

/* Targets given as OUTPUT=FILE for one set of samples. */
static rc_status load_targets(cli_outputs *o, const char *const *list, int n_list, rc_array *arrays, int64_t n,
                              rc_plan *p, const rc_graph *g, rc_output_side *side, rc_err *e) {
  for (int t = 0; t < n_list; t++) {
    const char *eq = strchr(list[t], '=');
    char name[128];
    snprintf(name, sizeof name, "%.*s", (int)(eq - list[t]), list[t]);
    int i = spec_of(o, name, 1);
    if (i < 0)
      return rc_err_set(e, RC_ERR_INVALID, "--targets %s: no --output-loss term on '%s' takes targets (bounded-l2)", name,
                      name);
    int v = -1;
    for (int j = 0; j < g->n_outputs; j++)
      if (!strcmp(g->values[g->outputs[j]].name, name)) v = g->outputs[j];
    if (v < 0) return rc_err_set(e, RC_ERR_INVALID, "--targets: %s has no output '%s'", g->path, name);
    const rc_tensor *shape = rc_plan_tensor(p, v);
    rc_tensor want;
    sample_shape(&want, shape->dims, shape->rank, -1);
    RC_TRY(read_targets(&arrays[i], eq + 1, n, &want, e));
    for (int j = 0; j < o->n; j++)
      if (!strcmp(o->specs[j].output, name) && rc_out_term_needs_targets(o->specs[j].term))
        side->targets[j] = arrays[i].t.data;
  }
  return RC_OK;
}

static int find_value(const rc_graph *g, const char *name) {
  for (int j = 0; j < g->n_outputs; j++)
    if (!strcmp(g->values[g->outputs[j]].name, name)) return g->outputs[j];
  return -1;
}

/* Dense labels belong to the first kd output. */
static rc_status load_labels(cli_outputs *o, rc_plan *p, const rc_graph *g, const char *path, int64_t n, rc_array *out,
                             rc_err *e) {
  for (int i = 0; i < o->n; i++) {
    if (o->specs[i].term != RC_OUT_KD) continue;
    int v = find_value(g, o->specs[i].output);
    const rc_tensor *t = rc_plan_tensor(p, v);
    rc_output_loss r = o->specs[i];
    RC_TRY(rc_output_loss_resolve(&r, t->dims, t->rank, 1.0f, e));
    snprintf(o->label_output, sizeof o->label_output, "%s", r.output);
    return read_dense_labels(out, path, n, t->dims, t->rank, r.axis, o->ignore, e);
  }
  return rc_err_set(e, RC_ERR_INVALID, "--labels with --output-loss: dense labels need a kd term on the output they "
                  "label");
}

rc_status cli_outputs_load(cli_outputs *o, const rc_graph *g, const cli_samples *train, const char *labels_path,
                           const cli_samples *val, const char *val_labels_path, rc_output_side *side,
                           rc_output_side *val_side, rc_err *e) {
  memset(side, 0, sizeof *side);
  memset(val_side, 0, sizeof *val_side);
  side->ignore = val_side->ignore = (int32_t)o->ignore;
  rc_tensor shapes[CLI_MAX_DATA];
  cli_samples_shapes(train, 1, shapes);
  rc_plan *p = NULL;
  RC_TRY(rc_plan_init(&p, g, shapes, NULL, e));
  rc_status s = RC_OK;
  for (int i = 0; i < o->n && s == RC_OK; i++) {
    int v = find_value(g, o->specs[i].output);
    if (v < 0) {
      s = rc_err_set(e, RC_ERR_INVALID, "--output-loss: %s has no output '%s'", g->path, o->specs[i].output);
      break;
    }
    const rc_tensor *t = rc_plan_tensor(p, v);
    rc_output_loss r = o->specs[i];
    s = rc_output_loss_resolve(&r, t->dims, t->rank, 1.0f, e);
  }
  if (s == RC_OK) s = load_targets(o, o->targets, o->n_targets, o->target_arrays, train->n, p, g, side, e);
  if (s == RC_OK && val)
    s = load_targets(o, o->val_targets, o->n_val_targets, o->val_target_arrays, val->n, p, g, val_side, e);
  if (s == RC_OK && labels_path && (s = load_labels(o, p, g, labels_path, train->n, &o->labels, e)) == RC_OK)
    side->labels = o->labels.t.data;
  if (s == RC_OK && val && val_labels_path &&
      (s = load_labels(o, p, g, val_labels_path, val->n, &o->val_labels, e)) == RC_OK)
    val_side->labels = o->val_labels.t.data;
  for (int i = 0; i < o->n && s == RC_OK; i++) {
    int has = side->targets[i] != NULL, has_val = !val || val_side->targets[i] != NULL;
    if (rc_out_term_needs_targets(o->specs[i].term) && (!has || !has_val))
      s = rc_err_set(e, RC_ERR_INVALID, "output '%s': %s needs targets: --targets %s=FILE%s", o->specs[i].output,
                   rc_out_term_name(o->specs[i].term), o->specs[i].output, val ? " and --val-targets" : "");
  }
  if (s == RC_OK && val && !labels_path != !val_labels_path)
    s = rc_err_set(e, RC_ERR_INVALID, "give dense labels for both --data and --val-data, or for neither");
  rc_plan_free(p);
  return s;
}

/* "-" where a figure does not apply (NaN: no output of that kind). */
static const char *pct(char *buf, size_t n, double v) {
  if (isnan(v)) snprintf(buf, n, "-");
  else snprintf(buf, n, "%.2f%%", 100 * v);
  return buf;
}

void cli_outputs_table_header(void) {
  printf("  %-22s %12s %11s %11s %11s %11s %11s\n", "model", "output loss", "agreement", "mIoU dense", "pixel acc",
         "mIoU labels", "value MAD");
}

void cli_outputs_table_row(const char *name, const rc_metrics *m) {
  char l[32], a[32], mi[32], acc[32], ml[32], mad[32];
  snprintf(l, sizeof l, "%.4g", m->kl);
  if (isnan(m->value_mad)) snprintf(mad, sizeof mad, "-");
  else snprintf(mad, sizeof mad, "%.4g", m->value_mad);
  printf("  %-22s %12s %11s %11s %11s %11s %11s\n", name, l, pct(a, sizeof a, m->agreement),
         pct(mi, sizeof mi, m->miou_ref), pct(acc, sizeof acc, m->has_labels ? m->top1 : NAN),
         pct(ml, sizeof ml, m->miou_labels), mad);
}

static void number_or_null(cJSON *o, const char *key, double v) {
  if (isfinite(v)) cJSON_AddNumberToObject(o, key, v);
  else cJSON_AddNullToObject(o, key);
}

void cli_outputs_metrics_json(cJSON *o, const rc_metrics *m) {
  number_or_null(o, "output_loss", m->kl);
  number_or_null(o, "miou_dense", m->miou_ref);
  number_or_null(o, "miou_labels", m->miou_labels);
  number_or_null(o, "value_mad", m->value_mad);
}
