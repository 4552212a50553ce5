/* Data files in, batches out.
 *
 * Readers turn NumPy .npy/.npz, IDX (plain or gzip) and ONNX TensorProto .pb
 * files into owned arrays; helpers turn arrays into normalised float32 model
 * inputs and checked integer labels; a dataset view serves batches in a
 * seeded shuffled order into caller buffers without allocating per batch.
 *
 * Every size read from a file is checked for overflow and against max_bytes
 * before anything is allocated. Every error names the file and what is wrong.
 */
#ifndef RECOUP_DATA_H
#define RECOUP_DATA_H

#include "recoup/export.h"

#include <stddef.h>
#include <stdint.h>

#include "recoup/status.h"
#include "recoup/tensor.h"

struct rc_image_stream;

/* An array that owns its data: t.data points into `owned` (or is `owned`).
 * When `mapped` is non-zero, `owned` is a read-only file mapping of that
 * many bytes (rc_array_map) rather than heap memory. When `stream` is set
 * (recoup/image.h), t is a uint8 (N, C, H, W) shape with no data: samples
 * are decoded from their image files as they are converted, and the stream
 * belongs to whoever opened it. */
typedef struct rc_array {
  rc_tensor t;
  void *owned;
  size_t mapped;
  const struct rc_image_stream *stream;
} rc_array;

/* Frees (or unmaps) the data and leaves an empty array; safe on a zeroed array. */
RC_API void rc_array_free(rc_array *a);

/* Map a little-endian, C-order NumPy .npy file read-only: t.data points into
 * the mapping, nothing is copied, and pages are read as samples are used.
 * Formats that cannot be mapped (.npz, gzip, IDX, TensorProto, big-endian or
 * Fortran-order .npy) give RC_ERR_UNSUPPORTED with how to convert them. */
RC_API rc_status rc_array_map(rc_array *out, const char *path, size_t max_bytes, rc_err *e);

/* Drop the resident pages of a mapped array (no-op otherwise): they are
 * read again from the file when next touched, so resident memory stays
 * bounded by what is in use rather than by the file. */
RC_API void rc_array_release_pages(const rc_array *a);

typedef enum rc_data_format {
  RC_DATA_AUTO = 0,        /* by magic bytes first, file extension second */
  RC_DATA_NPY = 1,         /* NumPy .npy, format versions 1.0, 2.0, 3.0 */
  RC_DATA_NPZ = 2,         /* zip of .npy members, stored or deflated */
  RC_DATA_IDX = 3,         /* IDX (big-endian dims), plain */
  RC_DATA_GZIP = 4,        /* gzip around an IDX or .npy payload */
  RC_DATA_TENSORPROTO = 5  /* one serialised onnx.TensorProto (.pb) */
} rc_data_format;

/* Default limit on one decoded array or one decompressed member: 8 GiB. */
#define RC_DATA_DEFAULT_MAX_BYTES ((size_t)8 << 30)

RC_API const char *rc_data_format_name(rc_data_format f);

/* Read an array from path. `member` selects an .npz member by name ("x" or
 * "x.npy"); NULL takes the first member. Other formats refuse a member name.
 * max_bytes 0 means RC_DATA_DEFAULT_MAX_BYTES. On error *out is empty. */
RC_API rc_status rc_array_read(rc_array *out, const char *path, const char *member, size_t max_bytes,
                        rc_err *e);

/* The same readers on a memory buffer (the fuzzing entry point). `name` is
 * used in error messages. fmt RC_DATA_AUTO detects by magic bytes only.
 * TensorProto data is read from files only (RC_ERR_UNSUPPORTED here). */
RC_API rc_status rc_array_read_mem(rc_array *out, const void *buf, size_t n, rc_data_format fmt,
                            const char *name, const char *member, size_t max_bytes, rc_err *e);

/* The format of a buffer by its magic bytes, or RC_DATA_AUTO if unknown. */
RC_API rc_data_format rc_data_detect(const void *buf, size_t n);

/* Member names of an .npz (zip) file in archive order. *names is one
 * allocation holding the pointer array and the strings: free it with
 * rc_data_names_free. */
