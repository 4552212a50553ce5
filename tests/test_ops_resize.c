/* Resize / Upsample kernels. Expected values are either the ONNX operator
 * specification's examples (named) or computed here by hand from the spec's
 * coordinate formulas (each case spells the formula and its values).
 * Gradients against finite differences. Spec example values are recalled
 * from memory; each one was re-derived from the spec's formula before use. */
#include "ops_expect.h"

static const int CHECK0[] = {0, -1};
static const float X22[] = {1, 2, 3, 4};

/* Resize-13 with X, roi (absent), scales or sizes. */
static void resize_case(oh_case *c, int opset, const char *mode, const char *coord, const float *x,
                        const int64_t *xdims, const float *scales, const int64_t *sizes) {
  oh_init(c, "Resize", opset);
  oh_attr_string(c, "mode", mode);
  if (coord) oh_attr_string(c, "coordinate_transformation_mode", coord);
  oh_input(c, RC_DTYPE_FLOAT, 4, xdims, x);
  oh_input_absent(c);
  if (scales)
    oh_input(c, RC_DTYPE_FLOAT, 1, I64(4), scales);
  else
    oh_input_absent(c);
  if (sizes) oh_input(c, RC_DTYPE_INT64, 1, I64(4), sizes);
}

static void test_nearest_spec_examples(void) {
  static const float want[] = {1, 1, 1, 2, 2, 2, 1, 1, 1, 2, 2, 2, 3, 3, 3, 4, 4, 4, 3, 3, 3, 4, 4, 4};
  oh_case c;
  /* spec example resize_upsample_scales_nearest (half_pixel, round_prefer_floor) */
  resize_case(&c, 13, "nearest", NULL, X22, I64(1, 1, 2, 2), F32(1, 1, 2, 3), NULL);
  CHECK(run_ok(&c));
  CHECK_EQ(c.out_t[0].dims[2], 4);
  CHECK_EQ(c.out_t[0].dims[3], 6);
  check_floats(oh_out_f(&c, 0), want, 24);
  oh_free(&c);
  /* spec example upsample_nearest (Upsample, opset 9) and Resize-10: scales
   * are input 1, same output */
  static const char *ops[2] = {"Upsample", "Resize"};
  for (int i = 0; i < 2; i++) {
    oh_init(&c, ops[i], 9 + i);
    oh_input(&c, RC_DTYPE_FLOAT, 4, I64(1, 1, 2, 2), X22);
    oh_input(&c, RC_DTYPE_FLOAT, 1, I64(4), F32(1, 1, 2, 3));
    CHECK(run_ok(&c));
    check_floats(oh_out_f(&c, 0), want, 24);
    oh_free(&c);
  }
}

static void test_linear_coordinate_modes(void) {
  oh_case c;
  /* spec example resize_upsample_scales_linear (half_pixel) */
  resize_case(&c, 13, "linear", NULL, X22, I64(1, 1, 2, 2), F32(1, 1, 2, 2), NULL);
  CHECK(run_ok(&c));
  check_floats(oh_out_f(&c, 0),
               F32(1, 1.25f, 1.75f, 2, 1.5f, 1.75f, 2.25f, 2.5f, 2.5f, 2.75f, 3.25f, 3.5f, 3, 3.25f, 3.75f, 4), 16);
  oh_free(&c);
  /* spec example resize_upsample_scales_linear_align_corners: x_orig = o * (2-1)/(4-1) */
  resize_case(&c, 13, "linear", "align_corners", X22, I64(1, 1, 2, 2), F32(1, 1, 2, 2), NULL);
  CHECK(run_ok(&c));
  const float t = 1.0f / 3, u = 2.0f / 3;
  check_floats(oh_out_f(&c, 0),
               F32(1, 1 + t, 1 + u, 2, 1 + 2 * t, 2, 2 + t, 2 + u, 2 + t, 2 + u, 3, 3 + t, 3, 3 + t, 3 + u, 4), 16);
  oh_free(&c);
  /* asymmetric, by hand: x_orig = o / 2 = 0, .5, 1, 1.5 (clamped to 1) per axis */
  resize_case(&c, 13, "linear", "asymmetric", X22, I64(1, 1, 2, 2), F32(1, 1, 2, 2), NULL);
  CHECK(run_ok(&c));
  check_floats(oh_out_f(&c, 0), F32(1, 1.5f, 2, 2, 2, 2.5f, 3, 3, 3, 3.5f, 4, 4, 3, 3.5f, 4, 4), 16);
  oh_free(&c);
  /* pytorch_half_pixel, by hand: an output axis of length 1 reads coordinate 0 (row 0),
   * where half_pixel reads (0 + .5) / .5 - .5 = .5 (between the rows) */
  resize_case(&c, 13, "linear", "pytorch_half_pixel", X22, I64(1, 1, 2, 2), NULL, I64(1, 1, 1, 4));
  CHECK(run_ok(&c));
  check_floats(oh_out_f(&c, 0), F32(1, 1.25f, 1.75f, 2), 4);
  oh_free(&c);
  resize_case(&c, 13, "linear", "half_pixel", X22, I64(1, 1, 2, 2), NULL, I64(1, 1, 1, 4));
  CHECK(run_ok(&c));
  check_floats(oh_out_f(&c, 0), F32(2, 2.25f, 2.75f, 3), 4);
  oh_free(&c);
  /* half_pixel_symmetric (opset 19), spec example resize_downsample_scales_linear_half_pixel_symmetric:
   * [1 2 3 4] scale 0.6 -> [1.6666666, 3.3333333] (out 2, adjustment 2/2.4, offset 2*(1-adj)) */
  resize_case(&c, 19, "linear", "half_pixel_symmetric", X22, I64(1, 1, 1, 4), F32(1, 1, 1, 0.6f), NULL);
  CHECK(run_ok(&c));
  CHECK_INT(c.out_t[0].dims[3], 2);
  check_floats(oh_out_f(&c, 0), F32(5.0f / 3, 10.0f / 3), 2);
  oh_free(&c);
  resize_case(&c, 18, "linear", "half_pixel_symmetric", X22, I64(1, 1, 1, 4), F32(1, 1, 1, 0.6f), NULL);
  rc_err e = {0};
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_UNSUPPORTED); /* not defined before opset 19 */
  oh_free(&c);
}

