/* Reports: JSON records, CSV and Markdown summaries, and one HTML page with
 * SVG charts drawn here (no scripts, nothing fetched: it opens offline). */
#define _DEFAULT_SOURCE /* gmtime_r */
#include "cli/report.h"

#include <errno.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <time.h>
#include <unistd.h>

#include "cli/cli.h"
#include "cli/sbuf.h"
#include "cli/svg.h"
#include "recoup/util.h"

/* Our palette: distinct in hue and lightness (also for the common forms of
 * colour blindness), every colour dark enough for text on white. */
#define C_COMPRESSED "#c0562f"
#define C_RECOVERED "#1f5f99"
#define C_DENSE "#1a1a1a"
#define C_LOSS "#7a3db8"
#define C_VALID "#0d7a5f"

#define CAUTION                                                                                             \
  "Validate every recovered model on your own held-out data before deploying it. The figures in this "     \
  "report hold only for the samples they were measured on (a held-out slice of the training data unless "  \
  "validation data was given), and follow the rules of your domain for deploying models."

/* ---- Files ---------------------------------------------------------------------- */

static rc_status write_sbuf(const char *dir, const char *name, cli_sbuf *b, rc_err *e) {
  char path[4200];
  snprintf(path, sizeof path, "%s/%s", dir, name);
  if (b->oom) return rc_err_set(e, RC_ERR_NOMEM, "%s: out of memory", path);
  return rc_file_write_atomic(path, b->p ? b->p : "", b->n, e);
}

static rc_status write_json(const char *path, const cJSON *j, rc_err *e) {
  char *text = cJSON_Print(j);
  if (!text) return rc_err_set(e, RC_ERR_NOMEM, "%s: out of memory", path);
  size_t n = strlen(text);
  text[n] = '\n'; /* cJSON_Print's NUL becomes the final newline */
  rc_status s = rc_file_write_atomic(path, text, n + 1, e);
  free(text);
  return s;
}

static rc_status make_dir(const char *path, rc_err *e) {
  if (mkdir(path, 0755) == 0 || errno == EEXIST) {
    struct stat st;
    if (stat(path, &st) == 0 && S_ISDIR(st.st_mode)) return RC_OK;
    return rc_err_set(e, RC_ERR_IO, "report folder %s: exists and is not a folder", path);
  }
  return rc_err_set(e, RC_ERR_IO, "report folder %s: %s", path, strerror(errno));
}

int cli_make_parents(const char *file) {
  char path[4200];
  snprintf(path, sizeof path, "%s", file);
  for (char *p = path + 1; *p; p++)
    if (*p == '/') {
      *p = '\0';
      if (mkdir(path, 0755) != 0 && errno != EEXIST) return -1;
      *p = '/';
    }
  return 0;
}

rc_status cli_report_prepare(const char *dir, int with_logs, rc_err *e) {
  char path[4200];
  snprintf(path, sizeof path, "%s", dir);
  if (cli_make_parents(path) != 0) return rc_err_set(e, RC_ERR_IO, "report folder %s: %s", dir, strerror(errno));
  RC_TRY(make_dir(path, e));
  snprintf(path, sizeof path, "%s/logs", dir);
  if (with_logs) RC_TRY(make_dir(path, e));
  snprintf(path, sizeof path, "%s/jobs", dir);
  RC_TRY(make_dir(path, e));
  if (access(dir, W_OK) != 0) return rc_err_set(e, RC_ERR_IO, "report folder %s: not writable", dir);
  return RC_OK;
}

rc_status cli_report_refuse_inputs(const char *dir, const char *const *names, int n_names,
                                   const char *const *inputs, const char *const *labels, int n_inputs, rc_err *e) {
  static const char *const fixed[] = {"report.json", "report.html", "summary.csv", "summary.md", "state.json"};
  char path[4200];
  for (size_t i = 0; i < sizeof fixed / sizeof fixed[0]; i++) {
    snprintf(path, sizeof path, "%s/%s", dir, fixed[i]);
    RC_TRY(rc_path_refuse_inputs("--report", path, inputs, labels, n_inputs, e));
  }
  for (int k = 0; k < n_names; k++) {
    snprintf(path, sizeof path, "%s/jobs/%s.json", dir, names[k]);
    RC_TRY(rc_path_refuse_inputs("--report", path, inputs, labels, n_inputs, e));
    snprintf(path, sizeof path, "%s/logs/%s.log", dir, names[k]);
    RC_TRY(rc_path_refuse_inputs("--report", path, inputs, labels, n_inputs, e));
  }
  return RC_OK;
}

rc_status cli_report_read(const char *dir, cJSON **report, rc_err *e) {
  char path[4200];
  snprintf(path, sizeof path, "%s/report.json", dir);
  FILE *f = fopen(path, "rb");
  if (!f) return rc_err_set(e, RC_ERR_IO, "%s: %s", path, strerror(errno));
  cli_sbuf b = {0};
  char buf[1 << 14];
  size_t n;
  while ((n = fread(buf, 1, sizeof buf, f)) > 0 && b.n < (64u << 20)) cli_sb_add(&b, buf, n);
  int bad = ferror(f) || b.n >= (64u << 20);
  fclose(f);
  if (bad || b.oom) {
    free(b.p);
    return rc_err_set(e, RC_ERR_IO, "%s: read error or too large", path);
  }
  *report = b.p ? cJSON_Parse(b.p) : NULL;
  free(b.p);
  if (!*report || !cJSON_IsArray(cJSON_GetObjectItemCaseSensitive(*report, "jobs"))) {
    cJSON_Delete(*report);
    *report = NULL;
    return rc_err_set(e, RC_ERR_FORMAT, "%s: not a recoup report (expected an object with \"jobs\")", path);
  }
  return RC_OK;
}

