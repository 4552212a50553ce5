#include "core/log.h"

#include <stdarg.h>
#include <stdio.h>

void rc__log(const rc_logger *lg, rc_log_level level, const char *fmt, ...) {
  if (!lg || !lg->fn || level > lg->max_level) return;
  char buf[1024];
  va_list ap;
  va_start(ap, fmt);
  vsnprintf(buf, sizeof buf, fmt, ap);
  va_end(ap);
  lg->fn(lg->user, level, buf);
}
