/* recoup distill: fine-tune the compressed copy against the dense model. */
#define _DEFAULT_SOURCE /* realpath */
#include <cJSON.h>
#include <errno.h>
#include <getopt.h>
#include <libgen.h>
#include <limits.h>
#include <math.h>
#include <signal.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include "cli/cli.h"
#include "cli/cli_data.h"
#include "cli/cli_outputs.h"
#include "cli/cli_synth.h"
#include "cli/distill_options.h"
#include "cli/report.h"
#include "cli/weight_rules.h"
#include "recoup/distill.h"
#include "recoup/model.h"
#include "recoup/parallel.h"
#include "recoup/synthesize.h"
#include "recoup/util.h"

#define MAX_GLOBS 32

static void usage(FILE *f) {
  static const char *const heads[CLI_GROUP_COUNT] = {
      "Models:", "Data:", "Training (defaults chosen for recovery fine-tuning from a good start):", "Interruption:",
      "Output:"};
  fprintf(f,
      "Usage: recoup distill --teacher DENSE.onnx --student COMPRESSED.onnx --data X\n"
      "                      --out RECOVERED.onnx [OPTIONS]\n"
      "\n"
      "Fine-tune a pruned (or otherwise compressed) model on CPU so that its outputs\n"
      "match the dense model's (knowledge distillation). Weights that are exactly zero\n"
      "in the student stay exactly zero. Labels are optional: the teacher's outputs\n"
      "are the target; labels, when given, add a cross-entropy term.\n");
  for (int g = 0; g < CLI_GROUP_COUNT; g++) {
    fprintf(f, "\n%s\n", heads[g]);
    cli_distill_options_help(f, (cli_opt_group)g);
    if (g == CLI_GROUP_INTERRUPTION) fprintf(f, "  SIGINT or SIGTERM writes a checkpoint and exits with status 1.\n");
    if (g == CLI_GROUP_OUTPUT) fprintf(f, "  -h, --help               show this help\n");
  }
  fprintf(f,
      "\n"
      "The state with the lowest validation KL to the teacher is written (with\n"
      "labels: alpha*KL + (1-alpha)*cross-entropy); accuracy and agreement are shown\n"
      "beside it but do not decide. Validate the recovered model on your own held-out\n"
      "data before deploying it: the figures hold only for the samples measured.\n");
}

typedef struct distill_args {
  const char *teacher, *student, *out, *val_labels;
  cli_data_opts data;
  const char *val_data[CLI_MAX_DATA];
  int n_val_data;
  double val_split;
  const char *train[MAX_GLOBS], *freeze[MAX_GLOBS];
  int n_train, n_freeze;
  long threads;
  int json;
  const cli_samples *train_samples; /* for the image summary in --json and reports */
  const char *checkpoint;
  char checkpoint_buf[4096];
  const char *pairs[MAX_GLOBS];
  float pair_weights[MAX_GLOBS];
  int n_pairs;
  const char *config;
  const char *report;
  char *config_strings; /* pair names read from --config, freed at exit */
  char config_loss[2048]; /* the "loss" of --config as settings text */
  rc_distill_settings cfg;
  cli_outputs outs;
  char augment[RC_DISTILL_AUGMENT_MAX]; /* every --augment joined with ',' */
} distill_args;

/* --augment LIST (repeatable): checked here, so a typo is a usage error
 * before any model is read; the run parses the joined list again. */
static int add_augment(distill_args *a, const char *v) {
  size_t used = strlen(a->augment);
  if (used + strlen(v) + 2 > sizeof a->augment)
    return cli_usage_error("distill", "--augment: the list is too long");
  snprintf(a->augment + used, sizeof a->augment - used, "%s%s", used ? "," : "", v);
  rc_err e = {0};
  if (rc_distill_augment_check(a->augment, &e) != RC_OK) return cli_option_usage_error("distill", "--augment", &e);
  a->cfg.augment = a->augment;
  return 0;
}

