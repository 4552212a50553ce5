/* Shared helpers of the data-movement kernels (shape, reduce, resize, quant
 * families): strided copies and accumulations over views of contiguous
 * tensors, and a node-naming error macro. A view maps a contiguous index
 * (i0, ..., i_{r-1}) over `dims` to the flat offset base + sum(i_d * stride[d])
 * of another buffer; strides may be zero (broadcast) or negative (reversal). */
#ifndef RC_OPS_LAYOUT_H
#define RC_OPS_LAYOUT_H

#include <stddef.h>
#include <stdint.h>

#include "ops/op.h"

/* Views may carry twice the tensor rank (Tile splits each axis in two). */
#define RC_VIEW_MAX_RANK (2 * RC_MAX_RANK)

#define RC_NODE_FAIL(e, n, code, fmt, ...) \
  rc__fail((e), (code), "node '%s' (%s): " fmt, (n)->label, (n)->op_type, __VA_ARGS__)

/* Row-major strides (in elements) of dims. */
void rc__contig_strides(int64_t *stride, int rank, const int64_t *dims);

/* dst[i] = src[view(i)] for every i of the contiguous dst of shape dims;
 * esz is the element size in bytes (1, 2, 4 or 8). */
void rc__view_copy(void *dst, const void *src, int64_t base, int rank, const int64_t *dims,
                   const int64_t *stride, size_t esz);
/* dst[i] += src[view(i)]: gathers a view into a contiguous float buffer. */
void rc__view_gather_add(float *dst, const float *src, int64_t base, int rank, const int64_t *dims,
                         const int64_t *stride);
/* dst[view(i)] += src[i]: scatters a contiguous float buffer into a view,
 * in index order (so repeated targets accumulate deterministically). A view
 * without zero strides is taken to be one-to-one (as Slice and Transpose
 * views are) and may be scattered by several threads. */
void rc__view_scatter_add(float *dst, int64_t base, const float *src, int rank, const int64_t *dims,
                          const int64_t *stride);

/* dst[i] += src[i]. */
void rc__add_into(float *dst, const float *src, int64_t n);

/* Element i of a numeric tensor's data as double, and the reverse (integers
 * wrap like a C cast after truncation toward zero; bool stores v != 0). */
double rc__load_f64(const void *data, rc_dtype dt, int64_t i);
void rc__store_f64(void *data, rc_dtype dt, int64_t i, double v);

#endif