/* ---- Records -------------------------------------------------------------------- */

cJSON *cli_report_record(const char *name, int index, const char *teacher, const char *student, const char *out,
                         const char *status, const char *error, const char *log, cJSON *result,
                         double wall_seconds) {
  cJSON *r = cJSON_CreateObject();
  if (!r) {
    cJSON_Delete(result);
    return NULL;
  }
  cJSON_AddStringToObject(r, "name", name);
  cJSON_AddNumberToObject(r, "index", index);
  cJSON_AddStringToObject(r, "status", status);
  if (error) cJSON_AddStringToObject(r, "error", error);
  else cJSON_AddNullToObject(r, "error");
  cJSON_AddStringToObject(r, "teacher", teacher ? teacher : "");
  cJSON_AddStringToObject(r, "student", student ? student : "");
  cJSON_AddStringToObject(r, "out", out ? out : "");
  if (log) cJSON_AddStringToObject(r, "log", log);
  cJSON_AddNumberToObject(r, "wall_seconds", wall_seconds);
  if (result) {
    /* Move the distill results over, after the identity fields. */
    while (result->child) {
      cJSON *it = cJSON_DetachItemViaPointer(result, result->child);
      if (!strcmp(it->string, "teacher") || !strcmp(it->string, "student") || !strcmp(it->string, "out") ||
          cJSON_GetObjectItemCaseSensitive(r, it->string)) {
        cJSON_Delete(it);
        continue;
      }
      cJSON_AddItemToObject(r, it->string, it);
    }
    cJSON_Delete(result);
  }
  return r;
}

cJSON *cli_report_meta(const char *title) {
  cJSON *m = cJSON_CreateObject();
  if (!m) return NULL;
  cJSON_AddStringToObject(m, "title", title);
  time_t t = time(NULL);
  struct tm tm;
  char when[64];
  gmtime_r(&t, &tm);
  strftime(when, sizeof when, "%Y-%m-%d %H:%M UTC", &tm);
  cJSON_AddStringToObject(m, "generated", when);
  return m;
}

static double num(const cJSON *o, const char *key) {
  const cJSON *v = o ? cJSON_GetObjectItemCaseSensitive(o, key) : NULL;
  return cJSON_IsNumber(v) ? v->valuedouble : NAN;
}

static const char *str(const cJSON *o, const char *key) {
  const cJSON *v = o ? cJSON_GetObjectItemCaseSensitive(o, key) : NULL;
  return cJSON_IsString(v) ? v->valuestring : "";
}

static double metric(const cJSON *rec, const char *model, const char *key) {
  return num(cJSON_GetObjectItemCaseSensitive(rec, model), key);
}

static int is_ok(const cJSON *rec) { return !strcmp(str(rec, "status"), CLI_JOB_OK); }

static int has_results(const cJSON *rec) {
  return is_ok(rec) && cJSON_IsObject(cJSON_GetObjectItemCaseSensitive(rec, "recovered"));
}

/* The figure compared across the zoo: accuracy when every job measured it
 * (labels given), else agreement with the dense model. */
static const char *zoo_metric(const cJSON *records) {
  const cJSON *r;
  int any = 0;
  cJSON_ArrayForEach(r, records) if (has_results(r)) {
    any = 1;
    if (isnan(metric(r, "recovered", "accuracy"))) return "agreement";
  }
  return any ? "accuracy" : "agreement";
}

static void pct(char *buf, size_t n, double v) {
  if (isnan(v)) snprintf(buf, n, "–");
  else snprintf(buf, n, "%.2f%%", 100 * v);
}

/* A figure that can be small (KL, loss): significant digits, "–" when absent. */
static const char *fig(char *buf, size_t n, double v) {
  if (isnan(v)) snprintf(buf, n, "–");
  else rc_fmt_sig(buf, n, v, RC_FMT_SIG, 0);
  return buf;
}

/* A change of a fraction in percentage points, with the digits it needs. */
static const char *delta_pt(char *buf, size_t n, double delta) {
  char d[32];
  if (isnan(delta)) snprintf(buf, n, "–");
  else snprintf(buf, n, "%s pt", rc_fmt_sig(d, sizeof d, 100 * delta, 3, 1));
  return buf;
}

/* KL to the dense model before and after: "0.03584 → 0.006748". */
static const char *kl_change(char *buf, size_t n, const cJSON *r) {
  char a[32], b[32];
  double before = metric(r, "compressed", "kl"), after = metric(r, "recovered", "kl");
  if (isnan(before) && isnan(after)) snprintf(buf, n, "–");
  else snprintf(buf, n, "%s → %s", fig(a, sizeof a, before), fig(b, sizeof b, after));
  return buf;
}

static void fmt_duration(char *buf, size_t n, double s) {
  if (isnan(s)) snprintf(buf, n, "–");
  else if (s < 60) snprintf(buf, n, "%.1f s", s);
  else {
    long t = (long)(s + 0.5);
    snprintf(buf, n, "%ld:%02ld:%02ld", t / 3600, t / 60 % 60, t % 60);
  }
}

static const char *masks_text(const cJSON *rec) {
  const cJSON *m = cJSON_GetObjectItemCaseSensitive(rec, "masks_intact");
  if (!cJSON_IsBool(m)) return "–";
  return cJSON_IsTrue(m) ? "intact" : "BROKEN";
}

/* ---- CSV and Markdown ------------------------------------------------------------- */

static void csv_field(cli_sbuf *b, const char *s, int last) {
  /* RFC 4180: quote fields holding a comma, quote or line break. */
  if (strpbrk(s, ",\"\r\n")) {
    cli_sb_add(b, "\"", 1);
    for (const char *p = s; *p; p++) {
      if (*p == '"') cli_sb_add(b, "\"", 1);
      cli_sb_add(b, p, 1);
    }
    cli_sb_add(b, "\"", 1);
  } else {
    cli_sb_add(b, s, strlen(s));
  }
  cli_sb_add(b, last ? "\r\n" : ",", last ? 2 : 1);
}