static int apply_option(distill_args *a, int c, const char *v) {
  rc_distill_settings *cfg = &a->cfg;
  if (c < CLI_OPT_BASE || c >= CLI_OPT_BASE + CLI_DISTILL_N_OPTIONS) return cli_usage_error("distill", "unknown option");
  double d = 0;
  long l = 0;
  if (cli_option_value(&cli_distill_options[c - CLI_OPT_BASE], v, &d, &l)) return RC_EXIT_USAGE;
  switch ((cli_distill_opt)(c - CLI_OPT_BASE)) {
    case CLI_DISTILL_TEACHER: a->teacher = v; return 0;
    case CLI_DISTILL_STUDENT: a->student = v; return 0;
    case CLI_DISTILL_OUT: a->out = v; return 0;
    case CLI_DISTILL_DATA:
      if (a->data.n_data == CLI_MAX_DATA) return cli_usage_error("distill", "too many --data");
      a->data.data[a->data.n_data++] = v;
      return 0;
    case CLI_DISTILL_LABELS: a->data.labels = v; return 0;
    case CLI_DISTILL_VAL_DATA:
      if (a->n_val_data == CLI_MAX_DATA) return cli_usage_error("distill", "too many --val-data");
      a->val_data[a->n_val_data++] = v;
      return 0;
    case CLI_DISTILL_VAL_LABELS: a->val_labels = v; return 0;
    case CLI_DISTILL_VAL_SPLIT: a->val_split = d; return 0;
    case CLI_DISTILL_SCALE: return cli_data_option(&a->data, "distill", "scale", v);
    case CLI_DISTILL_MEAN: return cli_data_option(&a->data, "distill", "mean", v);
    case CLI_DISTILL_STD: return cli_data_option(&a->data, "distill", "std", v);
    case CLI_DISTILL_RESIZE: return cli_data_option(&a->data, "distill", "resize", v);
    case CLI_DISTILL_SKIP_BAD: return cli_data_option(&a->data, "distill", "skip-bad", v);
    case CLI_DISTILL_IMAGE_MEMORY: return cli_data_option(&a->data, "distill", "image-memory", v);
    case CLI_DISTILL_CACHE_MB: a->cfg.cache_bytes = (size_t)l << 20; return 0;
    case CLI_DISTILL_AUGMENT: return add_augment(a, v);
    case CLI_DISTILL_EPOCHS: cfg->epochs = l; return 0;
    case CLI_DISTILL_STEPS: cfg->steps = l; return 0;
    case CLI_DISTILL_BATCH: cfg->batch = l; return 0;
    /* An unset rate or weight decay is the chosen optimizer's default. */
    case CLI_DISTILL_OPTIMIZER:
      cfg->optimizer = l == 1 ? RC_DISTILL_OPT_SGD : RC_DISTILL_OPT_ADAMW;
      return 0; /* adamw, sgd */
    case CLI_DISTILL_LR: cfg->lr = (float)d; return 0;
    case CLI_DISTILL_SCHEDULE: /* choices: cosine, step, constant */
      cfg->schedule = l == 0   ? RC_DISTILL_SCHED_COSINE
                      : l == 1 ? RC_DISTILL_SCHED_STEP
                               : RC_DISTILL_SCHED_CONSTANT;
      return 0;
    case CLI_DISTILL_WARMUP: cfg->warmup = l; return 0;
    case CLI_DISTILL_STEP_SIZE: cfg->step_size = l; return 0;
    case CLI_DISTILL_GAMMA: cfg->gamma = (float)d; return 0;
    case CLI_DISTILL_WEIGHT_DECAY: cfg->weight_decay = (float)d; return 0;
    case CLI_DISTILL_MOMENTUM: cfg->momentum = (float)d; return 0;
    case CLI_DISTILL_NO_NESTEROV: cfg->nesterov = 0; return 0;
    case CLI_DISTILL_CLIP: cfg->clip = d; return 0;
    case CLI_DISTILL_LOSS: {
      rc_err e = {0};
      if (rc_distill_loss_check(v, &e) != RC_OK) return cli_option_usage_error("distill", "--loss", &e);
      cfg->loss = v;
      return 0;
    }
    case CLI_DISTILL_PAIR:
      if (a->n_pairs == MAX_GLOBS) return cli_usage_error("distill", "too many --pair");
      a->pairs[a->n_pairs] = v;
      a->pair_weights[a->n_pairs++] = 1.0f;
      return 0;
    case CLI_DISTILL_CONFIG: a->config = v; return 0;
    case CLI_DISTILL_REPORT: a->report = v; return 0;
    case CLI_DISTILL_TEMPERATURE: cfg->temperature = (float)d; return 0;
    case CLI_DISTILL_ALPHA: cfg->alpha = (float)d; return 0;
    case CLI_DISTILL_BN: cfg->bn = (rc_bn_mode)l; return 0;       /* choices in rc_bn_mode's order */
    case CLI_DISTILL_MASK: cfg->mask = (rc_mask_mode)l; return 0; /* choices in rc_mask_mode's order */
    case CLI_DISTILL_TRAIN:
      if (a->n_train == MAX_GLOBS) return cli_usage_error("distill", "too many --train");
      a->train[a->n_train++] = v;
      return 0;
    case CLI_DISTILL_FREEZE:
      if (a->n_freeze == MAX_GLOBS) return cli_usage_error("distill", "too many --freeze");
      a->freeze[a->n_freeze++] = v;
      return 0;
    case CLI_DISTILL_SEED: cfg->seed = (uint64_t)l; return 0;
    case CLI_DISTILL_THREADS: a->threads = l; return 0;
    case CLI_DISTILL_JSON: a->json = 1; return 0;
    case CLI_DISTILL_CHECKPOINT: a->checkpoint = v; return 0;
    case CLI_DISTILL_CHECKPOINT_EVERY: cfg->checkpoint_every = l; return 0;
    case CLI_DISTILL_RESUME: cfg->resume_path = v; return 0;
    case CLI_DISTILL_OUTPUT_LOSS: return cli_outputs_add_spec(&a->outs, "distill", v);
    case CLI_DISTILL_TARGETS: return cli_outputs_add_targets(&a->outs, "distill", v, 0);
    case CLI_DISTILL_VAL_TARGETS: return cli_outputs_add_targets(&a->outs, "distill", v, 1);
    case CLI_DISTILL_IGNORE_LABEL: a->outs.ignore = l; return 0;
    case CLI_DISTILL_N_OPTIONS: break;
  }
  return cli_usage_error("distill", "unknown option");
}

/* "output_loss": ["OUT=TERM[:key=value...]", ...], as --output-loss. */
static int config_output_losses(distill_args *a, const cJSON *list) {
  if (!list) return 0;
  if (!cJSON_IsArray(list))
    return cli_usage_error("distill", "--config %s: \"output_loss\" must be an array of \"OUT=TERM[:key=value...]\"",
                           a->config);
  for (const cJSON *it = list->child; it; it = it->next) {
    if (!cJSON_IsString(it))
      return cli_usage_error("distill", "--config %s: \"output_loss\" items must be strings", a->config);
    if (cli_outputs_add_spec(&a->outs, "distill", it->valuestring)) return RC_EXIT_USAGE;
  }
  return 0;
}

