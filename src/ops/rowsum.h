/* Sums over one contiguous run of floats, vectorised, with the instruction
 * set picked at run time (AVX-512, AVX2 or the baseline). Each sum keeps 16
 * float partial sums in a fixed order and adds them pairwise, so the
 * result is the same bit for bit on every instruction set and thread count. */
#ifndef RC_OPS_ROWSUM_H
#define RC_OPS_ROWSUM_H

#include <stdint.h>

/* sum x[j] */
double rc__row_sum(const float *x, int64_t n);
/* sum (x[j] - m)^2 */
double rc__row_sq_dev(const float *x, int64_t n, float m);
/* sum dy[j] * (x[j] - m) */
double rc__row_dot_dev(const float *dy, const float *x, int64_t n, float m);

#endif
