/* recoup batch: run a manifest's zoo of distillation jobs, each as its own
 * `recoup distill` process, several at once, with resume, shards and reports. */
#include <cJSON.h>
#include <errno.h>
#include <getopt.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "cli/batch.h"
#include "cli/cli.h"
#include "cli/manifest.h"
#include "cli/report.h"
#include "recoup/parallel.h"
#include "recoup/util.h"

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
      "Under 'mpirun -np N' (or srun) the batch is a work queue: rank 0 reads the\n"
      "manifest, keeps the state and reports, and hands each job to the next free\n"
      "rank; ranks 1..N-1 run one job at a time each, with --threads T per job (0:\n"
      "that machine's cores); --jobs is not used. Every file must be visible to\n"
      "every rank (a shared file system).\n"
      "\n"
      "SIGINT or SIGTERM stops the batch: running jobs are sent SIGTERM, write a\n"
      "checkpoint and stop; 'recoup batch --resume' continues them. Exit status is 0\n"
      "only when every job succeeded.\n"
      "\n"
      "Validate every recovered model on your own held-out data before deploying it:\n"
      "the figures hold only for the samples measured.\n");
}


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

/* ---- Reports ---------------------------------------------------------------------------- */

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

void cli_batch_write_reports(batch *b) {
  if (!b->a->report) return;
  cJSON *meta = meta_json(b), *recs = records_json(b);
  rc_err e = {0};
  if (cli_report_write(b->a->report, meta, recs, &e) != RC_OK) cli_batch_event(b, "warning: report not written: %s", e.msg);
  cJSON_Delete(meta);
  cJSON_Delete(recs);
}



/* ---- The batch ---------------------------------------------------------------------------- */




/* Select this shard's jobs; with --resume, take the records of finished jobs
 * whose outputs are unchanged. */
static rc_status plan_runs(batch *b, rc_err *e) {
  b->runs = calloc((size_t)b->m.n_jobs + 1, sizeof *b->runs);
  if (!b->runs) return rc_err_set(e, RC_ERR_NOMEM, "out of memory");
  for (int i = 0; i < b->m.n_jobs; i++) {
    if (i % b->a->shard_n != b->a->shard_k - 1) continue;
    run *r = &b->runs[b->n_runs++];
    r->job = &b->m.jobs[i];
    r->out_fd = -1;
    r->state = R_PENDING;
    if (!b->a->resume) continue;
    cJSON *rec = cli_batch_reusable_record(b, r);
    if (!rec) continue;
    cJSON_DeleteItemFromObjectCaseSensitive(rec, "reused");
    cJSON_AddBoolToObject(rec, "reused", 1);
    r->record = rec;
    r->state = R_DONE;
    b->n_done++;
    b->n_ok++;
    cli_batch_event(b, "skipped %s: %s is unchanged since it finished", r->job->name, r->job->out_given);
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
    else
      s = rc_path_refuse_inputs("state file", b->state_path, inputs, NULL, n, e);
  }
  free(inputs);
  free(names);
  return s;
}

/* Under mpirun: ranks 1..N-1 free to take jobs. */
static rc_status prepare_ranks(batch *b, rc_err *e) {
  int n = rc_dist_size(b->dist);
  b->rank_run = malloc(sizeof *b->rank_run * (size_t)n);
  if (!b->rank_run) return rc_err_set(e, RC_ERR_NOMEM, "out of memory");
  for (int w = 0; w < n; w++) b->rank_run[w] = RANK_FREE;
  b->rank_run[0] = RANK_LOST; /* rank 0 coordinates and runs no job */
  return RC_OK;
}

static void announce(batch *b) {
  const batch_args *a = b->a;
  const char *in_shard = a->shard_n > 1 ? " in this shard" : "";
  if (b->rank_run) {
    int n = rc_dist_size(b->dist) - 1;
    char t[48] = "this machine's cores";
    if (a->threads > 0) snprintf(t, sizeof t, "%ld thread%s", a->threads, a->threads == 1 ? "" : "s");
    cli_batch_event(b, "%d job%s%s over %d rank%s, one at a time each, %s per job", b->n_runs,
                    b->n_runs == 1 ? "" : "s", in_shard, n, n == 1 ? "" : "s", t);
  } else {
    cli_batch_event(b, "%d job%s%s, %ld at once, %d thread%s each", b->n_runs, b->n_runs == 1 ? "" : "s", in_shard,
                    a->jobs, b->threads_per_job, b->threads_per_job == 1 ? "" : "s");
  }
}

