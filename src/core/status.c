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

/* One body for rc__fail (the library's name) and rc_err_set (the public one). */
static rc_status err_vset(rc_err *e, rc_status code, const char *fmt, va_list ap) {
  if (e) {
    /* Keep the first, most specific message: callers higher up may add context
     * with rc__wrap but never overwrite what went wrong. */
    e->code = code;
    char raw[sizeof e->msg];
    vsnprintf(raw, sizeof raw, fmt, ap);
    /* Messages quote names from files: escape them where they are made. */
    rc__escape(e->msg, sizeof e->msg, raw);
  }
  return code;
}

static rc_status err_vprefix(rc_err *e, const char *fmt, va_list ap) {
  if (!e) return RC_ERR_INVALID;
  char prefix[256];
  char raw[256];
  vsnprintf(raw, sizeof raw, fmt, ap);
  rc__escape(prefix, sizeof prefix, raw);
  char joined[sizeof e->msg];
  snprintf(joined, sizeof joined, "%s: %s", prefix, e->msg);
  memcpy(e->msg, joined, sizeof e->msg);
  return e->code;
}

rc_status rc__fail(rc_err *e, rc_status code, const char *fmt, ...) {
  va_list ap;
  va_start(ap, fmt);
  rc_status s = err_vset(e, code, fmt, ap);
  va_end(ap);
  return s;
}

rc_status rc_err_set(rc_err *e, rc_status code, const char *fmt, ...) {
  va_list ap;
  va_start(ap, fmt);
  rc_status s = err_vset(e, code, fmt, ap);
  va_end(ap);
  return s;
}

rc_status rc__wrap(rc_err *e, const char *fmt, ...) {
  va_list ap;
  va_start(ap, fmt);
  rc_status s = err_vprefix(e, fmt, ap);
  va_end(ap);
  return s;
}

rc_status rc_err_prefix(rc_err *e, const char *fmt, ...) {
  va_list ap;
  va_start(ap, fmt);
  rc_status s = err_vprefix(e, fmt, ap);
  va_end(ap);
  return s;
}

void rc__err_clear(rc_err *e) {
  if (e) {
    e->code = RC_OK;
    e->msg[0] = '\0';
  }
}
