/* BatchNormalization, LayerNormalization, InstanceNormalization. Expected
 * values are the ONNX operator spec's formulas evaluated by hand (the
 * numbers are small enough to redo on paper) or in double precision here. */
#include "ops_check.h"

static void bn_inputs(oh_case *c, const int64_t *xd, int rank, const float *x, const float *scale,
                      const float *b, const float *mean, const float *var) {
  const int64_t cd[] = {xd[1]};
  oh_input(c, RC_DTYPE_FLOAT, rank, xd, x);
  oh_input(c, RC_DTYPE_FLOAT, 1, cd, scale);
  oh_input(c, RC_DTYPE_FLOAT, 1, cd, b);
  oh_input(c, RC_DTYPE_FLOAT, 1, cd, mean);
  oh_input(c, RC_DTYPE_FLOAT, 1, cd, var);
}

/* Inference form: y = (x - mean) / sqrt(var + eps) * scale + B.
 * Channel 0: mean 1, var 4 -> (x - 1) / 2 * 2 + 1 = x; channel 1: mean 0,
 * var 0.25 -> x / 0.5 * 1 + (-1) = 2x - 1 (eps = 0). */
static void test_bn_inference(void) {
  oh_case c;
  oh_init(&c, "BatchNormalization", 15);
  oh_attr_float(&c, "epsilon", 0);
  const int64_t xd[] = {1, 2, 2};
  bn_inputs(&c, xd, 3, (float[]){3, 5, 1, -2}, (float[]){2, 1}, (float[]){1, -1}, (float[]){1, 0},
            (float[]){4, 0.25f});
  CHECK(run_ok(&c));
  const float want[] = {3, 5, 1, -5};
  for (int i = 0; i < 4; i++) CHECK_NEAR(oh_out_f(&c, 0)[i], want[i], 1e-6, 0);
  /* dx = scale / sqrt(var + eps) * dy: 1 on channel 0, 2 on channel 1. */
  run_backward(&c, NULL, (const int[]){0, 1, 2, -1});
  CHECK_NEAR(grad_of(&c, 0)[0], 1, 1e-6, 0);
  CHECK_NEAR(grad_of(&c, 0)[3], 2, 1e-6, 0);
  CHECK_NEAR(grad_of(&c, 2)[1], 2, 1e-6, 0);      /* dB = sum dy */
  CHECK_NEAR(grad_of(&c, 1)[0], (2 + 4) / 2.0, 1e-6, 0); /* dscale = sum xhat */
  oh_free(&c);

  /* Gradients of every input, default epsilon, 4-D. */
  oh_init(&c, "BatchNormalization", 9);
  const int64_t x4[] = {2, 3, 2, 2};
  bn_inputs(&c, x4, 4, NULL, (float[]){0.5f, -1, 2}, (float[]){0.1f, 0.2f, 0.3f},
            (float[]){0.1f, -0.2f, 0.3f}, (float[]){0.5f, 1.5f, 0.8f});
  oh_fill(oh_in_f(&c, 0), 24, 3);
  CHECK_GRAD(&c, 5e-3, 0, 1, 2, 3, 4);
  oh_free(&c);
}

/* Batch statistics (our planner's training flag): channel 0 holds 1, 2, 3, 6
 * over N and W: mean 3, population variance (4 + 1 + 0 + 9) / 4 = 3.5. */
