/* Op family: quant. Forward and backward side by side. */
#include "ops/op.h"

const rc_op_def rc__ops_quant[] = {{0}};
const int rc__ops_quant_count = 0;
