#include "plan/mask_rule.h"

#include <string.h>

#include "ops/op.h"

const char *rc__mask_mode_name(rc_mask_mode m) {
  return m == RC_MASK_ZEROS ? "zeros" : m == RC_MASK_NONE ? "none" : "auto";
}

int rc__mask_mode_parse(const char *s, rc_mask_mode *m) {
  static const rc_mask_mode modes[] = {RC_MASK_AUTO, RC_MASK_ZEROS, RC_MASK_NONE};
  for (size_t i = 0; i < sizeof modes / sizeof modes[0]; i++)
    if (s && !strcmp(s, rc__mask_mode_name(modes[i]))) {
      *m = modes[i];
      return 1;
    }
  return 0;
}

static void count_near_zero(const rc_tensor *t, int quantized, const rc_tensor *zp, int64_t channels, int64_t inner,
                            rc_mask_choice *c) {
  int64_t n = rc_tensor_numel(t);
  if (!quantized) {
    const float *x = t->data;
    for (int64_t i = 0; i < n; i++) c->at_zero += x[i] == 0.0f;
    return;
  }
  for (int64_t i = 0; i < n; i++) {
    int64_t ch = channels > 1 ? (i / inner) % channels : 0;
    int64_t d = rc__int_at(t, i) - (zp ? rc__int_at(zp, rc_tensor_numel(zp) > 1 ? ch : 0) : 0);
    c->at_zero += d == 0;
    c->beside_zero += d == 1 || d == -1;
  }
}

void rc__mask_choose(rc_mask_mode mode, const rc_file_notes *notes, const char *name, const rc_tensor *t,
                     int quantized, const rc_tensor *zero_point, int64_t channels, int64_t inner, rc_mask_choice *c) {
  memset(c, 0, sizeof *c);
  if (t->data) count_near_zero(t, quantized, zero_point, channels, inner, c);
  if (mode != RC_MASK_AUTO) {
    c->keep_zeros = mode == RC_MASK_ZEROS;
    c->rule = mode == RC_MASK_ZEROS ? "mask zeros" : "mask none";
  } else if (!quantized) {
    c->keep_zeros = 1;
    c->rule = "float";
  } else if (rc__file_notes_pruned(notes, name)) {
    c->keep_zeros = 1;
    c->rule = "recorded";
  } else {
    double mean_beside = (double)c->beside_zero / 2.0;
    c->keep_zeros = (double)c->at_zero > RC_MASK_EXCESS * (mean_beside > 1.0 ? mean_beside : 1.0);
    c->rule = c->keep_zeros ? "excess" : "rounding";
  }
  if (!c->at_zero) c->keep_zeros = 0;
}