static void test_bn_batch_stats(void) {
  oh_case c;
  oh_init(&c, "BatchNormalization", 15);
  oh_attr_float(&c, "epsilon", 0.5f);
  oh_attr_float(&c, "momentum", 0.8f);
  c.training = 1;
  c.n_out = 3;
  const int64_t xd[] = {2, 2, 2};
  bn_inputs(&c, xd, 3, (float[]){1, 2, 10, 10, 3, 6, 10, 10}, (float[]){1, 1}, (float[]){0, 0},
            (float[]){1, 2}, (float[]){10, 20});
  CHECK(run_ok(&c));
  CHECK_NEAR(oh_out_f(&c, 0)[0], (1 - 3) / 2.0, 1e-6, 0); /* sqrt(3.5 + 0.5) = 2 */
  CHECK_NEAR(oh_out_f(&c, 0)[5], (6 - 3) / 2.0, 1e-6, 0);
  /* Channel 1 is constant: normalised to 0. */
  CHECK_NEAR(oh_out_f(&c, 0)[2], 0, 1e-6, 0);
  /* running = input * momentum + batch * (1 - momentum) (spec text). */
  CHECK_NEAR(oh_out_f(&c, 1)[0], 1 * 0.8 + 3 * 0.2, 1e-6, 0);
  CHECK_NEAR(oh_out_f(&c, 1)[1], 2 * 0.8 + 10 * 0.2, 1e-5, 0);
  CHECK_NEAR(oh_out_f(&c, 2)[0], 10 * 0.8 + 3.5 * 0.2, 1e-5, 0);
  CHECK_NEAR(oh_out_f(&c, 2)[1], 20 * 0.8 + 0 * 0.2, 1e-5, 0);
  oh_free(&c);

  /* training_mode=1 in the file (opset 14+) means batch statistics too. */
  oh_init(&c, "BatchNormalization", 14);
  oh_attr_int(&c, "training_mode", 1);
  oh_attr_float(&c, "epsilon", 0.5f);
  bn_inputs(&c, xd, 3, (float[]){1, 2, 10, 10, 3, 6, 10, 10}, (float[]){1, 1}, (float[]){0, 0},
            (float[]){1, 2}, (float[]){10, 20});
  CHECK(run_ok(&c));
  CHECK_NEAR(oh_out_f(&c, 0)[1], (2 - 3) / 2.0, 1e-6, 0);
  oh_free(&c);

  /* Gradient through the batch statistics for X, scale and B. */
  oh_init(&c, "BatchNormalization", 15);
  c.training = 1;
  const int64_t x4[] = {3, 2, 2, 3};
  bn_inputs(&c, x4, 4, NULL, (float[]){0.7f, -1.3f}, (float[]){0.1f, 0.2f}, (float[]){0, 0},
            (float[]){1, 1});
  oh_fill(oh_in_f(&c, 0), 36, 17);
  CHECK_GRAD(&c, 5e-3, 0, 1, 2);
  oh_free(&c);

  /* Old opsets: five outputs, saved_mean / saved_var = batch statistics. */
  oh_init(&c, "BatchNormalization", 9);
  c.training = 1;
  c.n_out = 5;
  bn_inputs(&c, xd, 3, (float[]){1, 2, 10, 10, 3, 6, 10, 10}, (float[]){1, 1}, (float[]){0, 0},
            (float[]){1, 2}, (float[]){10, 20});
  CHECK(run_ok(&c));
  CHECK_NEAR(oh_out_f(&c, 3)[0], 3, 1e-6, 0);
  CHECK_NEAR(oh_out_f(&c, 4)[0], 3.5, 1e-6, 0);
  oh_free(&c);
}

static void test_bn_refusals(void) {
  oh_case c;
  oh_init(&c, "BatchNormalization", 7);
  oh_attr_int(&c, "spatial", 0);
  const int64_t xd[] = {2, 2, 2};
  bn_inputs(&c, xd, 3, NULL, NULL, NULL, NULL, NULL);
  CHECK_REFUSED(&c, RC_ERR_UNSUPPORTED, "spatial=0");
  oh_free(&c);
  oh_init(&c, "BatchNormalization", 15);
  oh_input(&c, RC_DTYPE_FLOAT, 3, xd, NULL);
  const int64_t three[] = {3}, two[] = {2};
  oh_input(&c, RC_DTYPE_FLOAT, 1, three, NULL);
  for (int i = 0; i < 3; i++) oh_input(&c, RC_DTYPE_FLOAT, 1, two, NULL);
  CHECK_REFUSED(&c, RC_ERR_SHAPE, "scale");
  oh_free(&c);
}

/* LayerNormalization: every normalised row has mean 0 and variance
 * 1 - eps/(var+eps) (spec: (x - mean) / sqrt(var + eps)); Mean and
 * InvStdDev outputs have the reduced shape with 1s. */