static void test_nearest_modes(void) {
  static const float x[] = {10, 20, 30};
  /* tf_half_pixel_for_nn, scale 2: x_orig = (o + .5) / 2 = .25 .75 1.25 1.75 2.25 2.75 */
  static const char *modes[] = {"round_prefer_floor", "round_prefer_ceil", "floor", "ceil"};
  static const float want_tf[4][6] = {{10, 20, 20, 30, 30, 30},
                                      {10, 20, 20, 30, 30, 30},
                                      {10, 10, 20, 20, 30, 30},
                                      {20, 20, 30, 30, 30, 30}};
  /* asymmetric, scale 2: x_orig = o / 2 = 0 .5 1 1.5 2 2.5: the ties separate prefer_floor/ceil */
  static const float want_as[4][6] = {{10, 10, 20, 20, 30, 30},
                                      {10, 20, 20, 30, 30, 30},
                                      {10, 10, 20, 20, 30, 30},
                                      {10, 20, 20, 30, 30, 30}};
  for (int m = 0; m < 4; m++)
    for (int coord = 0; coord < 2; coord++) {
      oh_case c;
      resize_case(&c, 13, "nearest", coord ? "asymmetric" : "tf_half_pixel_for_nn", x, I64(1, 1, 1, 3),
                  F32(1, 1, 1, 2), NULL);
      oh_attr_string(&c, "nearest_mode", modes[m]);
      CHECK(run_ok(&c));
      check_floats(oh_out_f(&c, 0), coord ? want_as[m] : want_tf[m], 6);
      oh_free(&c);
    }
}

static void test_sizes_axes_and_refusals(void) {
  oh_case c;
  /* opset 18: axes and keep_aspect_ratio_policy=not_larger: scale = min(1/2, 3/4) = .5 */
  oh_init(&c, "Resize", 18);
  oh_attr_string(&c, "mode", "nearest");
  oh_attr_ints(&c, "axes", 2, I64(2, 3));
  oh_attr_string(&c, "keep_aspect_ratio_policy", "not_larger");
  oh_input(&c, RC_DTYPE_FLOAT, 4, I64(1, 1, 2, 4), F32(1, 2, 3, 4, 5, 6, 7, 8));
  oh_input_absent(&c);
  oh_input_absent(&c);
  oh_input(&c, RC_DTYPE_INT64, 1, I64(2), I64(1, 3));
  CHECK(run_ok(&c));
  CHECK_EQ(c.out_t[0].dims[2], 1);
  CHECK_EQ(c.out_t[0].dims[3], 2);
  oh_free(&c);
  rc_err e = {0};
  /* both scales and sizes */
  resize_case(&c, 13, "nearest", NULL, X22, I64(1, 1, 2, 2), F32(1, 1, 2, 2), I64(1, 1, 4, 4));
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_INVALID);
  oh_free(&c);
  /* refused at load time, naming what is unsupported */
  resize_case(&c, 13, "cubic", NULL, X22, I64(1, 1, 2, 2), F32(1, 1, 2, 2), NULL);
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_UNSUPPORTED);
  CHECK_STR_CONTAINS(e.msg, "cubic");
  oh_free(&c);
  resize_case(&c, 13, "linear", "tf_crop_and_resize", X22, I64(1, 1, 2, 2), F32(1, 1, 2, 2), NULL);
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_UNSUPPORTED);
  CHECK_STR_CONTAINS(e.msg, "tf_crop_and_resize");
  oh_free(&c);
  resize_case(&c, 18, "linear", NULL, X22, I64(1, 1, 2, 2), F32(1, 1, 2, 2), NULL);
  oh_attr_int(&c, "antialias", 1);
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_UNSUPPORTED);
  oh_free(&c);
  resize_case(&c, 13, "linear", NULL, X22, I64(1, 1, 2, 2), F32(1, 1, 0, 2), NULL);
  CHECK_STATUS(oh_run(&c, &e), RC_ERR_INVALID); /* a zero scale */
  oh_free(&c);
}

