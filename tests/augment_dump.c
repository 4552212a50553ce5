/* Writes what src/data/augment.c draws and computes on fixed seeds as .npy
 * files, for tests/augment_test.py to check against NumPy, the Python
 * imaging library and SciPy's Beta distribution.
 *
 * Usage: augment_dump OUTDIR */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "data/augment.h"
#include "recoup/data.h"

#define N 6
#define C 2
#define H 9
#define W 11
#define DRAWS 4000
#define SEED 7
#define STEP 5

static int save(const char *dir, const char *name, rc_dtype dt, int rank, const int64_t *dims, void *data) {
  char path[4096];
  snprintf(path, sizeof path, "%s/%s.npy", dir, name);
  rc_tensor t = {dt, rank, {0}, data};
  memcpy(t.dims, dims, sizeof(int64_t) * (size_t)rank);
  rc_err e = {0};
  if (rc_npy_write(path, &t, &e) != RC_OK) {
    fprintf(stderr, "augment_dump: %s\n", e.msg);
    return 1;
  }
  return 0;
}

/* The geometric transforms of one list over the test batch, with what was drawn. */
static int dump_sample_case(const char *dir, const char *tag, const char *list, const float *in) {
  rc_augment a;
  rc_err e = {0};
  if (rc__augment_parse(&a, list, &e) != RC_OK) {
    fprintf(stderr, "augment_dump: %s\n", e.msg);
    return 1;
  }
  static float out[N * C * H * W], work[H * W];
  static int64_t params[N * 7];
  memcpy(out, in, sizeof out);
  for (int64_t j = 0; j < N; j++) {
    rc_augment_draw d;
    rc__augment_draw_sample(&a, &d, H, W, SEED, STEP, j);
    rc__augment_apply_sample(&d, a.pad, out + j * C * H * W, C, H, W, work);
    int64_t p[7] = {d.flip, d.dy, d.dx, d.ry, d.rx, d.rh, d.rw};
    memcpy(params + j * 7, p, sizeof p);
  }
  char name[128];
  int64_t dims[4] = {N, C, H, W}, pdims[2] = {N, 7};
  snprintf(name, sizeof name, "out_%s", tag);
  if (save(dir, name, RC_DTYPE_FLOAT, 4, dims, out)) return 1;
  snprintf(name, sizeof name, "params_%s", tag);
  return save(dir, name, RC_DTYPE_INT64, 2, pdims, params);
}

/* Mixing weights over many steps: (drawn, lambda, y0, y1, x0, x1) per step. */
static int dump_mix_draws(const char *dir, const char *tag, const char *list) {
  rc_augment a;
  rc_err e = {0};
  if (rc__augment_parse(&a, list, &e) != RC_OK) return 1;
  static double rows[DRAWS * 6];
  int64_t partner[N];
  for (int64_t s = 0; s < DRAWS; s++) {
    rc_augment_mix m;
    rc__augment_draw_mix(&a, &m, partner, N, H, W, SEED, s);
    double r[6] = {m.drawn, m.lambda, (double)m.y0, (double)m.y1, (double)m.x0, (double)m.x1};
    memcpy(rows + s * 6, r, sizeof r);
  }
  char name[128];
  snprintf(name, sizeof name, "draws_%s", tag);
  int64_t dims[2] = {DRAWS, 6};
  return save(dir, name, RC_DTYPE_DOUBLE, 2, dims, rows);
}

/* One mixed batch: the output, the partners and (lambda, y0, y1, x0, x1). */
static int dump_mix_apply(const char *dir, const char *tag, const char *list, const float *in) {
  rc_augment a;
  rc_err e = {0};
  if (rc__augment_parse(&a, list, &e) != RC_OK) return 1;
  static float out[N * C * H * W];
  int64_t partner[N];
  rc_augment_mix m;
  rc__augment_draw_mix(&a, &m, partner, N, H, W, SEED, STEP);
  for (int64_t j = 0; j < N; j++) {
    memcpy(out + j * C * H * W, in + j * C * H * W, sizeof(float) * C * H * W);
    rc__augment_apply_mix(&m, out + j * C * H * W, in + partner[j] * C * H * W, C, H, W);
  }
  double info[5] = {m.lambda, (double)m.y0, (double)m.y1, (double)m.x0, (double)m.x1};
  char name[128];
  int64_t dims[4] = {N, C, H, W}, pd[1] = {N}, id[1] = {5};
  snprintf(name, sizeof name, "out_%s", tag);
  if (save(dir, name, RC_DTYPE_FLOAT, 4, dims, out)) return 1;
  snprintf(name, sizeof name, "partner_%s", tag);
  if (save(dir, name, RC_DTYPE_INT64, 1, pd, partner)) return 1;
  snprintf(name, sizeof name, "mixinfo_%s", tag);
  return save(dir, name, RC_DTYPE_DOUBLE, 1, id, info);
}

int main(int argc, char **argv) {
  if (argc != 2) {
    fprintf(stderr, "usage: augment_dump OUTDIR\n");
    return 2;
  }
  const char *dir = argv[1];
  static float in[N * C * H * W];
  unsigned s = 12345u; /* any fixed values will do: a small LCG */
  for (size_t i = 0; i < sizeof in / sizeof in[0]; i++) {
    s = s * 1103515245u + 12345u;
    in[i] = (float)((s >> 8) & 0xffff) / 65536.0f - 0.5f;
  }
  int64_t dims[4] = {N, C, H, W};
  int bad = save(dir, "in", RC_DTYPE_FLOAT, 4, dims, in);
  bad |= dump_sample_case(dir, "flip", "flip", in);
  bad |= dump_sample_case(dir, "crop", "crop=3", in);
  bad |= dump_sample_case(dir, "flipcrop", "flip,crop=2", in);
  bad |= dump_sample_case(dir, "rrc", "rrc=0.2-1:0.5-2", in);
  bad |= dump_mix_draws(dir, "mix", "mix=0.4");
  bad |= dump_mix_draws(dir, "cutmix", "cutmix=1");
  bad |= dump_mix_draws(dir, "both", "mix=0.2,cutmix=2");
  bad |= dump_mix_apply(dir, "mixup", "mix=0.4", in);
  bad |= dump_mix_apply(dir, "cutmix", "cutmix=1", in);
  return bad;
}
