/* recoup synthesize: inputs made from a teacher alone (no data at hand). */
#include <cJSON.h>
#include <getopt.h>
#include <limits.h>
#include <stdlib.h>
#include <string.h>

#include "cli/cli.h"
#include "cli/cli_synth.h"
#include "recoup/data.h"
#include "recoup/model.h"
#include "recoup/synthesize.h"
#include "recoup/util.h"

static void usage(FILE *f) {
  fprintf(f,
          "Usage: recoup synthesize TEACHER.onnx --count N --out SYNTH.npy [OPTIONS]\n"
          "\n"
          "Make input samples from the teacher alone, for recovery when no data is at hand:\n"
          "starting from seeded noise, gradient descent on the input values makes the\n"
          "per-channel mean and variance entering every BatchNormalization layer match the\n"
          "running statistics stored in it (ZeroQ, Cai et al. 2020; DeepInversion, Yin et\n"
          "al. 2020). The teacher needs BatchNormalization kept as nodes. The .npy holds\n"
          "float32 model inputs (already normalised): give it to distill, eval or quantize\n"
          "without --scale, --mean or --std.\n"
          "\n"
          "  --count N          samples to make (required)\n"
          "  --out FILE         the .npy to write (required; never the teacher)\n"
          "  --batch B          samples whose statistics are matched together (default 256)\n"
          "  --steps S          Adam steps per batch (default 200)\n"
          "  --lr R             Adam rate on the input values (default 0.05)\n"
          "  --class-weight W   weight of the class-balance term: cross-entropy of the output\n"
          "                     against classes assigned in turn (default 0.1; 0 = off)\n"
          "  --tv W             weight of the smoothness prior, mean squared difference of\n"
          "                     neighbouring pixels (default 0.05)\n"
          "  --l2 W             weight of the L2 prior, mean squared value (default 0.001)\n"
          "  --seed S           noise seed (default 1); same seed and threads, same file\n"
          "  --threads N        compute threads (default: all cores)\n"
          "  --json             print the result as JSON on stdout\n"
          "  -h, --help         show this help\n"
          "\n"
          "Synthetic samples can miss what real data holds: validate any model recovered\n"
          "with them on real held-out samples before deploying it.\n");
}

typedef struct synth_args {
  const char *teacher, *out;
  rc_synth_config c;
  long threads;
  int json;
} synth_args;

enum { O_COUNT = 256, O_OUT, O_BATCH, O_STEPS, O_LR, O_CLASS, O_TV, O_L2, O_SEED, O_THREADS, O_JSON };

static int num(const char *opt, const char *v, double lo, double hi, double *d) {
  if (cli_parse_float(v, d) || *d < lo || *d > hi)
    return cli_usage_error("synthesize", "--%s expects a number in [%g, %g], got '%s'", opt, lo, hi, v);
  return 0;
}

static int integer(const char *opt, const char *v, long lo, long hi, long *l) {
  if (cli_parse_int(v, lo, hi, l))
    return cli_usage_error("synthesize", "--%s expects an integer in [%ld, %ld], got '%s'", opt, lo, hi, v);
  return 0;
}

static int apply(void *ctx, int o, const char *v) {
  synth_args *a = ctx;
  double d;
  long l;
  switch (o) {
    case O_COUNT: if (integer("count", v, 1, 1L << 24, &l)) return RC_EXIT_USAGE; a->c.count = l; return 0;
    case O_OUT: a->out = v; return 0;
    case O_BATCH: if (integer("batch", v, 2, 1 << 16, &l)) return RC_EXIT_USAGE; a->c.batch = l; return 0;
    case O_STEPS: if (integer("steps", v, 1, 1000000, &l)) return RC_EXIT_USAGE; a->c.steps = l; return 0;
    case O_LR: if (num("lr", v, 1e-9, 100, &d)) return RC_EXIT_USAGE; a->c.lr = (float)d; return 0;
    case O_CLASS: if (num("class-weight", v, 0, 1e6, &d)) return RC_EXIT_USAGE; a->c.w_class = (float)d; return 0;
    case O_TV: if (num("tv", v, 0, 1e6, &d)) return RC_EXIT_USAGE; a->c.w_tv = (float)d; return 0;
    case O_L2: if (num("l2", v, 0, 1e6, &d)) return RC_EXIT_USAGE; a->c.w_l2 = (float)d; return 0;
    case O_SEED: if (integer("seed", v, 0, LONG_MAX, &l)) return RC_EXIT_USAGE; a->c.seed = (uint64_t)l; return 0;
    case O_THREADS: if (integer("threads", v, 0, 1024, &l)) return RC_EXIT_USAGE; a->threads = l; return 0;
    case O_JSON: a->json = 1; return 0;
  }
  return cli_usage_error("synthesize", "unknown option");
}

