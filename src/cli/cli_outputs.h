/* Per-output options shared by distill, eval and batch manifests:
 * --output-loss NAME=TERM[:key=value...], --targets NAME=FILE (and
 * --val-targets), dense labels and their --ignore-label value. */
#ifndef RC_CLI_OUTPUTS_H
#define RC_CLI_OUTPUTS_H

#include "cli/cli_data.h"
#include "onnx/model.h"
#include "recoup/eval.h"
#include "train/outputs.h"

#define CLI_DEFAULT_IGNORE_LABEL RC_EVAL_DEFAULT_IGNORE_LABEL /* 255 */

typedef struct cli_outputs {
  rc_output_loss specs[RC_OUTPUTS_MAX];
  int n;
  const char *targets[RC_OUTPUTS_MAX], *val_targets[RC_OUTPUTS_MAX]; /* "NAME=FILE" */
  int n_targets, n_val_targets;
  long ignore;
  rc_array target_arrays[RC_OUTPUTS_MAX], val_target_arrays[RC_OUTPUTS_MAX];
  rc_array labels, val_labels;  /* int32 dense labels */
  char label_output[128];       /* the kd output they belong to, "" when none */
} cli_outputs;

void cli_outputs_init(cli_outputs *o);
void cli_outputs_free(cli_outputs *o);
/* --output-loss TEXT; returns 0 or prints a usage error and returns 2. */
int cli_outputs_add_spec(cli_outputs *o, const char *cmd, const char *text);
int cli_outputs_add_targets(cli_outputs *o, const char *cmd, const char *text, int val);

/* Output shapes of g planned at batch 1 for s; checks every spec's output
 * exists and its axis; reads targets (shape (N, the output's per-sample
 * shape); NaN marks a position without a target) and dense labels (shape
 * (N, the kd output's per-sample shape without the class axis), integers in
 * [0, classes) or the ignore value), filling side. labels_path / val_path
 * NULL: none. val (may be NULL) are --val-data samples. */
rc_status cli_outputs_load(cli_outputs *o, const rc_graph *g, const cli_samples *train, const char *labels_path,
                           const cli_samples *val, const char *val_labels_path, rc_output_side *side,
                           rc_output_side *val_side, rc_err *e);

/* Validation figures of a per-output run (rc_metrics.outputs): a table with
 * one row per model, and the same as JSON members of o. */
struct cJSON;
void cli_outputs_table_header(void);
void cli_outputs_table_row(const char *name, const rc_metrics *m);
void cli_outputs_metrics_json(struct cJSON *o, const rc_metrics *m);

#endif
