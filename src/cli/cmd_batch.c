/* recoup batch: run a manifest's zoo of distillation jobs, each as its own
 * `recoup distill` process, several at once, with resume, shards and reports. */
#define _GNU_SOURCE /* pipe2, prctl */
#include <cJSON.h>
#include <errno.h>
#include <fcntl.h>
#include <getopt.h>
#include <limits.h>
#include <math.h>
#include <signal.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/file.h>
#include <sys/ioctl.h>
#include <sys/prctl.h>
#include <sys/stat.h>
#include <sys/wait.h>
#include <time.h>
#include <unistd.h>

#include "cli/cli.h"
#include "cli/manifest.h"
#include "cli/report.h"
#include "recoup/util.h"
#include "cli/sha256.h"

#define STDOUT_MAX (4 << 20) /* a distill --json result is a few kilobytes */

static void usage(FILE *f) {
  fprintf(f,
      "Usage: recoup batch MANIFEST.json [OPTIONS]\n"
      "       recoup batch --merge-reports DIR... --report OUT\n"
      "\n"
      "Run every job of a manifest (a zoo of dense/compressed model pairs), each as\n"
      "its own 'recoup distill' process. A job that fails is reported with its error\n"
      "and the others go on. The manifest is checked whole before any job starts.\n"
      "\n"
      "Options:\n"
      "  --jobs N          jobs at once (default 1)\n"
      "  --threads T       threads for all jobs together; 0 (the default) uses every\n"
      "                    online core; each job gets T/N, at least one\n"
      "  --shard K/N       run only the jobs whose 0-based index i has i mod N = K-1,\n"
      "                    so N machines given K = 1..N run every job exactly once\n"
      "  --resume          skip jobs whose output still has the content (SHA-256)\n"
      "                    recorded when they finished with the same settings, and\n"
      "                    continue interrupted jobs from their checkpoint (OUT.ckpt)\n"
      "  --report DIR      write report.html, summary.csv, summary.md, report.json,\n"
      "                    jobs/NAME.json and logs/NAME.log into DIR; the resume\n"
      "                    state is DIR/state.json (without --report: next to the\n"
      "                    manifest, and job logs next to their outputs)\n"
      "  --merge-reports   join the report folders of several shards into --report\n"
      "  --allow-outside   accept manifest paths outside the manifest's folder\n"
      "  --json            print the job records as JSON on stdout\n"
      "  -h, --help        show this help\n"
      "\n"
      "Manifest: {\"defaults\": {OPTION: VALUE, ...}, \"jobs\": [{\"name\": ..., \"teacher\": ...,\n"
      "\"student\": ..., \"data\": ..., \"out\": ..., OPTION: VALUE, ...}, ...]}, where OPTION is\n"
      "any 'recoup distill' option without dashes, '-' written '_' (\"val_split\").\n"
      "Relative paths are relative to the manifest's folder.\n"
      "\n"
      "SIGINT or SIGTERM stops the batch: running jobs are sent SIGTERM, write a\n"
      "checkpoint and stop; 'recoup batch --resume' continues them. Exit status is 0\n"
      "only when every job succeeded.\n"
      "\n"
      "Validate every recovered model on your own held-out data before deploying it:\n"
      "the figures hold only for the samples measured.\n");
}

typedef struct batch_args {
  const char *manifest, *report;
  long jobs, threads;
  long shard_k, shard_n;
  int resume, json, allow_outside, merge;
  char **merge_dirs;
  int n_merge;
} batch_args;

enum { OPT_JOBS = 256, OPT_THREADS, OPT_SHARD, OPT_RESUME, OPT_REPORT, OPT_MERGE, OPT_ALLOW_OUTSIDE, OPT_JSON };

static int parse_shard(const char *v, batch_args *a) {
  char *end;
  errno = 0;
  long k = strtol(v, &end, 10);
  if (errno || *end != '/' || end == v) return -1;
  const char *rest = end + 1;
  long n = strtol(rest, &end, 10);
  if (errno || *end || end == rest || n < 1 || n > 1000000 || k < 1 || k > n) return -1;
  a->shard_k = k, a->shard_n = n;
  return 0;
}

static int parse_args(batch_args *a, int argc, char **argv) {
  static const struct option longopts[] = {
      {"jobs", required_argument, NULL, OPT_JOBS},       {"threads", required_argument, NULL, OPT_THREADS},
      {"shard", required_argument, NULL, OPT_SHARD},     {"resume", no_argument, NULL, OPT_RESUME},
      {"report", required_argument, NULL, OPT_REPORT},   {"merge-reports", no_argument, NULL, OPT_MERGE},
      {"allow-outside", no_argument, NULL, OPT_ALLOW_OUTSIDE}, {"json", no_argument, NULL, OPT_JSON},
      {"help", no_argument, NULL, 'h'},                  {NULL, 0, NULL, 0}};
  memset(a, 0, sizeof *a);
  a->jobs = 1;
  a->shard_k = a->shard_n = 1;
  int c;
  optind = 1;
  while ((c = getopt_long(argc, argv, "h", longopts, NULL)) != -1) {
    switch (c) {
      case 'h': usage(stdout); return -1;
      case OPT_JOBS:
        if (cli_parse_int(optarg, 1, 1024, &a->jobs))
          return cli_usage_error("batch", "--jobs expects an integer in [1, 1024], got '%s'", optarg);
        break;
      case OPT_THREADS:
        if (cli_parse_int(optarg, 0, 4096, &a->threads))
          return cli_usage_error("batch", "--threads expects an integer in [0, 4096], got '%s'", optarg);
        break;
      case OPT_SHARD:
        if (parse_shard(optarg, a))
          return cli_usage_error("batch", "--shard expects K/N with 1 <= K <= N, got '%s'", optarg);
        break;
      case OPT_RESUME: a->resume = 1; break;
      case OPT_REPORT: a->report = optarg; break;
      case OPT_MERGE: a->merge = 1; break;
      case OPT_ALLOW_OUTSIDE: a->allow_outside = 1; break;
      case OPT_JSON: a->json = 1; break;
      default: return cli_bad_option("batch", argv, longopts);
    }
  }
  if (a->merge) {
    if (!a->report) return cli_usage_error("batch", "--merge-reports needs --report OUT");
    if (optind == argc) return cli_usage_error("batch", "--merge-reports needs report folders");
    a->merge_dirs = argv + optind;
    a->n_merge = argc - optind;
    return 0;
  }
  if (optind == argc) return cli_usage_error("batch", "a manifest file is required");
  if (argc - optind > 1) return cli_usage_error("batch", "unexpected argument '%s'", argv[optind + 1]);
  a->manifest = argv[optind];
  return 0;
}