/* --config FILE: {"loss": {"kd": 1, "hint": 0.5}, "pairs": [{"teacher": T,
 * "student": S, "weight": W}]}. Keys other than these are refused. */
static int read_config(distill_args *a) {
  FILE *f = fopen(a->config, "rb");
  if (!f) return cli_usage_error("distill", "--config %s: %s", a->config, strerror(errno));
  char *text = malloc(1 << 20);
  size_t n = text ? fread(text, 1, (1 << 20) - 1, f) : 0;
  fclose(f);
  if (!text) return cli_usage_error("distill", "--config: out of memory");
  text[n] = 0;
  cJSON *root = cJSON_Parse(text);
  free(text);
  int rc = 0;
  if (!cJSON_IsObject(root)) {
    rc = cli_usage_error("distill", "--config %s: not a JSON object", a->config);
    goto out;
  }
  for (cJSON *it = root->child; it; it = it->next)
    if (strcmp(it->string, "loss") && strcmp(it->string, "pairs") && strcmp(it->string, "output_loss")) {
      rc = cli_usage_error("distill", "--config %s: unknown key '%s' (expected loss, pairs, output_loss)", a->config,
                           it->string);
      goto out;
    }
  cJSON *loss = cJSON_GetObjectItemCaseSensitive(root, "loss");
  if (loss) {
    char spec[2048] = "";
    size_t used = 0;
    if (!cJSON_IsObject(loss)) {
      rc = cli_usage_error("distill", "--config %s: \"loss\" must be an object of term: weight", a->config);
      goto out;
    }
    for (cJSON *t = loss->child; t; t = t->next) {
      if (!cJSON_IsNumber(t)) {
        rc = cli_usage_error("distill", "--config %s: loss term '%s' needs a number", a->config, t->string);
        goto out;
      }
      used += (size_t)snprintf(spec + used, used < sizeof spec ? sizeof spec - used : 0, "%s%s=%.9g", used ? "," : "",
                               t->string, t->valuedouble);
    }
    rc_err e = {0};
    if (rc_distill_loss_check(spec, &e) != RC_OK) {
      rc = cli_usage_error("distill", "--config %s: \"loss\": %s", a->config, e.msg);
      goto out;
    }
    snprintf(a->config_loss, sizeof a->config_loss, "%s", spec);
    a->cfg.loss = a->config_loss;
  }
  if ((rc = config_output_losses(a, cJSON_GetObjectItemCaseSensitive(root, "output_loss"))) != 0) goto out;
  cJSON *pairs = cJSON_GetObjectItemCaseSensitive(root, "pairs");
  if (pairs) {
    int count = cJSON_GetArraySize(pairs);
    size_t bytes = 0;
    for (cJSON *p = pairs->child; p; p = p->next) {
      cJSON *t = cJSON_GetObjectItemCaseSensitive(p, "teacher"), *s = cJSON_GetObjectItemCaseSensitive(p, "student");
      if (!cJSON_IsString(t) || !cJSON_IsString(s)) {
        rc = cli_usage_error("distill", "--config %s: each pair needs \"teacher\" and \"student\" strings", a->config);
        goto out;
      }
      bytes += strlen(t->valuestring) + strlen(s->valuestring) + 2;
    }
    if (!cJSON_IsArray(pairs) || a->n_pairs + count > MAX_GLOBS) {
      rc = cli_usage_error("distill", "--config %s: \"pairs\" must be an array of at most %d pairs", a->config, MAX_GLOBS);
      goto out;
    }
    a->config_strings = malloc(bytes + 1);
    char *cur = a->config_strings;
    for (cJSON *p = pairs->child; p && cur; p = p->next) {
      cJSON *w = cJSON_GetObjectItemCaseSensitive(p, "weight");
      int len = sprintf(cur, "%s=%s", cJSON_GetObjectItemCaseSensitive(p, "teacher")->valuestring,
                        cJSON_GetObjectItemCaseSensitive(p, "student")->valuestring);
      a->pairs[a->n_pairs] = cur;
      a->pair_weights[a->n_pairs++] = cJSON_IsNumber(w) ? (float)w->valuedouble : 1.0f;
      cur += len + 1;
    }
  }
out:
  cJSON_Delete(root);
  return rc;
}

static int apply_option_ctx(void *a, int c, const char *v) { return apply_option(a, c, v); }

static int parse_args(distill_args *a, int argc, char **argv) {
  struct option longopts[CLI_DISTILL_N_OPTIONS + 2];
  cli_distill_longopts(longopts);
  memset(a, 0, sizeof *a);
  cli_data_opts_init(&a->data);
  cli_outputs_init(&a->outs);
  rc_distill_settings_init(&a->cfg);
  for (int i = 0; i < CLI_DISTILL_N_OPTIONS; i++)
    if (cli_distill_options[i].dflt && apply_option(a, CLI_OPT_BASE + i, cli_distill_options[i].dflt))
      return RC_EXIT_FAIL; /* a default the table itself refuses */
  int pr = cli_parse_options(argc, argv, longopts, "distill", apply_option_ctx, a, usage);
  if (pr) return pr;
  if (optind != argc) return cli_usage_error("distill", "unexpected argument '%s'", argv[optind]);
  if (!a->teacher || !a->student || !a->data.n_data || !a->out)
    return cli_usage_error("distill", "--teacher, --student, --data and --out are required");
  if (a->val_labels && !a->n_val_data) return cli_usage_error("distill", "--val-labels needs --val-data");
  if (!a->checkpoint) {
    snprintf(a->checkpoint_buf, sizeof a->checkpoint_buf, "%s.ckpt", a->out);
    a->checkpoint = a->checkpoint_buf;
  }
  a->cfg.checkpoint_path = a->checkpoint;
  if (a->config && read_config(a)) return RC_EXIT_USAGE;
  a->cfg.pairs = a->pairs;
  a->cfg.pair_weights = a->pair_weights;
  a->cfg.n_pairs = a->n_pairs;
  a->cfg.train_globs = a->train;
  a->cfg.n_train = a->n_train;
  a->cfg.freeze_globs = a->freeze;
  a->cfg.n_freeze = a->n_freeze;
  a->cfg.output_losses = a->outs.specs;
  a->cfg.n_output_losses = a->outs.n;
  return 0;
}

