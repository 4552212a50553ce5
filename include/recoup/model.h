/* Models: load an ONNX file, look at what it holds, save it.
 *
 * An rc_model is an opaque handle: the graph, the message it was read from
 * (so that saving keeps everything the caller did not change) and the path.
 * Lists returned by the inspection functions are one allocation each, freed
 * with rc_model_list_free; the strings in them point into the model and live
 * as long as it does. */
#ifndef RECOUP_MODEL_H
#define RECOUP_MODEL_H

#include <stddef.h>
#include <stdint.h>

#include "recoup/export.h"
#include "recoup/rules.h"
#include "recoup/status.h"
#include "recoup/tensor.h"

typedef struct rc_model rc_model;

/* Limits on what a file may ask for, checked before anything is allocated. */
typedef struct rc_load_limits {
  size_t max_file_bytes;      /* whole .onnx file */
  size_t max_tensor_bytes;    /* one initializer or attribute tensor */
  size_t max_total_bytes;     /* every initializer together, external data included */
  int max_nodes;
  int max_rank;               /* at most RC_MAX_RANK */
  size_t max_string;          /* one name or string attribute */
} rc_load_limits;

/* Generous defaults for real models: 4 GiB file, 2 GiB tensor, 8 GiB total,
 * 1,000,000 nodes, rank 8, 64 KiB strings. */
RC_API void rc_load_limits_default(rc_load_limits *l);

/* Read, order and bind path; limits may be NULL for the defaults. Refuses
 * unsupported ops, IR versions outside 3..10 and default-domain opsets
 * outside 9..21. Errors name the file and the node or field. */
RC_API rc_status rc_model_load(rc_model **out, const char *path, const rc_load_limits *limits,
                               rc_err *e);
/* Safe on NULL. */
RC_API void rc_model_free(rc_model *m);

/* Write the model to path atomically (temp file in the same folder, synced,
 * renamed), refusing to write over the file it was read from. `changed`
 * lists the values whose data the caller changed (NULL, 0: none); the other
 * initializers keep their exact bytes. After distillation use
 * rc_distill_save, which knows the list. */
RC_API rc_status rc_model_save(rc_model *m, const char *path, const int *changed, int n_changed,
                               rc_err *e);

/* The path the model was loaded from. */
RC_API const char *rc_model_path(const rc_model *m);
/* Size in bytes of the file the model was loaded from. */
RC_API int64_t rc_model_file_bytes(const rc_model *m);
/* The file's ONNX IR version and default-domain opset. */
RC_API int64_t rc_model_ir_version(const rc_model *m);
RC_API int rc_model_opset(const rc_model *m);

/* The value of a metadata_props entry of the model, or NULL when it has
 * none (points into the model). */
RC_API const char *rc_model_metadata(const rc_model *m, const char *key);
/* Set (replace or append) a metadata_props entry, written with the model by
 * rc_model_save. */
RC_API rc_status rc_model_edit_set_metadata(rc_model *m, const char *key, const char *value, rc_err *e);

/* ---- Inputs and outputs ---------------------------------------------- */

/* One graph input or output: its name and declared dtype and shape
 * (shape.data is NULL; a dim is -1 where symbolic or unknown; rank -1 when
 * the file declares no shape). */
typedef struct rc_model_io {
  const char *name;
  rc_tensor shape;
} rc_model_io;

RC_API int rc_model_n_inputs(const rc_model *m);
RC_API int rc_model_n_outputs(const rc_model *m);
/* Input or output i (0-based); RC_ERR_INVALID when i is out of range. Output
 * shapes are the ones the model computes for a batch of one, or the declared
 * ones when it does not plan. */
RC_API rc_status rc_model_input(const rc_model *m, int i, rc_model_io *out, rc_err *e);
RC_API rc_status rc_model_output(const rc_model *m, int i, rc_model_io *out, rc_err *e);

/* What the file declares for input or output i: element type (0 when it
 * declares none), shape (rank -1 when it declares none; a dim -1 where
 * symbolic or unknown) and the names of symbolic dims ("N"), NULL where
 * not given (strings point into the model). */
typedef struct rc_io_decl {
  const char *name; /* rc_model_declared: the input's or output's name */
  rc_dtype dtype;
  int rank;
  int64_t dims[RC_MAX_RANK];
  const char *dim_names[RC_MAX_RANK];
} rc_io_decl;

RC_API rc_status rc_model_declared(const rc_model *m, int is_output, int i, rc_io_decl *d, rc_err *e);

/* The declared input shapes with every symbolic or unknown dim taken as b
 * (no shape: rank 0): one per input into out, data NULL. Counts are quoted
 * at b = 1. */
RC_API void rc_model_batch_inputs(const rc_model *m, int64_t b, rc_tensor *out);

