#define _POSIX_C_SOURCE 200809L /* sigaction */
#include <cblas.h>
#include <errno.h>
#include <getopt.h>
#include <limits.h>
#include <math.h>
#include <omp.h>
#include <stdarg.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "cli/cli.h"

int cli_fail(const rc_err *e) {
  fprintf(stderr, "recoup: error: %s\n", e && e->msg[0] ? e->msg : rc_strerror(e ? e->code : -1));
  return RC_EXIT_FAIL;
}

int cli_usage_error(const char *cmd, const char *fmt, ...) {
  va_list ap;
  va_start(ap, fmt);
  fprintf(stderr, "recoup%s%s: ", cmd ? " " : "", cmd ? cmd : "");
  vfprintf(stderr, fmt, ap);
  va_end(ap);
  fprintf(stderr, "\nTry 'recoup%s%s --help'.\n", cmd ? " " : "", cmd ? cmd : "");
  return RC_EXIT_USAGE;
}

int cli_parse_int(const char *s, long lo, long hi, long *out) {
  if (!s || !*s) return -1;
  char *end;
  errno = 0;
  long v = strtol(s, &end, 10);
  if (errno || *end || v < lo || v > hi) return -1;
  *out = v;
  return 0;
}

int cli_parse_float(const char *s, double *out) {
  if (!s || !*s) return -1;
  char *end;
  errno = 0;
  double v = strtod(s, &end);
  if (errno || *end || !isfinite(v)) return -1;
  *out = v;
  return 0;
}

void cli_set_threads(int n) {
  if (n <= 0) {
    long c = sysconf(_SC_NPROCESSORS_ONLN);
    n = c > 0 ? (int)c : 1;
  }
  openblas_set_num_threads(n);
  omp_set_num_threads(n);
}

const char *cli_group_digits(long long v, char *buf, size_t n) {
  char raw[32];
  snprintf(raw, sizeof raw, "%lld", v < 0 ? -v : v);
  size_t len = strlen(raw), o = 0;
  if (v < 0 && o + 1 < n) buf[o++] = '-';
  for (size_t i = 0; i < len && o + 1 < n; i++) {
    if (i && (len - i) % 3 == 0 && o + 1 < n) buf[o++] = ',';
    if (o + 1 < n) buf[o++] = raw[i];
  }
  buf[o] = '\0';
  return buf;
}

void cli_log_stderr(void *user, rc_log_level level, const char *msg) {
  const int *tty = user;
  const char *tag = level == RC_LOG_ERROR ? "error: " : level == RC_LOG_WARN ? "warning: " : "";
  fprintf(stderr, "%srecoup: %s%s\n", tty && *tty ? "\r\033[K" : "", tag, msg);
}

int cli_isatty_stderr(void) { return isatty(STDERR_FILENO); }

volatile sig_atomic_t cli_stop_requested;

static void on_stop_signal(int sig) {
  (void)sig;
  cli_stop_requested = 1;
}

void cli_catch_stop_signals(void) {
  struct sigaction sa;
  memset(&sa, 0, sizeof sa);
  sa.sa_handler = on_stop_signal;
  sigemptyset(&sa.sa_mask);
  sigaction(SIGINT, &sa, NULL);
  sigaction(SIGTERM, &sa, NULL);
  sigaction(SIGHUP, &sa, NULL);
}

int cli_parse_options(int argc, char **argv, const struct option *longopts, const char *cmd,
                      int (*apply)(void *ctx, int opt, const char *value), void *ctx, void (*usage)(FILE *)) {
  int c;
  optind = 1;
  while ((c = getopt_long(argc, argv, "h", longopts, NULL)) != -1) {
    if (c == 'h') {
      usage(stdout);
      return -1;
    }
    if (c == '?') return cli_usage_error(cmd, "unknown option");
    int r = apply(ctx, c, optarg);
    if (r) return r;
  }
  return 0;
}
