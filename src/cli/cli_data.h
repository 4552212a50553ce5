/* Data options shared by eval and distill: --data, --labels, --scale,
 * --mean, --std; reading, normalising and fitting samples to a model. */
#ifndef RC_CLI_DATA_H
#define RC_CLI_DATA_H

#include "recoup/data.h"
#include "recoup/image.h"
#include "recoup/model.h"

#define CLI_MAX_DATA 8
/* Default of --image-memory (MB). */
#define CLI_IMAGE_MEMORY_MB 1024
#define CLI_MAX_CHANNELS 64

typedef struct cli_data_opts {
  const char *data[CLI_MAX_DATA]; /* "FILE" or "NAME=FILE" */
  int n_data;
  const char *labels;
  const char *labels_option; /* the option labels came from, for messages; NULL: "--labels" */
  double scale;
  float mean[CLI_MAX_CHANNELS];
  int n_mean;
  float std[CLI_MAX_CHANNELS];
  int n_std;
  int resize;   /* --resize S: images' shorter side to S before the centre crop (0 = none) */
  int skip_bad; /* --skip-bad: leave unreadable images out, listed */
  /* --image-memory MB: image sets whose decoded pixels fit are decoded once
   * up front, larger ones per batch (0: always per batch). ranks: processes
   * of an MPI job sharing the data (more than one: always per batch, so each
   * rank decodes only its rows). */
  long image_memory_mb;
  int ranks;
  int given_scale, given_mean, given_std, given_resize; /* set on the command line */
  /* Preprocessing recorded in the model (cli_prep_apply): used for integer
   * sources (pixels, images) where the command line gives no value. */
  int recorded;
  double rec_scale;
  float rec_mean[CLI_MAX_CHANNELS], rec_std[CLI_MAX_CHANNELS];
  int rec_n_mean, rec_n_std;
  char rec_text[256];  /* the recorded options as text, for notes */
  const char *rec_model;
} cli_data_opts;

typedef struct cli_samples {
  rc_array inputs[CLI_MAX_DATA]; /* one per graph input, in graph order */
  int n_inputs;
  int64_t n;                     /* samples */
  rc_array labels;               /* int32 (N) when has_labels */
  int has_labels;
  /* Float inputs stay in the file's dtype (a mapping for .npy) and are
   * converted per batch with norm: convert[i] says which. */
  int convert[CLI_MAX_DATA];
  rc_data_norm norm[CLI_MAX_DATA];
  float mean[CLI_MAX_DATA][CLI_MAX_CHANNELS], std[CLI_MAX_DATA][CLI_MAX_CHANNELS];
  rc_image_set images;           /* when the data is a folder or list of images */
  rc_image_load decoded;         /* its labels, skipped images */
  rc_image_stream *stream;       /* the set decoded per batch, or NULL (decoded up front) */
  int from_images;
} cli_samples;

/* The file of a --data value: "NAME=FILE" gives FILE unless the whole
 * value names an existing file. */
const char *cli_data_file(const char *arg);
/* Help lines for the image options, shared by the commands that take --data. */
#define CLI_IMAGE_HELP \
  "  --data FOLDER|LIST.txt   JPEG/PNG images: a folder (recursive) or a list file,\n" \
  "                           one path per line, optionally followed by a label;\n" \
  "                           converted to the input's channels, centre-cropped to its H x W\n" \
  "  --labels folders|list    labels from the first level of subfolders (sorted, 0..K-1)\n" \
  "                           or from the list file's second column\n" \
  "  --resize S               images: shorter side to S (antialiased bilinear) before cropping\n" \
  "  --skip-bad               images: skip unreadable files, list them, go on\n" \
  "  --image-memory MB        images: decode once up front when the pixels fit in MB\n" \
  "                           (default 1024), else per batch; 0: always per batch\n"

void cli_data_opts_init(cli_data_opts *o);

/* Preprocessing recorded in a model's metadata_props (cli_prep.c). apply:
 * options not given take the recorded values, with a note saying so; given
 * ones win, with a note where they differ. record: store the options in
 * effect in m, to be written with it. */
rc_status cli_prep_apply(cli_data_opts *o, const rc_model *m, rc_err *e);
rc_status cli_prep_record(rc_model *m, const cli_data_opts *o, rc_err *e);
/* The normalisation for a source of dtype `source`: given options, else the
 * recorded ones for integer sources, else none; mean/std are filled (the
 * norm points at them). Notes on stderr say what was used. */
void cli_prep_norm(rc_data_norm *norm, float *mean, float *std, const cli_data_opts *o, rc_dtype source,
                   const char *file);
/* Handle --scale/--mean/--std values; returns 0 or prints a usage error and returns 2. */
int cli_data_option(cli_data_opts *o, const char *cmd, const char *name, const char *value);

/* Read every --data file, map it to the graph's inputs (a lone FILE feeds a
 * one-input model; NAME=FILE names the input), convert float inputs with the
 * normalisation and fit each to the input's per-sample shape. */
rc_status cli_samples_load(cli_samples *s, const cli_data_opts *o, const rc_model *m, rc_err *e);
/* Read labels for the loaded samples, checked against the count and n_classes. */
rc_status cli_samples_load_labels(cli_samples *s, const char *path, int64_t n_classes, rc_err *e);
void cli_samples_free(cli_samples *s);

/* Images (cli_images.c): is file a folder or list file? */
int cli_is_image_source(const char *file);
/* Decode the image set at file into a (N, C, H, W) uint8 array for input, with
 * labels from folders or the list when o->labels says "folders"/"list". */
rc_status cli_images_load(cli_samples *s, rc_array *out, const cli_data_opts *o, const rc_model_io *input,
                          const char *file, rc_err *e);
/* "--labels folders|list" for loaded images: take the set's labels. */
int cli_images_labels_word(const char *labels);
rc_status cli_images_take_labels(cli_samples *s, int64_t n_classes, rc_err *e);
/* After the work on a set decoded per batch: the images found unreadable on
 * the way (--skip-bad), listed on stderr and kept for cli_images_json. */
void cli_images_finish(cli_samples *s);
/* Class names and skipped images into a --json object (nothing without images). */
struct cJSON;
void cli_images_json(struct cJSON *root, const cli_samples *s);
/* The first output's shape for a batch of one of these samples. */
rc_status cli_first_output_shape(const rc_model *m, const cli_samples *s, rc_tensor *first, rc_err *e);
/* Number of classes: the width of the first output, planned at batch 1. */
rc_status cli_output_classes(const rc_model *m, const cli_samples *s, int64_t *k, rc_err *e);
/* Tensor shapes for planning at batch b (dims[0] = b). */
void cli_samples_shapes(const cli_samples *s, int64_t b, rc_tensor *shapes);
/* cli_samples_dataset over `limit` samples: the first after a PCG32 shuffle
 * seeded with seed, in ascending order (limit 0 or >= n: every sample). */
rc_status cli_samples_dataset_limit(rc_dataset *d, const cli_samples *s, int64_t limit, uint64_t seed, rc_err *e);
/* The first min(b, n) samples as the model takes them (converted), into
 * out[i] (rc_array, freed by the caller), for one-batch checks. */
rc_status cli_samples_first_batch(rc_array *out, const cli_samples *s, int64_t b, rc_err *e);
/* Dataset view over every sample (labels included when present), converting
 * float inputs per batch. */
rc_status cli_samples_dataset(rc_dataset *d, const cli_samples *s, const int64_t *index, int64_t n_index,
                              rc_err *e);

#endif