/* The shapes of every output (rc_model_n_outputs entries into out, data
 * NULL) when the inputs have the shapes in `inputs` (one per graph input,
 * data ignored): what running the model on such a batch gives. Errors name
 * the node whose shapes do not fit. */
RC_API rc_status rc_model_output_shapes(const rc_model *m, const rc_tensor *inputs, rc_tensor *out, rc_err *e);

/* ---- Counts ------------------------------------------------------------ */

typedef struct rc_model_summary {
  int n_nodes, n_initializers;
  int64_t params;           /* entries of float and integer weight initializers */
  int64_t macs;             /* multiply-accumulates at batch 1; -1 when the model does not plan */
  int64_t weights_total;    /* entries of layer weights (Conv, ConvTranspose, Gemm, MatMul) */
  int64_t weights_zero;     /* of those, zero (or at the zero point) */
  int n_grids;              /* quantization grids (DequantizeLinear with a constant scale) */
} rc_model_summary;

RC_API rc_status rc_model_summarize(const rc_model *m, rc_model_summary *out, rc_err *e);

/* Entries of float and integer weight initializers (as summary.params). */
RC_API int64_t rc_model_params(const rc_model *m);
/* Multiply-accumulates at batch 1 (as summary.macs); fails with the reason
 * when the model does not plan. */
RC_API rc_status rc_model_macs(const rc_model *m, int64_t *macs, rc_err *e);

typedef struct rc_model_op_count {
  const char *op_type;
  const char *domain;       /* "" for the default domain */
  int count;
} rc_model_op_count;

/* Nodes per op type, in order of first appearance. */
RC_API rc_status rc_model_op_counts(const rc_model *m, rc_model_op_count **out, int *n, rc_err *e);

/* ---- Weights and grids ------------------------------------------------- */

typedef enum rc_weight_kind {
  RC_WEIGHT_KERNEL = 0,     /* the weight of Conv, ConvTranspose, Gemm or MatMul */
  RC_WEIGHT_BIAS = 1,
  RC_WEIGHT_NORM = 2,       /* BatchNormalization and other normalisation parameters */
  RC_WEIGHT_AFFINE = 3      /* a float initializer added to or multiplied with an activation */
} rc_weight_kind;

typedef struct rc_model_weight {
  const char *name;         /* the initializer */
  const char *layer;        /* the node that consumes it */
  const char *op_type;
  rc_weight_kind kind;
  rc_tensor shape;          /* dtype and dims; data NULL */
  int quantized;            /* reached through DequantizeLinear */
  int in_axis;              /* input-channel axis, -1 if none */
  int64_t numel, zeros;
  double sparsity;          /* zeros / numel */
  int nm_n, nm_m;           /* N:M pattern along in_axis, 0 when none holds */
} rc_model_weight;

RC_API rc_status rc_model_weights(const rc_model *m, rc_model_weight **out, int *n, rc_err *e);

typedef struct rc_model_grid {
  const char *tensor;       /* the quantized tensor */
  const char *node;         /* the DequantizeLinear (or QuantizeLinear) */
  int is_weight;            /* an initializer rather than an activation */
  rc_dtype dtype;           /* integer type of the grid */
  int axis;                 /* -1 for per-tensor */
  int64_t n_scale;
  float scale_min, scale_max;
  const float *scale; /* the n_scale scales (point into the model) */
} rc_model_grid;

RC_API rc_status rc_model_grids(const rc_model *m, rc_model_grid **out, int *n, rc_err *e);

/* rc_range_source, rc_int_range and rc_range_source_name: recoup/rules.h. */

/* The integer range of every grid of rc_model_grids (same order) into out
 * (one allocation, rc_model_list_free). Errors name the file and the
 * metadata entry or tensor at fault. */
RC_API rc_status rc_model_grid_ranges(const rc_model *m, rc_int_range **out, int *n, rc_err *e);

/* The zero points of grid i of rc_model_grids, one per scale (n_scale
 * int64 into out; 0 where the grid has none). */
RC_API rc_status rc_model_grid_zero_points(const rc_model *m, int i, int64_t *out, rc_err *e);

/* rc_mask_mode and rc_mask_choice (what an exact zero in a weight means to
 * distill): recoup/rules.h. */

/* "auto", "zeros", "none"; parse returns 1 for one of them, else 0. */
RC_API const char *rc_mask_mode_name(rc_mask_mode m);
RC_API int rc_mask_mode_parse(const char *s, rc_mask_mode *m);

/* The decision under `mode` for every weight of rc_model_weights (same
 * order; rule NULL for biases, normalisation and affine parameters) into
 * out (one allocation, rc_model_list_free). */
RC_API rc_status rc_model_masks(const rc_model *m, rc_mask_mode mode, rc_mask_choice **out, int *n, rc_err *e);

/* Frees a list returned above; safe on NULL. */
RC_API void rc_model_list_free(void *list);

#endif