/* ---- Signals --------------------------------------------------------------------- */


static double now_s(void) {
  struct timespec t;
  clock_gettime(CLOCK_MONOTONIC, &t);
  return (double)t.tv_sec + 1e-9 * (double)t.tv_nsec;
}

static void fmt_hms(char *buf, size_t n, double s) {
  long t = s > 0 ? (long)(s + 0.5) : 0;
  snprintf(buf, n, "%ld:%02ld:%02ld", t / 3600, t / 60 % 60, t % 60);
}

/* ---- Jobs in flight ---------------------------------------------------------------- */

typedef enum run_state { R_PENDING, R_RUNNING, R_DONE } run_state;

typedef struct run {
  cli_job *job;
  run_state state;
  pid_t pid;
  int out_fd;       /* read end of the job's stdout */
  char *out_text;   /* captured stdout */
  size_t out_n, out_cap;
  char log[PATH_MAX], log_shown[PATH_MAX];
  double started, wall;
  int term_sent, resumed_ckpt;
  char progress[160];
  double eta;       /* from the job's own progress line; < 0 unknown */
  cJSON *record;
} run;

typedef struct batch {
  batch_args *a;
  cli_manifest m;
  run *runs;
  int n_runs;
  int threads_per_job;
  char state_path[PATH_MAX];
  cJSON *state;     /* {"version", "jobs": {name: {...}}} */
  int tty, drawn;
  double t0, last_draw;
  int n_done, n_ok;
  double sum_wall;  /* of jobs that really ran to success */
  int n_timed;
} batch;

/* ---- Status lines (terminal) or plain log lines ------------------------------------- */

static int term_columns(void) {
  struct winsize w;
  if (ioctl(STDERR_FILENO, TIOCGWINSZ, &w) == 0 && w.ws_col > 20) return w.ws_col;
  return 100;
}

static void clear_status(batch *b) {
  if (!b->tty || !b->drawn) return;
  fprintf(stderr, "\033[%dA\r\033[J", b->drawn);
  b->drawn = 0;
}

static double time_left(const batch *b) {
  int running = 0, pending = 0;
  double left = 0, avg = b->n_timed ? b->sum_wall / b->n_timed : -1, t = now_s();
  for (int i = 0; i < b->n_runs; i++) {
    const run *r = &b->runs[i];
    if (r->state == R_PENDING) pending++;
    if (r->state != R_RUNNING) continue;
    running++;
    if (r->eta >= 0) left += r->eta;
    else if (avg >= 0) left += fmax(0, avg - (t - r->started));
    else return -1;
    if (avg < 0 && r->eta >= 0) avg = (t - r->started) + r->eta;
  }
  if (pending && avg < 0) return -1;
  double slots = (double)(b->a->jobs < running + pending ? b->a->jobs : running + pending);
  return slots > 0 ? (left + pending * avg) / slots : 0;
}

static void draw_status(batch *b) {
  if (!b->tty) return;
  clear_status(b);
  int cols = term_columns();
  double t = now_s();
  for (int i = 0; i < b->n_runs; i++) {
    run *r = &b->runs[i];
    if (r->state != R_RUNNING) continue;
    char el[32];
    fmt_hms(el, sizeof el, t - r->started);
    fprintf(stderr, "  %-20.20s %s  %.*s\n", r->job->name, el, cols > 40 ? cols - 35 : 5,
            r->progress[0] ? r->progress : "starting");
    b->drawn++;
  }
  char left[32] = "time left unknown yet";
  double tl = time_left(b);
  if (tl >= 0) {
    char h[24];
    fmt_hms(h, sizeof h, tl);
    snprintf(left, sizeof left, "about %s left", h);
  }
  fprintf(stderr, "recoup batch: %d/%d done (%d failed), %s\n", b->n_done, b->n_runs, b->n_done - b->n_ok, left);
  b->drawn++;
  fflush(stderr);
  b->last_draw = t;
}

static void event(batch *b, const char *fmt, ...) CLI_PRINTF(2, 3);
static void event(batch *b, const char *fmt, ...) {
  clear_status(b);
  char raw[2048], msg[4096];
  va_list ap;
  va_start(ap, fmt);
  vsnprintf(raw, sizeof raw, fmt, ap);
  va_end(ap);
  fprintf(stderr, "recoup batch: %s\n", cli_esc(raw, msg, sizeof msg)); /* paths and errors from files */
  draw_status(b);
}