/* The report's job name: the output's file name without ".onnx". */
static void report_name(const char *out, char *name, size_t n) {
  const char *slash = strrchr(out, '/');
  snprintf(name, n, "%s", slash ? slash + 1 : out);
  size_t len = strlen(name);
  if (len > 5 && !strcmp(name + len - 5, ".onnx")) name[len - 5] = '\0';
}

/* Nothing this run writes (the model, its checkpoints, the report's files)
 * may be a file it reads: compared as files, so links and "./x" count too. */
static int check_output_path(const distill_args *a, rc_err *e) {
  const char *inputs[8 + 2 * CLI_MAX_DATA], *labels[8 + 2 * CLI_MAX_DATA];
  int n = 0;
#define INPUT(path, label) (inputs[n] = (path), labels[n++] = (label))
  INPUT(a->teacher, "--teacher");
  INPUT(a->student, "--student");
  for (int i = 0; i < a->data.n_data; i++) INPUT(cli_data_file(a->data.data[i]), "--data");
  for (int i = 0; i < a->n_val_data; i++) INPUT(cli_data_file(a->val_data[i]), "--val-data");
  INPUT(a->data.labels, "--labels");
  INPUT(a->val_labels, "--val-labels");
  INPUT(a->config, "--config");
#undef INPUT
  char prev[4200];
  snprintf(prev, sizeof prev, "%s.1", a->checkpoint);
  if (cli_check_output("--out", a->out, inputs, labels, n, e)) return -1;
  /* Checkpoints are removed once the output is written: never the output either. */
  inputs[n] = a->out, labels[n++] = "--out";
  if (rc_path_refuse_inputs("--checkpoint", a->checkpoint, inputs, labels, n, e) ||
      rc_path_refuse_inputs("--checkpoint", prev, inputs, labels, n, e))
    return -1;
  /* --resume is read, then replaced by the run's own checkpoints; the output never. */
  if (a->cfg.resume_path && rc_path_same_file(a->out, a->cfg.resume_path)) {
    rc_err_set(e, RC_ERR_INVALID, "--resume %s is the output file", a->cfg.resume_path);
    return -1;
  }
  if (a->report) {
    char name[256];
    report_name(a->out, name, sizeof name);
    const char *names[1] = {name};
    inputs[n] = a->checkpoint, labels[n++] = "--checkpoint";
    inputs[n] = a->cfg.resume_path, labels[n++] = "--resume";
    if (cli_report_refuse_inputs(a->report, names, 1, inputs, labels, n, e) != RC_OK) return -1;
  }
  return 0;
}

/* ---- Progress -------------------------------------------------------------- */

typedef struct progress_state {
  int tty;
  double last_print;
  int json;
} progress_state;

static void fmt_time(double s, char *buf, size_t n) {
  long t = (long)(s + 0.5);
  snprintf(buf, n, "%ld:%02ld:%02ld", t / 3600, t / 60 % 60, t % 60);
}

/* Reading input is shown once the step waits for it this share of the time:
 * then the readers' rate, not the step, sets the pace. */
#define CLI_INPUT_BOUND_SHARE 0.05

static void on_progress(void *user, const rc_distill_progress *p) {
  progress_state *ps = user;
  char eta[32], loss[32], kl[32];
  rc_fmt_sig(loss, sizeof loss, p->loss, RC_FMT_SIG, 0);
  if (p->event == RC_DISTILL_EPOCH) {
    if (ps->tty) fprintf(stderr, "\r\033[K");
    fprintf(stderr, "epoch %lld/%lld  loss %s", (long long)p->epoch, (long long)p->epochs, loss);
    if (p->val.has_labels) fprintf(stderr, "  val accuracy %.2f%%", 100 * p->val.top1);
    fprintf(stderr, "  agreement %.2f%%  %s %s%s\n", 100 * p->val.agreement, p->val.outputs ? "output loss" : "KL",
            rc_fmt_sig(kl, sizeof kl, p->val.kl, RC_FMT_SIG, 0), p->is_best ? "  (best so far)" : "");
    return;
  }
  fmt_time(p->eta_s, eta, sizeof eta);
  char input[64] = "";
  if (p->input_wait_share >= CLI_INPUT_BOUND_SHARE)
    snprintf(input, sizeof input, "  input-bound: %.0f samples/s read, %.0f%% waiting", p->input_samples_per_s,
             100 * p->input_wait_share);
  if (ps->tty) {
    if (p->elapsed_s - ps->last_print < 0.2 && p->step != p->steps) return;
    ps->last_print = p->elapsed_s;
    fprintf(stderr, "\r\033[Kepoch %lld/%lld  step %lld/%lld  loss %s  %.0f samples/s  %s left%s",
            (long long)p->epoch, (long long)p->epochs, (long long)p->step, (long long)p->steps, loss,
            p->samples_per_s, eta, input);
    fflush(stderr);
  } else if (p->elapsed_s - ps->last_print >= 10 || p->step == p->steps) {
    ps->last_print = p->elapsed_s;
    fprintf(stderr, "epoch %lld/%lld step %lld/%lld loss %s %.0f samples/s %s left%s\n", (long long)p->epoch,
            (long long)p->epochs, (long long)p->step, (long long)p->steps, loss, p->samples_per_s, eta, input);
  }
}

