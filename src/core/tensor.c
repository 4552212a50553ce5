#include "recoup/tensor.h"

#include <stdio.h>
#include <string.h>

size_t rc_dtype_size(rc_dtype t) {
  switch (t) {
    case RC_DTYPE_FLOAT: case RC_DTYPE_INT32: case RC_DTYPE_UINT32: return 4;
    case RC_DTYPE_UINT8: case RC_DTYPE_INT8: case RC_DTYPE_BOOL:
    case RC_DTYPE_UINT4: case RC_DTYPE_INT4: return 1;
    case RC_DTYPE_UINT16: case RC_DTYPE_INT16: case RC_DTYPE_FLOAT16:
    case RC_DTYPE_BFLOAT16: return 2;
    case RC_DTYPE_INT64: case RC_DTYPE_DOUBLE: case RC_DTYPE_UINT64: return 8;
    default: return 0;
  }
}

const char *rc_dtype_name(rc_dtype t) {
  switch (t) {
    case RC_DTYPE_FLOAT: return "float32";
    case RC_DTYPE_UINT8: return "uint8";
    case RC_DTYPE_INT8: return "int8";
    case RC_DTYPE_UINT16: return "uint16";
    case RC_DTYPE_INT16: return "int16";
    case RC_DTYPE_INT32: return "int32";
    case RC_DTYPE_INT64: return "int64";
    case RC_DTYPE_STRING: return "string";
    case RC_DTYPE_BOOL: return "bool";
    case RC_DTYPE_FLOAT16: return "float16";
    case RC_DTYPE_DOUBLE: return "float64";
    case RC_DTYPE_UINT32: return "uint32";
    case RC_DTYPE_UINT64: return "uint64";
    case RC_DTYPE_BFLOAT16: return "bfloat16";
    case RC_DTYPE_UINT4: return "uint4";
    case RC_DTYPE_INT4: return "int4";
    default: return "undefined";
  }
}

int rc_dtype_is_float(rc_dtype t) {
  return t == RC_DTYPE_FLOAT || t == RC_DTYPE_DOUBLE || t == RC_DTYPE_FLOAT16 ||
         t == RC_DTYPE_BFLOAT16;
}

int rc_dtype_is_integer(rc_dtype t) {
  switch (t) {
    case RC_DTYPE_UINT8: case RC_DTYPE_INT8: case RC_DTYPE_UINT16: case RC_DTYPE_INT16:
    case RC_DTYPE_INT32: case RC_DTYPE_INT64: case RC_DTYPE_UINT32: case RC_DTYPE_UINT64:
    case RC_DTYPE_UINT4: case RC_DTYPE_INT4: return 1;
    default: return 0;
  }
}

int64_t rc_tensor_numel(const rc_tensor *t) {
  int64_t n = 1;
  for (int i = 0; i < t->rank; i++) n *= t->dims[i];
  return n;
}

size_t rc_tensor_nbytes(const rc_tensor *t) {
  size_t n = rc_dtype_size(t->dtype);
  for (int i = 0; i < t->rank; i++) {
    if (t->dims[i] < 0) return SIZE_MAX;
    size_t d = (size_t)t->dims[i];
    if (d != 0 && n > SIZE_MAX / d) return SIZE_MAX;
    n *= d;
  }
  return n;
}

const char *rc_shape_str(const rc_tensor *t, char *buf, size_t n) {
  size_t used = 0;
  used += (size_t)snprintf(buf + used, used < n ? n - used : 0, "(");
  for (int i = 0; i < t->rank; i++)
    used += (size_t)snprintf(buf + used, used < n ? n - used : 0, "%s%lld", i ? ", " : "",
                             (long long)t->dims[i]);
  snprintf(buf + used, used < n ? n - used : 0, ")");
  return buf;
}

int rc_shape_equal(const rc_tensor *a, const rc_tensor *b) {
  if (a->rank != b->rank) return 0;
  return memcmp(a->dims, b->dims, sizeof(int64_t) * (size_t)a->rank) == 0;
}