/* The last progress line a job wrote to its log ("epoch 1/3 step 40/300 ..."). */
static void read_progress(run *r) {
  int fd = open(r->log, O_RDONLY);
  if (fd < 0) return;
  char buf[2048];
  off_t end = lseek(fd, 0, SEEK_END);
  off_t from = end > (off_t)sizeof buf - 1 ? end - (off_t)sizeof buf + 1 : 0;
  ssize_t n = pread(fd, buf, sizeof buf - 1, from);
  close(fd);
  if (n <= 0) return;
  buf[n] = '\0';
  char *line = NULL;
  for (char *p = buf; (p = strstr(p, "epoch ")) != NULL; p++)
    if (p == buf || p[-1] == '\n') line = p;
  if (!line) return;
  char *nl = strchr(line, '\n');
  if (!nl) return; /* still being written */
  *nl = '\0';
  snprintf(r->progress, sizeof r->progress, "%s", line);
  int h, m, s;
  char *left = strstr(line, " left");
  r->eta = -1;
  if (left) {
    char *sp = left;
    while (sp > line && sp[-1] != ' ') sp--;
    if (sscanf(sp, "%d:%d:%d", &h, &m, &s) == 3) r->eta = h * 3600.0 + m * 60.0 + s;
  }
}

/* Last non-empty line of the job's log: distill's one-line error, with the
 * manifest's folder left out of paths so reports read the same wherever the
 * zoo lives. */
static void last_error_line(const run *r, const char *dir, char *out, size_t n) {
  snprintf(out, n, "no error message (see %s)", r->log_shown);
  int fd = open(r->log, O_RDONLY);
  if (fd < 0) return;
  char buf[4096];
  off_t end = lseek(fd, 0, SEEK_END);
  off_t from = end > (off_t)sizeof buf - 1 ? end - (off_t)sizeof buf + 1 : 0;
  ssize_t k = pread(fd, buf, sizeof buf - 1, from);
  close(fd);
  if (k <= 0) return;
  buf[k] = '\0';
  while (k > 0 && (buf[k - 1] == '\n' || buf[k - 1] == '\r' || buf[k - 1] == ' ')) buf[--k] = '\0';
  char *line = strrchr(buf, '\n');
  line = line ? line + 1 : buf;
  char *cr = strrchr(line, '\r'); /* progress lines redrawn with \r */
  if (cr) line = cr + 1;
  static const char prefix[] = "recoup: error: ";
  if (!strncmp(line, prefix, sizeof prefix - 1)) line += sizeof prefix - 1;
  if (!*line) return;
  size_t dl = strlen(dir), o = 0;
  for (const char *p = line; *p && o + 1 < n;) {
    if (!strncmp(p, dir, dl) && p[dl] == '/') {
      p += dl + 1;
      continue;
    }
    out[o++] = *p++;
  }
  out[o] = '\0';
}

/* ---- Resume state ------------------------------------------------------------------------ */

/* Settings fingerprint: the job's distill arguments with the manifest folder
 * written as "." so a moved zoo still matches. */
static void job_fingerprint(const cli_manifest *m, const cli_job *j, char hex[65]) {
  cli_sha256 h;
  cli_sha256_init(&h);
  size_t dl = strlen(m->dir);
  for (int i = 0; i < j->n_args; i++) {
    const char *s = j->args[i];
    const char *at = strstr(s, m->dir);
    if (at && (at[dl] == '/' || at[dl] == '\0')) {
      cli_sha256_update(&h, s, (size_t)(at - s));
      cli_sha256_update(&h, ".", 1);
      s = at + dl;
    }
    cli_sha256_update(&h, s, strlen(s) + 1);
  }
  cli_sha256_hex(&h, hex);
}

static rc_status load_state(batch *b, rc_err *e) {
  FILE *f = fopen(b->state_path, "rb");
  if (!f) {
    if (errno != ENOENT) return rc_err_set(e, RC_ERR_IO, "%s: %s", b->state_path, strerror(errno));
    b->state = cJSON_CreateObject();
    cJSON_AddNumberToObject(b->state, "version", 1);
    cJSON_AddObjectToObject(b->state, "jobs");
    return RC_OK;
  }
  fseek(f, 0, SEEK_END);
  long n = ftell(f);
  rewind(f);
  char *text = n >= 0 && n < (64L << 20) ? malloc((size_t)n + 1) : NULL;
  size_t got = text ? fread(text, 1, (size_t)n, f) : 0;
  fclose(f);
  if (!text || got != (size_t)n) {
    free(text);
    return rc_err_set(e, RC_ERR_IO, "%s: cannot read", b->state_path);
  }
  text[n] = '\0';
  b->state = cJSON_Parse(text);
  free(text);
  if (!b->state || !cJSON_IsObject(cJSON_GetObjectItemCaseSensitive(b->state, "jobs")))
    return rc_err_set(e, RC_ERR_FORMAT, "%s: not a recoup batch state file (remove it to start afresh)",
                    b->state_path);
  return RC_OK;
}

static rc_status save_state(batch *b, rc_err *e) {
  char *text = cJSON_Print(b->state);
  if (!text) return rc_err_set(e, RC_ERR_NOMEM, "out of memory");
  rc_status s = rc_file_write_atomic(b->state_path, text, strlen(text), e);
  free(text);
  return s;
}

static rc_status lock_state(batch *b, rc_err *e) {
  char path[PATH_MAX + 8];
  snprintf(path, sizeof path, "%s.lock", b->state_path);
  int fd = open(path, O_RDWR | O_CREAT | O_CLOEXEC, 0644);
  if (fd < 0) return rc_err_set(e, RC_ERR_IO, "%s: %s", path, strerror(errno));
  if (flock(fd, LOCK_EX | LOCK_NB) != 0) {
    close(fd);
    return rc_err_set(e, RC_ERR_IO, "%s is in use by another recoup batch (one batch per report folder)",
                    b->state_path);
  }
  return RC_OK; /* held until exit */
}

/* A finished job may be skipped when its output still has the recorded bytes
 * and its settings are unchanged. */