/* ---- Results ------------------------------------------------------------------ */

static void table_row(const char *name, const rc_metrics *m) {
  char acc[32] = "-", kl[32];
  if (m->has_labels) snprintf(acc, sizeof acc, "%.2f%%", 100 * m->top1);
  printf("  %-22s %10s %12.2f%% %14s\n", name, acc, 100 * m->agreement,
         rc_fmt_sig(kl, sizeof kl, m->kl, RC_FMT_SIG, 0));
}

/* JSON has no infinity or NaN: a number, or null beside a state saying why. */
static const char *layer_state(double db, int64_t samples) {
  return samples == 0 ? "not measured" : isinf(db) && db > 0 ? "identical" : "measured";
}

static const char *layer_cell(char *buf, size_t n, double db, int64_t samples) {
  if (!strcmp(layer_state(db, samples), "measured")) snprintf(buf, n, "%.1f", db);
  else snprintf(buf, n, "%s", layer_state(db, samples));
  return buf;
}

static void layer_json(cJSON *o, const char *key, const char *state_key, double db, int64_t samples) {
  if (isfinite(db)) cJSON_AddNumberToObject(o, key, db);
  else cJSON_AddNullToObject(o, key);
  cJSON_AddStringToObject(o, state_key, layer_state(db, samples));
}

/* The deciding figure of train/select.h beside the metrics it is made of. */
static cJSON *metrics_json(const rc_metrics *m, double alpha) {
  cJSON *o = cJSON_CreateObject();
  if (m->has_labels) cJSON_AddNumberToObject(o, "accuracy", m->top1);
  else cJSON_AddNullToObject(o, "accuracy");
  cJSON_AddNumberToObject(o, "agreement", m->agreement);
  cJSON_AddNumberToObject(o, "kl", m->kl);
  if (m->has_labels) cJSON_AddNumberToObject(o, "cross_entropy", m->ce);
  double sel = rc_distill_selection(m, alpha);
  if (isfinite(sel)) cJSON_AddNumberToObject(o, "selection", sel);
  if (m->outputs) cli_outputs_metrics_json(o, m);
  return o;
}

static cJSON *range_json(const rc_range_check *c) {
  cJSON *o = cJSON_CreateObject();
  cJSON_AddStringToObject(o, "tensor", c->tensor);
  cJSON_AddNumberToObject(o, "worst_value", c->after.worst);
  cJSON_AddNumberToObject(o, "range_end", c->after.bound);
  cJSON_AddNumberToObject(o, "beyond", fabs(c->after.worst - c->after.bound));
  cJSON_AddNumberToObject(o, "values_outside", (double)c->after.values_out);
  cJSON_AddNumberToObject(o, "values", (double)c->after.values);
  cJSON_AddNumberToObject(o, "samples_outside", (double)c->after.samples_out);
  cJSON_AddNumberToObject(o, "samples", (double)c->after.samples);
  cJSON_AddNumberToObject(o, "values_outside_before", (double)c->before.values_out);
  return o;
}

/* Trained values the deployed model clamps: say which tensor, how far, how often. */
static void warn_ranges(const rc_distill_summary *r) {
  for (int i = 0; i < r->n_ranges; i++) {
    const rc_range_check *c = &r->ranges[i];
    if (!c->after.values_out) continue;
    char w[32], b[32], d[32], nb[512];
    fprintf(stderr,
            "recoup: warning: %lld of %lld values of '%s' on %lld of %lld validation samples lie outside "
            "its activation grid and are clamped: the furthest is %s against the grid's %s of %s (%s beyond); "
            "before training: %lld values\n",
            (long long)c->after.values_out, (long long)c->after.values, cli_esc(c->tensor, nb, sizeof nb),
            (long long)c->after.samples_out, (long long)c->after.samples,
            rc_fmt_sig(w, sizeof w, c->after.worst, RC_FMT_SIG, 0),
            c->after.worst > c->after.bound ? "maximum" : "minimum",
            rc_fmt_sig(b, sizeof b, c->after.bound, RC_FMT_SIG, 0),
            rc_fmt_sig(d, sizeof d, fabs(c->after.worst - c->after.bound), RC_FMT_SIG, 0),
            (long long)c->before.values_out);
  }
}

