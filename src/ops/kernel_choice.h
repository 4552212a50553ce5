/* Which implementation a kernel runs: the instruction set of the vector
 * kernels recoup writes itself (the best the CPU has, or a lower one named
 * by RECOUP_KERNEL_ISA) and which of Conv's paths serves (RECOUP_CONV_PATH,
 * one of the names in kernel_choice.c's table). Both variables exist so
 * that tests can run every path on one machine; results agree to float
 * tolerance (and bit for bit across instruction sets). Read at each call:
 * no state. */
#ifndef RC_OPS_KERNEL_CHOICE_H
#define RC_OPS_KERNEL_CHOICE_H

typedef enum rc__isa {
  RC_ISA_BASELINE = 0, /* x86-64 SSE2, or whatever the compiler targets elsewhere */
  RC_ISA_AVX2 = 1,
  RC_ISA_AVX512 = 2
} rc__isa;

/* The CPU's best level, lowered to RECOUP_KERNEL_ISA ("baseline", "avx2",
 * "avx512") when that names a lower one. */
rc__isa rc__isa_level(void);

/* Conv's paths: recoup's own fast paths (batched GEMMs, direct depthwise
 * kernels), the plain per-sample path, and oneDNN's convolutions where the
 * library was built in (a layer it does not take runs recoup's own). */
typedef enum rc__conv_path {
  RC_CONV_PATH_BUILTIN = 0,
  RC_CONV_PATH_REFERENCE = 1,
  RC_CONV_PATH_DNNL = 2
} rc__conv_path;

/* The path RECOUP_CONV_PATH names ("builtin", "reference", "dnnl"), or
 * the default (also for "dense", "sparse", "unfused", "nm-off", "nm-on",
 * which choose only the switches below): oneDNN where built in, else the built-in path.
 * "dnnl" without the library built in gives the built-in path. */
rc__conv_path rc__conv_path_choice(void);

/* Non-zero when RECOUP_CONV_PATH is "reference". */
int rc__conv_reference(void);

/* When the sparse kernels of Conv, Gemm and MatMul (sparse.h) run for a
 * weight with a pattern: by its density (the default), never
 * (RECOUP_CONV_PATH "reference" or "dense") or at any density ("sparse"). */
typedef enum rc__sparse_mode { RC_SPARSE_AUTO = 0, RC_SPARSE_NEVER = 1, RC_SPARSE_ALWAYS = 2 } rc__sparse_mode;
rc__sparse_mode rc__sparse_choice(void);
/* When the N:M kernels (nm.h) run for a weight with N:M structure: where
 * they were measured to pay (the default), never ("nm-off", "dense",
 * "reference") or wherever they fit ("nm-on"). */
rc__sparse_mode rc__nm_choice(void);
/* Non-zero when plans may run a Conv with its following frozen
 * BatchNormalization and Relu/Clip as one step (ops/epilogue.h): not when
 * RECOUP_CONV_PATH is "reference" or "unfused" (fast Conv paths, separate
 * passes after them). */
int rc__conv_fuse(void);
/* Non-zero when RECOUP_CONV_PATH is "dnnl": oneDNN then takes every shape
 * it can (tests reach it on all sizes); by default only shapes where it was
 * measured to pay (the 1x1 matmul of conv_dnnl_1x1.c). */
int rc__conv_dnnl_everywhere(void);

#endif
