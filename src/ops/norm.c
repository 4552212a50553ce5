/* Op family: norm. Forward and backward side by side. */
#include "ops/op.h"

const rc_op_def rc__ops_norm[] = {{0}};
const int rc__ops_norm_count = 0;