static cJSON *results_json(const distill_args *a, const rc_distill_summary *r, double verify_diff) {
  cJSON *root = cJSON_CreateObject();
  cJSON_AddStringToObject(root, "teacher", a->teacher);
  cJSON_AddStringToObject(root, "student", a->student);
  cJSON_AddStringToObject(root, "out", a->out);
  cJSON_AddNumberToObject(root, "train_samples", (double)r->n_train);
  cJSON_AddNumberToObject(root, "val_samples", (double)r->n_val);
  double alpha = r->select_alpha;
  cJSON_AddItemToObject(root, "dense", metrics_json(&r->teacher, alpha));
  cJSON_AddItemToObject(root, "compressed", metrics_json(&r->before, alpha));
  cJSON_AddItemToObject(root, "recovered", metrics_json(&r->after, alpha));
  cJSON_AddBoolToObject(root, "improved", r->improved);
  cJSON_AddNumberToObject(root, "best_epoch", (double)r->best_epoch);
  cJSON_AddStringToObject(root, "best_by", rc_distill_selection_name(&r->before, alpha));
  cJSON_AddNumberToObject(root, "best_by_alpha", alpha);
  cJSON_AddNumberToObject(root, "steps", (double)r->steps_done);
  cJSON_AddNumberToObject(root, "seconds", r->seconds);
  cJSON_AddNumberToObject(root, "samples_per_s", r->samples_per_s);
  cJSON_AddNumberToObject(root, "ranks", r->ranks);
  cJSON_AddNumberToObject(root, "comm_seconds_per_step", r->comm_seconds_per_step);
  cJSON_AddNumberToObject(root, "comm_bytes_per_step", 4.0 * (double)r->comm_values_per_step);
  cJSON_AddNumberToObject(root, "trainable_tensors", r->n_trainable_tensors);
  cJSON_AddNumberToObject(root, "trainable_values", (double)r->n_trainable);
  cJSON_AddNumberToObject(root, "pruned_zeros_kept", (double)r->n_frozen_zeros);
  cJSON_AddBoolToObject(root, "masks_intact", r->mask_ok);
  cJSON_AddNumberToObject(root, "quantized_weights_rewritten", r->n_grids);
  cJSON_AddItemToObject(root, "weights", cli_weight_rules_json(r->rules, r->n_rules));
  cJSON_AddNumberToObject(root, "rollbacks", r->rollbacks);
  cJSON_AddNumberToObject(root, "reload_max_diff", verify_diff);
  if (a->train_samples) cli_images_json(root, a->train_samples);
  cJSON_AddStringToObject(root, "teacher_cache",
                          r->teacher_cache_off       ? "off (augmentation)"
                          : r->teacher_cache_in_file ? "file"
                                                     : "memory");
  cJSON_AddNumberToObject(root, "teacher_cache_bytes", (double)r->teacher_cache_bytes);
  cJSON_AddNumberToObject(root, "teacher_cached_samples", (double)r->teacher_cached_samples);
  cJSON_AddStringToObject(root, "augment", r->augment);
  cJSON *layers = cJSON_AddArrayToObject(root, "layers");
  for (int i = 0; i < r->n_layers; i++) {
    cJSON *o = cJSON_CreateObject();
    cJSON_AddStringToObject(o, "teacher", r->layers[i].teacher);
    cJSON_AddStringToObject(o, "student", r->layers[i].student);
    const rc_layer_error *l = &r->layers[i];
    layer_json(o, "sqnr_before_db", "state_before", l->sqnr_before_db, l->samples_before);
    layer_json(o, "sqnr_after_db", "state_after", l->sqnr_after_db, l->samples_after);
    cJSON_AddNumberToObject(o, "samples", (double)l->samples_after);
    cJSON_AddItemToArray(layers, o);
  }
  cJSON *ranges = cJSON_AddArrayToObject(root, "range_warnings");
  for (int i = 0; i < r->n_ranges; i++)
    if (r->ranges[i].after.values_out) cJSON_AddItemToArray(ranges, range_json(&r->ranges[i]));
  cJSON *hist = cJSON_AddArrayToObject(root, "epochs");
  for (int64_t i = 0; i < r->n_epochs; i++) {
    cJSON *o = metrics_json(&r->epoch_val[i], alpha);
    cJSON_AddNumberToObject(o, "train_loss", r->epoch_loss[i]);
    int64_t end = (i + 1) * r->steps_per_epoch;
    cJSON_AddNumberToObject(o, "step", (double)(end < r->steps_done ? end : r->steps_done));
    cJSON_AddItemToArray(hist, o);
  }
  cJSON *trace = cJSON_AddArrayToObject(root, "loss_trace");
  for (int i = 0; i < r->n_trace; i++) {
    cJSON *pt = cJSON_CreateArray();
    cJSON_AddItemToArray(pt, cJSON_CreateNumber((double)r->trace_step[i]));
    cJSON_AddItemToArray(pt, cJSON_CreateNumber(r->trace_loss[i]));
    cJSON_AddItemToArray(trace, pt);
  }
  return root;
}

/* --report DIR: the report files recoup batch writes, for this one run. */
static rc_status write_report(const distill_args *a, const rc_distill_summary *r, double verify_diff, rc_err *e) {
  char name[256];
  report_name(a->out, name, sizeof name);
  char title[300];
  snprintf(title, sizeof title, "recoup distill: %s", name);
  cJSON *meta = cli_report_meta(title), *recs = cJSON_CreateArray();
  cJSON_AddItemToArray(recs, cli_report_record(name, 0, a->teacher, a->student, a->out, CLI_JOB_OK, NULL, NULL,
                                               results_json(a, r, verify_diff), r->seconds));
  rc_status s = cli_report_write(a->report, meta, recs, e);
  cJSON_Delete(meta);
  cJSON_Delete(recs);
  return s;
}

