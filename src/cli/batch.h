/* recoup batch, shared by its parts: the jobs in flight and the batch's
 * state. cmd_batch.c reads the arguments and runs the batch; batch_pool.c
 * starts, watches and finishes the distill processes, here or (under
 * mpirun) on the ranks rank 0 hands them to; batch_display.c draws
 * status lines and the summary; batch_ledger.c keeps the resume state;
 * batch_merge.c merges shard reports. */
#ifndef RC_CLI_BATCH_H
#define RC_CLI_BATCH_H

#include <cJSON.h>
#include <limits.h>
#include <stddef.h>
#include <sys/types.h>

#include "cli/manifest.h"
#include "cli/cli.h"
#include "recoup/status.h"

struct rc_dist; /* recoup/parallel.h */

typedef struct batch_args {
  const char *manifest, *report;
  long jobs, threads;
  long shard_k, shard_n;
  int resume, json, allow_outside, merge;
  char **merge_dirs;
  int n_merge;
} batch_args;

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
  int rank;         /* under mpirun: the rank running it; 0 while none does */
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
  /* Under mpirun (rank 0 coordinates): ranks 1..N-1 run one job at a time. */
  struct rc_dist *dist;
  int *rank_run;    /* per rank: the run it is busy with, or RANK_FREE, RANK_LOST */
  char *hosts;      /* RC_DIST_MAX_HOST bytes per rank, rank order */
} batch;

enum { RANK_FREE = -1, RANK_LOST = -2 };

/* ---- Display (batch_display.c) ---- */
double cli_batch_now(void);
void cli_batch_fmt_hms(char *buf, size_t n, double s);
void cli_batch_clear_status(batch *b);
void cli_batch_draw_status(batch *b);
/* One event line on stderr (escaped), the status lines redrawn below it. */
void cli_batch_event(batch *b, const char *fmt, ...) CLI_PRINTF(2, 3);
void cli_batch_read_progress(run *r);
void cli_batch_print_summary(const cJSON *records, const char *report_dir);
void cli_batch_print_json(const cJSON *meta, const cJSON *records);

/* ---- Resume ledger (batch_ledger.c) ---- */
rc_status cli_batch_load_state(batch *b, rc_err *e);
rc_status cli_batch_save_state(batch *b, rc_err *e);
rc_status cli_batch_lock_state(batch *b, rc_err *e);
cJSON *cli_batch_reusable_record(batch *b, run *r);
void cli_batch_forget_job(batch *b, const char *name);
rc_status cli_batch_remember_job(batch *b, run *r, rc_err *e);

/* ---- Process pool (batch_pool.c) ---- */
/* The last size - 1 bytes of a job's log, NUL-terminated; the count read,
 * or -1 when the log cannot be opened. */
ssize_t cli_batch_log_tail(const char *path, char *buf, size_t size);
void cli_batch_set_record(batch *b, run *r, const char *status, const char *error, cJSON *result);
/* Run every pending job, at most b->a->jobs at once (under mpirun: one on
 * each free rank), until all are done or a stop signal has let the running
 * ones checkpoint. */
void cli_batch_run_all(batch *b);
/* Under mpirun, ranks 1..N-1: run the jobs rank 0 hands out until it says
 * stop. */
int cli_batch_serve(batch_args *a, struct rc_dist *d);
/* Rank 0, at the end: every other rank may stop waiting for jobs. */
void cli_batch_release_ranks(batch *b);

/* ---- Reports (cmd_batch.c) and merging (batch_merge.c) ---- */
void cli_batch_write_reports(batch *b);
int cli_batch_merge_reports(batch_args *a);

#endif
