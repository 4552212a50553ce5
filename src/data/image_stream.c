/* Image sets read per sample: each sample is decoded from its file when a
 * batch asks for it, so memory holds the batches in flight, not the set.
 * Unreadable files (with skip_bad) are listed once and stand in for by the
 * next readable image of the same label, a rule that depends on the files
 * alone, so the pixels of every sample are the same whoever reads them. */
#define _POSIX_C_SOURCE 200809L

#include <pthread.h>
#include <stdatomic.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core/alloc.h"
#include "core/status.h"
#include "data/data_internal.h"
#include "recoup/image.h"

struct rc_image_stream {
  const rc_image_set *set;
  rc_image_prep prep;
  int skip_bad;
  pthread_mutex_t lock;  /* guards bad, n_bad, cap, why, is_bad */
  unsigned char *is_bad; /* per image: found unreadable */
  int64_t *bad;          /* indices in the order they were found */
  char **why;
  int64_t n_bad, cap;
  _Atomic int64_t decoded;
};

rc_status rc_image_stream_open(rc_image_stream **out, rc_array *view, const rc_image_set *s,
                               const rc_image_prep *p, int skip_bad, rc_err *e) {
  *out = NULL;
  memset(view, 0, sizeof *view);
  RC_TRY(rc__image_prep_check(p, e));
  if (s->n < 1) return rc__fail(e, RC_ERR_INVALID, "the image set is empty");
  rc_image_stream *st = rc__calloc(1, sizeof *st);
  unsigned char *flags = rc__calloc((size_t)s->n, 1);
  if (!st || !flags) {
    rc__free(st);
    rc__free(flags);
    return rc__fail(e, RC_ERR_NOMEM, "out of memory for a stream of %lld images", (long long)s->n);
  }
  st->set = s;
  st->prep = *p;
  st->skip_bad = skip_bad;
  st->is_bad = flags;
  pthread_mutex_init(&st->lock, NULL);
  atomic_init(&st->decoded, 0);
  view->t = (rc_tensor){RC_DTYPE_UINT8, 4, {s->n, p->channels, p->height, p->width}, NULL};
  view->stream = st;
  *out = st;
  return RC_OK;
}

void rc_image_stream_free(rc_image_stream *st) {
  if (!st) return;
  for (int64_t i = 0; i < st->n_bad; i++) rc__free(st->why[i]);
  rc__free(st->why);
  rc__free(st->bad);
  rc__free(st->is_bad);
  pthread_mutex_destroy(&st->lock);
  rc__free(st);
}

static int known_bad(rc_image_stream *st, int64_t i) {
  pthread_mutex_lock(&st->lock);
  int bad = st->is_bad[i];
  pthread_mutex_unlock(&st->lock);
  return bad;
}

/* List image i as unreadable (once, whichever thread finds it first). */
static rc_status mark_bad(rc_image_stream *st, int64_t i, const char *why, rc_err *e) {
  rc_status s = RC_OK;
  pthread_mutex_lock(&st->lock);
  if (!st->is_bad[i]) {
    if (st->n_bad == st->cap) {
      int64_t cap = st->cap ? st->cap * 2 : 16;
      int64_t *nb = rc__realloc(st->bad, sizeof(int64_t) * (size_t)cap);
      if (nb) st->bad = nb;
      char **nw = nb ? rc__realloc(st->why, sizeof(char *) * (size_t)cap) : NULL;
      if (nw) {
        st->why = nw;
        st->cap = cap;
      }
    }
    char *msg = st->n_bad < st->cap ? rc__strdup(why) : NULL;
    if (msg) {
      st->bad[st->n_bad] = i;
      st->why[st->n_bad++] = msg;
      st->is_bad[i] = 1;
    } else {
      s = rc__fail(e, RC_ERR_NOMEM, "out of memory listing unreadable images");
    }
  }
  pthread_mutex_unlock(&st->lock);
  return s;
}

/* Try image i: RC_OK, or *unreadable set (and i listed) when the file is at
 * fault; an error that is not the file's (out of memory) is returned. */
