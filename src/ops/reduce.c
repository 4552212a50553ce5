/* Op family: reduce. Forward and backward side by side. */
#include "ops/op.h"

const rc_op_def rc__ops_reduce[] = {{0}};
const int rc__ops_reduce_count = 0;
