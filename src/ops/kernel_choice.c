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

int rc__conv_reference(void) {
  const char *path = getenv("RECOUP_CONV_PATH");
  return path && !strcmp(path, "reference");
}

int rc__conv_fuse(void) {
  const char *path = getenv("RECOUP_CONV_PATH");
  return !path || (strcmp(path, "reference") && strcmp(path, "unfused"));
}
