/* Status codes shared by every recoup function that can fail. */
#ifndef RECOUP_STATUS_H
#define RECOUP_STATUS_H

#include "recoup/export.h"

/* One list drives the enum and rc_strerror(); values are negative so that
 * functions may return a count or an index on success. */
#define RC_STATUS_LIST(X)                                                   \
  X(RC_OK, 0, "success")                                                    \
  X(RC_ERR_NOMEM, -1, "out of memory")                                      \
  X(RC_ERR_IO, -2, "input/output error")                                    \
  X(RC_ERR_FORMAT, -3, "malformed file")                                    \
  X(RC_ERR_UNSUPPORTED, -4, "unsupported feature")                          \
  X(RC_ERR_SHAPE, -5, "shape mismatch")                                     \
  X(RC_ERR_LIMIT, -6, "size limit exceeded")                                \
  X(RC_ERR_INVALID, -7, "invalid argument")                                 \
  X(RC_ERR_NUMERIC, -8, "non-finite value")                                 \
  X(RC_ERR_INTERRUPTED, -9, "interrupted")

typedef enum rc_status {
#define RC_STATUS_ENUM(name, value, text) name = value,
  RC_STATUS_LIST(RC_STATUS_ENUM)
#undef RC_STATUS_ENUM
} rc_status;

/* Short text for a status code; never NULL. */
RC_API const char *rc_strerror(int status);

/* An error: the code plus one line naming the file, node or field at fault. */
typedef struct rc_err {
  rc_status code;
  char msg[512];
} rc_err;

/* Set e's code and message (printf format; names are escaped for
 * printing); returns code, so that `return rc_err_set(e, ...)` works. Keeps
 * e untouched when it is NULL. For callbacks and programs that report their
 * own errors the library's way. */
RC_API rc_status rc_err_set(rc_err *e, rc_status code, const char *fmt, ...)
#if defined(__GNUC__)
    __attribute__((format(printf, 3, 4)))
#endif
    ;
/* Prefix the message already in e with context ("file.onnx: ..."); returns e's code. */
RC_API rc_status rc_err_prefix(rc_err *e, const char *fmt, ...)
#if defined(__GNUC__)
    __attribute__((format(printf, 2, 3)))
#endif
    ;

/* Return from the calling function when expr is not RC_OK. */
#define RC_TRY(expr)                          \
  do {                                        \
    rc_status rc_try_s_ = (expr);             \
    if (rc_try_s_ != RC_OK) return rc_try_s_; \
  } while (0)

#endif
