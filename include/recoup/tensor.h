/* Tensors: a dtype, a concrete shape and a pointer to data the tensor does
 * not own. Dtype codes are ONNX's TensorProto.DataType numbers. */
#ifndef RECOUP_TENSOR_H
#define RECOUP_TENSOR_H

#include "recoup/export.h"

#include <stddef.h>
#include <stdint.h>

#define RC_MAX_RANK 8

typedef enum rc_dtype {
  RC_DTYPE_UNDEFINED = 0,
  RC_DTYPE_FLOAT = 1,
  RC_DTYPE_UINT8 = 2,
  RC_DTYPE_INT8 = 3,
  RC_DTYPE_UINT16 = 4,
  RC_DTYPE_INT16 = 5,
  RC_DTYPE_INT32 = 6,
  RC_DTYPE_INT64 = 7,
  RC_DTYPE_STRING = 8,
  RC_DTYPE_BOOL = 9,
  RC_DTYPE_FLOAT16 = 10,
  RC_DTYPE_DOUBLE = 11,
  RC_DTYPE_UINT32 = 12,
  RC_DTYPE_UINT64 = 13,
  RC_DTYPE_BFLOAT16 = 16,
  RC_DTYPE_UINT4 = 21,
  RC_DTYPE_INT4 = 22
} rc_dtype;

typedef struct rc_tensor {
  rc_dtype dtype;
  int rank;
  int64_t dims[RC_MAX_RANK];
  void *data; /* not owned; NULL when only the shape is known */
} rc_tensor;

/* Bytes per element; 0 for dtypes recoup does not compute with. Sub-byte
 * types (int4/uint4) are unpacked to one byte per element in memory. */
RC_API size_t rc_dtype_size(rc_dtype t);
RC_API const char *rc_dtype_name(rc_dtype t);
RC_API int rc_dtype_is_float(rc_dtype t);
RC_API int rc_dtype_is_integer(rc_dtype t);

RC_API int64_t rc_tensor_numel(const rc_tensor *t);
/* Bytes of data, or SIZE_MAX if the size overflows. */
RC_API size_t rc_tensor_nbytes(const rc_tensor *t);
/* "(1, 3, 224, 224)" into buf. */
RC_API const char *rc_shape_str(const rc_tensor *t, char *buf, size_t n);
RC_API int rc_shape_equal(const rc_tensor *a, const rc_tensor *b);

#endif
