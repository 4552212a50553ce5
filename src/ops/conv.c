/* Op family: conv. Forward and backward side by side. */
#include "ops/op.h"

const rc_op_def rc__ops_conv[] = {{0}};
const int rc__ops_conv_count = 0;
