/* Dataset views, seeded shuffles, batch gathering and validation splits. */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "core/alloc.h"
#include "core/rng.h"
#include "data/data_internal.h"

/* The split draws from its own PCG32 stream so that it is independent of the
 * epoch shuffles, which use stream = epoch. */
#define SPLIT_STREAM 0x53504c4954ULL /* "SPLIT" */

rc_status rc_dataset_init(rc_dataset *d, const rc_tensor *inputs, int n_inputs, const rc_tensor *labels,
                          const int64_t *index, int64_t n_index, rc_err *e) {
  memset(d, 0, sizeof *d);
  if (n_inputs < 1 || n_inputs > RC_DATASET_MAX_INPUTS)
    return rc__fail(e, RC_ERR_INVALID, "a dataset takes 1..%d input arrays, not %d", RC_DATASET_MAX_INPUTS, n_inputs);
  int64_t n_all = -1;
  for (int i = 0; i < n_inputs; i++) {
    const rc_tensor *t = &inputs[i];
    if (t->rank < 1) return rc__fail(e, RC_ERR_INVALID, "input %d has no sample axis", i);
    if (n_all >= 0 && t->dims[0] != n_all)
      return rc__fail(e, RC_ERR_SHAPE, "input %d has %lld samples, input 0 has %lld", i, (long long)t->dims[0],
                      (long long)n_all);
    n_all = t->dims[0];
    rc_tensor one = *t;
    one.dims[0] = 1;
    size_t sb = rc_tensor_nbytes(&one);
    if (sb == SIZE_MAX || sb == 0)
      return rc__fail(e, RC_ERR_INVALID, "input %d: samples of %s have no computable size", i, rc_dtype_name(t->dtype));
    d->inputs[i] = *t;
    d->sample_bytes[i] = sb;
  }
  if (labels) {
    if (labels->dtype != RC_DTYPE_INT32 || labels->rank != 1 || !labels->data)
      return rc__fail(e, RC_ERR_INVALID, "dataset labels must be int32 of shape (N) (see rc_labels_to_int32)");
    if (labels->dims[0] != n_all)
      return rc__fail(e, RC_ERR_SHAPE, "%lld labels for %lld samples", (long long)labels->dims[0], (long long)n_all);
    d->labels = labels->data;
  }
  int64_t n = index ? n_index : n_all;
  if (n < 0) return rc__fail(e, RC_ERR_INVALID, "negative index count %lld", (long long)n);
  size_t bytes;
  if (!rc__mul_size((size_t)n, sizeof(int64_t), &bytes))
    return rc__fail(e, RC_ERR_LIMIT, "index of %lld samples overflows", (long long)n);
  d->index = rc__malloc(bytes);
  d->order = rc__malloc(bytes);
  if (!d->index || !d->order) {
    rc_dataset_free(d);
    return rc__fail(e, RC_ERR_NOMEM, "out of memory for a dataset index of %lld samples", (long long)n);
  }
  for (int64_t i = 0; i < n; i++) {
    int64_t s = index ? index[i] : i;
    if (s < 0 || s >= n_all) {
      rc_dataset_free(d);
      return rc__fail(e, RC_ERR_INVALID, "index entry %lld is sample %lld, outside 0..%lld", (long long)i,
                      (long long)s, (long long)n_all - 1);
    }
    d->index[i] = s;
    d->order[i] = i;
  }
  d->n_inputs = n_inputs;
  d->n = n;
  return RC_OK;
}

/* Pages of a mapped source are dropped after this many bytes of samples. */
#define RELEASE_BYTES ((size_t)64 << 20)

void rc_dataset_convert(rc_dataset *d, int i, const rc_data_norm *norm, const rc_array *source) {
  d->to_float[i] = 1;
  if (norm)
    d->norm[i] = *norm;
  else
    rc_data_norm_identity(&d->norm[i]);
  d->release[i] = source && source->mapped ? source : NULL;
  d->stream[i] = source ? source->stream : NULL;
  size_t sb = d->sample_bytes[i] ? d->sample_bytes[i] : 1;
  d->release_every[i] = (int64_t)(RELEASE_BYTES / sb) + 1; /* in samples */
  rc_tensor one = d->inputs[i];
  one.dims[0] = 1;
  one.dtype = RC_DTYPE_FLOAT;
  d->sample_bytes[i] = rc_tensor_nbytes(&one); /* what a gather writes */
}

