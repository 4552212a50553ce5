/* Folders and lists of images as --data: the model's input shape sets the
 * channels and crop, labels come from subfolders or the list, unreadable
 * images stop the run or (--skip-bad) are listed and left out. */
#define _POSIX_C_SOURCE 200809L /* clock_gettime */

#include <cjson/cJSON.h>
#include <stdio.h>
#include <string.h>
#include <time.h>

#include "cli/cli.h"
#include "cli/cli_data.h"

int cli_is_image_source(const char *file) { return rc_image_set_is_source(file); }

int cli_images_labels_word(const char *labels) {
  return labels && (!strcmp(labels, "folders") || !strcmp(labels, "list"));
}

/* Names from files, printable: control bytes and backslashes as \xNN. */
static const char *printable(const char *s, char *buf, size_t n) {
  size_t o = 0;
  for (; *s && o + 5 < n; s++) {
    unsigned char c = (unsigned char)*s;
    if (c < 0x20 || c == 0x7f || c == '\\')
      o += (size_t)snprintf(buf + o, n - o, "\\x%02x", c);
    else
      buf[o++] = (char)c;
  }
  buf[o] = '\0';
  return buf;
}

static void print_skipped(const cli_samples *s);

static rc_status input_prep(rc_image_prep *p, const rc_model_io *input, const cli_data_opts *o, const char *file,
                            rc_err *e) {
  const rc_tensor *d = &input->shape;
  if (d->rank != 4)
    return rc_err_set(e, RC_ERR_SHAPE, "%s: images feed (N, C, H, W) inputs; input '%s' has rank %d", file, input->name,
                    d->rank);
  if (d->dtype != RC_DTYPE_FLOAT && d->dtype != RC_DTYPE_UINT8)
    return rc_err_set(e, RC_ERR_SHAPE, "%s: input '%s' takes %s, images give float or uint8", file, input->name,
                    rc_dtype_name(d->dtype));
  if (d->dims[1] != 1 && d->dims[1] != 3)
    return rc_err_set(e, RC_ERR_SHAPE, "%s: input '%s' has %lld channels; images give 1 (gray) or 3 (RGB)", file,
                    input->name, (long long)d->dims[1]);
  p->channels = (int)d->dims[1];
  p->resize = o->resize;
  if (d->dims[2] > 0 && d->dims[3] > 0) {
    p->height = (int)d->dims[2];
    p->width = (int)d->dims[3];
  } else if (o->resize > 0) {
    p->height = p->width = o->resize; /* symbolic H x W: a square of the resized shorter side */
  } else {
    return rc_err_set(e, RC_ERR_SHAPE, "%s: input '%s' has no fixed height and width: give --resize S", file,
                    input->name);
  }
  return RC_OK;
}

static void print_summary(const cli_samples *s, const rc_image_prep *p, const char *file, int64_t n) {
  char buf[1024];
  fprintf(stderr, "images: %lld from %s as %s %dx%d", (long long)n, printable(file, buf, sizeof buf),
          p->channels == 1 ? "gray" : "RGB", p->width, p->height);
  if (p->resize) fprintf(stderr, " (shorter side resized to %d, centre crop)", p->resize);
  fprintf(stderr, "\n");
  for (int k = 0; k < s->images.n_classes; k++)
    fprintf(stderr, "  class %d = %s\n", k, printable(s->images.classes[k], buf, sizeof buf));
  print_skipped(s);
}

/* Decoded up front when the pixels fit in --image-memory and one process
 * reads them; decoding once costs less than decoding every pass, so the
 * only reason to decode per batch is memory (or, under MPI, that each rank
 * then decodes only its own rows). */
static int decode_up_front(const cli_data_opts *o, const rc_image_set *set, const rc_image_prep *p) {
  double bytes = (double)set->n * p->channels * p->height * p->width;
  return o->ranks <= 1 && o->image_memory_mb > 0 && bytes <= (double)o->image_memory_mb * 1048576.0;
}

/* A set decoded per batch: the view, and the labels the set gives. */
static rc_status open_stream(cli_samples *s, rc_array *out, const cli_data_opts *o, const rc_image_prep *p,
                             const char *file, rc_err *e) {
  RC_TRY(rc_image_stream_open(&s->stream, out, &s->images, p, o->skip_bad, e));
  print_summary(s, p, file, s->images.n);
  fprintf(stderr, "images: decoded per batch (%.3g MB of pixels, over --image-memory %ld MB%s)\n",
          (double)s->images.n * p->channels * p->height * p->width / 1048576.0, o->image_memory_mb,
          o->ranks > 1 ? "; or shared by MPI ranks" : "");
  /* Every image keeps its place (an unreadable one reads as a stand-in), so
   * the labels are the set's own, borrowed. */
  if (s->images.labels) s->decoded.labels.t = (rc_tensor){RC_DTYPE_INT32, 1, {s->images.n}, s->images.labels};
  return RC_OK;
}

void cli_images_finish(cli_samples *s) {
  rc_err e = {0};
  if (!s->stream) return;
  if (rc_image_stream_skipped(s->stream, &s->decoded, &e) != RC_OK) {
    fprintf(stderr, "warning: %s\n", e.msg);
    return;
  }
  print_skipped(s);
  if (s->decoded.n_skipped)
    fprintf(stderr, "images: each unreadable image's place was taken by the next readable one of its label\n");
}

