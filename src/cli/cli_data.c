#include "cli/cli_data.h"

#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "cli/cli.h"

const char *cli_data_file(const char *arg) {
  const char *eq = strchr(arg, '=');
  return eq && access(arg, F_OK) != 0 ? eq + 1 : arg;
}

void cli_data_opts_init(cli_data_opts *o) {
  memset(o, 0, sizeof *o);
  o->scale = 1.0;
  o->image_memory_mb = CLI_IMAGE_MEMORY_MB;
  o->ranks = 1;
}

int cli_data_option(cli_data_opts *o, const char *cmd, const char *name, const char *value) {
  rc_err e = {0};
  if (!strcmp(name, "skip-bad")) {
    o->skip_bad = 1;
    return 0;
  }
  if (!strcmp(name, "image-memory")) {
    if (cli_parse_int(value, 0, 1L << 30, &o->image_memory_mb))
      return cli_usage_error(cmd, "--image-memory expects a size in MB (0 or more), got '%s'", value);
    return 0;
  }
  if (!strcmp(name, "resize")) {
    o->given_resize = 1;
    long v;
    if (cli_parse_int(value, 1, 1 << 15, &v)) return cli_usage_error(cmd, "--resize expects a size in pixels, got '%s'", value);
    o->resize = (int)v;
    return 0;
  }
  if (!strcmp(name, "scale")) {
    o->given_scale = 1;
    if (cli_parse_float(value, &o->scale) || o->scale == 0)
      return cli_usage_error(cmd, "--scale expects a non-zero number, got '%s'", value);
    return 0;
  }
  if (!strcmp(name, "mean")) o->given_mean = 1;
  if (!strcmp(name, "std")) o->given_std = 1;
  float *dst = !strcmp(name, "mean") ? o->mean : o->std;
  int *n = !strcmp(name, "mean") ? &o->n_mean : &o->n_std;
  if (rc_data_parse_floats(value, dst, CLI_MAX_CHANNELS, n, &e) != RC_OK)
    return cli_option_usage_error(cmd, !strcmp(name, "mean") ? "--mean" : "--std", &e);
  if (!strcmp(name, "std"))
    for (int i = 0; i < *n; i++)
      if (dst[i] == 0) return cli_usage_error(cmd, "--std values must be non-zero");
  return 0;
}

/* "NAME=FILE" when NAME is one of the model's inputs; else the whole text is a path. */
static int split_named(const rc_model_io *inputs, int n_inputs, const char *arg, const char **file) {
  const char *eq = strchr(arg, '=');
  *file = arg;
  if (!eq) return -1;
  for (int i = 0; i < n_inputs; i++) {
    const char *name = inputs[i].name;
    if (strlen(name) == (size_t)(eq - arg) && !strncmp(name, arg, (size_t)(eq - arg))) {
      *file = eq + 1;
      return i;
    }
  }
  return -1;
}

/* Float inputs are not converted here: the dataset view converts each batch
 * (rc_dataset_convert), so memory holds the file's own dtype, or nothing at
 * all for a mapped .npy. */
static rc_status prepare_input(cli_samples *s, int i, const rc_model_io *input, const cli_data_opts *o,
                               const char *file, rc_err *e) {
  rc_array *a = &s->inputs[i];
  const rc_tensor *decl = &input->shape;
  if (decl->dtype == RC_DTYPE_FLOAT) {
    if (rc_dtype_size(a->t.dtype) == 0 || a->t.dtype == RC_DTYPE_STRING)
      return rc_err_set(e, RC_ERR_SHAPE, "%s: input '%s' takes float, the file holds %s", file, input->name,
                      rc_dtype_name(a->t.dtype));
    cli_prep_norm(&s->norm[i], s->mean[i], s->std[i], o, a->t.dtype, file);
    s->convert[i] = 1;
    if (a->t.dtype == RC_DTYPE_UINT8 && !o->given_scale && !o->recorded)
      fprintf(stderr,
              "warning: %s holds uint8 pixels and the model records no preprocessing: input '%s' gets 0..255 "
              "unscaled (give --scale, e.g. 0.00392156862745098 for 0..1, if it was trained on scaled inputs)\n",
              file, input->name);
  } else if (a->t.dtype != decl->dtype) {
    return rc_err_set(e, RC_ERR_SHAPE, "%s: input '%s' takes %s, the file holds %s", file, input->name,
                      rc_dtype_name(decl->dtype), rc_dtype_name(a->t.dtype));
  }
  if (decl->rank >= 1) {
    rc_tensor sample = {a->t.dtype, decl->rank - 1, {0}, NULL};
    int concrete = 1;
    for (int d = 1; d < decl->rank; d++) {
      sample.dims[d - 1] = decl->dims[d];
      if (decl->dims[d] < 0) concrete = 0;
    }
    if (concrete && rc_data_fit(a, &sample, e) != RC_OK)
      return rc_err_prefix(e, "%s: input '%s'", file, input->name);
  }
  return RC_OK;
}