static void csv_num(cli_sbuf *b, double v) {
  if (isnan(v)) cli_sb_add(b, ",", 1);
  else cli_sb_printf(b, "%.6g,", v);
}

static void write_csv(cli_sbuf *b, const cJSON *records) {
  static const char *const models[] = {"dense", "compressed", "recovered"};
  cli_sb_printf(b, "name,status,teacher,student,out");
  for (int m = 0; m < 3; m++) cli_sb_printf(b, ",%s_accuracy,%s_agreement,%s_kl", models[m], models[m], models[m]);
  cli_sb_printf(b, ",improved,best_epoch,steps,seconds,samples_per_s,masks_intact,error\r\n");
  const cJSON *r;
  cJSON_ArrayForEach(r, records) {
    csv_field(b, str(r, "name"), 0);
    csv_field(b, str(r, "status"), 0);
    csv_field(b, str(r, "teacher"), 0);
    csv_field(b, str(r, "student"), 0);
    csv_field(b, str(r, "out"), 0);
    for (int m = 0; m < 3; m++) {
      csv_num(b, metric(r, models[m], "accuracy"));
      csv_num(b, metric(r, models[m], "agreement"));
      csv_num(b, metric(r, models[m], "kl"));
    }
    const cJSON *imp = cJSON_GetObjectItemCaseSensitive(r, "improved");
    csv_field(b, cJSON_IsBool(imp) ? (cJSON_IsTrue(imp) ? "true" : "false") : "", 0);
    csv_num(b, num(r, "best_epoch"));
    csv_num(b, num(r, "steps"));
    csv_num(b, num(r, "seconds"));
    csv_num(b, num(r, "samples_per_s"));
    const cJSON *mk = cJSON_GetObjectItemCaseSensitive(r, "masks_intact");
    csv_field(b, cJSON_IsBool(mk) ? (cJSON_IsTrue(mk) ? "true" : "false") : "", 0);
    csv_field(b, str(r, "error"), 1);
  }
}

static void md_text(cli_sbuf *b, const char *s) {
  for (; *s; s++) {
    if (*s == '|') cli_sb_add(b, "\\|", 2);
    else if (*s == '\n' || *s == '\r') cli_sb_add(b, " ", 1);
    else cli_sb_add(b, s, 1);
  }
}

static void write_markdown(cli_sbuf *b, const char *title, const cJSON *records) {
  const char *metric_name = zoo_metric(records);
  cli_sb_printf(b, "# %s\n\n", title);
  cli_sb_printf(b, "Figures are %s on each job's validation samples (%s).\n\n", metric_name,
            strcmp(metric_name, "accuracy") ? "top-1 agreement with the dense model" : "top-1 against labels");
  cli_sb_printf(b, "| job | status | dense | compressed | recovered | change | KL to dense | steps | time | samples/s | "
            "masks |\n");
  cli_sb_printf(b, "|---|---|---:|---:|---:|---:|---:|---:|---:|---:|---|\n");
  const cJSON *r;
  cJSON_ArrayForEach(r, records) {
    char d[32], c[32], v[32], ch[32], t[32], kl[80];
    pct(d, sizeof d, metric(r, "dense", metric_name));
    pct(c, sizeof c, metric(r, "compressed", metric_name));
    pct(v, sizeof v, metric(r, "recovered", metric_name));
    delta_pt(ch, sizeof ch, metric(r, "recovered", metric_name) - metric(r, "compressed", metric_name));
    kl_change(kl, sizeof kl, r);
    fmt_duration(t, sizeof t, num(r, "seconds"));
    cli_sb_add(b, "| ", 2);
    md_text(b, str(r, "name"));
    cli_sb_add(b, " | ", 3);
    md_text(b, str(r, "status"));
    if (!is_ok(r) && *str(r, "error")) {
      cli_sb_add(b, ": ", 2);
      md_text(b, str(r, "error"));
    }
    double sps = num(r, "samples_per_s"), steps = num(r, "steps");
    char sps_s[32] = "–", steps_s[32] = "–";
    if (!isnan(sps)) snprintf(sps_s, sizeof sps_s, "%.0f", sps);
    if (!isnan(steps)) snprintf(steps_s, sizeof steps_s, "%.0f", steps);
    cli_sb_printf(b, " | %s | %s | %s | %s | %s | %s | %s | %s | %s |\n", d, c, v, ch, kl, steps_s, t, sps_s,
              masks_text(r));
  }
  cli_sb_printf(b, "\n**Caution.** %s\n", CAUTION);
}

/* ---- SVG charts ---------------------------------------------------------------------- */

/* Points of a job's history on the step axis: the loss trace (or, in a
 * record without one, the per-epoch mean loss at each epoch's last step) and
 * the validation metric at step 0 (the compressed input) and at each epoch's
 * last step. */
typedef struct history {
  double *ls, *lv, *vs, *vv; /* loss steps/values, validation steps/values */
  int nl, nv;
  double steps;
} history;

static double epoch_step(const cJSON *e, int i, int n, double steps) {
  double st = num(e, "step");
  return isnan(st) ? steps * (i + 1) / n : st;
}

