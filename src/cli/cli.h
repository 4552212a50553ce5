/* Shared pieces of the command-line front end. */
#ifndef RC_CLI_H
#define RC_CLI_H

#include <signal.h>
#include <stdio.h>

#include "recoup/log.h"
#include "recoup/status.h"

#if defined(__GNUC__)
#define CLI_PRINTF(a, b) __attribute__((format(printf, a, b)))
#else
#define CLI_PRINTF(a, b)
#endif

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
int rc_cmd_synthesize(int argc, char **argv);

/* "recoup: error: <msg>" on stderr; returns RC_EXIT_FAIL. */
int cli_fail(const rc_err *e);
/* The library names a setting in its own words; where a command passes it an
 * option's value, this puts the option in front of the library's message
 * ("--augment: unknown augmentation transform 'spin'"), so a user reads the
 * option they typed. Returns e's code. */
rc_status cli_option_context(rc_err *e, const char *option);
/* cli_option_context, then cli_usage_error with the message; returns RC_EXIT_USAGE. */
int cli_option_usage_error(const char *cmd, const char *option, rc_err *e);
/* "recoup <cmd>: <msg>" plus a pointer to --help on stderr; returns RC_EXIT_USAGE. */
int cli_usage_error(const char *cmd, const char *fmt, ...)
#if defined(__GNUC__)
    __attribute__((format(printf, 2, 3)))
#endif
    ;
/* Check an output path before any work: not one of the n inputs (compared
 * as files; NULL entries skipped), its folder exists and is writable. The
 * error names `label out` and the input. */
rc_status cli_check_output(const char *label, const char *out, const char *const *inputs,
                           const char *const *in_labels, int n, rc_err *e);
struct cJSON;
/* Escape every string value and key of a JSON tree in place (rc_text_escape:
 * control bytes and invalid UTF-8 from files become \xNN), so what is
 * printed is valid JSON and safe on a terminal. */
void cli_json_escape_tree(struct cJSON *j);
/* cli_json_escape_tree, then cJSON_Print; free the result with free(). */
char *cli_json_print(struct cJSON *j);
/* Escaped copy of a name from a file for tables: into buf, returned. */
const char *cli_esc(const char *s, char *buf, size_t n);
/* Columns a valid UTF-8 string takes on a terminal (one per character;
 * wide East Asian characters are counted as one). */
int cli_text_width(const char *s);
/* Print s, then spaces up to `width` columns. */
void cli_print_cell(FILE *f, const char *s, int width);
/* Parse a positive integer option value; 0 on success. */
int cli_parse_int(const char *s, long lo, long hi, long *out);
int cli_parse_float(const char *s, double *out);
/* Use n threads for OpenBLAS and OpenMP (0 = all cores). */
void cli_set_threads(int n);
/* Thousands separators: 1234567 -> "1,234,567". */
const char *cli_group_digits(long long v, char *buf, size_t n);
/* An rc_logger sink: library messages to stderr with a prefix. `user` may
 * point to an int that is non-zero while a progress line is open on a
 * terminal (the line is cleared first). */
void cli_log_stderr(void *user, rc_log_level level, const char *msg);
/* Set by SIGINT/SIGTERM/SIGHUP once cli_catch_stop_signals ran: long work
 * checkpoints and stops. The one piece of state a signal handler may touch. */
extern volatile sig_atomic_t cli_stop_requested;
void cli_catch_stop_signals(void);

/* The ranks of an MPI job this process belongs to (recoup/parallel.h): set once
 * by main before any command runs, NULL-safe everywhere (one process). */
struct rc_dist;
struct rc_dist *cli_dist(void);
/* The command's failure status is one all ranks reached together (batch: a
 * job failed): end normally instead of stopping the job with MPI_Abort. */
void cli_dist_agreed_exit(void);

struct option;
/* After getopt_long returned '?' (main sets opterr = 0, so getopt printed
 * nothing): one usage line naming the option and what is wrong with it. */
int cli_bad_option(const char *cmd, char **argv, const struct option *longopts);
/* getopt_long over argv, handing every option to apply(ctx, opt, value).
 * Returns 0, a usage status from apply, RC_EXIT_USAGE for an unknown option,
 * or -1 after printing usage for --help/-h. */
int cli_parse_options(int argc, char **argv, const struct option *longopts, const char *cmd,
                      int (*apply)(void *ctx, int opt, const char *value), void *ctx, void (*usage)(FILE *));

/* 1 when stdout/stderr is a terminal (progress lines redraw in place). */
int cli_isatty_stderr(void);

#endif
