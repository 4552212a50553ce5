#include "core/status.h"

#include "core/escape.h"

#include <stdarg.h>
#include <stdio.h>
#include <string.h>

const char *rc_strerror(int status) {
  switch (status) {
#define RC_STATUS_CASE(name, value, text) \
  case value:                             \
    return text;
    RC_STATUS_LIST(RC_STATUS_CASE)
#undef RC_STATUS_CASE
  }
  return "unknown status";
}

rc_status rc_err_set(rc_err *e, rc_status code, const char *fmt, ...) {
  if (e) {
    /* Keep the first, most specific message: callers higher up may add context
     * with rc__wrap but never overwrite what went wrong. */
    e->code = code;
    va_list ap;
    va_start(ap, fmt);
    char raw[sizeof e->msg];
    vsnprintf(raw, sizeof raw, fmt, ap);
    va_end(ap);
    /* Messages quote names from files: escape them where they are made. */
    rc__escape(e->msg, sizeof e->msg, raw);
  }
  return code;
}

rc_status rc_err_prefix(rc_err *e, const char *fmt, ...) {
  if (!e) return RC_ERR_INVALID;
  char prefix[256];
  va_list ap;
  va_start(ap, fmt);
  char raw[256];
  vsnprintf(raw, sizeof raw, fmt, ap);
  va_end(ap);
  rc__escape(prefix, sizeof prefix, raw);
  char joined[sizeof e->msg];
  snprintf(joined, sizeof joined, "%s: %s", prefix, e->msg);
  memcpy(e->msg, joined, sizeof e->msg);
  return e->code;
}