static void test_resize_gradients(void) {
  static const char *modes[] = {"nearest", "linear", "linear", "linear"};
  static const char *coords[] = {"half_pixel", "half_pixel", "align_corners", "asymmetric"};
  for (int m = 0; m < 4; m++)
    for (int down = 0; down < 2; down++) {
      oh_case c;
      float x[2 * 2 * 5 * 4];
      oh_fill(x, 80, 31 + m);
      resize_case(&c, 13, modes[m], coords[m], x, I64(2, 2, 5, 4), NULL, down ? I64(2, 2, 3, 3) : I64(2, 2, 7, 9));
      double err = oh_gradcheck(&c, CHECK0, 1e-3);
      if (err >= 1e-3) fprintf(stderr, "mode %s %s down=%d err %g\n", modes[m], coords[m], down, err);
      CHECK_LT(err, 1e-3);
      oh_free(&c);
    }
}

/* Large enough for the threaded paths: forward against a direct evaluation of
 * the spec's half_pixel formula; backward through the adjoint identity
 * <dy, R x> = <R^T dy, x> (Resize is linear in x). */
static void test_large_threaded(void) {
  enum { N = 2, C = 3, H = 40, W = 50, OH = 73, OW = 91 };
  static float x[N * C * H * W], dy[N * C * OH * OW];
  oh_fill(x, N * C * H * W, 41);
  oh_fill(dy, N * C * OH * OW, 43);
  oh_case c;
  resize_case(&c, 13, "linear", NULL, x, I64(N, C, H, W), NULL, I64(N, C, OH, OW));
  CHECK(run_ok(&c));
  const float *y = oh_out_f(&c, 0);
  int bad = 0;
  for (int p = 0; p < N * C; p++)
    for (int i = 0; i < OH; i++)
      for (int j = 0; j < OW; j++) {
        double sy = (i + 0.5) * H / OH - 0.5, sx = (j + 0.5) * W / OW - 0.5;
        sy = sy < 0 ? 0 : sy > H - 1 ? H - 1 : sy;
        sx = sx < 0 ? 0 : sx > W - 1 ? W - 1 : sx;
        int y0 = (int)sy, x0 = (int)sx, y1 = y0 + 1 < H ? y0 + 1 : H - 1, x1 = x0 + 1 < W ? x0 + 1 : W - 1;
        double fy = sy - y0, fx = sx - x0;
        const float *q = x + p * H * W;
        double v = (1 - fy) * ((1 - fx) * q[y0 * W + x0] + fx * q[y0 * W + x1]) +
                   fy * ((1 - fx) * q[y1 * W + x0] + fx * q[y1 * W + x1]);
        bad += fabs(v - y[(p * OH + i) * OW + j]) > 1e-5;
      }
  CHECK_INT(bad, 0);
  run_backward(&c, dy, (const int[]){0, -1});
  double lhs = 0, rhs = 0;
  for (int i = 0; i < N * C * OH * OW; i++) lhs += (double)dy[i] * y[i];
  for (int i = 0; i < N * C * H * W; i++) rhs += (double)grad_of(&c, 0)[i] * x[i];
  CHECK_NEAR(lhs, rhs, 1e-3, 1e-5);
  oh_free(&c);
}

int main(void) {
  RUN(test_large_threaded);
  RUN(test_nearest_spec_examples);
  RUN(test_linear_coordinate_modes);
  RUN(test_nearest_modes);
  RUN(test_sizes_axes_and_refusals);
  RUN(test_resize_gradients);
  return TEST_REPORT();
}