static int parse_args(synth_args *a, int argc, char **argv) {
  static const struct option longopts[] = {
      {"count", required_argument, NULL, O_COUNT}, {"out", required_argument, NULL, O_OUT},
      {"batch", required_argument, NULL, O_BATCH}, {"steps", required_argument, NULL, O_STEPS},
      {"lr", required_argument, NULL, O_LR}, {"class-weight", required_argument, NULL, O_CLASS},
      {"tv", required_argument, NULL, O_TV}, {"l2", required_argument, NULL, O_L2},
      {"seed", required_argument, NULL, O_SEED}, {"threads", required_argument, NULL, O_THREADS},
      {"json", no_argument, NULL, O_JSON}, {"help", no_argument, NULL, 'h'}, {NULL, 0, NULL, 0}};
  memset(a, 0, sizeof *a);
  rc_synth_config_init(&a->c);
  a->c.count = 0;
  int pr = cli_parse_options(argc, argv, longopts, "synthesize", apply, a, usage);
  if (pr) return pr;
  if (optind != argc - 1) return cli_usage_error("synthesize", "expects exactly one TEACHER.onnx");
  a->teacher = argv[optind];
  if (!a->c.count || !a->out) return cli_usage_error("synthesize", "--count and --out are required");
  size_t n = strlen(a->out);
  if (n < 5 || strcmp(a->out + n - 4, ".npy")) return cli_usage_error("synthesize", "--out must end in .npy");
  return 0;
}

int rc_cmd_synthesize(int argc, char **argv) {
  synth_args a;
  int pr = parse_args(&a, argc, argv);
  if (pr) return pr < 0 ? RC_EXIT_OK : pr;
  cli_set_threads((int)a.threads);
  rc_err e = {0};
  rc_model *teacher = NULL;
  rc_array made = {0};
  rc_synth_stats stats;
  int rc = RC_EXIT_FAIL;
  if (rc_path_same_file(a.out, a.teacher)) {
    rc_err_set(&e, RC_ERR_INVALID, "--out %s is the teacher: refusing to overwrite an input", a.out);
    goto out;
  }
  if (rc_model_load(&teacher, a.teacher, NULL, &e) != RC_OK) goto out;
  cli_synth_progress_state ps = {cli_isatty_stderr(), -1};
  a.c.progress = cli_synth_progress;
  a.c.user = &ps;
  if (rc_synthesize_array(&made, &stats, teacher, &a.c, &e) != RC_OK) goto out;
  if (rc_npy_write(a.out, &made.t, &e) != RC_OK) goto out;
  char shape[128];
  if (a.json) {
    cJSON *root = cJSON_CreateObject();
    cJSON_AddStringToObject(root, "teacher", a.teacher);
    cJSON_AddStringToObject(root, "out", a.out);
    cJSON_AddStringToObject(root, "shape", rc_shape_str(&made.t, shape, sizeof shape));
    cJSON_AddNumberToObject(root, "batchnorm_layers", stats.n_bn);
    cJSON_AddNumberToObject(root, "bn_loss_start", stats.bn_loss_start);
    cJSON_AddNumberToObject(root, "bn_loss_end", stats.bn_loss_end);
    cJSON_AddNumberToObject(root, "worst_mean_error", stats.worst_mean_err);
    cJSON_AddNumberToObject(root, "worst_variance_error", stats.worst_var_err);
    char *text = cJSON_Print(root);
    if (text) puts(text);
    free(text);
    cJSON_Delete(root);
  } else {
    printf("wrote %s: %s float32 inputs synthesised from %s\n", a.out, rc_shape_str(&made.t, shape, sizeof shape),
           a.teacher);
    printf("BatchNormalization layers matched: %d\n", stats.n_bn);
    printf("statistics loss: %.4g at the start, %.4g at the end (mean over batches)\n", stats.bn_loss_start,
           stats.bn_loss_end);
    printf("worst channel: mean off by %.3g running standard deviations, variance off by %.3g of itself\n",
           stats.worst_mean_err, stats.worst_var_err);
    printf("\nSynthetic samples can miss what real data holds: validate any model recovered with\n"
           "them on real held-out samples before deploying it.\n");
  }
  rc = RC_EXIT_OK;
out:
  if (rc != RC_EXIT_OK) cli_fail(&e);
  rc_array_free(&made);
  rc_model_free(teacher);
  return rc;
}
