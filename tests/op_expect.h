/* Expected-output check shared by the conv, pool and matmul op tests, on top
 * of ops_check.h (run_ok, CHECK_REFUSED, run_backward). */
#ifndef RC_OP_EXPECT_H
#define RC_OP_EXPECT_H

#include "ops_check.h"

/* parse + infer + forward, then output 0 has shape dims (rank) and values
 * want (|diff| <= 1e-5 + 1e-5 |want|). */
static void oe_expect_out(oh_case *c, const int64_t *dims, int rank, const float *want) {
  int ok = run_ok(c);
  CHECK(ok);
  if (!ok) return;
  CHECK_INT(c->out_t[0].rank, rank);
  for (int i = 0; i < rank && i < c->out_t[0].rank; i++) CHECK_INT(c->out_t[0].dims[i], dims[i]);
  int64_t n = rc_tensor_numel(&c->out_t[0]);
  for (int64_t i = 0; i < n; i++) CHECK_NEAR(oh_out_f(c, 0)[i], want[i], 1e-5, 1e-5);
}

#endif
