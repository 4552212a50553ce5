/* recoup batch: the process pool. Each job is its own `recoup distill`
 * process; its stdout (JSON results) is captured, its stderr logged. Under
 * mpirun the pool is the ranks: rank 0 hands each job to the next free rank,
 * which runs it as its own process the same way and sends back its status
 * and stdout. */
#define _GNU_SOURCE /* pipe2, prctl */
#include <cJSON.h>
#include <errno.h>
#include <fcntl.h>
#include <limits.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/prctl.h>
#include <sys/stat.h>
#include <sys/wait.h>
#include <time.h>
#include <unistd.h>

#include "cli/batch.h"
#include "cli/cli.h"
#include "cli/report.h"
#include "recoup/parallel.h"

#define STDOUT_MAX (4 << 20) /* a distill --json result is a few kilobytes */

/* Messages between rank 0 and the ranks that run jobs. TAG_JOB: {run index,
 * job index, resume from checkpoint, threads}, run index -1 = stop. TAG_DONE:
 * {run index, wait status, stdout bytes}, then TAG_OUT: those bytes. */
enum { TAG_JOB = 21, TAG_DONE = 22, TAG_OUT = 23 };

static int over_ranks(const batch *b) { return rc_dist_size(b->dist) > 1; }

static const char *host_of(const batch *b, int rank) { return b->hosts + (size_t)rank * RC_DIST_MAX_HOST; }

