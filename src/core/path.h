/* Whether a path we are about to write is a file we read. Paths are compared
 * as files, not strings: the same device and inode when both exist (so
 * symbolic links, hard links, "./x" and "../d/x" all match), else the
 * resolved folder plus the file name. */
#ifndef RC_CORE_PATH_H
#define RC_CORE_PATH_H

#include "core/status.h"

/* 1 when writing `out` would replace or change the file `in`. */
int rc__path_same_file(const char *out, const char *in);

/* RC_ERR_INVALID naming `out_label out` and the input when `out` is any of
 * the n inputs (NULL entries are skipped); `in_labels` may be NULL. */
rc_status rc__path_refuse_inputs(const char *out_label, const char *out, const char *const *inputs,
                                 const char *const *in_labels, int n, rc_err *e);

#endif