static cJSON *reusable_record(batch *b, run *r) {
  const cJSON *jobs = cJSON_GetObjectItemCaseSensitive(b->state, "jobs");
  const cJSON *s = cJSON_GetObjectItemCaseSensitive(jobs, r->job->name);
  if (!s) return NULL;
  const cJSON *hash = cJSON_GetObjectItemCaseSensitive(s, "sha256");
  const cJSON *fp = cJSON_GetObjectItemCaseSensitive(s, "settings_sha256");
  const cJSON *rec = cJSON_GetObjectItemCaseSensitive(s, "record");
  if (!cJSON_IsString(hash) || !cJSON_IsString(fp) || !cJSON_IsObject(rec)) return NULL;
  char now[65], fph[65];
  job_fingerprint(&b->m, r->job, fph);
  rc_err e = {0};
  if (strcmp(fph, fp->valuestring) || cli_sha256_file(r->job->out, now, &e) != RC_OK ||
      strcmp(now, hash->valuestring))
    return NULL;
  return cJSON_Duplicate(rec, 1);
}

static void forget_job(batch *b, const char *name) {
  cJSON_DeleteItemFromObjectCaseSensitive(cJSON_GetObjectItemCaseSensitive(b->state, "jobs"), name);
}

static rc_status remember_job(batch *b, run *r, rc_err *e) {
  char hash[65], fp[65];
  RC_TRY(cli_sha256_file(r->job->out, hash, e));
  job_fingerprint(&b->m, r->job, fp);
  forget_job(b, r->job->name);
  cJSON *s = cJSON_CreateObject();
  cJSON_AddStringToObject(s, "out", r->job->out_given);
  cJSON_AddStringToObject(s, "sha256", hash);
  cJSON_AddStringToObject(s, "settings_sha256", fp);
  cJSON_AddItemToObject(s, "record", cJSON_Duplicate(r->record, 1));
  cJSON_AddItemToObject(cJSON_GetObjectItemCaseSensitive(b->state, "jobs"), r->job->name, s);
  return save_state(b, e);
}

/* ---- Starting and finishing jobs --------------------------------------------------------- */

static void set_record(batch *b, run *r, const char *status, const char *error, cJSON *result) {
  cli_job *j = r->job;
  cJSON_Delete(r->record);
  r->record = cli_report_record(j->name, j->index, j->teacher_given, j->student_given, j->out_given, status, error,
                                r->log_shown[0] ? r->log_shown : NULL, result, r->wall);
  (void)b;
}

static void child_exec(batch *b, run *r, int out_w, int log_fd, pid_t parent) {
  /* Die with the batch: a killed batch must not leave jobs writing outputs
   * behind a later --resume. SIGTERM lets the job checkpoint first. */
  prctl(PR_SET_PDEATHSIG, SIGTERM);
  if (getppid() != parent) _exit(1);
  sigset_t none;
  sigemptyset(&none);
  sigprocmask(SIG_SETMASK, &none, NULL);
  signal(SIGINT, SIG_DFL);
  signal(SIGTERM, SIG_DFL);
  int in = open("/dev/null", O_RDONLY);
  if (in >= 0) dup2(in, STDIN_FILENO);
  dup2(out_w, STDOUT_FILENO);
  dup2(log_fd, STDERR_FILENO);
  cli_job *j = r->job;
  char threads[16], ckpt[PATH_MAX + 8];
  snprintf(threads, sizeof threads, "%d", b->threads_per_job);
  snprintf(ckpt, sizeof ckpt, "%s.ckpt", j->out);
  char **argv = calloc((size_t)j->n_args + 8, sizeof *argv);
  if (!argv) _exit(127);
  int n = 0;
  argv[n++] = "recoup";
  argv[n++] = "distill";
  for (int i = 0; i < j->n_args; i++) argv[n++] = j->args[i];
  argv[n++] = "--threads";
  argv[n++] = threads;
  argv[n++] = "--json";
  if (r->resumed_ckpt) {
    argv[n++] = "--resume";
    argv[n++] = ckpt;
  }
  argv[n] = NULL;
  execv("/proc/self/exe", argv);
  fprintf(stderr, "recoup: error: cannot start recoup distill: %s\n", strerror(errno));
  _exit(127);
}

static void start_job(batch *b, run *r) {
  cli_job *j = r->job;
  char ckpt[PATH_MAX + 8];
  snprintf(ckpt, sizeof ckpt, "%s.ckpt", j->out);
  r->resumed_ckpt = b->a->resume && access(ckpt, R_OK) == 0;
  if (b->a->report) {
    snprintf(r->log, sizeof r->log, "%s/logs/%s.log", b->a->report, j->name);
    snprintf(r->log_shown, sizeof r->log_shown, "logs/%s.log", j->name);
  } else {
    snprintf(r->log, sizeof r->log, "%s.log", j->out);
    snprintf(r->log_shown, sizeof r->log_shown, "%s.log", j->out_given);
  }
  r->started = now_s();
  r->state = R_RUNNING;
  r->eta = -1;
  r->progress[0] = '\0';
  char err[512];
  int pipefd[2] = {-1, -1}, log_fd = -1;
  if (cli_make_parents(j->out) != 0) {
    snprintf(err, sizeof err, "cannot create the folder of %s: %s", j->out_given, strerror(errno));
    goto fail;
  }
  log_fd = open(r->log, O_WRONLY | O_CREAT | O_APPEND | O_CLOEXEC | (r->resumed_ckpt ? 0 : O_TRUNC), 0644);
  if (log_fd < 0) {
    snprintf(err, sizeof err, "%s: %s", r->log, strerror(errno));
    goto fail;
  }
  if (r->resumed_ckpt) dprintf(log_fd, "--- recoup batch: resuming from %s ---\n", ckpt);
  if (pipe2(pipefd, O_CLOEXEC) != 0) {
    snprintf(err, sizeof err, "pipe: %s", strerror(errno));
    goto fail;
  }
  pid_t parent = getpid();
  fflush(NULL);
  r->pid = fork();
  if (r->pid < 0) {
    snprintf(err, sizeof err, "fork: %s", strerror(errno));
    goto fail;
  }
  if (r->pid == 0) child_exec(b, r, pipefd[1], log_fd, parent);
  close(pipefd[1]);
  close(log_fd);
  r->out_fd = pipefd[0];
  fcntl(r->out_fd, F_SETFL, fcntl(r->out_fd, F_GETFL) | O_NONBLOCK);
  event(b, "started %s%s (log: %s)", j->name, r->resumed_ckpt ? ", resuming from its checkpoint" : "",
        b->a->report ? r->log : r->log_shown);
  return;
fail:
  if (pipefd[0] >= 0) close(pipefd[0]), close(pipefd[1]);
  if (log_fd >= 0) close(log_fd);
  r->state = R_DONE;
  r->pid = 0;
  set_record(b, r, CLI_JOB_FAILED, err, NULL);
  b->n_done++;
  event(b, "%s failed: %s", j->name, err);
}