static rc_status try_one(rc_image_stream *st, uint8_t *dst, int64_t i, int *unreadable, rc_err *e) {
  *unreadable = 0;
  if (known_bad(st, i)) {
    *unreadable = 1;
    return RC_OK;
  }
  rc_err ie = {0};
  rc_status s = rc__image_read_one(dst, st->set, i, &st->prep, &ie);
  if (s == RC_OK) {
    atomic_fetch_add(&st->decoded, 1);
    return RC_OK;
  }
  if (!st->skip_bad || s == RC_ERR_NOMEM) {
    *e = ie;
    return s;
  }
  *unreadable = 1;
  return mark_bad(st, i, ie.msg, e);
}

rc_status rc_image_stream_read(const rc_image_stream *cst, uint8_t *dst, int64_t i, rc_err *e) {
  rc_image_stream *st = (rc_image_stream *)cst; /* the list of unreadable files is a cache behind the lock */
  const rc_image_set *set = st->set;
  if (i < 0 || i >= set->n)
    return rc__fail(e, RC_ERR_INVALID, "image %lld is outside 0..%lld", (long long)i, (long long)set->n - 1);
  int unreadable;
  RC_TRY(try_one(st, dst, i, &unreadable, e));
  if (!unreadable) return RC_OK;
  int32_t label = set->labels ? set->labels[i] : -1;
  for (int64_t k = 1; k < set->n; k++) {
    int64_t j = (i + k) % set->n;
    if (set->labels && set->labels[j] != label) continue;
    RC_TRY(try_one(st, dst, j, &unreadable, e));
    if (!unreadable) return RC_OK;
  }
  char path[8192];
  rc_image_set_path(set, i, path, sizeof path);
  if (set->labels)
    return rc__fail(e, RC_ERR_INVALID,
                    "%s: unreadable, and no readable image of label %d is left to stand in for it", path,
                    (int)label);
  return rc__fail(e, RC_ERR_INVALID, "%s: unreadable, and no readable image is left to stand in for it", path);
}

typedef struct listed {
  int64_t index;
  char *why;
} listed;

static int by_index(const void *a, const void *b) {
  int64_t x = ((const listed *)a)->index, y = ((const listed *)b)->index;
  return (x > y) - (x < y);
}

rc_status rc_image_stream_skipped(const rc_image_stream *cst, rc_image_load *out, rc_err *e) {
  rc_image_stream *st = (rc_image_stream *)cst;
  for (int64_t i = 0; i < out->n_skipped; i++) rc__free(out->skipped_why[i]);
  rc__free(out->skipped_why);
  rc__free(out->skipped);
  out->skipped = NULL;
  out->skipped_why = NULL;
  out->n_skipped = 0;
  rc_status s = RC_OK;
  pthread_mutex_lock(&st->lock);
  int64_t n = st->n_bad;
  listed *l = rc__malloc(sizeof(listed) * (size_t)(n ? n : 1));
  out->skipped = rc__malloc(sizeof(int64_t) * (size_t)(n ? n : 1));
  out->skipped_why = rc__calloc((size_t)(n ? n : 1), sizeof(char *));
  if (!l || !out->skipped || !out->skipped_why) {
    s = rc__fail(e, RC_ERR_NOMEM, "out of memory listing unreadable images");
    n = 0;
  }
  for (int64_t i = 0; i < n; i++) l[i] = (listed){st->bad[i], st->why[i]};
  if (n > 1) qsort(l, (size_t)n, sizeof *l, by_index);
  for (int64_t i = 0; i < n && s == RC_OK; i++) {
    out->skipped[i] = l[i].index;
    out->skipped_why[i] = rc__strdup(l[i].why);
    if (!out->skipped_why[i]) s = rc__fail(e, RC_ERR_NOMEM, "out of memory listing unreadable images");
    out->n_skipped = i + 1;
  }
  pthread_mutex_unlock(&st->lock);
  rc__free(l);
  return s;
}

int64_t rc_image_stream_decoded(const rc_image_stream *st) {
  return atomic_load(&((rc_image_stream *)st)->decoded);
}
