/* Whole files in and out. Every writer of recoup's outputs (models, data
 * files, checkpoints, reports, batch state) goes through rc__write_atomic, so
 * each has the same guarantee: readers see the old file or the new one,
 * never half of one. */
#ifndef RC_CORE_FILE_H
#define RC_CORE_FILE_H

#include <stddef.h>
#include <stdint.h>

#include "core/status.h"

/* Read a whole regular file into rc__malloc'd memory. Refuses files over
 * max_bytes before reading. Errors name the path. */
rc_status rc__file_read_all(const char *path, size_t max_bytes, uint8_t **data, size_t *n, rc_err *e);

/* The folder part of path ("." when there is none, "/" for "/x"), from
 * rc__malloc; NULL when out of memory. */
char *rc__path_dir(const char *path);

/* Write n bytes to path atomically: a temporary file with a unique name
 * (mkstemp) in path's folder, given the mode of the file it replaces (else
 * 0666 less the umask), written, fsync'd, renamed over path, and the folder
 * fsync'd so the rename survives a crash. On failure path is as it was. */
rc_status rc__write_atomic(const char *path, const void *data, size_t n, rc_err *e);

#endif
