/* recoup distill: fine-tune the compressed copy against the dense model. */
#define _DEFAULT_SOURCE /* realpath */
#include <cJSON.h>
#include <errno.h>
#include <getopt.h>
#include <libgen.h>
#include <signal.h>
#include <limits.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include "cli/cli.h"
#include "cli/cli_data.h"
#include "cli/report.h"
#include "cli/weight_rules.h"
#include "core/fmt.h"
#include "core/path.h"
#include "onnx/model.h"
#include "plan/load.h"
#include "train/distill.h"
#include "train/select.h"

#define MAX_GLOBS 32

static void usage(FILE *f) {
  fprintf(f,
      "Usage: recoup distill --teacher DENSE.onnx --student COMPRESSED.onnx --data X\n"
      "                      --out RECOVERED.onnx [OPTIONS]\n"
      "\n"
      "Fine-tune a pruned (or otherwise compressed) model on CPU so that its outputs\n"
      "match the dense model's (knowledge distillation). Weights that are exactly zero\n"
      "in the student stay exactly zero. Labels are optional: the teacher's outputs\n"
      "are the target; labels, when given, add a cross-entropy term.\n"
      "\n"
      "Data:\n"
      "  --data FILE|NAME=FILE    training samples (.npy, .npz, IDX, .gz, .pb); repeatable\n"
      "  --labels FILE            class labels of --data (optional)\n"
      "  --val-data FILE|NAME=FILE  validation samples (default: hold out --val-split)\n"
      "  --val-labels FILE        labels of --val-data\n"
      "  --val-split F            fraction of --data held out for validation (default 0.1)\n"
      "  --scale S, --mean M[,..], --std D[,..]   x' = (x*S - M) / D, as for eval\n"
      "\n"
      "Training (defaults chosen for recovery fine-tuning from a good start):\n"
      "  --epochs E               passes over the training samples (default 3)\n"
      "  --steps N                optimizer steps instead of epochs\n"
      "  --batch B                samples per step (default 64)\n"
      "  --optimizer adamw|sgd    (default adamw)\n"
      "  --lr R                   peak learning rate (default 5e-4 adamw, 0.01 sgd)\n"
      "  --schedule cosine|step|constant  (default cosine, linear warm-up over 3%%)\n"
      "  --warmup N               warm-up steps (overrides the 3%% default)\n"
      "  --step-size N            steps between decays for --schedule step (default: an epoch)\n"
      "  --gamma G                decay factor for --schedule step (default 0.1)\n"
      "  --weight-decay W         (default 0 adamw, 1e-4 sgd; never on pruned entries\n"
      "                           or normalisation parameters)\n"
      "  --momentum M             SGD momentum (default 0.9, Nesterov)\n"
      "  --no-nesterov            plain momentum for SGD\n"
      "  --clip N                 clip the global gradient norm at N (default 5; 0 = off)\n"
      "  --loss TERMS             loss terms with weights, e.g. kd=1,hint=0.5,attention=1000\n"
      "                           (default kd): kd, logit-mse, hint, attention, boundary,\n"
      "                           fsp, rkd-distance, rkd-angle, attention-map, weight-anchor\n"
      "  --pair T=S               match teacher tensor T with student tensor S for the\n"
      "                           feature terms (repeatable; default: automatic pairing)\n"
      "  --config FILE            JSON with \"loss\" (term: weight) and \"pairs\"\n"
      "                           ([{\"teacher\", \"student\", \"weight\"}]), see README\n"
      "  --temperature T          kd temperature (default 4)\n"
      "  --alpha A                weight of the distillation term against cross-entropy\n"
      "                           (default 0.9 with labels, 1 without)\n"
      "  --bn frozen|recalibrate|train  BatchNormalization statistics (default frozen)\n"
      "  --mask auto|zeros|none   which zero weights stay zero (default auto): zeros =\n"
      "                           every zero (integer at its zero point); none = no mask;\n"
      "                           auto = zeros of float weights, and of quantized weights\n"
      "                           recorded as pruned or far more common than rounding\n"
      "                           explains (see README)\n"
      "  --train PATTERN          also train float initializers matching this glob\n"
      "  --freeze PATTERN         do not train initializers matching this glob\n"
      "  --seed S                 data order and split (default 1); same seed and\n"
      "                           threads give a byte-identical output file\n"
      "  --threads N              compute threads; 0 (the default) uses every online core\n"
      "\n"
      "Interruption:\n"
      "  --checkpoint FILE        where to keep the run's state (default OUT.ckpt; the\n"
      "                           previous one is kept as FILE.1); removed on success\n"
      "  --checkpoint-every N     also every N steps (default 500; 0 = epoch ends only)\n"
      "  --resume FILE            continue an interrupted run from its checkpoint; the\n"
      "                           result is byte-identical to an uninterrupted run\n"
      "  SIGINT or SIGTERM writes a checkpoint and exits with status 1.\n"
      "\n"
      "Output:\n"
      "  --out FILE               the recovered model (never one of the inputs)\n"
      "  --json                   print the before/after results as JSON on stdout\n"
      "  --report DIR             also write a report into DIR: report.html (charts),\n"
      "                           summary.csv, summary.md and JSON records\n"
      "  -h, --help               show this help\n"
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
  int lr_set, wd_set;
  const char *checkpoint;
  char checkpoint_buf[4096];
  const char *pairs[MAX_GLOBS];
  float pair_weights[MAX_GLOBS];
  int n_pairs;
  const char *config;
  const char *report;
  char *config_strings; /* pair names read from --config, freed at exit */
  rc_distill_config cfg;
} distill_args;

enum {
  OPT_TEACHER = 256, OPT_STUDENT, OPT_DATA, OPT_LABELS, OPT_VAL_DATA, OPT_VAL_LABELS, OPT_VAL_SPLIT,
  OPT_SCALE, OPT_MEAN, OPT_STD, OPT_EPOCHS, OPT_STEPS, OPT_BATCH, OPT_OPTIMIZER, OPT_LR, OPT_SCHEDULE,
  OPT_WARMUP, OPT_STEP_SIZE, OPT_GAMMA, OPT_WD, OPT_MOMENTUM, OPT_NO_NESTEROV, OPT_CLIP, OPT_LOSS,
  OPT_TEMPERATURE, OPT_ALPHA, OPT_BN, OPT_MASK, OPT_TRAIN, OPT_FREEZE, OPT_SEED, OPT_THREADS, OPT_OUT, OPT_JSON,
  OPT_CHECKPOINT, OPT_CHECKPOINT_EVERY, OPT_RESUME, OPT_PAIR, OPT_CONFIG, OPT_REPORT
};

static int number(const char *opt, const char *v, double lo, double hi, double *out) {
  if (cli_parse_float(v, out) || *out < lo || *out > hi)
    return cli_usage_error("distill", "--%s expects a number in [%g, %g], got '%s'", opt, lo, hi, v);
  return 0;
}

static int integer(const char *opt, const char *v, long lo, long hi, long *out) {
  if (cli_parse_int(v, lo, hi, out))
    return cli_usage_error("distill", "--%s expects an integer in [%ld, %ld], got '%s'", opt, lo, hi, v);
  return 0;
}

static int choice(const char *opt, const char *v, const char *const *names, int n, int *out) {
  for (int i = 0; i < n; i++)
    if (!strcmp(v, names[i])) {
      *out = i;
      return 0;
    }
  return cli_usage_error("distill", "--%s: unknown value '%s'", opt, v);
}

static int apply_option(distill_args *a, int c, const char *v) {
  rc_distill_config *cfg = &a->cfg;
  double d;
  long l;
  int k = 0;
  switch (c) {
    case OPT_TEACHER: a->teacher = v; return 0;
    case OPT_STUDENT: a->student = v; return 0;
    case OPT_OUT: a->out = v; return 0;
    case OPT_DATA:
      if (a->data.n_data == CLI_MAX_DATA) return cli_usage_error("distill", "too many --data");
      a->data.data[a->data.n_data++] = v;
      return 0;
    case OPT_LABELS: a->data.labels = v; return 0;
    case OPT_VAL_DATA:
      if (a->n_val_data == CLI_MAX_DATA) return cli_usage_error("distill", "too many --val-data");
      a->val_data[a->n_val_data++] = v;
      return 0;
    case OPT_VAL_LABELS: a->val_labels = v; return 0;
    case OPT_VAL_SPLIT:
      if (number("val-split", v, 1e-6, 0.9, &d)) return RC_EXIT_USAGE;
      a->val_split = d;
      return 0;
    case OPT_SCALE: return cli_data_option(&a->data, "distill", "scale", v);
    case OPT_MEAN: return cli_data_option(&a->data, "distill", "mean", v);
    case OPT_STD: return cli_data_option(&a->data, "distill", "std", v);
    case OPT_EPOCHS:
      if (integer("epochs", v, 1, 1000000, &l)) return RC_EXIT_USAGE;
      cfg->epochs = l;
      return 0;
    case OPT_STEPS:
      if (integer("steps", v, 1, LONG_MAX, &l)) return RC_EXIT_USAGE;
      cfg->steps = l;
      return 0;
    case OPT_BATCH:
      if (integer("batch", v, 1, 1 << 16, &l)) return RC_EXIT_USAGE;
      cfg->batch = l;
      return 0;
    case OPT_OPTIMIZER: {
      static const char *const names[] = {"sgd", "adamw"};
      if (choice("optimizer", v, names, 2, &k)) return RC_EXIT_USAGE;
      rc_optim_config keep = cfg->optim;
      rc_optim_defaults(&cfg->optim, k == 0 ? RC_OPTIM_SGD : RC_OPTIM_ADAMW);
      if (a->lr_set) cfg->optim.lr = keep.lr;
      if (a->wd_set) cfg->optim.weight_decay = keep.weight_decay;
      return 0;
    }
    case OPT_LR:
      if (number("lr", v, 1e-12, 10, &d)) return RC_EXIT_USAGE;
      cfg->optim.lr = (float)d;
      a->lr_set = 1;
      return 0;
    case OPT_SCHEDULE: {
      static const char *const names[] = {"constant", "step", "cosine"};
      if (choice("schedule", v, names, 3, &k)) return RC_EXIT_USAGE;
      cfg->sched.kind = k == 0 ? RC_SCHED_CONSTANT : k == 1 ? RC_SCHED_STEP : RC_SCHED_COSINE;
      return 0;
    }
    case OPT_WARMUP:
      if (integer("warmup", v, 0, LONG_MAX, &l)) return RC_EXIT_USAGE;
      cfg->sched.warmup = l;
      return 0;
    case OPT_STEP_SIZE:
      if (integer("step-size", v, 1, LONG_MAX, &l)) return RC_EXIT_USAGE;
      cfg->sched.step_size = l;
      return 0;
    case OPT_GAMMA:
      if (number("gamma", v, 1e-9, 1, &d)) return RC_EXIT_USAGE;
      cfg->sched.gamma = (float)d;
      return 0;
    case OPT_WD:
      if (number("weight-decay", v, 0, 1, &d)) return RC_EXIT_USAGE;
      cfg->optim.weight_decay = (float)d;
      a->wd_set = 1;
      return 0;
    case OPT_MOMENTUM:
      if (number("momentum", v, 0, 0.9999, &d)) return RC_EXIT_USAGE;
      cfg->optim.momentum = (float)d;
      return 0;
    case OPT_NO_NESTEROV: cfg->optim.nesterov = 0; return 0;
    case OPT_CLIP:
      if (number("clip", v, 0, 1e9, &d)) return RC_EXIT_USAGE;
      cfg->clip = d;
      return 0;
    case OPT_LOSS: {
      rc_err e = {0};
      if (rc_loss_spec_parse(&cfg->terms, v, &e) != RC_OK) return cli_usage_error("distill", "%s", e.msg);
      return 0;
    }
    case OPT_PAIR:
      if (a->n_pairs == MAX_GLOBS) return cli_usage_error("distill", "too many --pair");
      a->pairs[a->n_pairs] = v;
      a->pair_weights[a->n_pairs++] = 1.0f;
      return 0;
    case OPT_CONFIG: a->config = v; return 0;
    case OPT_REPORT: a->report = v; return 0;
    case OPT_TEMPERATURE:
      if (number("temperature", v, 1e-3, 1e3, &d)) return RC_EXIT_USAGE;
      cfg->temperature = (float)d;
      return 0;
    case OPT_ALPHA:
      if (number("alpha", v, 0, 1, &d)) return RC_EXIT_USAGE;
      cfg->alpha = (float)d;
      return 0;
    case OPT_BN: {
      static const char *const names[] = {"frozen", "recalibrate", "train"};
      if (choice("bn", v, names, 3, &k)) return RC_EXIT_USAGE;
      cfg->bn = (rc_bn_mode)k;
      return 0;
    }
    case OPT_MASK:
      if (!rc__mask_mode_parse(v, &cfg->mask))
        return cli_usage_error("distill", "--mask must be auto, zeros or none, not '%s'", v);
      return 0;
    case OPT_TRAIN:
      if (a->n_train == MAX_GLOBS) return cli_usage_error("distill", "too many --train");
      a->train[a->n_train++] = v;
      return 0;
    case OPT_FREEZE:
      if (a->n_freeze == MAX_GLOBS) return cli_usage_error("distill", "too many --freeze");
      a->freeze[a->n_freeze++] = v;
      return 0;
    case OPT_SEED:
      if (integer("seed", v, 0, LONG_MAX, &l)) return RC_EXIT_USAGE;
      cfg->seed = (uint64_t)l;
      return 0;
    case OPT_THREADS:
      if (integer("threads", v, 0, 1024, &l)) return RC_EXIT_USAGE;
      a->threads = l;
      return 0;
    case OPT_JSON: a->json = 1; return 0;
    case OPT_CHECKPOINT: a->checkpoint = v; return 0;
    case OPT_CHECKPOINT_EVERY:
      if (integer("checkpoint-every", v, 0, LONG_MAX, &l)) return RC_EXIT_USAGE;
      cfg->checkpoint_every = l;
      return 0;
    case OPT_RESUME: cfg->resume_path = v; return 0;
  }
  return cli_usage_error("distill", "unknown option");
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
    if (strcmp(it->string, "loss") && strcmp(it->string, "pairs")) {
      rc = cli_usage_error("distill", "--config %s: unknown key '%s' (expected loss, pairs)", a->config, it->string);
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
    if (rc_loss_spec_parse(&a->cfg.terms, spec, &e) != RC_OK) {
      rc = cli_usage_error("distill", "--config %s: %s", a->config, e.msg);
      goto out;
    }
  }
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
  static const struct option longopts[] = {
      {"teacher", required_argument, NULL, OPT_TEACHER}, {"student", required_argument, NULL, OPT_STUDENT},
      {"data", required_argument, NULL, OPT_DATA}, {"labels", required_argument, NULL, OPT_LABELS},
      {"val-data", required_argument, NULL, OPT_VAL_DATA}, {"val-labels", required_argument, NULL, OPT_VAL_LABELS},
      {"val-split", required_argument, NULL, OPT_VAL_SPLIT}, {"scale", required_argument, NULL, OPT_SCALE},
      {"mean", required_argument, NULL, OPT_MEAN}, {"std", required_argument, NULL, OPT_STD},
      {"epochs", required_argument, NULL, OPT_EPOCHS}, {"steps", required_argument, NULL, OPT_STEPS},
      {"batch", required_argument, NULL, OPT_BATCH}, {"optimizer", required_argument, NULL, OPT_OPTIMIZER},
      {"lr", required_argument, NULL, OPT_LR}, {"schedule", required_argument, NULL, OPT_SCHEDULE},
      {"warmup", required_argument, NULL, OPT_WARMUP}, {"step-size", required_argument, NULL, OPT_STEP_SIZE},
      {"gamma", required_argument, NULL, OPT_GAMMA}, {"weight-decay", required_argument, NULL, OPT_WD},
      {"momentum", required_argument, NULL, OPT_MOMENTUM}, {"no-nesterov", no_argument, NULL, OPT_NO_NESTEROV},
      {"clip", required_argument, NULL, OPT_CLIP}, {"loss", required_argument, NULL, OPT_LOSS},
      {"temperature", required_argument, NULL, OPT_TEMPERATURE}, {"alpha", required_argument, NULL, OPT_ALPHA},
      {"bn", required_argument, NULL, OPT_BN}, {"mask", required_argument, NULL, OPT_MASK},
      {"train", required_argument, NULL, OPT_TRAIN},
      {"freeze", required_argument, NULL, OPT_FREEZE}, {"seed", required_argument, NULL, OPT_SEED},
      {"threads", required_argument, NULL, OPT_THREADS}, {"out", required_argument, NULL, OPT_OUT},
      {"json", no_argument, NULL, OPT_JSON}, {"checkpoint", required_argument, NULL, OPT_CHECKPOINT},
      {"checkpoint-every", required_argument, NULL, OPT_CHECKPOINT_EVERY},
      {"resume", required_argument, NULL, OPT_RESUME}, {"pair", required_argument, NULL, OPT_PAIR},
      {"config", required_argument, NULL, OPT_CONFIG}, {"report", required_argument, NULL, OPT_REPORT},
      {"help", no_argument, NULL, 'h'}, {NULL, 0, NULL, 0}};
  memset(a, 0, sizeof *a);
  cli_data_opts_init(&a->data);
  rc_distill_config_defaults(&a->cfg);
  a->cfg.checkpoint_every = 500;
  a->val_split = 0.1;
  int pr = cli_parse_options(argc, argv, longopts, "distill", apply_option_ctx, a, usage);
  if (pr) return pr;
  if (optind != argc) return cli_usage_error("distill", "unexpected argument '%s'", argv[optind]);
  if (!a->teacher || !a->student || !a->data.n_data || !a->out)
    return cli_usage_error("distill", "--teacher, --student, --data and --out are required");
  if (a->val_labels && !a->n_val_data) return cli_usage_error("distill", "--val-labels needs --val-data");
  a->cfg.sched.lr = a->cfg.optim.lr;
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
  if (rc__path_refuse_inputs("--checkpoint", a->checkpoint, inputs, labels, n, e) ||
      rc__path_refuse_inputs("--checkpoint", prev, inputs, labels, n, e))
    return -1;
  /* --resume is read, then replaced by the run's own checkpoints; the output never. */
  if (a->cfg.resume_path && rc__path_same_file(a->out, a->cfg.resume_path)) {
    rc__fail(e, RC_ERR_INVALID, "--resume %s is the output file", a->cfg.resume_path);
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

static void on_progress(void *user, const rc_distill_progress *p) {
  progress_state *ps = user;
  char eta[32], loss[32], kl[32];
  rc__fmt_sig(loss, sizeof loss, p->loss, RC_FMT_SIG, 0);
  if (p->event == RC_DISTILL_NOTE) {
    char nb[1024];
    fprintf(stderr, "%srecoup: %s\n", ps->tty ? "\r\033[K" : "", cli_esc(p->note, nb, sizeof nb));
    return;
  }
  if (p->event == RC_DISTILL_EPOCH) {
    if (ps->tty) fprintf(stderr, "\r\033[K");
    fprintf(stderr, "epoch %lld/%lld  loss %s", (long long)p->epoch, (long long)p->epochs, loss);
    if (p->val.has_labels) fprintf(stderr, "  val accuracy %.2f%%", 100 * p->val.top1);
    fprintf(stderr, "  agreement %.2f%%  KL %s%s\n", 100 * p->val.agreement,
            rc__fmt_sig(kl, sizeof kl, p->val.kl, RC_FMT_SIG, 0), p->is_best ? "  (best so far)" : "");
    return;
  }
  fmt_time(p->eta_s, eta, sizeof eta);
  if (ps->tty) {
    if (p->elapsed_s - ps->last_print < 0.2 && p->step != p->steps) return;
    ps->last_print = p->elapsed_s;
    fprintf(stderr, "\r\033[Kepoch %lld/%lld  step %lld/%lld  loss %s  %.0f samples/s  %s left",
            (long long)p->epoch, (long long)p->epochs, (long long)p->step, (long long)p->steps, loss,
            p->samples_per_s, eta);
    fflush(stderr);
  } else if (p->elapsed_s - ps->last_print >= 10 || p->step == p->steps) {
    ps->last_print = p->elapsed_s;
    fprintf(stderr, "epoch %lld/%lld step %lld/%lld loss %s %.0f samples/s %s left\n", (long long)p->epoch,
            (long long)p->epochs, (long long)p->step, (long long)p->steps, loss, p->samples_per_s, eta);
  }
}

/* ---- Results ------------------------------------------------------------------ */

static void table_row(const char *name, const rc_metrics *m) {
  char acc[32] = "-", kl[32];
  if (m->has_labels) snprintf(acc, sizeof acc, "%.2f%%", 100 * m->top1);
  printf("  %-22s %10s %12.2f%% %14s\n", name, acc, 100 * m->agreement, rc__fmt_sig(kl, sizeof kl, m->kl, RC_FMT_SIG, 0));
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
  double sel = rc__select_measure(m, alpha);
  if (isfinite(sel)) cJSON_AddNumberToObject(o, "selection", sel);
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
static void warn_ranges(const rc_distill_result *r) {
  for (int i = 0; i < r->n_ranges; i++) {
    const rc_range_check *c = &r->ranges[i];
    if (!c->after.values_out) continue;
    char w[32], b[32], d[32];
    fprintf(stderr, "recoup: warning: %lld of %lld values of '%s' on %lld of %lld validation samples lie outside "
            "its activation grid and are clamped: the furthest is %s against the grid's %s of %s (%s beyond); "
            "before training: %lld values\n", (long long)c->after.values_out, (long long)c->after.values, c->tensor,
            (long long)c->after.samples_out, (long long)c->after.samples,
            rc__fmt_sig(w, sizeof w, c->after.worst, RC_FMT_SIG, 0),
            c->after.worst > c->after.bound ? "maximum" : "minimum", rc__fmt_sig(b, sizeof b, c->after.bound, RC_FMT_SIG, 0),
            rc__fmt_sig(d, sizeof d, fabs(c->after.worst - c->after.bound), RC_FMT_SIG, 0),
            (long long)c->before.values_out);
  }
}

static cJSON *results_json(const distill_args *a, const rc_distill_result *r, double verify_diff) {
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
  cJSON_AddStringToObject(root, "best_by", rc__select_rule_name(&r->before, alpha));
  cJSON_AddNumberToObject(root, "best_by_alpha", alpha);
  cJSON_AddNumberToObject(root, "steps", (double)r->steps_done);
  cJSON_AddNumberToObject(root, "seconds", r->seconds);
  cJSON_AddNumberToObject(root, "samples_per_s", r->samples_per_s);
  cJSON_AddNumberToObject(root, "trainable_tensors", r->n_trainable_tensors);
  cJSON_AddNumberToObject(root, "trainable_values", (double)r->n_trainable);
  cJSON_AddNumberToObject(root, "pruned_zeros_kept", (double)r->n_frozen_zeros);
  cJSON_AddBoolToObject(root, "masks_intact", r->mask_ok);
  cJSON_AddNumberToObject(root, "quantized_weights_rewritten", r->n_grids);
  cJSON_AddItemToObject(root, "weights", cli_weight_rules_json(r->rules, r->n_rules));
  cJSON_AddNumberToObject(root, "rollbacks", r->rollbacks);
  cJSON_AddNumberToObject(root, "reload_max_diff", verify_diff);
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
static rc_status write_report(const distill_args *a, const rc_distill_result *r, double verify_diff, rc_err *e) {
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

static void print_results(const distill_args *a, const rc_distill_result *r, double verify_diff) {
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
  printf("  %-22s %10s %13s %14s\n", "model", "accuracy", "agreement", "KL to dense");
  table_row("dense (teacher)", &r->teacher);
  table_row("compressed (input)", &r->before);
  table_row("recovered (output)", &r->after);
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
  printf("masks: %s pruned entries checked, all still exactly zero\n",
         cli_group_digits(r->n_frozen_zeros, b2, sizeof b2));
  if (r->n_grids)
    printf("grids: %d quantized weights rewritten on their unchanged grids (scales, zero points, dtypes, axes,\n"
           "       integer ranges; every integer checked inside its range)\n", r->n_grids);
  cli_weight_rules_print(r->rules, r->n_rules);
  printf("best state: lowest validation %s; agreement%s reported beside it\n",
         strcmp(rc__select_rule_name(&r->before, r->select_alpha), "kl") ? "alpha*KL + (1-alpha)*cross-entropy"
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

static rc_status load_val(cli_samples *val, const distill_args *a, const rc_model *m, rc_err *e) {
  cli_data_opts vo = a->data;
  memcpy(vo.data, a->val_data, sizeof vo.data);
  vo.n_data = a->n_val_data;
  vo.labels = NULL;
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
  rc_distill_result r;
  memset(&r, 0, sizeof r);
  int rc = RC_EXIT_FAIL;
  double diff = 0;
  if (check_output_path(&a, &e)) goto out;
  if (a.report && cli_report_prepare(a.report, 0, &e) != RC_OK) goto out;
  if (rc_model_load(&teacher, a.teacher, NULL, &e) != RC_OK || rc_model_load(&student, a.student, NULL, &e) != RC_OK)
    goto out;
  if (rc_distill_check_pair(&teacher->graph, &student->graph, &e) != RC_OK) goto out;
  if (cli_samples_load(&train, &a.data, student, &e) != RC_OK) goto out;
  if (a.n_val_data && load_val(&val, &a, student, &e) != RC_OK) goto out;
  {
    int64_t k = 0;
    if (cli_output_classes(student, &k, &e) != RC_OK) goto out;
    if (a.data.labels && cli_samples_load_labels(&train, a.data.labels, k, &e) != RC_OK) goto out;
    if (a.val_labels && cli_samples_load_labels(&val, a.val_labels, k, &e) != RC_OK) goto out;
  }
  rc_tensor ins[CLI_MAX_DATA], vins[CLI_MAX_DATA];
  for (int i = 0; i < train.n_inputs; i++) ins[i] = train.inputs[i].t;
  for (int i = 0; i < val.n_inputs; i++) vins[i] = val.inputs[i].t;
  rc_distill_data d = {ins, train.n_inputs, train.has_labels ? train.labels.t.data : NULL,
                       a.n_val_data ? vins : NULL, val.has_labels ? val.labels.t.data : NULL, a.val_split};
  if (a.n_val_data && train.has_labels != val.has_labels) {
    rc__fail(&e, RC_ERR_INVALID, "give labels for both --data and --val-data, or for neither");
    goto out;
  }
  progress_state ps = {cli_isatty_stderr(), -1e9, a.json};
  a.cfg.progress = on_progress;
  a.cfg.user = &ps;
  a.cfg.stop = &cli_stop_requested;
  cli_catch_stop_signals();
  if (rc_distill_run(&r, teacher, student, &d, &a.cfg, &e) != RC_OK) goto out;
  if (rc_model_save(student, a.out, r.changed, r.n_changed, &e) != RC_OK) goto out;
  if (rc_distill_verify_written(a.out, student, a.n_val_data ? vins : ins, train.n_inputs, a.cfg.batch, &diff, &e) !=
      RC_OK)
    goto out;
  print_results(&a, &r, diff);
  remove_checkpoints(a.checkpoint);
  if (a.report && write_report(&a, &r, diff, &e) != RC_OK) goto out;
  rc = RC_EXIT_OK;
out:
  if (rc != RC_EXIT_OK) cli_fail(&e);
  rc_distill_result_free(&r);
  cli_samples_free(&train);
  cli_samples_free(&val);
  free(a.config_strings);
  rc_model_free(teacher);
  rc_model_free(student);
  return rc;
}