static void test_layernorm(void) {
  oh_case c;
  oh_init(&c, "LayerNormalization", 17);
  oh_attr_float(&c, "epsilon", 0);
  c.n_out = 3;
  const int64_t xd[] = {2, 4}, sd[] = {4};
  oh_input(&c, RC_DTYPE_FLOAT, 2, xd, (float[]){1, 2, 3, 4, -1, -1, 1, 1});
  oh_input(&c, RC_DTYPE_FLOAT, 1, sd, (float[]){1, 1, 1, 1});
  oh_input(&c, RC_DTYPE_FLOAT, 1, sd, (float[]){0, 0, 0, 10});
  CHECK(run_ok(&c));
  /* Row 0: mean 2.5, var 1.25. Row 1: mean 0, var 1. */
  CHECK_NEAR(oh_out_f(&c, 0)[0], -1.5 / sqrt(1.25), 1e-6, 0);
  CHECK_NEAR(oh_out_f(&c, 0)[3], 1.5 / sqrt(1.25) + 10, 1e-5, 0);
  CHECK_NEAR(oh_out_f(&c, 0)[4], -1, 1e-6, 0);
  CHECK_INT(c.out_t[1].rank, 2);
  CHECK_INT(c.out_t[1].dims[0], 2);
  CHECK_INT(c.out_t[1].dims[1], 1);
  CHECK_NEAR(oh_out_f(&c, 1)[0], 2.5, 1e-6, 0);
  CHECK_NEAR(oh_out_f(&c, 2)[0], 1 / sqrt(1.25), 1e-6, 0);
  CHECK_NEAR(oh_out_f(&c, 2)[1], 1, 1e-6, 0);
  oh_free(&c);

  /* Gradients for axis -1 and -2, with and without B. */
  const int64_t axes[] = {-1, -2};
  for (int a = 0; a < 2; a++)
    for (int with_b = 0; with_b < 2; with_b++) {
      oh_init(&c, "LayerNormalization", 17);
      oh_attr_int(&c, "axis", axes[a]);
      const int64_t x3[] = {2, 3, 4}, s1[] = {4}, s2[] = {3, 4};
      oh_input(&c, RC_DTYPE_FLOAT, 3, x3, NULL);
      oh_input(&c, RC_DTYPE_FLOAT, a ? 2 : 1, a ? s2 : s1, NULL);
      if (with_b) oh_input(&c, RC_DTYPE_FLOAT, a ? 2 : 1, a ? s2 : s1, NULL);
      oh_fill(oh_in_f(&c, 0), 24, 50);
      oh_fill(oh_in_f(&c, 1), a ? 12 : 4, 51);
      if (with_b) oh_fill(oh_in_f(&c, 2), a ? 12 : 4, 52);
      if (with_b)
        CHECK_GRAD(&c, 5e-3, 0, 1, 2);
      else
        CHECK_GRAD(&c, 5e-3, 0, 1);
      oh_free(&c);
    }

  oh_init(&c, "LayerNormalization", 17);
  oh_attr_int(&c, "stash_type", 0);
  oh_input(&c, RC_DTYPE_FLOAT, 2, xd, NULL);
  oh_input(&c, RC_DTYPE_FLOAT, 1, sd, NULL);
  CHECK_REFUSED(&c, RC_ERR_UNSUPPORTED, "stash_type");
  oh_free(&c);
  oh_init(&c, "LayerNormalization", 17);
  const int64_t bad[] = {3};
  oh_input(&c, RC_DTYPE_FLOAT, 2, xd, NULL);
  oh_input(&c, RC_DTYPE_FLOAT, 1, bad, NULL);
  CHECK_REFUSED(&c, RC_ERR_SHAPE, "Scale");
  oh_free(&c);
  CHECK_NULL(rc__op_find("LayerNormalization", "", 16)); /* new in opset 17 */
}

/* InstanceNormalization: per (n, c) statistics over the spatial dims.
 * (0, 0): values 1, 3 -> mean 2, var 1 -> -1, 1 scaled by 2 plus 0.5. */
static void test_instancenorm(void) {
  oh_case c;
  oh_init(&c, "InstanceNormalization", 6);
  oh_attr_float(&c, "epsilon", 0);
  const int64_t xd[] = {1, 2, 2}, cd[] = {2};
  oh_input(&c, RC_DTYPE_FLOAT, 3, xd, (float[]){1, 3, 5, 5.5f});
  oh_input(&c, RC_DTYPE_FLOAT, 1, cd, (float[]){2, 1});
  oh_input(&c, RC_DTYPE_FLOAT, 1, cd, (float[]){0.5f, 0});
  CHECK(run_ok(&c));
  CHECK_NEAR(oh_out_f(&c, 0)[0], -1.5, 1e-6, 0);
  CHECK_NEAR(oh_out_f(&c, 0)[1], 2.5, 1e-6, 0);
  CHECK_NEAR(oh_out_f(&c, 0)[3], 1, 1e-5, 0);
  oh_free(&c);

  oh_init(&c, "InstanceNormalization", 6);
  const int64_t x4[] = {2, 3, 2, 3}, c3[] = {3};
  oh_input(&c, RC_DTYPE_FLOAT, 4, x4, NULL);
  oh_input(&c, RC_DTYPE_FLOAT, 1, c3, (float[]){0.5f, -1, 1.5f});
  oh_input(&c, RC_DTYPE_FLOAT, 1, c3, (float[]){0, 1, 2});
  oh_fill(oh_in_f(&c, 0), 36, 60);
  CHECK_GRAD(&c, 5e-3, 0, 1, 2);
  oh_free(&c);
}

int main(void) {
  RUN(test_bn_inference);
  RUN(test_bn_batch_stats);
  RUN(test_bn_refusals);
  RUN(test_layernorm);
  RUN(test_instancenorm);
  return TEST_REPORT();
}
