/* Which implementation a kernel runs: the instruction set of the vector
 * kernels recoup writes itself (the best the CPU has, or a lower one named
 * by RECOUP_KERNEL_ISA), whether Conv takes its fast paths or the plain
 * per-sample path (RECOUP_CONV_PATH=reference), and whether a Conv runs the
 * ops after it as its epilogue (off with "reference" or "unfused"). Both
 * variables exist so that tests can run every path on one machine; results agree to float tolerance
 * (and bit for bit across instruction sets). Read at each call: no state. */
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

/* Non-zero when RECOUP_CONV_PATH is "reference". */
int rc__conv_reference(void);

/* When the sparse kernels of Conv, Gemm and MatMul (sparse.h) run for a
 * weight with a pattern: by its density (the default), never
 * (RECOUP_CONV_PATH "reference" or "dense") or at any density ("sparse"). */
typedef enum rc__sparse_mode { RC_SPARSE_AUTO = 0, RC_SPARSE_NEVER = 1, RC_SPARSE_ALWAYS = 2 } rc__sparse_mode;
rc__sparse_mode rc__sparse_choice(void);
/* Non-zero when plans may run a Conv with its following frozen
 * BatchNormalization and Relu/Clip as one step (ops/epilogue.h): not when
 * RECOUP_CONV_PATH is "reference" or "unfused" (fast Conv paths, separate
 * passes after them). */
int rc__conv_fuse(void);

#endif
