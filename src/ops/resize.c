/* Op family: resize. Forward and backward side by side. */
#include "ops/op.h"

const rc_op_def rc__ops_resize[] = {{0}};
const int rc__ops_resize_count = 0;
