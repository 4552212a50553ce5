/* Op family: pool. Forward and backward side by side. */
#include "ops/op.h"

const rc_op_def rc__ops_pool[] = {{0}};
const int rc__ops_pool_count = 0;