static int history_read(history *h, const cJSON *rec, const char *vm) {
  const cJSON *epochs = cJSON_GetObjectItemCaseSensitive(rec, "epochs");
  const cJSON *trace = cJSON_GetObjectItemCaseSensitive(rec, "loss_trace");
  int ne = cJSON_GetArraySize(epochs), nt = cJSON_GetArraySize(trace);
  memset(h, 0, sizeof *h);
  h->steps = num(rec, "steps");
  if (isnan(h->steps) || h->steps < 1) h->steps = ne > 0 ? ne : 1;
  int cap = (nt > ne ? nt : ne) + 2;
  h->ls = calloc((size_t)cap * 4, sizeof(double));
  if (!h->ls) return 0;
  h->lv = h->ls + cap, h->vs = h->lv + cap, h->vv = h->vs + cap;
  for (int i = 0; i < nt; i++) {
    const cJSON *pt = cJSON_GetArrayItem(trace, i);
    const cJSON *x = cJSON_GetArrayItem(pt, 0), *y = cJSON_GetArrayItem(pt, 1);
    if (cJSON_IsNumber(x) && cJSON_IsNumber(y) && isfinite(y->valuedouble))
      h->ls[h->nl] = x->valuedouble, h->lv[h->nl++] = y->valuedouble;
  }
  double v0 = metric(rec, "compressed", vm);
  if (!isnan(v0)) h->vs[h->nv] = 0, h->vv[h->nv++] = v0;
  for (int i = 0; i < ne; i++) {
    const cJSON *e = cJSON_GetArrayItem(epochs, i);
    double x = epoch_step(e, i, ne, h->steps), l = num(e, "train_loss"), v = num(e, vm);
    if (!nt && !isnan(l)) h->ls[h->nl] = x, h->lv[h->nl++] = l;
    if (!isnan(v)) h->vs[h->nv] = x, h->vv[h->nv++] = v;
  }
  return 1;
}

/* One job: training loss (left axis) along the optimizer steps and the
 * validation metric (right axis) at step 0 and at every epoch's end. */
static void history_chart(cli_sbuf *b, const cJSON *rec) {
  const char *vm = isnan(metric(rec, "compressed", "accuracy")) ? "agreement" : "accuracy";
  history h;
  if (!history_read(&h, rec, vm)) {
    b->oom = 1;
    return;
  }
  double lmax = 0, vlo = NAN, vhi = NAN;
  for (int i = 0; i < h.nl; i++) lmax = fmax(lmax, h.lv[i]);
  for (int i = 0; i < h.nv; i++)
    vlo = isnan(vlo) || h.vv[i] < vlo ? h.vv[i] : vlo, vhi = isnan(vhi) || h.vv[i] > vhi ? h.vv[i] : vhi;
  if (isnan(vlo)) vlo = 0, vhi = 1;
  double lstep = cli_svg_nice_step(lmax > 0 ? lmax : 1, 5), ltop = lstep * ceil((lmax > 0 ? lmax : 1) / lstep);
  double vstep = cli_svg_nice_step(fmax(vhi - vlo, 0.02), 5);
  double vbot = fmax(0, vstep * floor(vlo / vstep - 0.5)), vtop = fmin(1, vstep * ceil(vhi / vstep + 0.5));
  if (vtop <= vbot) vtop = fmin(1, vbot + vstep);
  cli_svg_frame f = {72, 488, 44, 236};
  const char *name = str(rec, "name");
  cli_sb_printf(b, "<svg xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 560 290\" width=\"560\" height=\"290\" "
            "role=\"img\" data-chart=\"history\" data-job=\"");
  cli_sb_esc(b, name);
  cli_sb_printf(b, "\"><title>Training loss and validation %s along the steps of ", vm);
  cli_sb_esc(b, name);
  cli_sb_add(b, "</title>", 8);
  char vlabel[64];
  snprintf(vlabel, sizeof vlabel, "validation %s", vm);
  cli_svg_y_axis(b, &f, 0, ltop, lstep, 0, 0, C_LOSS, "training loss");
  cli_svg_y_axis(b, &f, vbot, vtop, vstep, 1, 1, C_VALID, vlabel);
  double xstep = fmax(1, cli_svg_nice_step(h.steps, 6));
  for (double i = 0; i <= h.steps + xstep * 1e-6; i += xstep) {
    double x = cli_svg_map(i, 0, h.steps, f.x0, f.x1);
    cli_sb_printf(b, "<line x1=\"%.1f\" x2=\"%.1f\" y1=\"%.1f\" y2=\"%.1f\" stroke=\"%s\"/>", x, x, f.y1, f.y1 + 5,
              CLI_SVG_AXIS);
    cli_sb_printf(b, "<text x=\"%.1f\" y=\"%.1f\" text-anchor=\"middle\" class=\"tick\">%.0f</text>", x, f.y1 + 18, i);
  }
  cli_sb_printf(b, "<line x1=\"%.1f\" x2=\"%.1f\" y1=\"%.1f\" y2=\"%.1f\" stroke=\"%s\"/>", f.x0, f.x1, f.y1, f.y1,
            CLI_SVG_AXIS);
  cli_sb_printf(b, "<text x=\"%.1f\" y=\"%.1f\" text-anchor=\"middle\" class=\"axis-title\">optimizer step</text>", (f.x0 + f.x1) / 2, f.y1 + 40);
  /* A polyline per series; validation points carry markers (they are few),
   * and so does the loss when it has few points, so a single one shows. */
  cli_sbuf loss = {0}, val = {0}, marks = {0};
  for (int i = 0; i < h.nl; i++) {
    double x = cli_svg_map(h.ls[i], 0, h.steps, f.x0, f.x1), y = cli_svg_map(h.lv[i], 0, ltop, f.y1, f.y0);
    cli_sb_printf(&loss, "%.1f,%.1f ", x, y);
    if (h.nl <= 12)
      cli_sb_printf(&marks, "<rect x=\"%.1f\" y=\"%.1f\" width=\"7\" height=\"7\" fill=\"%s\"/>", x - 3.5, y - 3.5,
                C_LOSS);
  }
  for (int i = 0; i < h.nv; i++) {
    double x = cli_svg_map(h.vs[i], 0, h.steps, f.x0, f.x1), y = cli_svg_map(h.vv[i], vbot, vtop, f.y1, f.y0);
    cli_sb_printf(&val, "%.1f,%.1f ", x, y);
    cli_sb_printf(&marks, "<circle cx=\"%.1f\" cy=\"%.1f\" r=\"3.5\" fill=\"%s\"/>", x, y, C_VALID);
  }
  free(h.ls);
  cli_sb_printf(b, "<polyline data-series=\"loss\" fill=\"none\" stroke=\"%s\" stroke-width=\"2\" points=\"%s\"/>",
            C_LOSS, loss.p ? loss.p : "");
  cli_sb_printf(b, "<polyline data-series=\"validation\" fill=\"none\" stroke=\"%s\" stroke-width=\"2.5\" "
            "stroke-dasharray=\"7 4\" points=\"%s\"/>", C_VALID, val.p ? val.p : "");
  if (marks.p) cli_sb_add(b, marks.p, marks.n);
  b->oom |= loss.oom | val.oom | marks.oom;
  free(loss.p);
  free(val.p);
  free(marks.p);
  cli_svg_legend_item(b, f.x0, 24, C_LOSS, "line", "training loss (left)");
  cli_svg_legend_item(b, f.x0 + 200, 24, C_VALID, "dashed", "validation (right)");
  cli_sb_add(b, "</svg>", 6);
}