/* A .npy is mapped in place; what cannot be mapped is read, with a note
 * when that costs a lot of memory. */
static rc_status read_array(rc_array *a, const char *file, rc_err *e) {
  rc_status st = rc_array_map(a, file, 0, e);
  if (st != RC_ERR_UNSUPPORTED) return st;
  char why[sizeof e->msg];
  snprintf(why, sizeof why, "%s", e->msg);
  RC_TRY(rc_array_read(a, file, NULL, 0, e));
  if (rc_tensor_nbytes(&a->t) >= ((size_t)256 << 20))
    fprintf(stderr, "note: %s; it was read into memory (%zu MB)\n", why, rc_tensor_nbytes(&a->t) >> 20);
  return RC_OK;
}

/* 1 when path starts like a zip archive (an .npz). */
static int looks_like_npz(const char *path) {
  unsigned char head[8] = {0};
  FILE *f = fopen(path, "rb");
  if (!f) return 0;
  size_t n = fread(head, 1, sizeof head, f);
  fclose(f);
  return rc_data_detect(head, n) == RC_DATA_NPZ;
}

/* The array for `name` (a model input, or "labels") from file: an .npz
 * with several arrays gives the one so named (NumPy's savez(x=...) stores
 * "x.npy"); one array is used whatever its name; anything else is refused
 * with the list. `what` says what the name is, for the message. */
static rc_status read_named_array(rc_array *a, const char *file, const char *name, const char *what, rc_err *e) {
  if (!looks_like_npz(file)) return read_array(a, file, e);
  char **names = NULL;
  int count = 0;
  RC_TRY(rc_npz_list(&names, &count, file, e));
  const char *pick = NULL;
  size_t nlen = strlen(name);
  for (int i = 0; i < count && !pick; i++)
    if (!strcmp(names[i], name) || (!strncmp(names[i], name, nlen) && !strcmp(names[i] + nlen, ".npy")))
      pick = names[i];
  if (!pick && count == 1) pick = names[0];
  rc_status st;
  if (pick) {
    st = rc_array_read(a, file, pick, 0, e);
  } else {
    char list[320] = "";
    size_t o = 0;
    for (int i = 0; i < count && o < sizeof list; i++) {
      size_t len = strlen(names[i]);
      if (len > 4 && !strcmp(names[i] + len - 4, ".npy")) len -= 4;
      o += (size_t)snprintf(list + o, sizeof list - o, "%s'%.*s'", i ? ", " : "", (int)(len > 64 ? 64 : len), names[i]);
    }
    st = rc_err_set(e, RC_ERR_INVALID,
                  "%s holds %d arrays (%s) and none is named '%s' like %s: save it under that name, or "
                  "one array per file",
                  file, count, count ? list : "none", name, what);
  }
  rc_data_names_free(names);
  return st;
}

rc_status cli_samples_load(cli_samples *s, const cli_data_opts *o, const rc_model *m, rc_err *e) {
  memset(s, 0, sizeof *s);
  const char *path = rc_model_path(m);
  int n_inputs = rc_model_n_inputs(m);
  if (n_inputs > CLI_MAX_DATA)
    return rc_err_set(e, RC_ERR_UNSUPPORTED, "%s: more than %d inputs", path, CLI_MAX_DATA);
  s->n_inputs = n_inputs;
  rc_model_io inputs[CLI_MAX_DATA];
  for (int i = 0; i < n_inputs; i++) RC_TRY(rc_model_input(m, i, &inputs[i], e));
  const char *files[CLI_MAX_DATA] = {0};
  for (int i = 0; i < o->n_data; i++) {
    const char *file;
    int idx = split_named(inputs, n_inputs, o->data[i], &file);
    if (idx < 0) {
      if (o->n_data != 1 || n_inputs != 1)
        return rc_err_set(e, RC_ERR_INVALID,
                          "%s has %d inputs: give each as --data NAME=FILE ('%s' names none of them)", path,
                          n_inputs, o->data[i]);
      idx = 0;
    }
    if (files[idx]) return rc_err_set(e, RC_ERR_INVALID, "input '%s' is given twice", inputs[idx].name);
    files[idx] = file;
  }
  for (int i = 0; i < n_inputs; i++) {
    const rc_model_io *input = &inputs[i];
    if (!files[i]) return rc_err_set(e, RC_ERR_INVALID, "no --data for input '%s' of %s", input->name, path);
    if (cli_is_image_source(files[i]))
      RC_TRY(cli_images_load(s, &s->inputs[i], o, input, files[i], e));
    else
      RC_TRY(read_named_array(&s->inputs[i], files[i], input->name, "the model's input", e));
    if (s->inputs[i].t.rank < 1)
      return rc_err_set(e, RC_ERR_SHAPE, "%s: a scalar is not a set of samples", files[i]);
    RC_TRY(prepare_input(s, i, input, o, files[i], e));
    int64_t n = s->inputs[i].t.dims[0];
    if (i && n != s->n)
      return rc_err_set(e, RC_ERR_SHAPE, "%s holds %lld samples, the other inputs %lld", files[i],
                      (long long)n, (long long)s->n);
    s->n = n;
  }
  if (s->n == 0) return rc_err_set(e, RC_ERR_INVALID, "%s: no samples", files[0]);
  return RC_OK;
}