RC_API rc_status rc_npz_list(char ***names, int *count, const char *path, rc_err *e);
RC_API rc_status rc_npz_list_mem(char ***names, int *count, const void *buf, size_t n,
                          const char *name, rc_err *e);
RC_API void rc_data_names_free(char **names);

/* Write t to path as NumPy .npy (format 1.0), atomically. */
RC_API rc_status rc_npy_write(const char *path, const rc_tensor *t, rc_err *e);
/* Write n tensors as members "<name>.npy" of a stored zip (.npz), atomically. */
RC_API rc_status rc_npz_write(const char *path, const char *const *names, const rc_tensor *tensors, int n,
                              rc_err *e);

/* ---- Conversion into model input ------------------------------------- */

/* x' = (x * scale - mean[c]) / std[c], c the channel (axis 1 of the array's
 * (N, C, ...) layout). n_mean/n_std are 1 (one value for all elements) or C;
 * 0 means mean 0 / std 1. */
typedef struct rc_data_norm {
  float scale;
  const float *mean;
  int n_mean;
  const float *std;
  int n_std;
} rc_data_norm;

/* scale 1, no mean, no std. */
RC_API void rc_data_norm_identity(rc_data_norm *n);

/* Parse "0.5,0.5, 0.5" into out (at most max values); *n receives the count.
 * Refuses empty items, trailing text, non-finite values, too many values.
 * Decimal point per the C locale in force (recoup's CLI keeps "C"). */
RC_API rc_status rc_data_parse_floats(const char *s, float *out, int max, int *n, rc_err *e);

/* Convert samples [first, first + count) of `in` (any numeric dtype) to
 * float32 into out (count * per-sample elements) with the normalisation
 * `norm` (NULL = identity). Refuses a non-finite result naming the sample
 * index and element position ("sample 12, element 40: NaN"). */
RC_API rc_status rc_data_to_float(float *out, const rc_array *in, int64_t first, int64_t count,
                           const rc_data_norm *norm, rc_err *e);

/* Whole-array form: *out becomes a new float32 array of in's shape. */
RC_API rc_status rc_data_to_float_array(rc_array *out, const rc_array *in, const rc_data_norm *norm,
                                 rc_err *e);

/* Make a's per-sample shape (dims after axis 0) equal sample_shape: accepted
 * as is, or after inserting/removing size-1 dims when the remaining dims and
 * the element count per sample agree; a's dims are rewritten in place (data
 * untouched). Otherwise RC_ERR_SHAPE naming both shapes. */
RC_API rc_status rc_data_fit(rc_array *a, const rc_tensor *sample_shape, rc_err *e);

/* ---- Labels ------------------------------------------------------------ */

/* Labels are an array of shape (N) or (N, 1) of an integer dtype, bool, or a
 * float dtype holding whole numbers. Refuses another shape, a count other than
 * n_samples and a label outside 0..n_classes-1, naming the position. */
RC_API rc_status rc_labels_check(const rc_array *labels, int64_t n_samples, int64_t n_classes, rc_err *e);

/* Check as rc_labels_check, then *out becomes an int32 array of shape (N). */
RC_API rc_status rc_labels_to_int32(rc_array *out, const rc_array *labels, int64_t n_samples,
                             int64_t n_classes, rc_err *e);

/* ---- Batching ---------------------------------------------------------- */

#define RC_DATASET_MAX_INPUTS 8

/* A view over the samples `index` of one or more arrays that share axis 0,
 * with optional int32 labels (N). The view does not own the arrays. */
typedef struct rc_dataset {
  int n_inputs;
  rc_tensor inputs[RC_DATASET_MAX_INPUTS];
  size_t sample_bytes[RC_DATASET_MAX_INPUTS]; /* bytes of one gathered sample */
  const int32_t *labels; /* NULL when there are none */
  int64_t n;             /* samples in the view */
  int64_t *index;        /* n sample indices into the arrays (owned) */
  int64_t *order;        /* n positions into index, the current epoch's order (owned) */
  /* Per-batch conversion (rc_dataset_convert): inputs with to_float set are
   * gathered as float32 through norm; `release` is the mapped array whose
   * pages are dropped every release_every batches. */
  unsigned char to_float[RC_DATASET_MAX_INPUTS];
  rc_data_norm norm[RC_DATASET_MAX_INPUTS];
  const rc_array *release[RC_DATASET_MAX_INPUTS];
  int64_t release_every[RC_DATASET_MAX_INPUTS];
  /* Inputs whose samples are decoded from image files per batch (the
   * source's stream, set by rc_dataset_convert); their tensors have no data. */
  const struct rc_image_stream *stream[RC_DATASET_MAX_INPUTS];
} rc_dataset;

