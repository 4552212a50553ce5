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

/* RECOUP_CONV_PATH, one row per value: which Conv path serves, whether
 * patterned weights take the sparse kernels, whether Conv -> frozen BN ->
 * Relu/Clip chains run as one step. Unset or unknown values take the
 * defaults. */
typedef struct conv_path_row {
  const char *value;
  rc__conv_path path;     /* RC_CONV_PATH_DEFAULT: oneDNN where built in */
  rc__sparse_mode sparse; /* sparse kernels for patterned weights */
  int fuse;               /* chains as one step */
  rc__sparse_mode nm;     /* N:M kernels (nm.h) for N:M-patterned weights */
  int everywhere;         /* oneDNN takes every shape it fits, not only where measured to pay */
} conv_path_row;

#define RC_CONV_PATH_DEFAULT ((rc__conv_path)-1)

static const conv_path_row k_conv_paths[] = {
    {"builtin", RC_CONV_PATH_BUILTIN, RC_SPARSE_AUTO, 1, RC_SPARSE_AUTO, 0},
    {"reference", RC_CONV_PATH_REFERENCE, RC_SPARSE_NEVER, 0, RC_SPARSE_NEVER, 0},
    {"dnnl", RC_CONV_PATH_DNNL, RC_SPARSE_AUTO, 1, RC_SPARSE_AUTO, 1},
    {"dense", RC_CONV_PATH_DEFAULT, RC_SPARSE_NEVER, 1, RC_SPARSE_NEVER, 0},
    {"sparse", RC_CONV_PATH_DEFAULT, RC_SPARSE_ALWAYS, 1, RC_SPARSE_AUTO, 0},
    {"unfused", RC_CONV_PATH_DEFAULT, RC_SPARSE_AUTO, 0, RC_SPARSE_AUTO, 0},
    {"nm-off", RC_CONV_PATH_DEFAULT, RC_SPARSE_AUTO, 1, RC_SPARSE_NEVER, 0},
    {"nm-on", RC_CONV_PATH_DEFAULT, RC_SPARSE_AUTO, 1, RC_SPARSE_ALWAYS, 0},
};
static const conv_path_row k_conv_default = {NULL, RC_CONV_PATH_DEFAULT, RC_SPARSE_AUTO, 1, RC_SPARSE_AUTO, 0};

static const conv_path_row *conv_path_row_chosen(void) {
  const char *value = getenv("RECOUP_CONV_PATH");
  if (value)
    for (size_t i = 0; i < sizeof k_conv_paths / sizeof k_conv_paths[0]; i++)
      if (!strcmp(value, k_conv_paths[i].value)) return &k_conv_paths[i];
  return &k_conv_default;
}

/* Without a path named: oneDNN where the build has it (the ResNet-8
 * training step ran about twice as fast; README's note on oneDNN), else
 * recoup's own paths. "dnnl" without the library gives recoup's own. */
rc__conv_path rc__conv_path_choice(void) {
  rc__conv_path path = conv_path_row_chosen()->path;
#ifdef RECOUP_HAVE_DNNL
  if (path == RC_CONV_PATH_DEFAULT) path = RC_CONV_PATH_DNNL;
#else
  if (path == RC_CONV_PATH_DEFAULT || path == RC_CONV_PATH_DNNL) path = RC_CONV_PATH_BUILTIN;
#endif
  return path;
}

int rc__conv_reference(void) { return rc__conv_path_choice() == RC_CONV_PATH_REFERENCE; }

rc__sparse_mode rc__sparse_choice(void) { return conv_path_row_chosen()->sparse; }

rc__sparse_mode rc__nm_choice(void) { return conv_path_row_chosen()->nm; }

int rc__conv_fuse(void) { return conv_path_row_chosen()->fuse; }

int rc__conv_dnnl_everywhere(void) { return conv_path_row_chosen()->everywhere; }