static void drain(run *r) {
  if (r->out_fd < 0) return;
  char buf[8192];
  for (;;) {
    ssize_t n = read(r->out_fd, buf, sizeof buf);
    if (n < 0 && errno == EINTR) continue;
    if (n <= 0) return;
    if (r->out_n + (size_t)n + 1 > r->out_cap && r->out_n < STDOUT_MAX) {
      size_t cap = r->out_cap ? r->out_cap * 2 : 16384;
      while (cap < r->out_n + (size_t)n + 1) cap *= 2;
      char *p = realloc(r->out_text, cap);
      if (!p) return;
      r->out_text = p;
      r->out_cap = cap;
    }
    if (r->out_n + (size_t)n + 1 <= r->out_cap) {
      memcpy(r->out_text + r->out_n, buf, (size_t)n);
      r->out_n += (size_t)n;
      r->out_text[r->out_n] = '\0';
    }
  }
}

/* The job's stdout (its JSON results) goes into its log too, after the fact. */
static void append_stdout_to_log(const run *r) {
  if (!r->out_n) return;
  int fd = open(r->log, O_WRONLY | O_APPEND | O_CLOEXEC);
  if (fd < 0) return;
  ssize_t w = write(fd, r->out_text, r->out_n);
  (void)w;
  close(fd);
}

static void write_reports(batch *b);

static void finish_job(batch *b, run *r, int wstatus) {
  drain(r);
  close(r->out_fd);
  r->out_fd = -1;
  r->state = R_DONE;
  r->wall = now_s() - r->started;
  b->n_done++;
  char err[512];
  cli_job *j = r->job;
  if (WIFEXITED(wstatus) && WEXITSTATUS(wstatus) == 0) {
    cJSON *res = r->out_text ? cJSON_Parse(r->out_text) : NULL;
    append_stdout_to_log(r);
    rc_err e = {0};
    if (!res) {
      set_record(b, r, CLI_JOB_FAILED, "recoup distill printed no readable results", NULL);
    } else {
      set_record(b, r, CLI_JOB_OK, NULL, res);
      if (remember_job(b, r, &e) != RC_OK) event(b, "warning: resume state not saved: %s", e.msg);
      b->n_ok++;
      b->sum_wall += r->wall;
      b->n_timed++;
      char c[32] = "", v[32] = "", el[32];
      const cJSON *rec = r->record;
      const char *vm = cJSON_IsNumber(cJSON_GetObjectItemCaseSensitive(
                           cJSON_GetObjectItemCaseSensitive(rec, "recovered"), "accuracy")) ? "accuracy" : "agreement";
      const cJSON *cm = cJSON_GetObjectItemCaseSensitive(cJSON_GetObjectItemCaseSensitive(rec, "compressed"), vm);
      const cJSON *rm = cJSON_GetObjectItemCaseSensitive(cJSON_GetObjectItemCaseSensitive(rec, "recovered"), vm);
      if (cJSON_IsNumber(cm)) snprintf(c, sizeof c, "%.2f%%", 100 * cm->valuedouble);
      if (cJSON_IsNumber(rm)) snprintf(v, sizeof v, "%.2f%%", 100 * rm->valuedouble);
      fmt_hms(el, sizeof el, r->wall);
      event(b, "finished %s in %s: %s %s -> %s", j->name, el, vm, c, v);
      write_reports(b);
      return;
    }
  } else if (WIFSIGNALED(wstatus)) {
    snprintf(err, sizeof err, "killed by signal %d (%s)", WTERMSIG(wstatus), strsignal(WTERMSIG(wstatus)));
    set_record(b, r, r->term_sent ? CLI_JOB_INTERRUPTED : CLI_JOB_FAILED, err, NULL);
  } else {
    last_error_line(r, b->m.dir, err, sizeof err);
    set_record(b, r, r->term_sent ? CLI_JOB_INTERRUPTED : CLI_JOB_FAILED, err, NULL);
  }
  forget_job(b, j->name);
  rc_err e = {0};
  if (save_state(b, &e) != RC_OK) event(b, "warning: resume state not saved: %s", e.msg);
  const cJSON *st = cJSON_GetObjectItemCaseSensitive(r->record, "status");
  const cJSON *er = cJSON_GetObjectItemCaseSensitive(r->record, "error");
  event(b, "%s %s: %s", j->name, st->valuestring, cJSON_IsString(er) ? er->valuestring : "");
  write_reports(b);
}

/* ---- Reports and summary ---------------------------------------------------------------- */