/* inputs: n_inputs arrays with equal dims[0] (data may be NULL for an input
 * that rc_dataset_convert then binds to an image stream); labels NULL or
 * int32 (N) as made by rc_labels_to_int32. index NULL takes every sample 0..N-1 in order; else
 * n_index indices, each checked to be in range. The order starts unshuffled. */
RC_API rc_status rc_dataset_init(rc_dataset *d, const rc_tensor *inputs, int n_inputs,
                          const rc_tensor *labels, const int64_t *index, int64_t n_index,
                          rc_err *e);
RC_API void rc_dataset_free(rc_dataset *d);

/* Gather input i as float32 converted with norm (NULL = identity; the mean
 * and std arrays must outlive the view) instead of copying its raw dtype, so
 * a uint8 or float16 source costs its own size in memory, plus one batch.
 * `source` (may be NULL) is the array behind input i: when it is a file
 * mapping, its pages are released every 64 MiB of samples gathered; when it
 * is an image stream, each gathered sample is decoded from its file. */
RC_API void rc_dataset_convert(rc_dataset *d, int i, const rc_data_norm *norm, const rc_array *source);

/* Make input i of `to` be input j of `from` (array, sample size, conversion):
 * for feeding the same view to a model whose inputs come in another order. */
RC_API void rc_dataset_take_input(rc_dataset *to, int i, const rc_dataset *from, int j);

/* Put the view in the order for (seed, epoch): a Fisher-Yates shuffle driven
 * by PCG32 seeded with `seed` on stream `epoch`, so the order of any epoch is
 * a pure function of the two numbers and resuming needs nothing else. */
RC_API void rc_dataset_shuffle(rc_dataset *d, uint64_t seed, uint64_t epoch);
/* Back to the view's own order (validation passes). */
RC_API void rc_dataset_unshuffle(rc_dataset *d);

/* Batches of batch_size in the view; drop_last drops a short final batch. */
RC_API int64_t rc_dataset_n_batches(const rc_dataset *d, int64_t batch_size, int drop_last);

/* Copy batch `batch` (samples [batch*batch_size, ...) of the current order)
 * into out[i] (one buffer per input, batch_size * sample bytes, the input's
 * dtype, or float32 after rc_dataset_convert) and labels_out (batch_size int32, may be NULL). *count receives the
 * samples copied (short for the last batch). Allocates nothing, except
 * what decoding an image-stream input takes for one image at a time.
 * Safe to call from several threads at once on the same view. */
RC_API rc_status rc_dataset_gather(void *const *out, int32_t *labels_out, int64_t *count,
                            const rc_dataset *d, int64_t batch, int64_t batch_size, rc_err *e);

/* A training/validation split of n samples: a PCG32 permutation from seed,
 * the last round(n * val_fraction) positions (at least one when the fraction
 * is above 0) for validation, the rest for training; each list sorted
 * ascending. Disjoint, and together every sample exactly once. */
typedef struct rc_data_split {
  int64_t *train;
  int64_t n_train;
  int64_t *val;
  int64_t n_val;
} rc_data_split;

/* A random subset of count of the n samples 0..n-1 (count <= n): perm (n
 * entries) becomes a Fisher-Yates permutation driven by PCG32 seeded with
 * `seed` on stream 0, whose first count entries are then sorted ascending.
 * The subset depends only on (n, count, seed). */
RC_API void rc_data_subset(int64_t *perm, int64_t n, int64_t count, uint64_t seed);

RC_API rc_status rc_data_split_init(rc_data_split *out, int64_t n, double val_fraction, uint64_t seed,
                             rc_err *e);
RC_API void rc_data_split_free(rc_data_split *s);

#endif
