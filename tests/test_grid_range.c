/* Integer ranges of quantization grids and the --mask rule (plan/grid_range.h,
 * plan/mask_rule.h). The expected values follow the rules stated there and in
 * README's "Quantized students"; the dtype ranges are the ONNX operator
 * specification's (QuantizeLinear saturates int8 to [-128, 127], uint8 to
 * [0, 255], int4 to [-8, 7]). */
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "plan/grid_range.h"
#include "plan/mask_rule.h"
#include "test.h"

static void expect_observed(rc_dtype dt, int64_t used_lo, int64_t used_hi, int32_t lo, int32_t hi) {
  int32_t a, b;
  rc__range_observed(dt, used_lo, used_hi, &a, &b);
  printf("  %-6s uses [%lld, %lld] -> [%d, %d] (expected [%d, %d])\n", rc_dtype_name(dt), (long long)used_lo,
         (long long)used_hi, a, b, lo, hi);
  CHECK_INT(a, lo);
  CHECK_INT(b, hi);
}

static void observed_ranges(void) {
  expect_observed(RC_DTYPE_INT8, -7, 7, -7, 7);        /* 4-bit symmetric held in int8 */
  expect_observed(RC_DTYPE_INT8, -8, 7, -8, 7);        /* 4-bit full range */
  expect_observed(RC_DTYPE_INT8, -127, 127, -127, 127); /* 8-bit symmetric: never -128 */
  expect_observed(RC_DTYPE_INT8, -128, 127, -128, 127);
  expect_observed(RC_DTYPE_INT8, -100, 60, -127, 127);
  expect_observed(RC_DTYPE_INT8, -3, 2, -3, 3);         /* 3 bits, symmetric */
  expect_observed(RC_DTYPE_UINT8, 0, 15, 0, 15);        /* 4 bits unsigned */
  expect_observed(RC_DTYPE_UINT8, 3, 200, 0, 255);
  expect_observed(RC_DTYPE_INT16, -300, 300, -511, 511);
}

/* A graph of one int8 initializer holding v (n entries). */
typedef struct one_tensor {
  rc_graph g;
  rc_value v;
  int8_t data[64];
} one_tensor;

static void one_tensor_init(one_tensor *t, const int8_t *v, int n) {
  memset(t, 0, sizeof *t);
  memcpy(t->data, v, (size_t)n);
  t->v.name = "w.grid";
  t->v.kind = RC_VALUE_INITIALIZER;
  t->v.producer = -1;
  t->v.decl.dtype = RC_DTYPE_INT8;
  t->v.decl.rank = 1;
  t->v.decl.dims[0] = n;
  t->v.decl.data = t->data;
  t->g.path = "model.onnx";
  t->g.values = &t->v;
  t->g.n_values = 1;
}

static void recorded_and_observed(void) {
  const int8_t w[] = {-7, 0, 3, 7, -2, 1};
  one_tensor t;
  one_tensor_init(&t, w, 6);
  rc_err e = {0};
  rc_int_range r;
  CHECK_INT(rc__grid_range(&t.g, NULL, 0, RC_DTYPE_INT8, "w.grid", &r, &e), RC_OK);
  printf("  no metadata: [%d, %d] %s, used [%lld, %lld]\n", r.lo, r.hi, rc_range_source_name(r.source),
         (long long)r.used_lo, (long long)r.used_hi);
  CHECK_INT(r.source, RC_RANGE_OBSERVED);
  CHECK_INT(r.lo, -7);
  CHECK_INT(r.hi, 7);

  rc_file_notes notes;
  CHECK_INT(rc__file_notes_parse(&notes, "{\"schema\":1,\"tensors\":{\"w.grid\":{\"min\":-8,\"max\":7,\"from\":\"w\"}}}",
                                 "{\"schema\":1,\"tensors\":[\"w\"]}", "model.onnx", &e),
            RC_OK);
  CHECK_INT(rc__grid_range(&t.g, &notes, 0, RC_DTYPE_INT8, "w.grid", &r, &e), RC_OK);
  printf("  recorded: [%d, %d] %s\n", r.lo, r.hi, rc_range_source_name(r.source));
  CHECK_INT(r.source, RC_RANGE_RECORDED);
  CHECK_INT(r.lo, -8);
  CHECK(rc__file_notes_pruned(&notes, "w.grid"));  /* through "from" */
  CHECK(!rc__file_notes_pruned(&notes, "other"));
  rc__file_notes_free(&notes);

  /* A recorded range that does not hold the integers is refused. */
  CHECK_INT(rc__file_notes_parse(&notes, "{\"schema\":1,\"tensors\":{\"w.grid\":{\"min\":-3,\"max\":3}}}", NULL,
                                 "model.onnx", &e),
            RC_OK);
  CHECK_FAILS(rc__grid_range(&t.g, &notes, 0, RC_DTYPE_INT8, "w.grid", &r, &e));
  printf("  refused: %s\n", e.msg);
  CHECK_STR_CONTAINS(e.msg, "w.grid");
  CHECK_STR_CONTAINS(e.msg, "[-7, 7]");
  rc__file_notes_free(&notes);

  /* Out-of-type and non-integer bounds are refused before any conversion. */
  CHECK_INT(rc__file_notes_parse(&notes, "{\"schema\":1,\"tensors\":{\"w.grid\":{\"min\":-1e300,\"max\":2.5}}}",
                                 NULL, "model.onnx", &e),
            RC_OK);
  CHECK_FAILS(rc__grid_range(&t.g, &notes, 0, RC_DTYPE_INT8, "w.grid", &r, &e));
  CHECK_STR_CONTAINS(e.msg, "within [-128, 127]");
  rc__file_notes_free(&notes);

  /* int4 keeps its dtype's range whatever it uses; bad metadata is refused. */
  t.v.decl.dtype = RC_DTYPE_INT4;
  CHECK_INT(rc__grid_range(&t.g, NULL, 0, RC_DTYPE_INT4, "w.grid", &r, &e), RC_OK);
  CHECK_INT(r.source, RC_RANGE_DTYPE);
  CHECK_INT(r.lo, -8);
  CHECK_FAILS(rc__file_notes_parse(&notes, "{\"tensors\":[]}", NULL, "model.onnx", &e));
  CHECK_STR_CONTAINS(e.msg, RC_RANGES_METADATA);
}