static void print_skipped(const cli_samples *s) {
  char buf[1024];
  for (int64_t i = 0; i < s->decoded.n_skipped; i++)
    fprintf(stderr, "  skipped: %s\n", printable(s->decoded.skipped_why[i], buf, sizeof buf));
  if (s->decoded.n_skipped)
    fprintf(stderr, "images: %lld unreadable image%s skipped (--skip-bad)\n", (long long)s->decoded.n_skipped,
            s->decoded.n_skipped == 1 ? "" : "s");
}

/* A set that does not fit the labels asked for (not a folder or list, no
 * class subfolders, a list line without a label) names the option; a file
 * that cannot be read is the data's own error. */
static rc_status labels_context(rc_err *e, const cli_data_opts *o, rc_image_labels mode) {
  if (mode == RC_IMAGE_LABELS_NONE || (e->code != RC_ERR_INVALID && e->code != RC_ERR_FORMAT)) return e->code;
  char option[64];
  snprintf(option, sizeof option, "%s %s", o->labels_option ? o->labels_option : "--labels", o->labels);
  return cli_option_context(e, option);
}

rc_status cli_images_load(cli_samples *s, rc_array *out, const cli_data_opts *o, const rc_model_io *input,
                          const char *file, rc_err *e) {
  if (s->from_images)
    return rc_err_set(e, RC_ERR_UNSUPPORTED, "%s: one input only can be a folder or list of images", file);
  rc_image_prep p;
  RC_TRY(input_prep(&p, input, o, file, e));
  rc_image_labels mode = RC_IMAGE_LABELS_NONE;
  if (o->labels && !strcmp(o->labels, "folders")) mode = RC_IMAGE_LABELS_FOLDERS;
  if (o->labels && !strcmp(o->labels, "list")) mode = RC_IMAGE_LABELS_LIST;
  rc_status st = rc_image_set_open(&s->images, file, mode, e);
  if (st != RC_OK) return labels_context(e, o, mode);
  s->from_images = 1;
  if (!decode_up_front(o, &s->images, &p)) return open_stream(s, out, o, &p, file, e);
  struct timespec t0, t1;
  clock_gettime(CLOCK_MONOTONIC, &t0);
  st = rc_image_set_load(&s->decoded, &s->images, &p, o->skip_bad, 0, e);
  /* The one shape error of decoding: an image smaller than the crop. */
  if (st == RC_ERR_SHAPE && o->resize <= 0) return cli_option_context(e, "--resize");
  if (st != RC_OK) return st;
  clock_gettime(CLOCK_MONOTONIC, &t1);
  print_summary(s, &p, file, s->decoded.images.t.dims[0]);
  double secs = (double)(t1.tv_sec - t0.tv_sec) + 1e-9 * (double)(t1.tv_nsec - t0.tv_nsec);
  if (secs > 0) fprintf(stderr, "images: decoded in %.2f s (%.0f images/s)\n", secs, (double)s->images.n / secs);
  /* The array moves to the caller; the load keeps labels and skipped names. */
  *out = s->decoded.images;
  memset(&s->decoded.images, 0, sizeof s->decoded.images);
  return RC_OK;
}

rc_status cli_images_take_labels(cli_samples *s, int64_t n_classes, rc_err *e) {
  if (!s->from_images || !s->decoded.labels.t.data)
    return rc_err_set(e, RC_ERR_INVALID, "--labels folders or list needs --data to be a folder or list of images");
  if (s->images.n_classes && s->images.n_classes != n_classes)
    return rc_err_set(e, RC_ERR_SHAPE, "%s: %d class folders, the model has %lld classes", s->images.root,
                    s->images.n_classes, (long long)n_classes);
  rc_status st = rc_labels_to_int32(&s->labels, &s->decoded.labels, s->n, n_classes, e);
  if (st != RC_OK) return rc_err_prefix(e, "%s", s->images.root);
  s->has_labels = 1;
  return RC_OK;
}

void cli_images_json(struct cJSON *root, const cli_samples *s) {
  if (!s->from_images) return;
  cJSON *img = cJSON_AddObjectToObject(root, "images");
  cJSON_AddNumberToObject(img, "count", (double)s->n);
  cJSON_AddStringToObject(img, "decoded", s->stream ? "per batch" : "up front");
  if (s->images.n_classes) {
    cJSON *cls = cJSON_AddArrayToObject(img, "classes");
    for (int k = 0; k < s->images.n_classes; k++) cJSON_AddItemToArray(cls, cJSON_CreateString(s->images.classes[k]));
  }
  cJSON *sk = cJSON_AddArrayToObject(img, "skipped");
  char path[8192];
  for (int64_t i = 0; i < s->decoded.n_skipped; i++) {
    cJSON *one = cJSON_CreateObject();
    cJSON_AddStringToObject(one, "path", rc_image_set_path(&s->images, s->decoded.skipped[i], path, sizeof path));
    cJSON_AddStringToObject(one, "error", s->decoded.skipped_why[i]);
    cJSON_AddItemToArray(sk, one);
  }
}
