/* Images in, uint8 sample arrays out.
 *
 * JPEG (libjpeg-turbo) and PNG (libpng) files are decoded into 8-bit
 * interleaved pixels, converted to the model's channel count, optionally
 * resized (shorter side to S, bilinear with antialiasing when shrinking),
 * centre-cropped to the model's height and width, and stored as one uint8
 * (N, C, H, W) array; the float conversion with scale/mean/std is the one
 * every other data source goes through (rc_data_to_float).
 *
 * An image set is a folder read recursively (files ending .jpg, .jpeg, .png
 * in any case, in name order folder by folder) or a text file with
 * one path per line (relative paths are taken from the list's folder),
 * optionally followed by whitespace and an integer label. Every error names
 * the file and what is wrong.
 */
#ifndef RECOUP_IMAGE_H
#define RECOUP_IMAGE_H

#include <stddef.h>
#include <stdint.h>

#include "recoup/data.h"
#include "recoup/status.h"

/* Decoded 8-bit pixels, rows top to bottom, channels interleaved (1 or 3). */
typedef struct rc_image {
  int w, h, c;
  uint8_t *px; /* w * h * c bytes (rc__malloc) */
} rc_image;

RC_API void rc_image_free(rc_image *im);

/* Refuse images of more pixels than this before allocating (a header can
 * claim 60000 x 60000). */
#define RC_IMAGE_MAX_PIXELS ((int64_t)1 << 27)

/* Decode a JPEG or PNG held in memory (format by magic bytes). Grayscale
 * stays 1 channel, everything else becomes 3 (RGB): alpha is dropped,
 * palettes expanded, 16-bit samples reduced to their high byte. A truncated
 * or damaged stream is an error, not a partly grey picture. `name` is used
 * in messages. max_pixels 0 means RC_IMAGE_MAX_PIXELS. */
RC_API rc_status rc_image_decode(rc_image *out, const void *buf, size_t n, const char *name, int64_t max_pixels,
                          rc_err *e);

/* 1 <-> 3 channels in place of im: gray to RGB repeats the value; RGB to
 * gray is ITU-R BT.601 luma, L = (19595 R + 38470 G + 7471 B + 32768) >> 16. */
RC_API rc_status rc_image_to_channels(rc_image *im, int channels, rc_err *e);

/* Resample to w x h with a triangle (bilinear) filter whose support widens
 * by the reduction factor when shrinking (antialiasing); separable, the
 * horizontal pass first, each pass rounded to 8 bits. */
RC_API rc_status rc_image_resize(rc_image *im, int w, int h, rc_err *e);

/* The size that puts the shorter side at s: the longer side becomes
 * floor(long * s / short). */
RC_API void rc_image_shorter_side(int w, int h, int s, int *out_w, int *out_h);

/* Preparation of one image for a model input. */
typedef struct rc_image_prep {
  int channels; /* 1 or 3 */
  int height, width;  /* the centre crop (the model's H x W) */
  int resize;   /* shorter side to this before cropping; 0 = no resizing */
} rc_image_prep;

/* Convert, resize and centre-crop im (consumed) into out, (C, H, W) uint8.
 * The crop's top-left corner is ((h - H) / 2, (w - W) / 2), rounded down.
 * An image smaller than the crop is an error suggesting a resize. */
RC_API rc_status rc_image_prepare(uint8_t *out, rc_image *im, const rc_image_prep *p, rc_err *e);

/* ---- Image sets ---------------------------------------------------------- */

typedef enum rc_image_labels {
  RC_IMAGE_LABELS_NONE = 0,
  RC_IMAGE_LABELS_FOLDERS = 1, /* first level of subfolders, sorted, 0..K-1 */
  RC_IMAGE_LABELS_LIST = 2     /* the integer after each path of a list file */
} rc_image_labels;

typedef struct rc_image_set {
  char *root;        /* the folder, or the list file's folder */
  char **paths;      /* n paths as given or found (relative to root when found) */
  int64_t n;
  int32_t *labels;   /* n labels, or NULL */
  char **classes;    /* folder labels: n_classes sorted folder names */
  int n_classes;
  int is_list;
} rc_image_set;

/* Does path name a folder, or a list file (.txt, .lst, .list)? */
RC_API int rc_image_set_is_source(const char *path);

RC_API rc_status rc_image_set_open(rc_image_set *s, const char *path, rc_image_labels labels, rc_err *e);
RC_API void rc_image_set_free(rc_image_set *s);

/* Full path of image i into buf (for messages and reading). */
RC_API const char *rc_image_set_path(const rc_image_set *s, int64_t i, char *buf, size_t n);

/* Result of loading a set: the kept images in (N, C, H, W) uint8, their
 * labels, and the indices of images skipped as unreadable. */
typedef struct rc_image_load {
  rc_array images;
  rc_array labels;      /* int32 (N) when the set has labels */
  int64_t *skipped;     /* indices into the set */
  char **skipped_why;   /* one message each */
  int64_t n_skipped;
} rc_image_load;

/* Decode and prepare every image with `threads` workers (0 = OpenMP's
 * default); the result does not depend on the thread count. With skip_bad
 * an unreadable image is left out and listed; without it the first (by
 * index) is the error. */
RC_API rc_status rc_image_set_load(rc_image_load *out, const rc_image_set *s, const rc_image_prep *p, int skip_bad,
                            int threads, rc_err *e);
RC_API void rc_image_load_free(rc_image_load *l);

/* ---- Images decoded as they are used -------------------------------------- */

/* A set read per sample instead of up front: memory holds the images of the
 * batches in flight, not the set. rc_image_stream_open fills `view` with a
 * uint8 (N, C, H, W) shape and no data, bound to the stream; rc_data_to_float
 * and dataset views built over it (rc_dataset_convert) decode each sample
 * from its file. The set and prep must outlive the stream, and the stream
 * every view of it. Reading is safe from several threads at once.
 *
 * Unreadable images: without skip_bad, reading one is an error naming the
 * file. With skip_bad it is listed when first met, and its sample reads as
 * the next readable image of the set (in set order, wrapping round) with the
 * same label (any image when the set has no labels); the count N stays the
 * set's. The substitute depends only on which files are unreadable, not on
 * when or by which thread they were met, so runs stay byte-identical for a
 * seed; they differ from rc_image_set_load, which leaves the files out. */
typedef struct rc_image_stream rc_image_stream;

RC_API rc_status rc_image_stream_open(rc_image_stream **out, rc_array *view, const rc_image_set *s,
                                      const rc_image_prep *p, int skip_bad, rc_err *e);
RC_API void rc_image_stream_free(rc_image_stream *st);

/* Decode and prepare sample i into dst ((C, H, W) uint8). */
RC_API rc_status rc_image_stream_read(const rc_image_stream *st, uint8_t *dst, int64_t i, rc_err *e);

/* The images found unreadable so far, ascending by index, with their
 * messages, into out->skipped/skipped_why/n_skipped (out's arrays are
 * replaced; the images and labels members are left as they are). */
RC_API rc_status rc_image_stream_skipped(const rc_image_stream *st, rc_image_load *out, rc_err *e);

/* Images decoded so far (substitutes included), for throughput figures. */
RC_API int64_t rc_image_stream_decoded(const rc_image_stream *st);

#endif
