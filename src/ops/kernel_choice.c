/* See kernel_choice.h. */
#include "ops/kernel_choice.h"

#include <stddef.h>
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

/* The values of RECOUP_CONV_PATH. */
static const struct {
  const char *name;
  rc__conv_path path;
} conv_paths[] = {
    {"builtin", RC_CONV_PATH_BUILTIN},
    {"reference", RC_CONV_PATH_REFERENCE},
    {"dnnl", RC_CONV_PATH_DNNL},
};

/* Without RECOUP_CONV_PATH: oneDNN where the build has it (the ResNet-8
 * training step ran about twice as fast; README's note on oneDNN), else
 * recoup's own paths. */
#ifdef RECOUP_HAVE_DNNL
static const rc__conv_path default_conv_path = RC_CONV_PATH_DNNL;
#else
static const rc__conv_path default_conv_path = RC_CONV_PATH_BUILTIN;
#endif

rc__conv_path rc__conv_path_choice(void) {
  const char *want = getenv("RECOUP_CONV_PATH");
  rc__conv_path path = default_conv_path;
  for (size_t i = 0; want && i < sizeof conv_paths / sizeof conv_paths[0]; i++)
    if (!strcmp(want, conv_paths[i].name)) path = conv_paths[i].path;
#ifndef RECOUP_HAVE_DNNL
  if (path == RC_CONV_PATH_DNNL) path = RC_CONV_PATH_BUILTIN;
#endif
  return path;
}

int rc__conv_reference(void) { return rc__conv_path_choice() == RC_CONV_PATH_REFERENCE; }