static cJSON *meta_json(const batch *b) {
  cJSON *m = cli_report_meta(b->m.title ? b->m.title : "recoup batch report");
  cJSON_AddStringToObject(m, "manifest", b->m.path);
  cJSON_AddStringToObject(m, "manifest_sha256", b->m.sha256);
  cJSON_AddNumberToObject(m, "total_jobs", b->m.n_jobs);
  char shard[48] = "all";
  if (b->a->shard_n > 1) snprintf(shard, sizeof shard, "%ld/%ld", b->a->shard_k, b->a->shard_n);
  cJSON_AddStringToObject(m, "shard", shard);
  return m;
}

/* Records of every selected job in manifest order; jobs not yet finished
 * appear as "not run". */
static cJSON *records_json(batch *b) {
  cJSON *arr = cJSON_CreateArray();
  for (int i = 0; i < b->n_runs; i++) {
    run *r = &b->runs[i];
    if (r->record) cJSON_AddItemToArray(arr, cJSON_Duplicate(r->record, 1));
    else
      cJSON_AddItemToArray(arr, cli_report_record(r->job->name, r->job->index, r->job->teacher_given,
                                                  r->job->student_given, r->job->out_given, CLI_JOB_NOT_RUN,
                                                  r->state == R_RUNNING ? "still running" : "not started", NULL,
                                                  NULL, 0));
  }
  return arr;
}

static void write_reports(batch *b) {
  if (!b->a->report) return;
  cJSON *meta = meta_json(b), *recs = records_json(b);
  rc_err e = {0};
  if (cli_report_write(b->a->report, meta, recs, &e) != RC_OK) event(b, "warning: report not written: %s", e.msg);
  cJSON_Delete(meta);
  cJSON_Delete(recs);
}

static void print_summary(const cJSON *records, const char *report_dir) {
  printf("\n  %-24s %-12s %12s %12s %12s %10s\n", "job", "status", "dense", "compressed", "recovered", "time");
  const cJSON *r;
  int n = 0, ok = 0;
  cJSON_ArrayForEach(r, records) {
    n++;
    const char *status = cJSON_GetObjectItemCaseSensitive(r, "status")->valuestring;
    const cJSON *name = cJSON_GetObjectItemCaseSensitive(r, "name");
    if (strcmp(status, CLI_JOB_OK)) {
      const cJSON *err = cJSON_GetObjectItemCaseSensitive(r, "error");
      char nb[512], eb[2048];
      printf("  %-24.24s %-12s %s\n", cli_esc(name->valuestring, nb, sizeof nb), status,
             cJSON_IsString(err) ? cli_esc(err->valuestring, eb, sizeof eb) : "");
      continue;
    }
    ok++;
    const char *vm = cJSON_IsNumber(cJSON_GetObjectItemCaseSensitive(
                         cJSON_GetObjectItemCaseSensitive(r, "recovered"), "accuracy")) ? "accuracy" : "agreement";
    char cells[3][32];
    static const char *const models[] = {"dense", "compressed", "recovered"};
    for (int k = 0; k < 3; k++) {
      const cJSON *v = cJSON_GetObjectItemCaseSensitive(cJSON_GetObjectItemCaseSensitive(r, models[k]), vm);
      if (cJSON_IsNumber(v)) snprintf(cells[k], sizeof cells[k], "%.2f%%", 100 * v->valuedouble);
      else snprintf(cells[k], sizeof cells[k], "-");
    }
    const cJSON *secs = cJSON_GetObjectItemCaseSensitive(r, "seconds");
    char t[32] = "-";
    if (cJSON_IsNumber(secs)) fmt_hms(t, sizeof t, secs->valuedouble);
    char jb[512];
    printf("  %-24.24s %-12s %12s %12s %12s %10s  (%s)\n", cli_esc(name->valuestring, jb, sizeof jb), status, cells[0], cells[1], cells[2], t,
           vm);
  }
  printf("\n%d of %d jobs succeeded.%s%s\n", ok, n, report_dir ? " Report: " : "", report_dir ? report_dir : "");
  if (report_dir) printf("Open %s/report.html in a browser.\n", report_dir);
  printf("Validate every recovered model on your own held-out data before deploying it;\n"
         "these figures hold only for the samples measured.\n");
}

static void print_json(const cJSON *meta, const cJSON *records) {
  cJSON *root = cJSON_CreateObject();
  cJSON_AddItemToObject(root, "meta", cJSON_Duplicate(meta, 1));
  cJSON_AddItemToObject(root, "jobs", cJSON_Duplicate(records, 1));
  char *text = cli_json_print(root);
  if (text) puts(text);
  free(text);
  cJSON_Delete(root);
}

/* ---- The batch ---------------------------------------------------------------------------- */

static void poll_jobs(batch *b) {
  for (int i = 0; i < b->n_runs; i++)
    if (b->runs[i].state == R_RUNNING && b->runs[i].pid > 0) drain(&b->runs[i]);
  for (;;) {
    int ws;
    pid_t pid = waitpid(-1, &ws, WNOHANG);
    if (pid <= 0) break;
    for (int i = 0; i < b->n_runs; i++)
      if (b->runs[i].state == R_RUNNING && b->runs[i].pid == pid) finish_job(b, &b->runs[i], ws);
  }
}

static int count_state(const batch *b, run_state s) {
  int n = 0;
  for (int i = 0; i < b->n_runs; i++) n += b->runs[i].state == s;
  return n;
}