static int run_batch(batch_args *a, char *hosts) {
  batch b;
  memset(&b, 0, sizeof b);
  b.a = a;
  b.tty = cli_isatty_stderr();
  b.t0 = cli_batch_now();
  b.dist = cli_dist();
  b.hosts = hosts;
  rc_err e = {0};
  int rc = RC_EXIT_FAIL;
  if (cli_manifest_load(&b.m, a->manifest, a->allow_outside, &e) != RC_OK) goto out;
  if (hosts && prepare_ranks(&b, &e) != RC_OK) goto out;
  long threads = a->threads;
  if (threads <= 0) {
    long c = sysconf(_SC_NPROCESSORS_ONLN);
    threads = c > 0 ? c : 1;
  }
  /* Under mpirun each rank runs one job: --threads is per job; 0 lets each
   * rank use its own machine's cores. */
  if (b.rank_run) b.threads_per_job = (int)a->threads;
  else b.threads_per_job = threads / a->jobs > 0 ? (int)(threads / a->jobs) : 1;
  if (a->report) {
    if (cli_report_prepare(a->report, 1, &e) != RC_OK) goto out;
    snprintf(b.state_path, sizeof b.state_path, "%s/state.json", a->report);
  } else if (a->shard_n > 1) {
    snprintf(b.state_path, sizeof b.state_path, "%s.shard-%ld-of-%ld.state.json", a->manifest, a->shard_k,
             a->shard_n);
  } else {
    snprintf(b.state_path, sizeof b.state_path, "%s.state.json", a->manifest);
  }
  if (check_outputs(&b, &e) != RC_OK || cli_batch_lock_state(&b, &e) != RC_OK || cli_batch_load_state(&b, &e) != RC_OK || plan_runs(&b, &e) != RC_OK) goto out;
  announce(&b);
  cli_catch_stop_signals();
  cli_batch_run_all(&b);
  cli_batch_write_reports(&b);
  cJSON *recs = records_json(&b), *meta = meta_json(&b);
  if (a->json) cli_batch_print_json(meta, recs);
  else cli_batch_print_summary(recs, a->report);
  cJSON_Delete(recs);
  cJSON_Delete(meta);
  rc = b.n_ok == b.n_runs && !cli_stop_requested ? RC_EXIT_OK : RC_EXIT_FAIL;
  if (cli_stop_requested) fprintf(stderr, "recoup batch: stopped by a signal; run again with --resume to continue\n");
out:
  if (e.code) cli_fail(&e);
  if (hosts) {
    cli_batch_release_ranks(&b);
    cli_dist_agreed_exit(); /* every rank was told the batch is over: no need to abort them */
  }
  free(b.rank_run);
  for (int i = 0; i < b.n_runs; i++) {
    cJSON_Delete(b.runs[i].record);
    free(b.runs[i].out_text);
  }
  free(b.runs);
  cJSON_Delete(b.state);
  cli_manifest_free(&b.m);
  return rc;
}

/* Under mpirun rank 0 coordinates and ranks 1..N-1 run the jobs it hands
 * out; one process runs its own pool. */
static int run_on_ranks(batch_args *a) {
  rc_dist *d = cli_dist();
  if (rc_dist_size(d) <= 1) return run_batch(a, NULL);
  rc_err e = {0};
  char *hosts = calloc((size_t)rc_dist_size(d), RC_DIST_MAX_HOST);
  if (!hosts) rc_err_set(&e, RC_ERR_NOMEM, "out of memory"); /* the job aborts: the others wait in rc_dist_hosts */
  if (!hosts || rc_dist_hosts(d, hosts, &e) != RC_OK) {
    free(hosts);
    return cli_fail(&e);
  }
  int rc = rc_dist_rank(d) == 0 ? run_batch(a, hosts) : cli_batch_serve(a, d);
  free(hosts);
  return rc;
}

/* Merging is one process's work: under mpirun rank 0 does it alone. */
static int merge_on_rank0(batch_args *a) {
  if (rc_dist_size(cli_dist()) <= 1) return cli_batch_merge_reports(a);
  cli_dist_agreed_exit();
  return rc_dist_rank(cli_dist()) == 0 ? cli_batch_merge_reports(a) : RC_EXIT_OK;
}

int rc_cmd_batch(int argc, char **argv) {
  batch_args a;
  int pr = parse_args(&a, argc, argv);
  if (pr) return pr < 0 ? RC_EXIT_OK : pr;
  return a.merge ? merge_on_rank0(&a) : run_on_ranks(&a);
}
