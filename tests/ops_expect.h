/* Literal-array helpers for the shape, reduce, resize and quant op tests,
 * on top of ops_check.h. */
#ifndef RC_OPS_EXPECT_H
#define RC_OPS_EXPECT_H

#include "ops_check.h"

#define I64(...) ((const int64_t[]){__VA_ARGS__})
#define F32(...) ((const float[]){__VA_ARGS__})

/* got[i] within 1e-5 (absolute + relative) of want[i], for n elements. */
static void check_floats(const float *got, const float *want, int n) {
  for (int i = 0; i < n; i++) CHECK_NEAR(got[i], want[i], 1e-5, 1e-5);
}

#endif