static void run_all(batch *b) {
  int next = 0, stopping = 0;
  while (count_state(b, R_PENDING) + count_state(b, R_RUNNING) > 0) {
    if (cli_stop_requested && !stopping) {
      stopping = 1;
      event(b, "stopping: asking %d running job%s to checkpoint and stop", count_state(b, R_RUNNING),
            count_state(b, R_RUNNING) == 1 ? "" : "s");
      for (int i = 0; i < b->n_runs; i++)
        if (b->runs[i].state == R_RUNNING && b->runs[i].pid > 0) {
          kill(b->runs[i].pid, SIGTERM);
          b->runs[i].term_sent = 1;
        }
    }
    if (stopping) {
      for (int i = 0; i < b->n_runs; i++)
        if (b->runs[i].state == R_PENDING) {
          b->runs[i].state = R_DONE;
          set_record(b, &b->runs[i], CLI_JOB_NOT_RUN, "batch stopped before this job started", NULL);
        }
    }
    while (!stopping && count_state(b, R_RUNNING) < b->a->jobs && next < b->n_runs) {
      run *r = &b->runs[next++];
      if (r->state == R_PENDING) start_job(b, r);
    }
    poll_jobs(b);
    if (b->tty && now_s() - b->last_draw >= 0.5) {
      for (int i = 0; i < b->n_runs; i++)
        if (b->runs[i].state == R_RUNNING) read_progress(&b->runs[i]);
      draw_status(b);
    }
    struct timespec ts = {0, 100 * 1000 * 1000};
    nanosleep(&ts, NULL);
  }
  clear_status(b);
}

/* Select this shard's jobs; with --resume, take the records of finished jobs
 * whose outputs are unchanged. */
static rc_status plan_runs(batch *b, rc_err *e) {
  b->runs = calloc((size_t)b->m.n_jobs, sizeof *b->runs);
  if (!b->runs) return rc_err_set(e, RC_ERR_NOMEM, "out of memory");
  for (int i = 0; i < b->m.n_jobs; i++) {
    if (i % b->a->shard_n != b->a->shard_k - 1) continue;
    run *r = &b->runs[b->n_runs++];
    r->job = &b->m.jobs[i];
    r->out_fd = -1;
    r->state = R_PENDING;
    if (!b->a->resume) continue;
    cJSON *rec = reusable_record(b, r);
    if (!rec) continue;
    cJSON_DeleteItemFromObjectCaseSensitive(rec, "reused");
    cJSON_AddBoolToObject(rec, "reused", 1);
    r->record = rec;
    r->state = R_DONE;
    b->n_done++;
    b->n_ok++;
    event(b, "skipped %s: %s is unchanged since it finished", r->job->name, r->job->out_given);
  }
  return RC_OK;
}

/* The report folder's files and the state file may be none of the files the
 * jobs read or write, nor the manifest (compared as files, not names). */
static rc_status check_outputs(const batch *b, rc_err *e) {
  int n = 1;
  for (int i = 0; i < b->m.n_jobs; i++) n += b->m.jobs[i].n_inputs + 1;
  const char **inputs = calloc((size_t)n, sizeof *inputs);
  const char **names = calloc((size_t)b->m.n_jobs + 1, sizeof *names);
  rc_status s = RC_OK;
  if (!inputs || !names) s = rc_err_set(e, RC_ERR_NOMEM, "out of memory");
  if (s == RC_OK) {
    n = 0;
    inputs[n++] = b->m.path;
    for (int i = 0; i < b->m.n_jobs; i++) {
      names[i] = b->m.jobs[i].name;
      for (int f = 0; f < b->m.jobs[i].n_inputs; f++) inputs[n++] = b->m.jobs[i].inputs[f];
      inputs[n++] = b->m.jobs[i].out; /* an output, but a report file must not replace it either */
    }
    if (b->a->report) s = cli_report_refuse_inputs(b->a->report, names, b->m.n_jobs, inputs, NULL, n, e);
    else s = rc_path_refuse_inputs("state file", b->state_path, inputs, NULL, n, e);
  }
  free(inputs);
  free(names);
  return s;
}

static int run_batch(batch_args *a) {
  batch b;
  memset(&b, 0, sizeof b);
  b.a = a;
  b.tty = cli_isatty_stderr();
  b.t0 = now_s();
  rc_err e = {0};
  int rc = RC_EXIT_FAIL;
  if (cli_manifest_load(&b.m, a->manifest, a->allow_outside, &e) != RC_OK) return cli_fail(&e);
  long threads = a->threads;
  if (threads <= 0) {
    long c = sysconf(_SC_NPROCESSORS_ONLN);
    threads = c > 0 ? c : 1;
  }
  b.threads_per_job = threads / a->jobs > 0 ? (int)(threads / a->jobs) : 1;
  if (a->report) {
    if (cli_report_prepare(a->report, 1, &e) != RC_OK) goto out;
    snprintf(b.state_path, sizeof b.state_path, "%s/state.json", a->report);
  } else if (a->shard_n > 1) {
    snprintf(b.state_path, sizeof b.state_path, "%s.shard-%ld-of-%ld.state.json", a->manifest, a->shard_k,
             a->shard_n);
  } else {
    snprintf(b.state_path, sizeof b.state_path, "%s.state.json", a->manifest);
  }
  if (check_outputs(&b, &e) != RC_OK || lock_state(&b, &e) != RC_OK || load_state(&b, &e) != RC_OK || plan_runs(&b, &e) != RC_OK) goto out;
  event(&b, "%d job%s%s, %ld at once, %d thread%s each", b.n_runs, b.n_runs == 1 ? "" : "s",
        a->shard_n > 1 ? " in this shard" : "", a->jobs, b.threads_per_job, b.threads_per_job == 1 ? "" : "s");
  cli_catch_stop_signals();
  run_all(&b);
  write_reports(&b);
  cJSON *recs = records_json(&b), *meta = meta_json(&b);
  if (a->json) print_json(meta, recs);
  else print_summary(recs, a->report);
  cJSON_Delete(recs);
  cJSON_Delete(meta);
  rc = b.n_ok == b.n_runs && !cli_stop_requested ? RC_EXIT_OK : RC_EXIT_FAIL;
  if (cli_stop_requested) fprintf(stderr, "recoup batch: stopped by a signal; run again with --resume to continue\n");
out:
  if (e.code) cli_fail(&e);
  for (int i = 0; i < b.n_runs; i++) {
    cJSON_Delete(b.runs[i].record);
    free(b.runs[i].out_text);
  }
  free(b.runs);
  cJSON_Delete(b.state);
  cli_manifest_free(&b.m);
  return rc;
}

