/* Reports of distillation runs, for `recoup batch --report DIR` and
 * `recoup distill --report DIR`.
 *
 * A record is one job: its name, paths, outcome, and the object that
 * `recoup distill --json` prints (dense, compressed and recovered metrics,
 * per-epoch history, steps, time, samples/s, mask check). A report folder
 * holds:
 *   report.json   every record plus "meta" (title, manifest hash, shard)
 *   jobs/NAME.json one record per job
 *   summary.csv, summary.md   one row per job
 *   report.html   one self-contained page: tables and SVG charts drawn here,
 *                 no scripts, no external resources. */
#ifndef RC_CLI_REPORT_H
#define RC_CLI_REPORT_H

#include <cJSON.h>
#include <stddef.h>

#include "recoup/status.h"

/* Job outcomes as written in records. */
#define CLI_JOB_OK "ok"
#define CLI_JOB_FAILED "failed"
#define CLI_JOB_INTERRUPTED "interrupted"
#define CLI_JOB_NOT_RUN "not run"

/* Build a record. `result` (the distill --json object, or NULL) is taken
 * over; its own teacher/student/out fields give way to the ones given here
 * (as the manifest wrote them). `log` and `error` may be NULL. */
cJSON *cli_report_record(const char *name, int index, const char *teacher, const char *student, const char *out,
                         const char *status, const char *error, const char *log, cJSON *result,
                         double wall_seconds);

/* A report's "meta" object: title and the time it was generated (UTC). */
cJSON *cli_report_meta(const char *title);

/* Create the missing folders above `file`, as `mkdir -p` would; -1 and errno
 * on failure. */
int cli_make_parents(const char *file);

/* Create DIR and DIR/jobs (and DIR/logs when with_logs) as needed. */
rc_status cli_report_prepare(const char *dir, int with_logs, rc_err *e);

/* Write every report file into DIR (see above). `records` is an array of
 * records in job order; `meta` an object (copied). */
rc_status cli_report_write(const char *dir, const cJSON *meta, const cJSON *records, rc_err *e);

/* Refuse a report folder where a file it would hold (report.json,
 * report.html, summary.csv, summary.md, state.json, jobs/NAME.json,
 * logs/NAME.log for each of the n_names job names) is one of the inputs. */
rc_status cli_report_refuse_inputs(const char *dir, const char *const *names, int n_names,
                                   const char *const *inputs, const char *const *labels, int n_inputs, rc_err *e);

/* Read DIR/report.json; *report owns the parsed object. */
rc_status cli_report_read(const char *dir, cJSON **report, rc_err *e);

#endif