void rc_dataset_take_input(rc_dataset *to, int i, const rc_dataset *from, int j) {
  to->inputs[i] = from->inputs[j];
  to->sample_bytes[i] = from->sample_bytes[j];
  to->to_float[i] = from->to_float[j];
  to->norm[i] = from->norm[j];
  to->release[i] = from->release[j];
  to->release_every[i] = from->release_every[j];
  to->stream[i] = from->stream[j];
}

/* Samples of an image stream, decoded in parallel (each writes only its own
 * rows, so the bytes do not depend on the thread count); the error reported
 * is the first failing sample's in batch order, whichever thread met it.
 * Prefetch workers set their own OpenMP thread count to one. */
static rc_status gather_decoded(float *dst, const rc_dataset *d, const rc_array *src, int i, int64_t start,
                                int64_t k, int64_t per, rc_err *e) {
  int64_t first_bad = k;
  rc_status st = RC_OK;
#pragma omp parallel for schedule(dynamic, 1)
  for (int64_t j = 0; j < k; j++) {
    rc_err je = {0};
    int64_t s = d->index[d->order[start + j]];
    rc_status sj = rc_data_to_float(dst + j * per, src, s, 1, &d->norm[i], &je);
    if (sj != RC_OK) {
#pragma omp critical
      if (j < first_bad) {
        first_bad = j;
        st = sj;
        *e = je;
      }
    }
  }
  return st;
}

/* Convert samples of input i one at a time (they are scattered by the order). */
static rc_status gather_float(float *dst, const rc_dataset *d, int i, int64_t start, int64_t k, rc_err *e) {
  rc_array src = {d->inputs[i], NULL, 0, d->stream[i]};
  /* Views share one mapping: a new pass over any of them starts from an
   * empty resident set, so passes do not pile up pages between them. */
  if (d->release[i] && start == 0) rc_array_release_pages(d->release[i]);
  int64_t per = rc_tensor_numel(&d->inputs[i]) / (d->inputs[i].dims[0] ? d->inputs[i].dims[0] : 1);
  if (d->stream[i]) return gather_decoded(dst, d, &src, i, start, k, per, e);
  for (int64_t j = 0; j < k; j++) {
    int64_t s = d->index[d->order[start + j]];
    RC_TRY(rc_data_to_float(dst + j * per, &src, s, 1, &d->norm[i], e));
  }
  /* Every release_every samples gathered (counted over the epoch's positions,
   * so the rule is the same for any batch size), drop the mapping's pages. */
  if (d->release[i] && (start + k) / d->release_every[i] != start / d->release_every[i])
    rc_array_release_pages(d->release[i]);
  return RC_OK;
}

void rc_dataset_free(rc_dataset *d) {
  if (!d) return;
  rc__free(d->index);
  rc__free(d->order);
  memset(d, 0, sizeof *d);
}

void rc_dataset_unshuffle(rc_dataset *d) {
  for (int64_t i = 0; i < d->n; i++) d->order[i] = i;
}

void rc_dataset_shuffle(rc_dataset *d, uint64_t seed, uint64_t epoch) {
  rc_rng r;
  rc__rng_seed(&r, seed, epoch);
  rc_dataset_unshuffle(d); /* so the order depends on (seed, epoch) only */
  rc__rng_shuffle_i64(&r, d->order, d->n);
}

int64_t rc_dataset_n_batches(const rc_dataset *d, int64_t batch_size, int drop_last) {
  if (batch_size < 1) return 0;
  return drop_last ? d->n / batch_size : d->n / batch_size + (d->n % batch_size != 0);
}