void cli_batch_set_record(batch *b, run *r, const char *status, const char *error, cJSON *result) {
  cli_job *j = r->job;
  cJSON_Delete(r->record);
  r->record = cli_report_record(j->name, j->index, j->teacher_given, j->student_given, j->out_given, status, error,
                                r->log_shown[0] ? r->log_shown : NULL, result, r->wall);
  if (r->record && b->hosts && r->rank > 0) cJSON_AddStringToObject(r->record, "host", host_of(b, r->rank));
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
  if (over_ranks(b)) setenv("RECOUP_RANK_CHILD", "1", 1); /* the job runs alone, not as a rank */
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

/* Start the job's process, its stderr into log_fd (the caller closes it),
 * its stdout into a pipe read without blocking. */
static int spawn(batch *b, run *r, int log_fd, char *err, size_t n) {
  int pipefd[2];
  if (pipe2(pipefd, O_CLOEXEC) != 0) {
    snprintf(err, n, "pipe: %s", strerror(errno));
    return -1;
  }
  pid_t parent = getpid();
  fflush(NULL);
  r->pid = fork();
  if (r->pid == 0) child_exec(b, r, pipefd[1], log_fd, parent);
  close(pipefd[1]);
  if (r->pid < 0) {
    snprintf(err, n, "fork: %s", strerror(errno));
    close(pipefd[0]);
    r->pid = 0;
    return -1;
  }
  r->out_fd = pipefd[0];
  fcntl(r->out_fd, F_SETFL, fcntl(r->out_fd, F_GETFL) | O_NONBLOCK);
  return 0;
}

static void log_paths(const batch *b, run *r) {
  cli_job *j = r->job;
  if (b->a->report) {
    snprintf(r->log, sizeof r->log, "%s/logs/%s.log", b->a->report, j->name);
    snprintf(r->log_shown, sizeof r->log_shown, "logs/%s.log", j->name);
  } else {
    snprintf(r->log, sizeof r->log, "%s.log", j->out);
    snprintf(r->log_shown, sizeof r->log_shown, "%s.log", j->out_given);
  }
}

static int free_rank(const batch *b) {
  for (int w = 1; w < rc_dist_size(b->dist); w++)
    if (b->rank_run[w] == RANK_FREE) return w;
  return -1;
}

/* Under mpirun: hand the job to a free rank, which appends to its log. */
static int hand_out(batch *b, run *r, char *err, size_t n) {
  int w = free_rank(b);
  if (w < 0) {
    snprintf(err, n, "no rank is left to run it (every other rank was lost)");
    return -1;
  }
  int64_t msg[4] = {r - b->runs, r->job->index, r->resumed_ckpt, b->threads_per_job};
  rc_err e = {0};
  if (rc_dist_send(b->dist, w, TAG_JOB, msg, 4, &e) != RC_OK) {
    b->rank_run[w] = RANK_LOST;
    snprintf(err, n, "cannot hand the job to rank %d (%s): %s", w, host_of(b, w), e.msg);
    return -1;
  }
  b->rank_run[w] = (int)(r - b->runs);
  r->rank = w;
  return 0;
}

static void start_job(batch *b, run *r) {
  cli_job *j = r->job;
  char ckpt[PATH_MAX + 8];
  snprintf(ckpt, sizeof ckpt, "%s.ckpt", j->out);
  r->resumed_ckpt = b->a->resume && access(ckpt, R_OK) == 0;
  log_paths(b, r);
  r->started = cli_batch_now();
  r->state = R_RUNNING;
  r->eta = -1;
  r->progress[0] = '\0';
  char err[512];
  int log_fd = -1;
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
  if (over_ranks(b)) {
    close(log_fd);
    log_fd = -1;
    if (hand_out(b, r, err, sizeof err) != 0) goto fail;
    cli_batch_event(b, "started %s on rank %d (%s)%s (log: %s)", j->name, r->rank, host_of(b, r->rank),
                    r->resumed_ckpt ? ", resuming from its checkpoint" : "", b->a->report ? r->log : r->log_shown);
    return;
  }
  if (spawn(b, r, log_fd, err, sizeof err) != 0) goto fail;
  close(log_fd);
  cli_batch_event(b, "started %s%s (log: %s)", j->name, r->resumed_ckpt ? ", resuming from its checkpoint" : "",
        b->a->report ? r->log : r->log_shown);
  return;
fail:
  if (log_fd >= 0) close(log_fd);
  r->state = R_DONE;
  r->pid = 0;
  cli_batch_set_record(b, r, CLI_JOB_FAILED, err, NULL);
  b->n_done++;
  cli_batch_event(b, "%s failed: %s", j->name, err);
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

ssize_t cli_batch_log_tail(const char *path, char *buf, size_t size) {
  int fd = open(path, O_RDONLY);
  if (fd < 0) return -1;
  off_t end = lseek(fd, 0, SEEK_END);
  off_t from = end > (off_t)size - 1 ? end - (off_t)size + 1 : 0;
  ssize_t n = pread(fd, buf, size - 1, from);
  close(fd);
  if (n >= 0) buf[n] = '\0';
  return n;
}

/* Last non-empty line of the job's log: distill's one-line error, with the
 * manifest's folder left out of paths so reports read the same wherever the
 * zoo lives. */
static void last_error_line(const run *r, const char *dir, char *out, size_t n) {
  snprintf(out, n, "no error message (see %s)", r->log_shown);
  char buf[4096];
  ssize_t k = cli_batch_log_tail(r->log, buf, sizeof buf);
  if (k <= 0) return;
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

static void finish_job(batch *b, run *r, int wstatus) {
  drain(r);
  close(r->out_fd);
  r->out_fd = -1;
  r->state = R_DONE;
  r->wall = cli_batch_now() - r->started;
  b->n_done++;
  char err[512];
  cli_job *j = r->job;
  if (WIFEXITED(wstatus) && WEXITSTATUS(wstatus) == 0) {
    cJSON *res = r->out_text ? cJSON_Parse(r->out_text) : NULL;
    append_stdout_to_log(r);
    rc_err e = {0};
    if (!res) {
      cli_batch_set_record(b, r, CLI_JOB_FAILED, "recoup distill printed no readable results", NULL);
    } else {
      cli_batch_set_record(b, r, CLI_JOB_OK, NULL, res);
      if (cli_batch_remember_job(b, r, &e) != RC_OK) cli_batch_event(b, "warning: resume state not saved: %s", e.msg);
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
      cli_batch_fmt_hms(el, sizeof el, r->wall);
      cli_batch_event(b, "finished %s in %s: %s %s -> %s", j->name, el, vm, c, v);
      cli_batch_write_reports(b);
      return;
    }
  } else if (WIFSIGNALED(wstatus)) {
    snprintf(err, sizeof err, "killed by signal %d (%s)", WTERMSIG(wstatus), strsignal(WTERMSIG(wstatus)));
    cli_batch_set_record(b, r, r->term_sent ? CLI_JOB_INTERRUPTED : CLI_JOB_FAILED, err, NULL);
  } else {
    last_error_line(r, b->m.dir, err, sizeof err);
    cli_batch_set_record(b, r, r->term_sent ? CLI_JOB_INTERRUPTED : CLI_JOB_FAILED, err, NULL);
  }
  cli_batch_forget_job(b, j->name);
  rc_err e = {0};
  if (cli_batch_save_state(b, &e) != RC_OK) cli_batch_event(b, "warning: resume state not saved: %s", e.msg);
  const cJSON *st = cJSON_GetObjectItemCaseSensitive(r->record, "status");
  const cJSON *er = cJSON_GetObjectItemCaseSensitive(r->record, "error");
  cli_batch_event(b, "%s %s: %s", j->name, st->valuestring, cJSON_IsString(er) ? er->valuestring : "");
  cli_batch_write_reports(b);
}

/* Under mpirun: the results of jobs the ranks finished. A rank that cannot
 * be heard from any more fails its job and gets no other. */
static void collect_ranks(batch *b) {
  int from;
  while (rc_dist_probe(b->dist, TAG_DONE, &from)) {
    int64_t done[3];
    rc_err e = {0};
    char *text = NULL;
    size_t got = 0;
    rc_status s = rc_dist_recv(b->dist, from, TAG_DONE, done, 3, &e);
    if (s == RC_OK && (done[2] < 0 || done[2] > 2 * (int64_t)STDOUT_MAX))
      s = rc_err_set(&e, RC_ERR_INVALID, "it announced %lld bytes of results", (long long)done[2]);
    if (s == RC_OK && !(text = malloc((size_t)done[2] + 1))) s = rc_err_set(&e, RC_ERR_NOMEM, "out of memory");
    if (s == RC_OK) s = rc_dist_recv_bytes(b->dist, from, TAG_OUT, text, (size_t)done[2], &got, &e);
    int i = b->rank_run[from];
    if (i < 0) { /* not busy with a job of ours: nothing to finish */
      free(text);
      continue;
    }
    run *r = &b->runs[i];
    b->rank_run[from] = RANK_FREE;
    if (s == RC_OK && done[0] != i) s = rc_err_set(&e, RC_ERR_INVALID, "it answered for another job");
    if (s != RC_OK) {
      free(text);
      b->rank_run[from] = RANK_LOST;
      r->state = R_DONE;
      r->wall = cli_batch_now() - r->started;
      b->n_done++;
      char err[512];
      snprintf(err, sizeof err, "lost rank %d (%s): %s", from, host_of(b, from), e.msg);
      cli_batch_set_record(b, r, CLI_JOB_FAILED, err, NULL);
      cli_batch_event(b, "%s failed: %s", r->job->name, err);
      cli_batch_write_reports(b);
      continue;
    }
    text[got] = '\0';
    free(r->out_text);
    r->out_text = text;
    r->out_n = got;
    finish_job(b, r, (int)done[1]);
  }
}

static void poll_jobs(batch *b) {
  if (over_ranks(b)) {
    collect_ranks(b);
    return;
  }
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

/* One more job may start now: below --jobs here; under mpirun, a rank is
 * free (or every rank is lost, so that the pending jobs fail, not wait). */
static int can_start(const batch *b) {
  if (!over_ranks(b)) return count_state(b, R_RUNNING) < b->a->jobs;
  return free_rank(b) > 0 || count_state(b, R_RUNNING) == 0;
}

void cli_batch_run_all(batch *b) {
  int next = 0, stopping = 0;
  while (count_state(b, R_PENDING) + count_state(b, R_RUNNING) > 0) {
    if (cli_stop_requested && !stopping) {
      stopping = 1;
      cli_batch_event(b, "stopping: asking %d running job%s to checkpoint and stop", count_state(b, R_RUNNING),
            count_state(b, R_RUNNING) == 1 ? "" : "s");
      for (int i = 0; i < b->n_runs; i++)
        if (b->runs[i].state == R_RUNNING && (b->runs[i].pid > 0 || b->runs[i].rank > 0)) {
          if (b->runs[i].pid > 0) kill(b->runs[i].pid, SIGTERM); /* the ranks' jobs: the launcher signals the ranks */
          b->runs[i].term_sent = 1;
        }
    }
    if (stopping) {
      for (int i = 0; i < b->n_runs; i++)
        if (b->runs[i].state == R_PENDING) {
          b->runs[i].state = R_DONE;
          cli_batch_set_record(b, &b->runs[i], CLI_JOB_NOT_RUN, "batch stopped before this job started", NULL);
        }
    }
    while (!stopping && can_start(b) && next < b->n_runs) {
      run *r = &b->runs[next++];
      if (r->state == R_PENDING) start_job(b, r);
    }
    poll_jobs(b);
    if (b->tty && cli_batch_now() - b->last_draw >= 0.5) {
      for (int i = 0; i < b->n_runs; i++)
        if (b->runs[i].state == R_RUNNING) cli_batch_read_progress(&b->runs[i]);
      cli_batch_draw_status(b);
    }
    struct timespec ts = {0, 100 * 1000 * 1000};
    nanosleep(&ts, NULL);
  }
  cli_batch_clear_status(b);
}

/* ---- Under mpirun: ranks 1..N-1 run the jobs rank 0 hands out ------------------------------ */

/* Run one job here as the pool runs any job (its own process, stdout
 * captured, stderr appended to the log rank 0 opened), passing a stop request
 * on; returns its wait status. */
static int run_here(batch *b, run *r) {
  log_paths(b, r);
  char err[512];
  int log_fd = open(r->log, O_WRONLY | O_CREAT | O_APPEND | O_CLOEXEC, 0644);
  if (log_fd < 0) snprintf(err, sizeof err, "%s: %s", r->log, strerror(errno));
  int started = log_fd >= 0 && spawn(b, r, log_fd, err, sizeof err) == 0;
  if (log_fd >= 0) {
    if (!started) dprintf(log_fd, "recoup: error: %s\n", err); /* the last line, which rank 0 reports */
    close(log_fd);
  }
  if (!started) {
    cli_batch_event(b, "rank %d (%s) cannot start %s: %s", rc_dist_rank(b->dist), rc_dist_host(b->dist), r->job->name,
                    err);
    return 127 << 8; /* as a process that could not start */
  }
  int ws = 0;
  for (;;) {
    drain(r);
    pid_t p = waitpid(r->pid, &ws, WNOHANG);
    if (p == r->pid) break;
    if (p < 0 && errno != EINTR) {
      ws = 127 << 8;
      break;
    }
    if (cli_stop_requested && !r->term_sent) {
      kill(r->pid, SIGTERM);
      r->term_sent = 1;
    }
    struct timespec ts = {0, 50 * 1000 * 1000};
    nanosleep(&ts, NULL);
  }
  drain(r);
  close(r->out_fd);
  return ws;
}

/* Run the job a TAG_JOB message names and send rank 0 its outcome. */
static rc_status serve_job(batch *b, const int64_t msg[4], rc_err *e) {
  if (msg[1] < 0 || msg[1] >= b->m.n_jobs)
    return rc_err_set(e, RC_ERR_INVALID, "rank 0 named job %lld, which the manifest does not have",
                      (long long)msg[1]);
  run r;
  memset(&r, 0, sizeof r);
  r.job = &b->m.jobs[msg[1]];
  r.out_fd = -1;
  r.resumed_ckpt = (int)msg[2];
  long cores = sysconf(_SC_NPROCESSORS_ONLN);
  b->threads_per_job = msg[3] > 0 ? (int)msg[3] : cores > 0 ? (int)cores : 1; /* 0: this machine's cores */
  int64_t done[3] = {msg[0], run_here(b, &r), 0};
  done[2] = (int64_t)r.out_n;
  rc_status s = rc_dist_send(b->dist, 0, TAG_DONE, done, 3, e);
  if (s == RC_OK) s = rc_dist_send_bytes(b->dist, 0, TAG_OUT, r.out_text ? r.out_text : "", r.out_n, e);
  free(r.out_text);
  return s;
}

int cli_batch_serve(batch_args *a, rc_dist *d) {
  batch b;
  memset(&b, 0, sizeof b);
  b.a = a;
  b.dist = d;
  rc_err e = {0};
  int loaded = 0, rc = RC_EXIT_OK;
  cli_catch_stop_signals();
  for (;;) {
    int64_t msg[4];
    if (rc_dist_recv(d, 0, TAG_JOB, msg, 4, &e) != RC_OK) {
      rc = cli_fail(&e);
      break;
    }
    if (msg[0] < 0) break;
    /* Read the manifest at the first job, so that one rank 0 refused alone
     * reports its error once. */
    if (!loaded && cli_manifest_load(&b.m, a->manifest, a->allow_outside, &e) != RC_OK) {
      rc = cli_fail(&e);
      break;
    }
    loaded = 1;
    if (serve_job(&b, msg, &e) != RC_OK) {
      rc = cli_fail(&e);
      break;
    }
  }
  if (loaded) cli_manifest_free(&b.m);
  if (rc == RC_EXIT_OK) cli_dist_agreed_exit(); /* whatever rank 0 concludes, this rank did its part */
  return rc;
}

void cli_batch_release_ranks(batch *b) {
  int64_t stop[4] = {-1, -1, 0, 0};
  for (int w = 1; w < rc_dist_size(b->dist); w++) {
    rc_err e = {0};
    if (b->rank_run && b->rank_run[w] == RANK_LOST) continue;
    if (rc_dist_send(b->dist, w, TAG_JOB, stop, 4, &e) != RC_OK)
      fprintf(stderr, "recoup: warning: cannot tell rank %d to stop: %s\n", w, e.msg);
  }
}
