/* Helpers the library uses itself and offers to programs around it (the
 * command-line tool among them), so that each job has one implementation:
 * printing names taken from files safely, refusing outputs that are
 * inputs, writing files atomically, and printing figures to the precision
 * they carry. */
#ifndef RECOUP_UTIL_H
#define RECOUP_UTIL_H

#include <stddef.h>

#include "recoup/export.h"
#include "recoup/status.h"

/* Copy src into dst (n bytes, always terminated) with control characters,
 * bytes that are not valid UTF-8 and bidirectional overrides written as
 * \xNN escapes, so that a name from a file cannot move the terminal's
 * cursor or fake a line. Returns dst. */
RC_API char *rc_text_escape(char *dst, size_t n, const char *src);
/* 1 if rc_text_escape would change s. */
RC_API int rc_text_needs_escape(const char *s);

/* 1 if out names the same file as in (compared as files, not as strings). */
RC_API int rc_path_same_file(const char *out, const char *in);
/* Refuse an output that is one of the n inputs (NULL entries skipped); the
 * error names `out_label out` and the input's label. */
RC_API rc_status rc_path_refuse_inputs(const char *out_label, const char *out, const char *const *inputs,
                                       const char *const *in_labels, int n, rc_err *e);

/* Write n bytes to path through a unique temporary file in the same folder,
 * synced, renamed over path (keeping an existing file's mode), the folder
 * synced; on failure path is left as it was. */
RC_API rc_status rc_file_write_atomic(const char *path, const void *data, size_t n, rc_err *e);

/* Significant digits the tables print figures with. */
#define RC_FMT_SIG 4
/* v with `sig` significant digits into buf ("+" before positive values when
 * plus is set); returns buf. */
RC_API char *rc_fmt_sig(char *buf, size_t n, double v, int sig, int plus);

#endif
