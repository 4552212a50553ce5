#ifndef RECOUP_LOG_H
#define RECOUP_LOG_H

typedef enum rc_log_level {
  RC_LOG_ERROR = 0,
  RC_LOG_WARN = 1,
  RC_LOG_INFO = 2,
  RC_LOG_DEBUG = 3
} rc_log_level;

/* A sink for library messages; `fn` may be NULL to discard them. */
typedef struct rc_logger {
  void (*fn)(void *user, rc_log_level level, const char *msg);
  void *user;
  rc_log_level max_level;
} rc_logger;

#endif