rc_status rc_dataset_gather(void *const *out, int32_t *labels_out, int64_t *count, const rc_dataset *d,
                            int64_t batch, int64_t batch_size, rc_err *e) {
  *count = 0;
  if (batch_size < 1) return rc__fail(e, RC_ERR_INVALID, "batch size %lld", (long long)batch_size);
  if (batch < 0 || batch > (d->n - 1) / batch_size || d->n == 0)
    return rc__fail(e, RC_ERR_INVALID, "batch %lld is outside the %lld batches of size %lld", (long long)batch,
                    (long long)rc_dataset_n_batches(d, batch_size, 0), (long long)batch_size);
  if (labels_out && !d->labels) return rc__fail(e, RC_ERR_INVALID, "labels asked for, but the dataset has none");
  int64_t start = batch * batch_size;
  int64_t k = d->n - start < batch_size ? d->n - start : batch_size;
  for (int i = 0; i < d->n_inputs; i++) {
    if (!d->inputs[i].data && !(d->to_float[i] && d->stream[i]))
      return rc__fail(e, RC_ERR_INVALID, "input %d of the dataset has no data", i);
    if (d->to_float[i]) {
      RC_TRY(gather_float(out[i], d, i, start, k, e));
      continue;
    }
    const unsigned char *src = d->inputs[i].data;
    unsigned char *dst = out[i];
    size_t sb = d->sample_bytes[i];
    for (int64_t j = 0; j < k; j++) {
      int64_t s = d->index[d->order[start + j]];
      memcpy(dst + (size_t)j * sb, src + (size_t)s * sb, sb);
    }
  }
  if (labels_out)
    for (int64_t j = 0; j < k; j++) labels_out[j] = d->labels[d->index[d->order[start + j]]];
  *count = k;
  return RC_OK;
}

static int cmp_i64(const void *a, const void *b) {
  int64_t x = *(const int64_t *)a, y = *(const int64_t *)b;
  return (x > y) - (x < y);
}

rc_status rc_data_split_init(rc_data_split *out, int64_t n, double val_fraction, uint64_t seed, rc_err *e) {
  memset(out, 0, sizeof *out);
  if (!(val_fraction >= 0.0 && val_fraction < 1.0))
    return rc__fail(e, RC_ERR_INVALID, "validation fraction %g is outside [0, 1)", val_fraction);
  if (n < 1) return rc__fail(e, RC_ERR_INVALID, "cannot split %lld samples", (long long)n);
  int64_t n_val = (int64_t)llround((double)n * val_fraction);
  if (val_fraction > 0.0 && n_val == 0) n_val = 1;
  if (n_val >= n)
    return rc__fail(e, RC_ERR_INVALID, "a validation fraction of %g leaves no training samples out of %lld",
                    val_fraction, (long long)n);
  size_t bytes;
  if (!rc__mul_size((size_t)n, sizeof(int64_t), &bytes))
    return rc__fail(e, RC_ERR_LIMIT, "split of %lld samples overflows", (long long)n);
  int64_t *perm = rc__malloc(bytes);
  int64_t *val = rc__malloc(n_val ? (size_t)n_val * sizeof(int64_t) : 1);
  if (!perm || !val) {
    rc__free(perm);
    rc__free(val);
    return rc__fail(e, RC_ERR_NOMEM, "out of memory splitting %lld samples", (long long)n);
  }
  for (int64_t i = 0; i < n; i++) perm[i] = i;
  rc_rng r;
  rc__rng_seed(&r, seed, SPLIT_STREAM);
  rc__rng_shuffle_i64(&r, perm, n);
  int64_t n_train = n - n_val;
  memcpy(val, perm + n_train, (size_t)n_val * sizeof(int64_t));
  qsort(perm, (size_t)n_train, sizeof(int64_t), cmp_i64);
  qsort(val, (size_t)n_val, sizeof(int64_t), cmp_i64);
  /* perm keeps the training part; its tail is no longer used. */
  out->train = perm;
  out->n_train = n_train;
  out->val = val;
  out->n_val = n_val;
  return RC_OK;
}

void rc_data_split_free(rc_data_split *s) {
  if (!s) return;
  rc__free(s->train);
  rc__free(s->val);
  memset(s, 0, sizeof *s);
}
