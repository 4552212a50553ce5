/* Op family: shape. Forward and backward side by side. */
#include "ops/op.h"

const rc_op_def rc__ops_shape[] = {{0}};
const int rc__ops_shape_count = 0;