static void print_results(const distill_args *a, const rc_distill_summary *r, double verify_diff) {
  warn_ranges(r);
  if (a->json) {
    cJSON *root = results_json(a, r, verify_diff);
    char *text = cli_json_print(root);
    if (text) puts(text);
    free(text);
    cJSON_Delete(root);
    return;
  }
  char b1[32], b2[32];
  char ob[1024];
  printf("\nValidation on %lld held-out samples (%s):\n", (long long)r->n_val,
         a->n_val_data ? "--val-data" : "a seeded slice of --data");
  void (*row)(const char *, const rc_metrics *) = r->after.outputs ? cli_outputs_table_row : table_row;
  if (r->after.outputs)
    cli_outputs_table_header();
  else
    printf("  %-22s %10s %13s %14s\n", "model", "accuracy", "agreement", "KL to dense");
  row("dense (teacher)", &r->teacher);
  row("compressed (input)", &r->before);
  row("recovered (output)", &r->after);
  if (r->n_layers) {
    printf("\nLayer outputs against the dense model (signal-to-noise ratio, dB; higher is closer):\n");
    printf("  %-44s %12s %12s\n", "student tensor", "before", "after");
    for (int i = 0; i < r->n_layers; i++) {
      const rc_layer_error *l = &r->layers[i];
      char nb[512];
      printf("  %-44s %12s %12s\n", cli_esc(l->student, nb, sizeof nb),
             layer_cell(b1, sizeof b1, l->sqnr_before_db, l->samples_before),
             layer_cell(b2, sizeof b2, l->sqnr_after_db, l->samples_after));
    }
  }
  printf("\n%lld steps in %.1f s (%.0f samples/s); %s values trained in %d tensors\n", (long long)r->steps_done,
         r->seconds, r->samples_per_s, cli_group_digits(r->n_trainable, b1, sizeof b1), r->n_trainable_tensors);
  if (r->augment[0])
    printf(
        "augmentation: %s, the same pixels for teacher and student; the teacher ran on every batch (no "
        "teacher-output cache)\n",
        r->augment);
  printf("masks: %s pruned entries checked, all still exactly zero\n",
         cli_group_digits(r->n_frozen_zeros, b2, sizeof b2));
  if (r->n_grids)
    printf("grids: %d quantized weights rewritten on their unchanged grids (scales, zero points, dtypes, axes,\n"
           "       integer ranges; every integer checked inside its range)\n", r->n_grids);
  cli_weight_rules_print(r->rules, r->n_rules);
  printf("best state: lowest validation %s; agreement%s reported beside it\n",
         r->after.outputs
             ? "output loss (the --output-loss terms; with labels, alpha of it + (1-alpha) cross-entropy)"
         : strcmp(rc_distill_selection_name(&r->before, r->select_alpha), "kl")
             ? "alpha*KL + (1-alpha)*cross-entropy"
             : "KL to dense",
         r->after.has_labels ? " and accuracy" : "");
  if (r->improved)
    printf("wrote %s (best epoch %lld; reloaded and checked: outputs identical)\n", cli_esc(a->out, ob, sizeof ob),
           (long long)r->best_epoch);
  else
    printf("training never beat the input on validation: wrote %s with the input's values unchanged\n",
           cli_esc(a->out, ob, sizeof ob));
  if (r->rollbacks) printf("non-finite steps rolled back: %d%s\n", r->rollbacks, r->stopped_nonfinite ? " (stopped early)" : "");
  printf("\nValidate the recovered model on your own held-out data before deploying it;\n"
         "these figures hold only for the samples measured.\n");
}

/* ---- Signals --------------------------------------------------------------- */

static void remove_checkpoints(const char *path) {
  char prev[4200];
  snprintf(prev, sizeof prev, "%s.1", path);
  unlink(path);
  unlink(prev);
}

/* ---- The command ------------------------------------------------------------- */

/* The folder of path ("." when it names none), into buf. */
static void output_dir(const char *path, char *buf, size_t n) {
  char copy[4096];
  snprintf(copy, sizeof copy, "%s", path);
  snprintf(buf, n, "%s", dirname(copy));
}

/* --data synth:N: N inputs made from the teacher (recoup/synthesize.h), seeded by --seed. */
static rc_status synth_samples(cli_samples *s, const distill_args *a, rc_model *teacher, rc_err *e) {
  if (a->data.n_data != 1 || a->data.labels)
    return rc_err_set(e, RC_ERR_INVALID, "--data synth:N stands alone: no other --data, no --labels");
  rc_synth_config c;
  rc_synth_config_init(&c);
  c.count = cli_synth_count(a->data.data[0]);
  c.seed = a->cfg.seed;
  cli_synth_progress_state ps = {cli_isatty_stderr(), -1};
  c.progress = cli_synth_progress;
  c.user = &ps;
  rc_synth_stats stats;
  RC_TRY(rc_synthesize_array(&s->inputs[0], &stats, teacher, &c, e));
  s->n_inputs = 1;
  s->n = c.count;
  return RC_OK;
}

static rc_status load_val(cli_samples *val, const distill_args *a, const rc_model *m, rc_err *e) {
  cli_data_opts vo = a->data;
  memcpy(vo.data, a->val_data, sizeof vo.data);
  vo.n_data = a->n_val_data;
  vo.labels = cli_images_labels_word(a->val_labels) ? a->val_labels : NULL; /* image sets read their own labels */
  vo.labels_option = "--val-labels";
  return cli_samples_load(val, &vo, m, e);
}