/* ---- Merging shard reports ------------------------------------------------------------------ */

static int by_index(const void *x, const void *y) {
  const cJSON *a = *(cJSON *const *)x, *b = *(cJSON *const *)y;
  double ia = cJSON_GetObjectItemCaseSensitive(a, "index")->valuedouble;
  double ib = cJSON_GetObjectItemCaseSensitive(b, "index")->valuedouble;
  return ia < ib ? -1 : ia > ib;
}

static int merge_reports(batch_args *a) {
  rc_err e = {0};
  cJSON **reports = calloc((size_t)a->n_merge, sizeof *reports);
  cJSON **recs = NULL;
  int n = 0, rc = RC_EXIT_FAIL, ok = 0;
  double total = 0;
  const char *manifest_hash = NULL;
  if (!reports) return cli_fail(&e);
  for (int i = 0; i < a->n_merge; i++)
    if (rc_path_same_file(a->report, a->merge_dirs[i])) {
      rc_err_set(&e, RC_ERR_INVALID, "--report %s is the report folder %s being merged: refusing to overwrite an input",
               a->report, a->merge_dirs[i]);
      goto out;
    }
  for (int i = 0; i < a->n_merge; i++) {
    if (cli_report_read(a->merge_dirs[i], &reports[i], &e) != RC_OK) goto out;
    const cJSON *meta = cJSON_GetObjectItemCaseSensitive(reports[i], "meta");
    const cJSON *h = cJSON_GetObjectItemCaseSensitive(meta, "manifest_sha256");
    if (!cJSON_IsString(h)) {
      rc_err_set(&e, RC_ERR_FORMAT, "%s/report.json: no manifest_sha256 in \"meta\"", a->merge_dirs[i]);
      goto out;
    }
    if (manifest_hash && strcmp(manifest_hash, h->valuestring)) {
      rc_err_set(&e, RC_ERR_INVALID, "%s/report.json comes from another manifest than %s/report.json",
               a->merge_dirs[i], a->merge_dirs[0]);
      goto out;
    }
    manifest_hash = h->valuestring;
    total = cJSON_GetObjectItemCaseSensitive(meta, "total_jobs") ? cJSON_GetObjectItemCaseSensitive(meta, "total_jobs")->valuedouble : 0;
    n += cJSON_GetArraySize(cJSON_GetObjectItemCaseSensitive(reports[i], "jobs"));
  }
  recs = calloc((size_t)n + 1, sizeof *recs);
  if (!recs) {
    rc_err_set(&e, RC_ERR_NOMEM, "out of memory");
    goto out;
  }
  int k = 0;
  for (int i = 0; i < a->n_merge; i++) {
    const cJSON *r;
    cJSON_ArrayForEach(r, cJSON_GetObjectItemCaseSensitive(reports[i], "jobs")) {
      const cJSON *name = cJSON_GetObjectItemCaseSensitive(r, "name");
      if (!cJSON_IsString(name) || !cJSON_IsNumber(cJSON_GetObjectItemCaseSensitive(r, "index"))) {
        rc_err_set(&e, RC_ERR_FORMAT, "%s/report.json: a job without name or index", a->merge_dirs[i]);
        goto out;
      }
      for (int q = 0; q < k; q++)
        if (!strcmp(cJSON_GetObjectItemCaseSensitive(recs[q], "name")->valuestring, name->valuestring)) {
          rc_err_set(&e, RC_ERR_INVALID, "job '%s' appears in more than one report (%s among them)", name->valuestring,
                   a->merge_dirs[i]);
          goto out;
        }
      recs[k++] = (cJSON *)r;
    }
  }
  qsort(recs, (size_t)n, sizeof *recs, by_index);
  cJSON *arr = cJSON_CreateArray();
  for (int i = 0; i < n; i++) {
    cJSON_AddItemToArray(arr, cJSON_Duplicate(recs[i], 1));
    ok += !strcmp(cJSON_GetObjectItemCaseSensitive(recs[i], "status")->valuestring, CLI_JOB_OK);
  }
  cJSON *meta = cJSON_Duplicate(cJSON_GetObjectItemCaseSensitive(reports[0], "meta"), 1);
  cJSON_ReplaceItemInObjectCaseSensitive(meta, "shard", cJSON_CreateString("merged"));
  rc_status s = cli_report_prepare(a->report, 1, &e);
  if (s == RC_OK) s = cli_report_write(a->report, meta, arr, &e);
  if (s == RC_OK) {
    if (a->json) print_json(meta, arr);
    else print_summary(arr, a->report);
    if (n < (int)total)
      fprintf(stderr, "recoup batch: the reports hold %d of the manifest's %.0f jobs: a shard is missing\n", n, total);
    rc = ok == n && n >= (int)total ? RC_EXIT_OK : RC_EXIT_FAIL;
  }
  cJSON_Delete(arr);
  cJSON_Delete(meta);
out:
  if (e.code) cli_fail(&e);
  for (int i = 0; i < a->n_merge; i++) cJSON_Delete(reports[i]);
  free(reports);
  free(recs);
  return rc;
}

int rc_cmd_batch(int argc, char **argv) {
  batch_args a;
  int pr = parse_args(&a, argc, argv);
  if (pr) return pr < 0 ? RC_EXIT_OK : pr;
  return a.merge ? merge_reports(&a) : run_batch(&a);
}
