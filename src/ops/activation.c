/* Op family: activation. Forward and backward side by side. */
#include "ops/op.h"

const rc_op_def rc__ops_activation[] = {{0}};
const int rc__ops_activation_count = 0;