/* Across the zoo: compressed and recovered bars per job, the dense model's
 * value as a black mark over each group. */
static void zoo_chart(cli_sbuf *b, const cJSON *records, const char *vm) {
  int n = 0;
  const cJSON *r;
  cJSON_ArrayForEach(r, records) n += has_results(r);
  if (!n) return;
  double group = 96, width = fmax(560, 90 + group * n + 30);
  cli_svg_frame f = {72, width - 30, 50, 260};
  cli_sb_printf(b, "<svg xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 %.0f 330\" width=\"%.0f\" height=\"330\" "
            "role=\"img\" data-chart=\"zoo\"><title>Validation %s of each job before and after recovery</title>",
            width, width, vm);
  char label[64];
  snprintf(label, sizeof label, "validation %s", vm);
  cli_svg_y_axis(b, &f, 0, 1, 0.2, 0, 1, CLI_SVG_AXIS, label);
  cli_sb_printf(b, "<line x1=\"%.1f\" x2=\"%.1f\" y1=\"%.1f\" y2=\"%.1f\" stroke=\"%s\"/>", f.x0, f.x1, f.y1, f.y1,
            CLI_SVG_AXIS);
  double gw = (f.x1 - f.x0) / n, bw = fmin(30, gw * 0.3);
  int i = 0;
  cJSON_ArrayForEach(r, records) {
    if (!has_results(r)) continue;
    double cx = f.x0 + gw * (i + 0.5);
    static const char *const series[] = {"compressed", "recovered"};
    static const char *const colours[] = {C_COMPRESSED, C_RECOVERED};
    for (int s = 0; s < 2; s++) {
      double v = metric(r, series[s], vm);
      if (isnan(v)) continue;
      double x = cx + (s ? 2 : -2 - bw), y = cli_svg_map(v, 0, 1, f.y1, f.y0);
      cli_sb_printf(b, "<rect data-series=\"%s\" x=\"%.1f\" y=\"%.1f\" width=\"%.1f\" height=\"%.1f\" fill=\"%s\">"
                "<title>", series[s], x, y, bw, f.y1 - y, colours[s]);
      cli_sb_esc(b, str(r, "name"));
      cli_sb_printf(b, ", %s: %.2f%%</title></rect>", series[s], 100 * v);
      cli_sb_printf(b, "<text x=\"%.1f\" y=\"%.1f\" text-anchor=\"middle\" class=\"value\">%.1f</text>", x + bw / 2,
                y - 4, 100 * v);
    }
    double d = metric(r, "dense", vm);
    if (!isnan(d)) {
      double y = cli_svg_map(d, 0, 1, f.y1, f.y0);
      cli_sb_printf(b, "<path data-series=\"dense\" d=\"M%.1f %.1fH%.1f\" stroke=\"%s\" stroke-width=\"3\">"
                "<title>dense: %.2f%%</title></path>", cx - bw - 10, y, cx + bw + 10, C_DENSE, 100 * d);
    }
    /* Job name under its group, shortened to fit; the full name in a tooltip. */
    const char *name = str(r, "name");
    int maxc = (int)(gw / 7.5);
    cli_sb_printf(b, "<text x=\"%.1f\" y=\"%.1f\" text-anchor=\"middle\" class=\"tick\"><title>", cx, f.y1 + 18);
    cli_sb_esc(b, name);
    cli_sb_add(b, "</title>", 8);
    if ((int)strlen(name) > maxc && maxc > 3) {
      char shortened[128];
      snprintf(shortened, sizeof shortened, "%.*s…", maxc - 1, name);
      cli_sb_esc(b, shortened);
    } else {
      cli_sb_esc(b, name);
    }
    cli_sb_add(b, "</text>", 7);
    i++;
  }
  cli_sb_printf(b, "<text x=\"%.1f\" y=\"%.1f\" text-anchor=\"middle\" class=\"axis-title\">job</text>",
            (f.x0 + f.x1) / 2, f.y1 + 44);
  cli_svg_legend_item(b, f.x0, 26, C_COMPRESSED, "box", "compressed (input)");
  cli_svg_legend_item(b, f.x0 + 170, 26, C_RECOVERED, "box", "recovered (output)");
  cli_svg_legend_item(b, f.x0 + 340, 26, C_DENSE, "line", "dense (teacher)");
  cli_sb_add(b, "</svg>", 6);
}

