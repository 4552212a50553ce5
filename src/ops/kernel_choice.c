/* See kernel_choice.h. */
#include "ops/kernel_choice.h"

#include <stdlib.h>
#include <string.h>

static rc__isa cpu_level(void) {
#if defined(__GNUC__) && defined(__x86_64__)
  __builtin_cpu_init();
  if (__builtin_cpu_supports("avx512f")) return RC_ISA_AVX512;
  if (__builtin_cpu_supports("avx2")) return RC_ISA_AVX2;
#endif
  return RC_ISA_BASELINE;
}

rc__isa rc__isa_level(void) {
  rc__isa level = cpu_level();
  const char *cap = getenv("RECOUP_KERNEL_ISA");
  if (!cap) return level;
  rc__isa want = !strcmp(cap, "baseline") ? RC_ISA_BASELINE : !strcmp(cap, "avx2") ? RC_ISA_AVX2 : level;
  return want < level ? want : level;
}

/* RECOUP_CONV_PATH, one row per value: what each turns off or forces.
 * Unset or unknown values take the defaults (fast paths chosen by shape). */
typedef struct conv_path_row {
  const char *value;
  int reference;          /* plain unfold + GEMM path only */
  rc__sparse_mode sparse; /* sparse kernels for patterned weights */
  int fuse;               /* Conv -> frozen BN -> Relu/Clip as one step */
} conv_path_row;

static const conv_path_row k_conv_paths[] = {
    {"reference", 1, RC_SPARSE_NEVER, 0},
    {"dense", 0, RC_SPARSE_NEVER, 1},
    {"sparse", 0, RC_SPARSE_ALWAYS, 1},
    {"unfused", 0, RC_SPARSE_AUTO, 0},
};
static const conv_path_row k_conv_default = {NULL, 0, RC_SPARSE_AUTO, 1};

static const conv_path_row *conv_path(void) {
  const char *value = getenv("RECOUP_CONV_PATH");
  if (value)
    for (size_t i = 0; i < sizeof k_conv_paths / sizeof k_conv_paths[0]; i++)
      if (!strcmp(value, k_conv_paths[i].value)) return &k_conv_paths[i];
  return &k_conv_default;
}

int rc__conv_reference(void) { return conv_path()->reference; }

rc__sparse_mode rc__sparse_choice(void) { return conv_path()->sparse; }

int rc__conv_fuse(void) { return conv_path()->fuse; }
