/* recoup batch: status lines on a terminal (plain event lines otherwise)
 * and the closing summary. */
#define _POSIX_C_SOURCE 200809L /* clock_gettime */
#include <cJSON.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/ioctl.h>
#include <time.h>
#include <unistd.h>

#include "cli/batch.h"
#include "cli/cli.h"
#include "cli/report.h"

double cli_batch_now(void) {
  struct timespec t;
  clock_gettime(CLOCK_MONOTONIC, &t);
  return (double)t.tv_sec + 1e-9 * (double)t.tv_nsec;
}

void cli_batch_fmt_hms(char *buf, size_t n, double s) {
  long t = s > 0 ? (long)(s + 0.5) : 0;
  snprintf(buf, n, "%ld:%02ld:%02ld", t / 3600, t / 60 % 60, t % 60);
}

static int term_columns(void) {
  struct winsize w;
  if (ioctl(STDERR_FILENO, TIOCGWINSZ, &w) == 0 && w.ws_col > 20) return w.ws_col;
  return 100;
}

void cli_batch_clear_status(batch *b) {
  if (!b->tty || !b->drawn) return;
  fprintf(stderr, "\033[%dA\r\033[J", b->drawn);
  b->drawn = 0;
}

static double time_left(const batch *b) {
  int running = 0, pending = 0;
  double left = 0, avg = b->n_timed ? b->sum_wall / b->n_timed : -1, t = cli_batch_now();
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

void cli_batch_draw_status(batch *b) {
  if (!b->tty) return;
  cli_batch_clear_status(b);
  int cols = term_columns();
  double t = cli_batch_now();
  for (int i = 0; i < b->n_runs; i++) {
    run *r = &b->runs[i];
    if (r->state != R_RUNNING) continue;
    char el[32];
    cli_batch_fmt_hms(el, sizeof el, t - r->started);
    fprintf(stderr, "  %-20.20s %s  %.*s\n", r->job->name, el, cols > 40 ? cols - 35 : 5,
            r->progress[0] ? r->progress : "starting");
    b->drawn++;
  }
  char left[32] = "time left unknown yet";
  double tl = time_left(b);
  if (tl >= 0) {
    char h[24];
    cli_batch_fmt_hms(h, sizeof h, tl);
    snprintf(left, sizeof left, "about %s left", h);
  }
  fprintf(stderr, "recoup batch: %d/%d done (%d failed), %s\n", b->n_done, b->n_runs, b->n_done - b->n_ok, left);
  b->drawn++;
  fflush(stderr);
  b->last_draw = t;
}

void cli_batch_event(batch *b, const char *fmt, ...) {
  cli_batch_clear_status(b);
  char raw[2048], msg[4096];
  va_list ap;
  va_start(ap, fmt);
  vsnprintf(raw, sizeof raw, fmt, ap);
  va_end(ap);
  fprintf(stderr, "recoup batch: %s\n", cli_esc(raw, msg, sizeof msg)); /* paths and errors from files */
  cli_batch_draw_status(b);
}

/* The last progress line a job wrote to its log ("epoch 1/3 step 40/300 ..."). */
void cli_batch_read_progress(run *r) {
  char buf[2048];
  if (cli_batch_log_tail(r->log, buf, sizeof buf) <= 0) return;
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

void cli_batch_print_summary(const cJSON *records, const char *report_dir) {
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
    if (cJSON_IsNumber(secs)) cli_batch_fmt_hms(t, sizeof t, secs->valuedouble);
    char jb[512];
    printf("  %-24.24s %-12s %12s %12s %12s %10s  (%s)\n", cli_esc(name->valuestring, jb, sizeof jb), status, cells[0], cells[1], cells[2], t,
           vm);
  }
  printf("\n%d of %d jobs succeeded.%s%s\n", ok, n, report_dir ? " Report: " : "", report_dir ? report_dir : "");
  if (report_dir) printf("Open %s/report.html in a browser.\n", report_dir);
  printf("Validate every recovered model on your own held-out data before deploying it;\n"
         "these figures hold only for the samples measured.\n");
}

void cli_batch_print_json(const cJSON *meta, const cJSON *records) {
  cJSON *root = cJSON_CreateObject();
  cJSON_AddItemToObject(root, "meta", cJSON_Duplicate(meta, 1));
  cJSON_AddItemToObject(root, "jobs", cJSON_Duplicate(records, 1));
  char *text = cli_json_print(root);
  if (text) puts(text);
  free(text);
  cJSON_Delete(root);
}
