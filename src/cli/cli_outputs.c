#include "cli/cli_outputs.h"

#include <cJSON.h>
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "cli/cli.h"

void cli_outputs_init(cli_outputs *o) { rc_output_set_init(o); }

void cli_outputs_free(cli_outputs *o) { rc_output_set_free(o); }

int cli_outputs_add_spec(cli_outputs *o, const char *cmd, const char *text) {
  if (o->n == RC_DISTILL_OUTPUTS_MAX)
    return cli_usage_error(cmd, "at most %d --output-loss terms", RC_DISTILL_OUTPUTS_MAX);
  rc_err e = {0};
  if (rc_output_set_add(o, text, &e) != RC_OK) return cli_option_usage_error(cmd, "--output-loss", &e);
  return 0;
}

int cli_outputs_add_targets(cli_outputs *o, const char *cmd, const char *text, int val) {
  const char *flag = val ? "val-targets" : "targets";
  if (!strchr(text, '=') || text[0] == '=')
    return cli_usage_error(cmd, "--%s expects OUTPUT=FILE, got '%s'", flag, text);
  rc_err e = {0};
  if (rc_output_set_add_targets(o, text, val, &e) != RC_OK) return cli_usage_error(cmd, "too many --%s", flag);
  return 0;
}

/* The option each part of the side data comes from (rc_output_part). */
static const char *const PART_OPTION[] = {
    [RC_OUTPUT_PART_NONE] = NULL,           [RC_OUTPUT_PART_TERMS] = "--output-loss",
    [RC_OUTPUT_PART_TARGETS] = "--targets", [RC_OUTPUT_PART_VAL_TARGETS] = "--val-targets",
    [RC_OUTPUT_PART_LABELS] = "--labels",   [RC_OUTPUT_PART_VAL_LABELS] = "--val-labels",
};

rc_status cli_outputs_load(cli_outputs *o, rc_model *m, const cli_samples *train, const char *labels_path,
                           const cli_samples *val, const char *val_labels_path, rc_output_side *side,
                           rc_output_side *val_side, rc_err *e) {
  rc_tensor shapes[CLI_MAX_DATA];
  cli_samples_shapes(train, 1, shapes);
  rc_status s = rc_output_set_load(o, m, shapes, train->n_inputs, train->n, labels_path, val ? val->n : -1,
                                   val_labels_path, side, val_side, e);
  if (s != RC_OK) cli_outputs_part_context(e, o->failed);
  return s;
}

void cli_outputs_part_context(rc_err *e, rc_output_part part) {
  if (PART_OPTION[part]) cli_option_context(e, PART_OPTION[part]);
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