/* ---- HTML ------------------------------------------------------------------------------ */

static const char *STYLE =
    "body{font-family:'DejaVu Sans',Helvetica,Arial,sans-serif;color:#1a1a1a;background:#fff;margin:0 auto;"
    "max-width:1120px;padding:24px 28px 48px;line-height:1.45}"
    "h1{font-size:26px;margin:0 0 4px}h2{font-size:20px;margin:32px 0 10px;border-bottom:2px solid #d5d9de;"
    "padding-bottom:4px}h3{font-size:17px;margin:0 0 8px}.sub{color:#4a4f55;margin:0}"
    ".caution{background:#fff6e0;border-left:6px solid #b26b00;padding:10px 14px;margin:18px 0}"
    "table{border-collapse:collapse;font-size:14px}th,td{padding:5px 10px;border-bottom:1px solid #dde1e5;"
    "text-align:right;white-space:nowrap}th{background:#f1f3f5}td.l,th.l{text-align:left}"
    ".ok{color:#0d6b3f;font-weight:bold}.bad{color:#b3261e;font-weight:bold}.err{white-space:normal;"
    "text-align:left;color:#b3261e;max-width:420px}"
    ".job{border:1px solid #d5d9de;border-radius:6px;padding:14px 16px;margin:16px 0}"
    ".row{display:flex;flex-wrap:wrap;gap:22px;align-items:flex-start}"
    ".facts{font-size:14px;color:#33383d;margin:8px 0 0}"
    "svg text{font-family:'DejaVu Sans',Helvetica,Arial,sans-serif}"
    "svg .tick{font-size:12px;fill:#33383d}svg .axis-title{font-size:13px;font-weight:bold}"
    "svg .legend{font-size:13px;fill:#1a1a1a}svg .value{font-size:11px;fill:#1a1a1a}"
    "details{margin:8px 0 0;font-size:14px}summary{cursor:pointer;color:#1f5f99}";

static void status_cell(cli_sbuf *b, const cJSON *r) {
  cli_sb_printf(b, "<td class=\"l %s\">", is_ok(r) ? "ok" : "bad");
  cli_sb_esc(b, str(r, "status"));
  cli_sb_add(b, "</td>", 5);
}

static void summary_table(cli_sbuf *b, const cJSON *records, const char *vm) {
  cli_sb_printf(b, "<table><thead><tr><th class=\"l\">job</th><th class=\"l\">status</th><th>dense</th>"
            "<th>compressed</th><th>recovered</th><th>change</th><th>KL to dense</th><th>steps</th><th>time</th>"
            "<th>samples/s</th><th class=\"l\">masks</th></tr></thead><tbody>");
  const cJSON *r;
  cJSON_ArrayForEach(r, records) {
    char d[32], c[32], v[32], ch[32], t[32], kl[80], steps[32] = "–", sps[32] = "–";
    pct(d, sizeof d, metric(r, "dense", vm));
    pct(c, sizeof c, metric(r, "compressed", vm));
    pct(v, sizeof v, metric(r, "recovered", vm));
    delta_pt(ch, sizeof ch, metric(r, "recovered", vm) - metric(r, "compressed", vm));
    kl_change(kl, sizeof kl, r);
    if (!isnan(num(r, "steps"))) snprintf(steps, sizeof steps, "%.0f", num(r, "steps"));
    if (!isnan(num(r, "samples_per_s"))) snprintf(sps, sizeof sps, "%.0f", num(r, "samples_per_s"));
    fmt_duration(t, sizeof t, num(r, "seconds"));
    cli_sb_add(b, "<tr><td class=\"l\">", 18);
    cli_sb_esc(b, str(r, "name"));
    cli_sb_add(b, "</td>", 5);
    status_cell(b, r);
    if (!has_results(r)) {
      cli_sb_add(b, "<td colspan=\"9\" class=\"err\">", 28);
      cli_sb_esc(b, *str(r, "error") ? str(r, "error") : "no results");
      cli_sb_add(b, "</td></tr>", 10);
      continue;
    }
    cli_sb_printf(b, "<td>%s</td><td>%s</td><td><b>%s</b></td><td>%s</td><td>%s</td><td>%s</td><td>%s</td><td>%s</td>"
              "<td class=\"l\">%s</td></tr>", d, c, v, ch, kl, steps, t, sps, masks_text(r));
  }
  cli_sb_add(b, "</tbody></table>", 16);
}

/* Longer per-epoch tables show the input, the first, the kept and the last
 * epoch, with every other epoch behind a disclosure. */
#define EPOCH_TABLE_MAX_ROWS 12

static void epoch_head(cli_sbuf *b, const char *vm) {
  cli_sb_printf(b, "<table><thead><tr><th>epoch</th><th>training loss</th><th>validation %s</th><th>KL to dense</th>"
            "</tr></thead><tbody>", vm);
}

static void epoch_row(cli_sbuf *b, const cJSON *e, int i, int best, const char *vm) {
  char l[32], v[32], kl[32];
  pct(v, sizeof v, num(e, vm));
  cli_sb_printf(b, "<tr data-epoch=\"%d\"><td>%d%s</td><td>%s</td><td>%s</td><td>%s</td></tr>", i, i,
            i == best ? " (kept)" : "", fig(l, sizeof l, num(e, "train_loss")), v, fig(kl, sizeof kl, num(e, "kl")));
}

