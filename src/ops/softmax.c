/* Op family: softmax. Forward and backward side by side. */
#include "ops/op.h"

const rc_op_def rc__ops_softmax[] = {{0}};
const int rc__ops_softmax_count = 0;
