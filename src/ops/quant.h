/* Fake quantization for the training side: the float image of
 * QuantizeLinear followed by DequantizeLinear, and its clipped
 * straight-through gradient. The rounding is QuantizeLinear's (x / scale,
 * round half to even), so a fine-tuned model sees exactly the values the
 * exported QDQ graph will compute.
 *
 * Layout: x is viewed as (outer, channels, inner) in row-major order; scale
 * and zero_point hold one entry per channel (channels = 1, inner = n for
 * per-tensor). zero_point may be NULL (all zero). */
#ifndef RC_OPS_QUANT_H
#define RC_OPS_QUANT_H

#include <stdint.h>

#include "recoup/tensor.h"

/* y = (clamp(round(x / s) + z, qmin, qmax) - z) * s; y may alias x. */
void rc__fake_quant_forward(float *y, const float *x, int64_t n, const float *scale, const int32_t *zero_point,
                            int64_t channels, int64_t inner, int32_t qmin, int32_t qmax);
/* dx += dy where qmin <= round(x / s) + z <= qmax, nothing elsewhere. */
void rc__fake_quant_backward(float *dx, const float *dy, const float *x, int64_t n, const float *scale,
                             const int32_t *zero_point, int64_t channels, int64_t inner, int32_t qmin,
                             int32_t qmax);

/* Range of a quantized integer type (int8, uint8, int16, uint16, int4,
 * uint4); 0 for other types. */
int rc__quant_range(rc_dtype dt, int32_t *lo, int32_t *hi);

#endif
