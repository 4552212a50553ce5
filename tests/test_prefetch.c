/* The prefetch ring (src/data/prefetch.c) and image sets decoded per sample
 * (src/data/image_stream.c): the ring serves exactly the batches a direct
 * gather gives, in order, for any worker count and depth; images decode to
 * the pixels libpng (Debian libpng-dev) wrote; an unreadable file met
 * mid-epoch is an error at its batch, or (skip_bad) is listed and read as a
 * fixed stand-in whatever the thread count. */
#define _POSIX_C_SOURCE 200809L

#include <png.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "data/prefetch.h"
#include "recoup/data.h"
#include "recoup/image.h"
#include "test.h"

static char tmpdir[512];

/* ---- Arrays in memory -------------------------------------------------------- */

#define N_SAMPLES 50
#define PER 3

typedef struct fixture {
  float x[N_SAMPLES * PER];
  int32_t labels[N_SAMPLES];
  rc_dataset ring_view, ref_view;
} fixture;

static void fixture_init(fixture *f) {
  for (int i = 0; i < N_SAMPLES; i++) {
    for (int k = 0; k < PER; k++) f->x[i * PER + k] = (float)(i * 10 + k);
    f->labels[i] = i % 7;
  }
  rc_tensor t = {RC_DTYPE_FLOAT, 2, {N_SAMPLES, PER}, f->x};
  rc_tensor l = {RC_DTYPE_INT32, 1, {N_SAMPLES}, f->labels};
  rc_err e = {0};
  /* A view over every other sample but the first two, so that positions and
   * sample numbers differ. */
  int64_t index[N_SAMPLES];
  int n = 0;
  for (int i = 2; i < N_SAMPLES; i++) index[n++] = i;
  CHECK_STATUS(rc_dataset_init(&f->ring_view, &t, 1, &l, index, n, &e), RC_OK);
  CHECK_STATUS(rc_dataset_init(&f->ref_view, &t, 1, &l, index, n, &e), RC_OK);
}

static void fixture_free(fixture *f) {
  rc_dataset_free(&f->ring_view);
  rc_dataset_free(&f->ref_view);
}

/* Rows [offset, offset + local) of global batch b of the epoch ref is in. */
static void direct_batch(const rc_dataset *ref, int64_t b, int64_t batch, int64_t offset, int64_t local, float *x,
                         int32_t *labels) {
  rc_dataset part = *ref;
  part.order = ref->order + b * batch + offset;
  part.n = local;
  void *out[1] = {x};
  int64_t count = 0;
  rc_err e = {0};
  CHECK_STATUS(rc_dataset_gather(out, labels, &count, &part, 0, local, &e), RC_OK);
  CHECK_EQ(count, local);
}

/* Positions from batch 3 of epoch 1 over four epochs, a rank's rows 2..5 of
 * batches of 8: each equals the direct gather of the same position. */
static void check_ring(int workers, int depth) {
  fixture f;
  fixture_init(&f);
  const int64_t batch = 8, offset = 2, local = 4, spe = f.ring_view.n / batch, epoch = 1, first = 3, count = 20;
  rc__prefetch_plan p = {&f.ring_view, 99, batch, offset, local, spe, epoch, first, count, 1, workers, depth};
  rc__prefetch *pf = NULL;
  rc_err e = {0};
  CHECK_STATUS(rc__prefetch_start(&pf, &p, &e), RC_OK);
  if (!pf) {
    fixture_free(&f);
    return;
  }
  int64_t cur_epoch = -1;
  for (int64_t j = 0; j < count; j++) {
    int64_t at = first + j, ep = epoch + at / spe, b = at % spe;
    if (ep != cur_epoch) rc_dataset_shuffle(&f.ref_view, 99, (uint64_t)ep);
    cur_epoch = ep;
    float want[8 * PER], got[8 * PER];
    int32_t want_l[8], got_l[8];
    direct_batch(&f.ref_view, b, batch, offset, local, want, want_l);
    void *out[1] = {got};
    int64_t n = 0;
    CHECK_STATUS(rc__prefetch_next(pf, out, got_l, &n, &e), RC_OK);
    CHECK_EQ(n, local);
    CHECK_MEM_EQ(got, want, sizeof(float) * (size_t)(local * PER));
    CHECK_MEM_EQ(got_l, want_l, sizeof(int32_t) * (size_t)local);
  }
  float spare[8 * PER];
  void *out[1] = {spare};
  int64_t n = 1;
  CHECK_STATUS(rc__prefetch_next(pf, out, NULL, &n, &e), RC_ERR_INVALID);
  CHECK_EQ(n, 0);
  rc__prefetch_stats st;
  rc__prefetch_stats_get(pf, &st);
  CHECK_EQ(st.samples, count * local);
  rc__prefetch_stop(pf);
  fixture_free(&f);
}

