/* Per-output options shared by distill, eval and batch manifests:
 * --output-loss NAME=TERM[:key=value...], --targets NAME=FILE (and
 * --val-targets), dense labels and their --ignore-label value. The terms and
 * their side data are the library's (recoup/outputs.h); this adds the
 * command line's errors, tables and JSON. */
#ifndef RC_CLI_OUTPUTS_H
#define RC_CLI_OUTPUTS_H

#include "cli/cli_data.h"
#include "recoup/outputs.h"

#define CLI_DEFAULT_IGNORE_LABEL RC_OUTPUT_DEFAULT_IGNORE

typedef rc_output_set cli_outputs;

void cli_outputs_init(cli_outputs *o);
void cli_outputs_free(cli_outputs *o);
/* --output-loss TEXT; returns 0 or prints a usage error and returns 2. */
int cli_outputs_add_spec(cli_outputs *o, const char *cmd, const char *text);
int cli_outputs_add_targets(cli_outputs *o, const char *cmd, const char *text, int val);

/* rc_output_set_load for the samples train (and val, may be NULL: --val-data
 * samples), the outputs planned at batch 1. labels_path / val_labels_path
 * NULL: none. */
rc_status cli_outputs_load(cli_outputs *o, rc_model *m, const cli_samples *train, const char *labels_path,
                           const cli_samples *val, const char *val_labels_path, rc_output_side *side,
                           rc_output_side *val_side, rc_err *e);

/* When a library call failed on one part of the per-output data (`part`),
 * the option that part came from in front of e's message. */
void cli_outputs_part_context(rc_err *e, rc_output_part part);

/* Validation figures of a per-output run (rc_metrics.outputs): a table with
 * one row per model, and the same as JSON members of o. */
struct cJSON;
void cli_outputs_table_header(void);
void cli_outputs_table_row(const char *name, const rc_metrics *m);
void cli_outputs_metrics_json(struct cJSON *o, const rc_metrics *m);

#endif
