/* Data options shared by eval and distill: --data, --labels, --scale,
 * --mean, --std; reading, normalising and fitting samples to a model. */
#ifndef RC_CLI_DATA_H
#define RC_CLI_DATA_H

#include "recoup/data.h"
#include "recoup/model.h"

#define CLI_MAX_DATA 8
#define CLI_MAX_CHANNELS 64

typedef struct cli_data_opts {
  const char *data[CLI_MAX_DATA]; /* "FILE" or "NAME=FILE" */
  int n_data;
  const char *labels;
  double scale;
  float mean[CLI_MAX_CHANNELS];
  int n_mean;
  float std[CLI_MAX_CHANNELS];
  int n_std;
} cli_data_opts;

typedef struct cli_samples {
  rc_array inputs[CLI_MAX_DATA]; /* one per graph input, in graph order */
  int n_inputs;
  int64_t n;                     /* samples */
  rc_array labels;               /* int32 (N) when has_labels */
  int has_labels;
} cli_samples;

/* The file of a --data value: "NAME=FILE" gives FILE unless the whole
 * value names an existing file. */
const char *cli_data_file(const char *arg);
void cli_data_opts_init(cli_data_opts *o);
/* Handle --scale/--mean/--std values; returns 0 or prints a usage error and returns 2. */
int cli_data_option(cli_data_opts *o, const char *cmd, const char *name, const char *value);

/* Read every --data file, map it to the graph's inputs (a lone FILE feeds a
 * one-input model; NAME=FILE names the input), convert float inputs with the
 * normalisation and fit each to the input's per-sample shape. */
rc_status cli_samples_load(cli_samples *s, const cli_data_opts *o, const rc_model *m, rc_err *e);
/* Read labels for the loaded samples, checked against the count and n_classes. */
rc_status cli_samples_load_labels(cli_samples *s, const char *path, int64_t n_classes, rc_err *e);
void cli_samples_free(cli_samples *s);
/* Number of classes: the width of the first output at batch 1. */
rc_status cli_output_classes(const rc_model *m, int64_t *k, rc_err *e);
/* Tensor shapes for planning at batch b (dims[0] = b). */
void cli_samples_shapes(const cli_samples *s, int64_t b, rc_tensor *shapes);
/* Dataset view over every sample (labels included when present). */
rc_status cli_samples_dataset(rc_dataset *d, const cli_samples *s, const int64_t *index, int64_t n_index,
                              rc_err *e);

#endif