static void ring_serves_the_gather_order(void) {
  int workers[] = {1, 2, 3}, depths[] = {1, 2, 5};
  for (int w = 0; w < 3; w++)
    for (int d = 0; d < 3; d++) check_ring(workers[w], depths[d]);
}

static void ring_refuses_bad_plans(void) {
  fixture f;
  fixture_init(&f);
  rc__prefetch *pf = NULL;
  rc_err e = {0};
  rc__prefetch_plan rows = {&f.ring_view, 1, 8, 6, 4, 6, 0, 0, 5, 0, 1, 2}; /* rows 6..9 of 8 */
  CHECK_STATUS(rc__prefetch_start(&pf, &rows, &e), RC_ERR_INVALID);
  CHECK_NULL(pf);
  rc__prefetch_plan epochs = {&f.ring_view, 1, 8, 0, 8, 7, 0, 0, 5, 0, 1, 2}; /* 7 * 8 > 48 samples */
  CHECK_STATUS(rc__prefetch_start(&pf, &epochs, &e), RC_ERR_INVALID);
  rc__prefetch_stop(NULL);
  fixture_free(&f);
}

/* ---- Images ---------------------------------------------------------------------- */

#define N_IMAGES 12
#define IMG_W 6
#define IMG_H 5

static uint8_t pixel(int image, int at) { return (uint8_t)(image * 20 + at); }

static void write_png(const char *path, int image) {
  uint8_t px[IMG_W * IMG_H];
  for (int k = 0; k < IMG_W * IMG_H; k++) px[k] = pixel(image, k);
  png_image im;
  memset(&im, 0, sizeof im);
  im.version = PNG_IMAGE_VERSION;
  im.width = IMG_W;
  im.height = IMG_H;
  im.format = PNG_FORMAT_GRAY;
  CHECK(png_image_write_to_file(&im, path, 0, px, 0, NULL));
}

/* A folder of N_IMAGES gray PNGs written by libpng, image `bad` replaced by
 * text, and a list file giving labels 0 to images 0..3 and 1 to the rest. */
static void write_images(const char *dir, int bad) {
  char path[700], cmd[800];
  snprintf(cmd, sizeof cmd, "rm -rf '%s' && mkdir -p '%s'", dir, dir);
  CHECK_EQ(system(cmd), 0);
  snprintf(path, sizeof path, "%s/list.txt", dir);
  FILE *list = fopen(path, "w");
  for (int i = 0; i < N_IMAGES; i++) {
    snprintf(path, sizeof path, "%s/img%02d.png", dir, i);
    if (i == bad) {
      FILE *f = fopen(path, "w");
      fputs("not a picture\n", f);
      fclose(f);
    } else {
      write_png(path, i);
    }
    fprintf(list, "img%02d.png %d\n", i, i < 4 ? 0 : 1);
  }
  fclose(list);
}

static const rc_image_prep gray_prep = {1, IMG_H, IMG_W, 0};

/* A folder or list opened as a set decoded per sample, gray IMG_H x IMG_W. */
typedef struct images {
  rc_image_set set;
  rc_image_stream *st;
  rc_array view;
} images;

static void images_open(images *im, const char *path, rc_image_labels labels, int skip_bad) {
  rc_err e = {0};
  im->st = NULL;
  CHECK_STATUS(rc_image_set_open(&im->set, path, labels, &e), RC_OK);
  CHECK_STATUS(rc_image_stream_open(&im->st, &im->view, &im->set, &gray_prep, skip_bad, &e), RC_OK);
}

static void images_close(images *im) {
  rc_image_stream_free(im->st);
  rc_image_set_free(&im->set);
}