rc_status cli_samples_load_labels(cli_samples *s, const char *path, int64_t n_classes, rc_err *e) {
  if (cli_images_labels_word(path)) return cli_images_take_labels(s, n_classes, e);
  rc_array raw = {0};
  RC_TRY(read_named_array(&raw, path, "labels", "the labels", e));
  rc_status st = rc_labels_to_int32(&s->labels, &raw, s->n, n_classes, e);
  rc_array_free(&raw);
  if (st != RC_OK) return rc_err_prefix(e, "%s", path);
  s->has_labels = 1;
  return RC_OK;
}

void cli_samples_free(cli_samples *s) {
  for (int i = 0; i < s->n_inputs; i++) rc_array_free(&s->inputs[i]);
  rc_array_free(&s->labels);
  rc_image_load_free(&s->decoded);
  rc_image_stream_free(s->stream);
  rc_image_set_free(&s->images);
  memset(s, 0, sizeof *s);
}

void cli_samples_shapes(const cli_samples *s, int64_t b, rc_tensor *shapes) {
  for (int i = 0; i < s->n_inputs; i++) {
    shapes[i] = s->inputs[i].t;
    shapes[i].data = NULL;
    shapes[i].dims[0] = b;
    if (s->convert[i]) shapes[i].dtype = RC_DTYPE_FLOAT;
  }
}

rc_status cli_samples_first_batch(rc_array *out, const cli_samples *s, int64_t b, rc_err *e) {
  int64_t k = s->n < b ? s->n : b;
  for (int i = 0; i < s->n_inputs; i++) {
    rc_tensor t = s->inputs[i].t;
    t.dims[0] = k;
    if (s->convert[i]) t.dtype = RC_DTYPE_FLOAT;
    size_t nb = rc_tensor_nbytes(&t);
    out[i].owned = malloc(nb ? nb : 1);
    if (!out[i].owned) return rc_err_set(e, RC_ERR_NOMEM, "out of memory for one batch");
    t.data = out[i].owned;
    out[i].t = t;
    if (s->convert[i])
      RC_TRY(rc_data_to_float(t.data, &s->inputs[i], 0, k, &s->norm[i], e));
    else
      memcpy(t.data, s->inputs[i].t.data, nb);
  }
  return RC_OK;
}

rc_status cli_samples_dataset(rc_dataset *d, const cli_samples *s, const int64_t *index, int64_t n_index,
                              rc_err *e) {
  rc_tensor ins[CLI_MAX_DATA];
  for (int i = 0; i < s->n_inputs; i++) ins[i] = s->inputs[i].t;
  RC_TRY(rc_dataset_init(d, ins, s->n_inputs, s->has_labels ? &s->labels.t : NULL, index, n_index, e));
  for (int i = 0; i < s->n_inputs; i++)
    if (s->convert[i]) rc_dataset_convert(d, i, &s->norm[i], &s->inputs[i]);
  return RC_OK;
}

rc_status cli_first_output_shape(const rc_model *m, const cli_samples *s, rc_tensor *first, rc_err *e) {
  rc_tensor shapes[CLI_MAX_DATA];
  cli_samples_shapes(s, 1, shapes);
  rc_tensor *outs = malloc(sizeof *outs * (size_t)(rc_model_n_outputs(m) + 1));
  if (!outs) return rc_err_set(e, RC_ERR_NOMEM, "out of memory");
  rc_status st = rc_model_output_shapes(m, shapes, outs, e);
  if (st == RC_OK) *first = outs[0];
  free(outs);
  return st;
}

rc_status cli_output_classes(const rc_model *m, const cli_samples *s, int64_t *k, rc_err *e) {
  rc_tensor t;
  RC_TRY(cli_first_output_shape(m, s, &t, e));
  if (t.dtype == RC_DTYPE_FLOAT && t.rank == 2) {
    *k = t.dims[1];
    return RC_OK;
  }
  rc_model_io first;
  RC_TRY(rc_model_output(m, 0, &first, e));
  return rc_err_set(e, RC_ERR_SHAPE, "%s: labels need a float (N, classes) first output; '%s' has rank %d",
                    rc_model_path(m), first.name, t.rank);
}

rc_status cli_samples_dataset_limit(rc_dataset *d, const cli_samples *s, int64_t limit, uint64_t seed, rc_err *e) {
  if (limit <= 0 || limit >= s->n) return cli_samples_dataset(d, s, NULL, 0, e);
  int64_t *perm = malloc(sizeof(int64_t) * (size_t)s->n);
  if (!perm) return rc_err_set(e, RC_ERR_NOMEM, "out of memory for %lld sample indices", (long long)s->n);
  rc_data_subset(perm, s->n, limit, seed);
  rc_status st = cli_samples_dataset(d, s, perm, limit, e);
  free(perm);
  return st;
}