static void epoch_table(cli_sbuf *b, const cJSON *rec) {
  const cJSON *epochs = cJSON_GetObjectItemCaseSensitive(rec, "epochs");
  const char *vm = isnan(metric(rec, "compressed", "accuracy")) ? "agreement" : "accuracy";
  char v[32], kl[32];
  pct(v, sizeof v, metric(rec, "compressed", vm));
  cli_sb_add(b, "<div>", 5); /* one flex item, whether or not the table collapses */
  epoch_head(b, vm);
  cli_sb_printf(b, "<tr data-epoch=\"0\"><td>0 (input)</td><td>–</td><td>%s</td><td>%s</td></tr>", v,
            fig(kl, sizeof kl, metric(rec, "compressed", "kl")));
  int best = (int)num(rec, "best_epoch"), n = cJSON_GetArraySize(epochs);
  int collapse = n + 1 > EPOCH_TABLE_MAX_ROWS;
  for (int i = 1; i <= n; i++)
    if (!collapse || i == 1 || i == best || i == n) epoch_row(b, cJSON_GetArrayItem(epochs, i - 1), i, best, vm);
  cli_sb_add(b, "</tbody></table>", 16);
  if (!collapse) {
    cli_sb_add(b, "</div>", 6);
    return;
  }
  cli_sb_printf(b, "<details class=\"epochs\"><summary>the other %d epochs</summary>",
                n - (best > 1 && best < n ? 3 : 2));
  epoch_head(b, vm);
  for (int i = 2; i < n; i++)
    if (i != best) epoch_row(b, cJSON_GetArrayItem(epochs, i - 1), i, best, vm);
  cli_sb_add(b, "</tbody></table></details></div>", 32);
}

/* A dB figure, or why there is none ("identical", "not measured"). */
static void layer_cell(char *buf, size_t n, const cJSON *l, const char *key, const char *state_key) {
  double db = num(l, key);
  if (!isnan(db)) snprintf(buf, n, "%.1f", db);
  else snprintf(buf, n, "%s", *str(l, state_key) ? str(l, state_key) : "not measured");
}

/* The --augment list of a run that used one. */
static void augment_note(cli_sbuf *b, const cJSON *r) {
  const char *aug = str(r, "augment");
  if (!*aug) return;
  cli_sb_printf(b, "<p class=\"facts\">Augmentation: ");
  cli_sb_esc(b, aug);
  cli_sb_printf(b, " (the same pixels for teacher and student; the teacher ran on every batch).</p>");
}

/* Trained activations the deployed model clamps (distill's range_warnings). */
static void range_notes(cli_sbuf *b, const cJSON *rec) {
  const cJSON *w;
  cJSON_ArrayForEach(w, cJSON_GetObjectItemCaseSensitive(rec, "range_warnings")) {
    char v[32], end[32], by[32];
    cli_sb_printf(b, "<p class=\"facts bad\">Outside its activation grid: ");
    cli_sb_esc(b, str(w, "tensor"));
    cli_sb_printf(b, ", %.0f of %.0f values on %.0f of %.0f samples clamped; furthest %s against the range end %s "
              "(%s beyond).</p>", num(w, "values_outside"), num(w, "values"), num(w, "samples_outside"),
              num(w, "samples"), fig(v, sizeof v, num(w, "worst_value")), fig(end, sizeof end, num(w, "range_end")),
              fig(by, sizeof by, num(w, "beyond")));
  }
}

/* Per-layer closeness to the dense model, when distill measured it. */
static void layer_table(cli_sbuf *b, const cJSON *rec) {
  const cJSON *layers = cJSON_GetObjectItemCaseSensitive(rec, "layers");
  if (cJSON_GetArraySize(layers) == 0) return;
  cli_sb_printf(b, "<details><summary>Layer outputs against the dense model (%d layers; signal-to-noise ratio in dB, "
            "higher is closer)</summary><table><thead><tr><th class=\"l\">student tensor</th><th>before</th>"
            "<th>after</th></tr></thead><tbody>", cJSON_GetArraySize(layers));
  const cJSON *l;
  cJSON_ArrayForEach(l, layers) {
    char before[32], after[32];
    layer_cell(before, sizeof before, l, "sqnr_before_db", "state_before");
    layer_cell(after, sizeof after, l, "sqnr_after_db", "state_after");
    cli_sb_add(b, "<tr><td class=\"l\">", 18);
    cli_sb_esc(b, str(l, "student"));
    cli_sb_printf(b, "</td><td>%s</td><td>%s</td></tr>", before, after);
  }
  cli_sb_add(b, "</tbody></table></details>", 26);
}

static void job_card(cli_sbuf *b, const cJSON *r) {
  cli_sb_add(b, "<div class=\"job\"><h3>", 21);
  cli_sb_esc(b, str(r, "name"));
  cli_sb_printf(b, " <span class=\"%s\">(", is_ok(r) ? "ok" : "bad");
  cli_sb_esc(b, str(r, "status"));
  cli_sb_add(b, ")</span></h3>", 13);
  cli_sb_add(b, "<p class=\"facts\">", 17);
  cli_sb_esc(b, str(r, "student"));
  cli_sb_add(b, " → ", 5);
  cli_sb_esc(b, str(r, "out"));
  cli_sb_add(b, " (teacher ", 10);
  cli_sb_esc(b, str(r, "teacher"));
  if (*str(r, "host")) { /* batch under mpirun: where the job ran */
    cli_sb_add(b, "; ran on ", 9);
    cli_sb_esc(b, str(r, "host"));
  }
  cli_sb_add(b, ")</p>", 5);
  if (!has_results(r)) {
    cli_sb_add(b, "<p class=\"err\">", 15);
    cli_sb_esc(b, *str(r, "error") ? str(r, "error") : "no results");
    if (*str(r, "log")) {
      cli_sb_add(b, " (log: ", 7);
      cli_sb_esc(b, str(r, "log"));
      cli_sb_add(b, ")", 1);
    }
    cli_sb_add(b, "</p></div>", 10);
    return;
  }
  cli_sb_add(b, "<div class=\"row\">", 17);
  history_chart(b, r);
  epoch_table(b, r);
  cli_sb_add(b, "</div>", 6);
  char t[32];
  fmt_duration(t, sizeof t, num(r, "seconds"));
  const cJSON *imp = cJSON_GetObjectItemCaseSensitive(r, "improved");
  cli_sb_printf(b, "<p class=\"facts\">%.0f steps in %s (%.0f samples/s) on %.0f training and %.0f validation samples; "
            "pruned entries kept at zero: %.0f (masks %s).%s</p>", num(r, "steps"), t,
            num(r, "samples_per_s"), num(r, "train_samples"), num(r, "val_samples"), num(r, "pruned_zeros_kept"),
            masks_text(r),
            cJSON_IsFalse(imp) ? " Training never beat the input on validation: the input's values were written." : "");
  augment_note(b, r);
  range_notes(b, r);
  layer_table(b, r);
  cli_sb_add(b, "</div>", 6);
}