static void mask_rule(void) {
  int8_t w[64];
  /* 40 at the zero point, 4 beside it: far more than rounding explains. */
  for (int i = 0; i < 64; i++) w[i] = i < 40 ? 0 : i < 42 ? 1 : i < 44 ? -1 : (int8_t)(i % 2 ? 5 : -5);
  one_tensor t;
  one_tensor_init(&t, w, 64);
  rc_mask_choice c;
  rc__mask_choose(RC_MASK_AUTO, NULL, "w.grid", &t.v.decl, 1, NULL, 1, 64, &c);
  printf("  auto, %lld at zero, %lld beside: %s (%s)\n", (long long)c.at_zero, (long long)c.beside_zero,
         c.keep_zeros ? "pruned" : "trainable", c.rule);
  CHECK_INT(c.at_zero, 40);
  CHECK_INT(c.beside_zero, 4);
  CHECK(c.keep_zeros);
  CHECK_STR_EQ(c.rule, "excess");
  /* 8 at zero, 8 beside: rounding. */
  for (int i = 0; i < 64; i++) w[i] = i < 8 ? 0 : i < 12 ? 1 : i < 16 ? -1 : (int8_t)(i % 2 ? 3 : -3);
  one_tensor_init(&t, w, 64);
  rc__mask_choose(RC_MASK_AUTO, NULL, "w.grid", &t.v.decl, 1, NULL, 1, 64, &c);
  printf("  auto, %lld at zero, %lld beside: %s (%s)\n", (long long)c.at_zero, (long long)c.beside_zero,
         c.keep_zeros ? "pruned" : "trainable", c.rule);
  CHECK(!c.keep_zeros);
  CHECK_STR_EQ(c.rule, "rounding");
  rc__mask_choose(RC_MASK_ZEROS, NULL, "w.grid", &t.v.decl, 1, NULL, 1, 64, &c);
  CHECK(c.keep_zeros);
  /* The same integers around a zero point of 1 per channel (2 channels). */
  int8_t zp[2] = {1, 1};
  rc_tensor z = {RC_DTYPE_INT8, 1, {2}, zp};
  rc__mask_choose(RC_MASK_AUTO, NULL, "w.grid", &t.v.decl, 1, &z, 2, 32, &c);
  CHECK_INT(c.at_zero, 4);
  CHECK_INT(c.beside_zero, 8);
  /* Float: any exact zero is pruned under auto, none under none. */
  float f[4] = {0.0f, 0.5f, -0.25f, 0.0f};
  rc_tensor ft = {RC_DTYPE_FLOAT, 1, {4}, f};
  rc__mask_choose(RC_MASK_AUTO, NULL, "f", &ft, 0, NULL, 1, 1, &c);
  CHECK(c.keep_zeros);
  CHECK_EQ(c.at_zero, 2);
  CHECK_STR_EQ(c.rule, "float");
  rc__mask_choose(RC_MASK_NONE, NULL, "f", &ft, 0, NULL, 1, 1, &c);
  CHECK(!c.keep_zeros);
  rc_mask_mode m;
  CHECK(rc__mask_mode_parse("zeros", &m));
  CHECK_EQ(m, RC_MASK_ZEROS);
  CHECK(!rc__mask_mode_parse("sometimes", &m));
}

int main(void) {
  RUN(observed_ranges);
  RUN(recorded_and_observed);
  RUN(mask_rule);
  return TEST_REPORT();
}