static void stream_decodes_what_libpng_wrote(void) {
  char dir[600];
  snprintf(dir, sizeof dir, "%s/good", tmpdir);
  write_images(dir, -1);
  images im;
  images_open(&im, dir, RC_IMAGE_LABELS_NONE, 0);
  CHECK_EQ(im.view.t.dims[0], N_IMAGES);
  CHECK_NULL(im.view.t.data);
  float got[N_IMAGES * IMG_W * IMG_H];
  rc_err e = {0};
  CHECK_STATUS(rc_data_to_float(got, &im.view, 0, N_IMAGES, NULL, &e), RC_OK);
  int wrong = 0;
  for (int i = 0; i < N_IMAGES; i++)
    for (int k = 0; k < IMG_W * IMG_H; k++) wrong += got[i * IMG_W * IMG_H + k] != (float)pixel(i, k);
  CHECK_EQ(wrong, 0);
  CHECK_EQ(rc_image_stream_decoded(im.st), N_IMAGES);
  images_close(&im);
}

/* A view over the stream with every image, converted per batch. */
static void stream_view(rc_dataset *d, const rc_array *view) {
  rc_err e = {0};
  CHECK_STATUS(rc_dataset_init(d, &view->t, 1, NULL, NULL, 0, &e), RC_OK);
  rc_dataset_convert(d, 0, NULL, view);
}

/* Batches of 4 in the order of (seed 5, epoch 0): where image `bad` falls. */
static int64_t batch_holding(const rc_dataset *d, int64_t image) {
  rc_dataset v = *d;
  int64_t order[N_IMAGES];
  v.order = order;
  rc_dataset_shuffle(&v, 5, 0);
  for (int64_t p = 0; p < N_IMAGES; p++)
    if (v.index[order[p]] == image) return p / 4;
  return -1;
}

static void unreadable_file_stops_at_its_batch(void) {
  char dir[600];
  snprintf(dir, sizeof dir, "%s/bad", tmpdir);
  write_images(dir, 7);
  images im;
  images_open(&im, dir, RC_IMAGE_LABELS_NONE, 0);
  rc_dataset d;
  stream_view(&d, &im.view);
  rc_err e = {0};
  int64_t at = batch_holding(&d, 7);
  printf("image 7 is in batch %lld of epoch 0\n", (long long)at);
  rc__prefetch_plan p = {&d, 5, 4, 0, 4, 3, 0, 0, 3, 0, 2, 3};
  rc__prefetch *pf = NULL;
  CHECK_STATUS(rc__prefetch_start(&pf, &p, &e), RC_OK);
  float x[4 * IMG_W * IMG_H];
  void *out[1] = {x};
  for (int64_t b = 0; pf && b < 3; b++) {
    int64_t n = 0;
    rc_err be = {0};
    rc_status s = rc__prefetch_next(pf, out, NULL, &n, &be);
    CHECK_STATUS(s, b == at ? RC_ERR_FORMAT : RC_OK);
    if (b == at) {
      printf("batch %lld: %s\n", (long long)b, be.msg);
      CHECK_NOT_NULL(strstr(be.msg, "img07.png"));
    }
  }
  rc__prefetch_stop(pf);
  rc_dataset_free(&d);
  images_close(&im);
}

/* With skip_bad, an epoch of batches from 1 and 3 workers: identical bytes;
 * the unreadable image listed once; its row holds the stand-in's pixels
 * (the next readable image, or with list labels the next of its label). */