int rc_cmd_distill(int argc, char **argv) {
  distill_args a;
  int pr = parse_args(&a, argc, argv);
  if (pr) return pr < 0 ? RC_EXIT_OK : pr;
  cli_set_threads((int)a.threads);
  rc_err e = {0};
  rc_model *teacher = NULL, *student = NULL;
  cli_samples train, val;
  memset(&train, 0, sizeof train);
  memset(&val, 0, sizeof val);
  rc_distill_summary r;
  memset(&r, 0, sizeof r);
  int rc = RC_EXIT_FAIL;
  double diff = 0;
  char cache_dir[4096];
  if (check_output_path(&a, &e)) goto out;
  /* Under mpirun every rank trains; rank 0 alone writes and prints. */
  int root = rc_dist_rank(cli_dist()) == 0;
  if (root && a.report && cli_report_prepare(a.report, 0, &e) != RC_OK) goto out;
  if (rc_model_load(&teacher, a.teacher, NULL, &e) != RC_OK || rc_model_load(&student, a.student, NULL, &e) != RC_OK)
    goto out;
  if (rc_distill_pair_check(teacher, student, &e) != RC_OK) goto out;
  if (cli_synth_count(a.data.data[0]) < 0) {
    rc_err_set(&e, RC_ERR_INVALID, "--data %s: expected synth:N with N > 0", a.data.data[0]);
    goto out;
  }
  /* The student's recorded preprocessing, else the teacher's. */
  a.data.ranks = rc_dist_size(cli_dist());
  if (cli_prep_apply(&a.data, student, &e) != RC_OK) goto out;
  if (!a.data.recorded && cli_prep_apply(&a.data, teacher, &e) != RC_OK) goto out;
  if (cli_synth_count(a.data.data[0]) > 0 ? synth_samples(&train, &a, teacher, &e) != RC_OK
                                           : cli_samples_load(&train, &a.data, student, &e) != RC_OK)
    goto out;
  if (a.n_val_data && load_val(&val, &a, student, &e) != RC_OK) goto out;
  rc_output_side side, val_side;
  memset(&side, 0, sizeof side);
  memset(&val_side, 0, sizeof val_side);
  if (a.outs.n) {
    if (cli_outputs_load(&a.outs, student, &train, a.data.labels, a.n_val_data ? &val : NULL, a.val_labels, &side,
                         &val_side, &e) != RC_OK)
      goto out;
    a.cfg.label_output = a.outs.label_output[0] ? a.outs.label_output : NULL;
  } else {
    int64_t k = 0;
    if (cli_output_classes(student, &train, &k, &e) != RC_OK) goto out;
    if (a.data.labels && cli_samples_load_labels(&train, a.data.labels, k, &e) != RC_OK) goto out;
    if (a.val_labels && cli_samples_load_labels(&val, a.val_labels, k, &e) != RC_OK) goto out;
  }
  rc_tensor ins[CLI_MAX_DATA], vins[CLI_MAX_DATA];
  for (int i = 0; i < train.n_inputs; i++) ins[i] = train.inputs[i].t;
  for (int i = 0; i < val.n_inputs; i++) vins[i] = val.inputs[i].t;
  rc_distill_data d = {ins, train.n_inputs, train.has_labels ? train.labels.t.data : NULL,
                       a.n_val_data ? vins : NULL, val.has_labels ? val.labels.t.data : NULL, a.val_split,
                       side, val_side, train.norm, train.inputs, a.n_val_data ? val.inputs : NULL};
  if (a.n_val_data && train.has_labels != val.has_labels) {
    rc_err_set(&e, RC_ERR_INVALID, "give labels for both --data and --val-data, or for neither");
    goto out;
  }
  progress_state ps = {cli_isatty_stderr(), -1e9, a.json};
  a.cfg.progress = root ? on_progress : NULL;
  a.cfg.dist = cli_dist();
  a.cfg.user = &ps;
  a.cfg.log = (rc_logger){cli_log_stderr, &ps.tty, RC_LOG_INFO};
  a.cfg.stop = &cli_stop_requested;
  cli_catch_stop_signals();
  output_dir(a.out, cache_dir, sizeof cache_dir); /* a spilled teacher cache goes beside the output */
  a.cfg.cache_dir = cache_dir;
  if (rc_distill_train(&r, teacher, student, &d, &a.cfg, &e) != RC_OK) goto out;
  if (root) {
    cli_images_finish(&train);
    cli_images_finish(&val);
  }
  if (!root) {
    rc = RC_EXIT_OK;
    goto out;
  }
  if (cli_prep_record(student, &a.data, &e) != RC_OK) goto out;
  if (rc_model_save(student, a.out, r.changed, r.n_changed, &e) != RC_OK) goto out;
  {
    rc_array first[CLI_MAX_DATA];
    rc_tensor fins[CLI_MAX_DATA];
    memset(first, 0, sizeof first);
    rc_status vs = cli_samples_first_batch(first, a.n_val_data ? &val : &train, a.cfg.batch, &e);
    for (int i = 0; i < train.n_inputs; i++) fins[i] = first[i].t;
    if (vs == RC_OK) vs = rc_distill_verify(a.out, student, fins, train.n_inputs, a.cfg.batch, &diff, &e);
    for (int i = 0; i < CLI_MAX_DATA; i++) rc_array_free(&first[i]);
    if (vs != RC_OK) goto out;
  }
  a.train_samples = &train;
  print_results(&a, &r, diff);
  remove_checkpoints(a.checkpoint);
  if (a.report && write_report(&a, &r, diff, &e) != RC_OK) goto out;
  rc = RC_EXIT_OK;
out:
  /* A stop request is summed with every step, so all ranks stop together
   * after rank 0's checkpoint: rank 0 says so, and the job ends normally. */
  if (e.code == RC_ERR_INTERRUPTED) cli_dist_agreed_exit();
  if (rc != RC_EXIT_OK && (e.code != RC_ERR_INTERRUPTED || rc_dist_rank(cli_dist()) == 0)) cli_fail(&e);
  rc_distill_summary_free(&r);
  cli_samples_free(&train);
  cli_samples_free(&val);
  free(a.config_strings);
  cli_outputs_free(&a.outs);
  rc_model_free(teacher);
  rc_model_free(student);
  return rc;
}
