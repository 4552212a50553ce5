#define _POSIX_C_SOURCE 200809L /* sigaction */
#include <cJSON.h>
#include <cblas.h>
#include <errno.h>
#include <getopt.h>
#include <limits.h>
#include <math.h>
#include <omp.h>
#include <stdarg.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include "cli/cli.h"
#include "recoup/parallel.h"
#include "recoup/util.h"

int cli_fail(const rc_err *e) {
  char buf[4 * sizeof e->msg], where[RC_DIST_MAX_HOST + 64] = "";
  if (rc_dist_size(cli_dist()) > 1) /* which process of the job failed, and where */
    snprintf(where, sizeof where, "rank %d of %d on %s: ", rc_dist_rank(cli_dist()), rc_dist_size(cli_dist()),
             rc_dist_host(cli_dist()));
  fprintf(stderr, "recoup: error: %s%s\n", where,
          rc_text_escape(buf, sizeof buf, e && e->msg[0] ? e->msg : rc_strerror(e ? e->code : -1)));
  return RC_EXIT_FAIL;
}

int cli_usage_error(const char *cmd, const char *fmt, ...) {
  char raw[1024], msg[4096];
  va_list ap;
  va_start(ap, fmt);
  vsnprintf(raw, sizeof raw, fmt, ap);
  va_end(ap);
  /* One line: the hint to --help rides on it. */
  fprintf(stderr, "recoup%s%s: %s (see 'recoup%s%s --help')\n", cmd ? " " : "", cmd ? cmd : "",
          rc_text_escape(msg, sizeof msg, raw), cmd ? " " : "", cmd ? cmd : "");
  return RC_EXIT_USAGE;
}

rc_status cli_option_context(rc_err *e, const char *option) { return rc_err_prefix(e, "%s", option); }

int cli_option_usage_error(const char *cmd, const char *option, rc_err *e) {
  cli_option_context(e, option);
  return cli_usage_error(cmd, "%s", e->msg);
}

const char *cli_esc(const char *s, char *buf, size_t n) { return rc_text_escape(buf, n, s); }

int cli_text_width(const char *s) {
  int w = 0;
  for (; s && *s; s++) w += ((unsigned char)*s & 0xc0) != 0x80;
  return w;
}

void cli_print_cell(FILE *f, const char *s, int width) {
  int pad = width - cli_text_width(s);
  fprintf(f, "%s%*s", s, pad > 0 ? pad : 0, "");
}

void cli_json_escape_tree(cJSON *j) {
  for (; j; j = j->next) {
    char buf[8192];
    if (j->string && rc_text_needs_escape(j->string)) {
      rc_text_escape(buf, sizeof buf, j->string);
      char *k = cJSON_malloc(strlen(buf) + 1);
      /* Keys the tree owns are freed with it; a constant key is only replaced. */
      if (k) {
        strcpy(k, buf);
        if (!(j->type & cJSON_StringIsConst)) cJSON_free(j->string);
        j->string = k;
        j->type &= ~cJSON_StringIsConst;
      }
    }
    if (cJSON_IsString(j) && j->valuestring && rc_text_needs_escape(j->valuestring))
      cJSON_SetValuestring(j, rc_text_escape(buf, sizeof buf, j->valuestring));
    cli_json_escape_tree(j->child);
  }
}

char *cli_json_print(cJSON *j) {
  if (j) cli_json_escape_tree(j->child);
  return cJSON_Print(j);
}

rc_status cli_check_output(const char *label, const char *out, const char *const *inputs,
                           const char *const *in_labels, int n, rc_err *e) {
  RC_TRY(rc_path_refuse_inputs(label, out, inputs, in_labels, n, e));
  char dir[4200];
  const char *slash = strrchr(out, '/');
  if (!slash) snprintf(dir, sizeof dir, ".");
  else snprintf(dir, sizeof dir, "%.*s", slash == out ? 1 : (int)(slash - out), out);
  struct stat st;
  if (stat(dir, &st) != 0 || !S_ISDIR(st.st_mode))
    return rc_err_set(e, RC_ERR_IO, "%s %s: folder %s does not exist", label, out, dir);
  if (access(dir, W_OK) != 0) return rc_err_set(e, RC_ERR_IO, "%s %s: folder %s is not writable", label, out, dir);
  return RC_OK;
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
  char nb[1024];
  fprintf(stderr, "%srecoup: %s%s\n", tty && *tty ? "\r\033[K" : "", tag, cli_esc(msg, nb, sizeof nb));
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

int cli_bad_option(const char *cmd, char **argv, const struct option *longopts) {
  const char *arg = optind > 0 ? argv[optind - 1] : "";
  if (arg[0] == '-' && arg[1] == '-') {
    const char *name = arg + 2, *eq = strchr(name, '=');
    size_t len = eq ? (size_t)(eq - name) : strlen(name);
    for (const struct option *o = longopts; o && o->name; o++)
      if (strlen(o->name) == len && !strncmp(o->name, name, len)) {
        if (o->has_arg == required_argument && !eq) return cli_usage_error(cmd, "option '--%s' needs a value", o->name);
        if (o->has_arg == no_argument && eq) return cli_usage_error(cmd, "option '--%s' takes no value", o->name);
      }
    /* getopt_long accepts unambiguous prefixes: one that matches several is ambiguous. */
    int matches = 0;
    for (const struct option *o = longopts; o && o->name; o++) matches += !strncmp(o->name, name, len);
    if (matches > 1) return cli_usage_error(cmd, "option '--%.*s' is ambiguous", (int)len, name);
    return cli_usage_error(cmd, "unknown option '--%.*s'", (int)len, name);
  }
  if (optopt) {
    for (const struct option *o = longopts; o && o->name; o++)
      if (o->val == optopt && !o->flag && o->has_arg == required_argument)
        return cli_usage_error(cmd, "option '-%c' needs a value", optopt);
    return cli_usage_error(cmd, "unknown option '-%c'", optopt);
  }
  return cli_usage_error(cmd, "unknown option '%s'", arg);
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
    if (c == '?') return cli_bad_option(cmd, argv, longopts);
    int r = apply(ctx, c, optarg);
    if (r) return r;
  }
  return 0;
}