static void write_html(cli_sbuf *b, const char *title, const cJSON *meta, const cJSON *records) {
  int n = 0, ok = 0;
  const cJSON *r;
  cJSON_ArrayForEach(r, records) n++, ok += is_ok(r);
  const char *vm = zoo_metric(records);
  cli_sb_printf(b, "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\"><title>");
  cli_sb_esc(b, title);
  cli_sb_printf(b, "</title><style>%s</style></head><body>\n<h1>", STYLE);
  cli_sb_esc(b, title);
  cli_sb_printf(b, "</h1><p class=\"sub\">%d job%s: %d recovered, %d not", n, n == 1 ? "" : "s", ok, n - ok);
  const char *when = str(meta, "generated"), *shard = str(meta, "shard");
  if (*shard && strcmp(shard, "all")) cli_sb_printf(b, " · shard %s", shard);
  if (*when) {
    cli_sb_add(b, " · ", 4);
    cli_sb_esc(b, when);
  }
  cli_sb_printf(b, " · recoup %s</p>\n", RECOUP_VERSION);
  cli_sb_printf(b, "<p class=\"caution\"><strong>Caution.</strong> %s</p>\n", CAUTION);
  cli_sb_printf(b, "<h2>Summary</h2><p>Validation %s of the dense model (teacher), the compressed input and the "
            "recovered output, measured on each job's validation samples%s.</p>", vm,
            strcmp(vm, "accuracy") ? " (agreement: how often the top class equals the dense model's)" : "");
  summary_table(b, records, vm);
  cli_sb_add(b, "\n", 1);
  if (ok) {
    cli_sb_printf(b, "<h2>Across the zoo</h2>");
    zoo_chart(b, records, vm);
  }
  cli_sb_printf(b, "\n<h2>Jobs</h2><p>Per job: training loss along the optimizer steps (left axis) and validation "
            "accuracy, or agreement when there are no labels (right axis), measured on the compressed input and at "
            "the end of every epoch. The state written (kept) is the one with the lowest validation KL to the dense "
            "model (with labels: α·KL + (1 − α)·cross-entropy, the mix training minimises); accuracy and agreement are "
            "shown beside it but do not decide.</p>\n");
  cJSON_ArrayForEach(r, records) {
    job_card(b, r);
    cli_sb_add(b, "\n", 1);
  }
  cli_sb_add(b, "</body></html>\n", 15);
}

/* ---- Writing the folder ------------------------------------------------------------------ */

static rc_status write_escaped(const char *dir, const cJSON *meta, const cJSON *records, rc_err *e);

/* Names and paths in records come from files: every report format gets them
 * escaped (cli_json_escape_tree), HTML then adds its entities. */
rc_status cli_report_write(const char *dir, const cJSON *meta, const cJSON *records, rc_err *e) {
  cJSON *m = cJSON_Duplicate(meta, 1), *r = cJSON_Duplicate(records, 1);
  rc_status s = m && r ? RC_OK : rc_err_set(e, RC_ERR_NOMEM, "out of memory");
  if (s == RC_OK) {
    cli_json_escape_tree(m);
    cli_json_escape_tree(r);
    s = write_escaped(dir, m, r, e);
  }
  cJSON_Delete(m);
  cJSON_Delete(r);
  return s;
}

static rc_status write_escaped(const char *dir, const cJSON *meta, const cJSON *records, rc_err *e) {
  char path[4200];
  const cJSON *r;
  cJSON_ArrayForEach(r, records) {
    snprintf(path, sizeof path, "%s/jobs/%s.json", dir, str(r, "name"));
    RC_TRY(write_json(path, r, e));
  }
  cJSON *all = cJSON_CreateObject();
  if (!all) return rc_err_set(e, RC_ERR_NOMEM, "out of memory");
  cJSON_AddItemToObject(all, "meta", cJSON_Duplicate(meta, 1));
  cJSON_AddItemToObject(all, "jobs", cJSON_Duplicate(records, 1));
  snprintf(path, sizeof path, "%s/report.json", dir);
  rc_status s = write_json(path, all, e);
  cJSON_Delete(all);
  RC_TRY(s);
  const char *title = *str(meta, "title") ? str(meta, "title") : "recoup report";
  cli_sbuf b = {0};
  write_csv(&b, records);
  s = write_sbuf(dir, "summary.csv", &b, e);
  b.n = 0;
  if (s == RC_OK) {
    write_markdown(&b, title, records);
    s = write_sbuf(dir, "summary.md", &b, e);
    b.n = 0;
  }
  if (s == RC_OK) {
    write_html(&b, title, meta, records);
    s = write_sbuf(dir, "report.html", &b, e);
  }
  free(b.p);
  return s;
}
