/* See nm.h: recognising an N:M pattern and building its transposed lists. */
#include "core/alloc.h"
#include "ops/nm.h"
#include "ops/op.h"
#include "ops/sparse.h"

/* Most kept in any group of m channels at one kernel cell (rows x channels
 * x cells). */
static int most_kept(const uint8_t *keep, int64_t rows, int64_t channels, int64_t cells, int m) {
  int most = 0;
  for (int64_t r = 0; r < rows; r++)
    for (int64_t c0 = 0; c0 < channels; c0 += m)
      for (int64_t t = 0; t < cells; t++) {
        int kept = 0;
        for (int j = 0; j < m; j++) kept += keep[(r * channels + c0 + j) * cells + t] != 0;
        if (kept > most) most = kept;
      }
  return most;
}

rc_status rc__nm_attach(rc__wpattern *p, rc_arena *a, const uint8_t *keep, int64_t cells, rc_err *e) {
  p->nm = NULL;
  if (cells < 1 || p->cols % cells) return RC_OK;
  const int64_t channels = p->cols / cells;
  int n = 0, m = 0;
  for (int mm = 2; mm <= 8 && !m; mm++) {
    if (channels % mm) continue;
    const int most = most_kept(keep, p->rows, channels, cells, mm);
    if (2 * most <= mm) n = most, m = mm;
  }
  if (!m) return RC_OK;
  rc__nm *f = rc__arena_zalloc(a, sizeof *f);
  int64_t *cstart = rc__arena_zalloc(a, sizeof(int64_t) * (size_t)(p->cols + 1));
  int32_t *crow = rc__arena_alloc(a, sizeof(int32_t) * (size_t)(p->nnz ? p->nnz : 1));
  if (!f || !cstart || !crow) return rc__fail(e, RC_ERR_NOMEM, "out of memory for an N:M weight pattern");
  /* Count per column, offsets, then fill in row order (rows ascend). */
  for (int64_t j = 0; j < p->nnz; j++) cstart[p->col[j] + 1]++;
  for (int64_t c = 0; c < p->cols; c++) cstart[c + 1] += cstart[c];
  int64_t *next = rc__malloc(sizeof(int64_t) * (size_t)p->cols);
  if (!next) return rc__fail(e, RC_ERR_NOMEM, "out of memory for an N:M weight pattern");
  for (int64_t c = 0; c < p->cols; c++) next[c] = cstart[c];
  for (int64_t r = 0; r < p->rows; r++)
    for (int64_t j = p->start[r]; j < p->start[r + 1]; j++) crow[next[p->col[j]]++] = (int32_t)r;
  rc__free(next);
  f->n = n;
  f->m = m;
  f->cells = cells;
  f->cstart = cstart;
  f->crow = crow;
  p->nm = f;
  return RC_OK;
}