static void skip_bad_epoch(int labels, int bad, int stand_in) {
  char dir[600], list[700];
  snprintf(dir, sizeof dir, "%s/skip%d", tmpdir, bad);
  write_images(dir, bad);
  snprintf(list, sizeof list, "%s/list.txt", dir);
  rc_err e = {0};
  enum { PX = IMG_W * IMG_H };
  float epoch_bytes[2][N_IMAGES * PX];
  for (int run = 0; run < 2; run++) {
    images im;
    images_open(&im, list, labels ? RC_IMAGE_LABELS_LIST : RC_IMAGE_LABELS_NONE, 1);
    rc_dataset d;
    stream_view(&d, &im.view);
    rc__prefetch_plan p = {&d, 5, 4, 0, 4, 3, 0, 0, 3, 0, run ? 3 : 1, run ? 4 : 1};
    rc__prefetch *pf = NULL;
    CHECK_STATUS(rc__prefetch_start(&pf, &p, &e), RC_OK);
    for (int64_t b = 0; pf && b < 3; b++) {
      void *out[1] = {epoch_bytes[run] + b * 4 * PX};
      int64_t n = 0;
      CHECK_STATUS(rc__prefetch_next(pf, out, NULL, &n, &e), RC_OK);
    }
    rc__prefetch_stop(pf);
    /* The row of the unreadable image holds the stand-in's pixels. */
    int64_t order[N_IMAGES];
    rc_dataset v = d;
    v.order = order;
    rc_dataset_shuffle(&v, 5, 0);
    for (int64_t q = 0; q < N_IMAGES; q++) {
      if (d.index[order[q]] != bad) continue;
      int wrong = 0;
      for (int k = 0; k < PX; k++) wrong += epoch_bytes[run][q * PX + k] != (float)pixel(stand_in, k);
      printf("image %d (labels %s) reads as image %d: %d pixels differ\n", bad, labels ? "list" : "none", stand_in,
             wrong);
      CHECK_EQ(wrong, 0);
    }
    rc_image_load listed;
    memset(&listed, 0, sizeof listed);
    CHECK_STATUS(rc_image_stream_skipped(im.st, &listed, &e), RC_OK);
    CHECK_EQ(listed.n_skipped, 1);
    if (listed.n_skipped == 1) {
      CHECK_EQ(listed.skipped[0], bad);
      printf("listed: %s\n", listed.skipped_why[0]);
    }
    rc_image_load_free(&listed);
    rc_dataset_free(&d);
    images_close(&im);
  }
  CHECK_MEM_EQ(epoch_bytes[0], epoch_bytes[1], sizeof epoch_bytes[0]);
}

static void skip_bad_stands_in_the_same_image(void) {
  skip_bad_epoch(0, 7, 8);  /* no labels: the next image */
  skip_bad_epoch(0, 11, 0); /* the last image: round to the first */
  skip_bad_epoch(1, 3, 0);  /* last of label 0: the next of label 0 is the first */
}

static void skip_bad_with_nothing_readable_left(void) {
  char dir[600], list[700];
  snprintf(dir, sizeof dir, "%s/lonely", tmpdir);
  write_images(dir, 2);
  snprintf(list, sizeof list, "%s/list.txt", dir);
  FILE *f = fopen(list, "w");
  fprintf(f, "img02.png 0\nimg05.png 1\n"); /* the unreadable image is alone in its label */
  fclose(f);
  images im;
  images_open(&im, list, RC_IMAGE_LABELS_LIST, 1);
  uint8_t px[IMG_W * IMG_H];
  rc_err e = {0};
  CHECK_STATUS(rc_image_stream_read(im.st, px, 0, &e), RC_ERR_INVALID);
  printf("%s\n", e.msg);
  CHECK_NOT_NULL(strstr(e.msg, "img02.png"));
  CHECK_STATUS(rc_image_stream_read(im.st, px, 1, &e), RC_OK);
  CHECK_EQ(px[3], pixel(5, 3));
  images_close(&im);
}

int main(int argc, char **argv) {
  TEST_SELECT(argc, argv);
  const char *base = getenv("RECOUP_BINARY_DIR");
  snprintf(tmpdir, sizeof tmpdir, "%s/test_prefetch.XXXXXX", base && *base ? base : "/tmp");
  if (!mkdtemp(tmpdir)) {
    perror(tmpdir);
    return 2;
  }
  RUN(ring_serves_the_gather_order);
  RUN(ring_refuses_bad_plans);
  RUN(stream_decodes_what_libpng_wrote);
  RUN(unreadable_file_stops_at_its_batch);
  RUN(skip_bad_stands_in_the_same_image);
  RUN(skip_bad_with_nothing_readable_left);
  char cmd[600];
  snprintf(cmd, sizeof cmd, "rm -rf '%s'", tmpdir);
  if (system(cmd) != 0) fprintf(stderr, "could not remove %s\n", tmpdir);
  return TEST_REPORT();
}
