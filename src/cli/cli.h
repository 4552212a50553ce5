/* Shared pieces of the command-line front end. */
#ifndef RC_CLI_H
#define RC_CLI_H

#include <stdio.h>

#include "core/status.h"

/* Exit codes: success, failure, usage error. */
enum { RC_EXIT_OK = 0, RC_EXIT_FAIL = 1, RC_EXIT_USAGE = 2 };

typedef struct rc_command {
  const char *name;
  const char *summary;
  int (*run)(int argc, char **argv);
} rc_command;

int rc_cmd_inspect(int argc, char **argv);
int rc_cmd_eval(int argc, char **argv);
int rc_cmd_distill(int argc, char **argv);
int rc_cmd_batch(int argc, char **argv);
int rc_cmd_prune(int argc, char **argv);
int rc_cmd_quantize(int argc, char **argv);

/* "recoup: error: <msg>" on stderr; returns RC_EXIT_FAIL. */
int cli_fail(const rc_err *e);
/* "recoup <cmd>: <msg>" plus a pointer to --help on stderr; returns RC_EXIT_USAGE. */
int cli_usage_error(const char *cmd, const char *fmt, ...)
#if defined(__GNUC__)
    __attribute__((format(printf, 2, 3)))
#endif
    ;
/* Parse a positive integer option value; 0 on success. */
int cli_parse_int(const char *s, long lo, long hi, long *out);
int cli_parse_float(const char *s, double *out);
/* Use n threads for OpenBLAS and OpenMP (0 = all cores). */
void cli_set_threads(int n);
/* Thousands separators: 1234567 -> "1,234,567". */
const char *cli_group_digits(long long v, char *buf, size_t n);
/* Library log messages go to stderr with a prefix. */
void cli_log_stderr(void *user, int level, const char *msg);
/* 1 when stdout/stderr is a terminal (progress lines redraw in place). */
int cli_isatty_stderr(void);

#endif
