/* N:M-patterned weights (at most N kept of every M consecutive input
 * channels at each kernel cell, as `recoup prune --pattern N:M` leaves
 * them) and the strip kernels that use them.
 *
 * The kept positions come from the weight's pattern (sparse.h, rows = output
 * channels, columns = input channel x kernel cell). On top of those rows the
 * plan builds once, when the pattern is set, the transposed lists (for each
 * column, the rows that keep it), so that forward and the input gradient are
 * both a gather: each output row of a product is a sum of a few input rows,
 * taken in vector strips with the sums kept in registers. Values are read
 * from the dense weight tensor at each call (the optimizer and export keep
 * that tensor), and the weight gradient is computed and written at kept
 * positions only. */
#ifndef RC_OPS_NM_H
#define RC_OPS_NM_H

#include <stdint.h>

#include "core/arena.h"
#include "core/status.h"

struct rc__wpattern;

typedef struct rc__nm {
  int n, m;              /* at most n kept in every group of m input channels */
  int64_t cells;         /* kernel cells: a group's members sit this far apart in a row */
  const int64_t *cstart; /* cols + 1 offsets into crow */
  const int32_t *crow;   /* rows keeping each column, ascending */
} rc__nm;

/* Attaches an rc__nm to p when keep (rows x cols, cols = channels * cells)
 * keeps at most half of every group of m channels for some m in 2..8
 * dividing the channels (the smallest such m is recorded); otherwise leaves
 * p->nm NULL. Arrays in arena a. */
rc_status rc__nm_attach(struct rc__wpattern *p, rc_arena *a, const uint8_t *keep, int64_t cells, rc_err *e);

/* out[r][j] (= or +=) sum over e in [start[r], start[r+1]) of
 * w[r * wrow + idx[e] * wstep] * src[row(idx[e]) + j], for rows r in
 * [r0, r1) and j < L, where row(i) is roff[i], or i * lds when roff is NULL
 * (a table lets source rows overlap: shifted views of one padded plane);
 * out row r starts at out + (r - r0) * ldo. Forward takes the pattern's rows
 * (wrow = cols, wstep = 1); the input gradient the transposed lists
 * (wrow = 1, wstep = cols). Single-threaded; the instruction set is chosen
 * at run time (kernel_choice.h). */
void rc__nm_gather(const int64_t *start, const int32_t *idx, int64_t r0, int64_t r1, const float *w, int64_t wrow,
                   int64_t wstep, const float *src, const int64_t *roff, int64_t lds, float *out, int64_t ldo,
                   int64_t L, int accumulate);

/* dw[r * cols + k] += sum over samples i < S and j < L of
 * u[i * us + r * ldu + j] * v[i * vs + k * ldv + j] for the kept k of rows
 * [r0, r1) (the pattern's rows), each sum kept in 16 lanes over all samples
 * and added up once; nothing else of dw is read or written.
 * Single-threaded. */
void rc__nm_wgrad(const struct rc__wpattern *p, int64_t r0, int64_t r1, float *dw, const float *u, int64_t ldu,
                  int64_t us, const float *v, int64_t ldv, int64_t vs, int64_t L, int64_t S);

#endif
