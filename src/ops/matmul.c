/* Op family: matmul. Forward and backward side by side. */
#include "ops/op.h"

const rc_op_def rc__ops_matmul[] = {{0}};
const int rc__ops_matmul_count = 0;
