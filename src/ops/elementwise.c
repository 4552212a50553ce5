/* Op family: elementwise. Forward and backward side by side. */
#include "ops/op.h"

const rc_op_def rc__ops_elementwise[] = {{0}};
const int rc__ops_elementwise_count = 0;
