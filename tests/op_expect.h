/* Small checks shared by the op tests of the conv, pool and matmul
 * families: run a hand-built node and compare output 0 with expected values,
 * or expect a refusal naming the node. Include after test.h and op_harness.h. */
#ifndef RC_OP_EXPECT_H
#define RC_OP_EXPECT_H

/* parse + infer + forward; a failure is a failed check, with the message. */
static int oe_run_ok(oh_case *c) {
  rc_err e = {0};
  rc_status st = oh_run(c, &e);
  CHECK_INT(st, RC_OK);
  if (st != RC_OK) fprintf(stderr, "  %s\n", e.msg);
  return st == RC_OK;
}

/* Output 0 has shape dims (rank) and values want (|diff| <= 1e-5 + 1e-5|want|). */
static void oe_expect_out(oh_case *c, const int64_t *dims, int rank, const float *want) {
  if (!oe_run_ok(c)) return;
  CHECK_INT(c->out_t[0].rank, rank);
  for (int i = 0; i < rank && i < c->out_t[0].rank; i++) CHECK_INT(c->out_t[0].dims[i], dims[i]);
  int64_t n = rc_tensor_numel(&c->out_t[0]);
  for (int64_t i = 0; i < n; i++) CHECK_NEAR(oh_out_f(c, 0)[i], want[i], 1e-5, 1e-5);
}

/* The node is refused with one message naming it and containing needle. */
static void oe_expect_refused(oh_case *c, const char *needle) {
  rc_err e = {0};
  CHECK(oh_run(c, &e) != RC_OK);
  CHECK_STR_CONTAINS(e.msg, c->node.label);
  CHECK_STR_CONTAINS(e.msg, needle);
}

#endif
