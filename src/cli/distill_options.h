/* Every `recoup distill` option, one row each. The option parser (its
 * getopt_long table and value checks), the --help text and the keys of a
 * batch manifest (the long name with '-' written '_') are made from this
 * table, so they cannot disagree.
 *
 * X(ID, name, kind, lo, hi, choices, where, group, metavar, default, help)
 *   lo, hi    range of an INT or NUM value (CLI_OPT_NO_MAX: no upper bound)
 *   choices   NULL-terminated list of a CHOICE, else NULL
 *   where     whether a manifest may set it (cli_opt_where)
 *   metavar   the value's placeholder in --help (CHOICE: NULL, the choices)
 *   default   the value given before the command line is read, shown in
 *             --help; NULL when there is none or it depends on other options
 *             (the help text then says what it is)
 *   help      filled to the width of --help
 * The order is the order of a manifest job's arguments to distill. */
#ifndef RC_CLI_DISTILL_OPTIONS_H
#define RC_CLI_DISTILL_OPTIONS_H

#include <stdio.h>

#define CLI_OPT_NO_MAX 1e300

#define CLI_DISTILL_OPTIONS(X)                                                                                     \
  X(TEACHER, "teacher", CLI_OPT_PATH, 0, 0, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_MODELS, "FILE", NULL,                \
    "the dense model (ONNX)")                                                                                      \
  X(STUDENT, "student", CLI_OPT_PATH, 0, 0, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_MODELS, "FILE", NULL,                \
    "the compressed copy to recover (ONNX)")                                                                       \
  X(DATA, "data", CLI_OPT_DATA, 0, 0, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_DATA, "FILE|NAME=FILE", NULL,              \
    "training samples (.npy, .npz, IDX, .gz, .pb, a folder or list file of JPEG/PNG images, or synth:N: "       \
    "N inputs synthesised from the teacher alone, see recoup synthesize); repeatable")                                                    \
  X(LABELS, "labels", CLI_OPT_PATH, 0, 0, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_DATA, "FILE", NULL,                    \
    "class labels of --data (optional); 'folders' or 'list' for images; with --output-loss, per-position "      \
    "labels of the first kd output")                                                                           \
  X(VAL_DATA, "val-data", CLI_OPT_DATA, 0, 0, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_DATA, "FILE|NAME=FILE", NULL,      \
    "validation samples (default: hold out --val-split)")                                                          \
  X(VAL_LABELS, "val-labels", CLI_OPT_PATH, 0, 0, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_DATA, "FILE", NULL,            \
    "labels of --val-data")                                                                                        \
  X(OUT, "out", CLI_OPT_PATH, 0, 0, NULL, CLI_OPT_JOB_ONLY, CLI_GROUP_OUTPUT, "FILE", NULL,                        \
    "the recovered model (never one of the inputs)")                                                               \
  X(VAL_SPLIT, "val-split", CLI_OPT_NUM, 1e-6, 0.9, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_DATA, "F", "0.1",             \
    "fraction of --data held out for validation")                                                                  \
  X(SCALE, "scale", CLI_OPT_NUM, -CLI_OPT_NO_MAX, CLI_OPT_NO_MAX, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_DATA, "S",     \
    NULL, "x' = (x*S - M) / D, as for eval (non-zero)")                                                            \
  X(MEAN, "mean", CLI_OPT_NUMLIST, -CLI_OPT_NO_MAX, CLI_OPT_NO_MAX, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_DATA,        \
    "M[,..]", NULL, "per-channel mean M of x' = (x*S - M) / D")                                                    \
  X(STD, "std", CLI_OPT_NUMLIST, -CLI_OPT_NO_MAX, CLI_OPT_NO_MAX, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_DATA,          \
    "D[,..]", NULL, "per-channel standard deviation D of x' = (x*S - M) / D (non-zero)")                           \
  X(RESIZE, "resize", CLI_OPT_INT, 1, 65536, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_DATA, "S", NULL,                   \
    "images: shorter side to S (antialiased bilinear) before the centre crop to the input's H x W")               \
  X(SKIP_BAD, "skip-bad", CLI_OPT_FLAG, 0, 0, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_DATA, NULL, NULL,                 \
    "images: skip unreadable files, list them, go on")                                                            \
  X(IMAGE_MEMORY, "image-memory", CLI_OPT_INT, 0, 1 << 30, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_DATA, "MB", "1024",  \
    "images: decode once up front when the pixels fit in MB, else per batch by worker threads; 0: always "        \
    "per batch")                                                                                                   \
  X(CACHE_MB, "cache-mb", CLI_OPT_INT, 1, 1e9, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_DATA, "N", NULL,                 \
    "keep the teacher's cached outputs in memory up to N MB, beyond that in a mapped temporary file next to "     \
    "--out (default: a quarter of physical memory)")                                                              \
  X(AUGMENT, "augment", CLI_OPT_STRLIST, 0, 0, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "LIST", NULL,          \
    "transform every training batch, the same for teacher and student: flip, crop=N (pad N zeros, crop "       \
    "back), rrc[=SMIN-SMAX[:RMIN-RMAX]] (random resized crop), mix=A (mixup), cutmix=A; e.g. flip,crop=4,mix=0.2 " \
    "(repeatable; the teacher then runs on every batch)")                                                         \
  X(EPOCHS, "epochs", CLI_OPT_INT, 1, 1000000, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "E", "3",               \
    "passes over the training samples")                                                                            \
  X(STEPS, "steps", CLI_OPT_INT, 1, CLI_OPT_NO_MAX, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "N", NULL,         \
    "optimizer steps instead of epochs")                                                                           \
  X(BATCH, "batch", CLI_OPT_INT, 1, 65536, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "B", "64",                  \
    "samples per step")                                                                                            \
  X(OPTIMIZER, "optimizer", CLI_OPT_CHOICE, 0, 0, cli_optimizers, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, NULL,      \
    "adamw", "the update rule")                                                                                    \
  X(LR, "lr", CLI_OPT_NUM, 1e-12, 10, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "R", NULL,                       \
    "peak learning rate (default 5e-4 adamw, 0.01 sgd)")                                                           \
  X(SCHEDULE, "schedule", CLI_OPT_CHOICE, 0, 0, cli_schedules, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, NULL,         \
    "cosine", "learning-rate schedule, with a linear warm-up over 3% of the steps")                                \
  X(WARMUP, "warmup", CLI_OPT_INT, 0, CLI_OPT_NO_MAX, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "N", NULL,       \
    "warm-up steps (overrides the 3% default)")                                                                    \
  X(STEP_SIZE, "step-size", CLI_OPT_INT, 1, CLI_OPT_NO_MAX, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "N", NULL, \
    "steps between decays for --schedule step (default: an epoch)")                                               \
  X(GAMMA, "gamma", CLI_OPT_NUM, 1e-9, 1, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "G", "0.1",                  \
    "decay factor for --schedule step")                                                                            \
  X(WEIGHT_DECAY, "weight-decay", CLI_OPT_NUM, 0, 1, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "W", NULL,        \
    "(default 0 adamw, 1e-4 sgd; never on pruned entries or normalisation parameters)")                           \
  X(MOMENTUM, "momentum", CLI_OPT_NUM, 0, 0.9999, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "M", NULL,           \
    "SGD momentum (default 0.9, Nesterov)")                                                                        \
  X(NO_NESTEROV, "no-nesterov", CLI_OPT_FLAG, 0, 0, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, NULL, NULL,        \
    "plain momentum for SGD")                                                                                      \
  X(CLIP, "clip", CLI_OPT_NUM, 0, 1e9, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "N", "5",                       \
    "clip the global gradient norm at N; 0 = off")                                                                \
  X(LOSS, "loss", CLI_OPT_TERMS, 0, 0, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "TERMS", "kd",                  \
    "loss terms with weights, e.g. kd=1,hint=0.5,attention=1000; a term without =W takes its weight below")     \
  X(PAIR, "pair", CLI_OPT_STRLIST, 0, 0, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "T=S", NULL,                  \
    "match teacher tensor T with student tensor S for the feature terms (repeatable; default: automatic "        \
    "pairing)")                                                                                                    \
  X(OUTPUT_LOSS, "output-loss", CLI_OPT_STRLIST, 0, 0, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING,                \
    "OUT=TERM[:key=value...]", NULL,                                                                              \
    "a loss on model output OUT instead of the logit terms (repeatable; outputs not named take none): kd "        \
    "(axis, t, weights), kd-sigmoid (t), mse, smooth-l1 (beta), bounded-l2 (axis, margin; needs --targets), "     \
    "edge-kd (axis, bins, t); each takes weight=W")                                                               \
  X(TARGETS, "targets", CLI_OPT_DATA, 0, 0, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "OUT=FILE", NULL,         \
    "regression targets of output OUT (NaN: no target there)")                                                    \
  X(VAL_TARGETS, "val-targets", CLI_OPT_DATA, 0, 0, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "OUT=FILE",       \
    NULL, "the same for --val-data")                                                                              \
  X(IGNORE_LABEL, "ignore-label", CLI_OPT_INT, -2147483647.0, 2147483647.0, NULL, CLI_OPT_ANYWHERE,               \
    CLI_GROUP_TRAINING, "V", "255", "dense label value that takes no loss")                                       \
  X(CONFIG, "config", CLI_OPT_PATH, 0, 0, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "FILE", NULL,                \
    "JSON with \"loss\" (term: weight) and \"pairs\" ([{\"teacher\", \"student\", \"weight\"}]), see README")     \
  X(TEMPERATURE, "temperature", CLI_OPT_NUM, 1e-3, 1e3, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "T", "4",      \
    "kd temperature")                                                                                              \
  X(ALPHA, "alpha", CLI_OPT_NUM, 0, 1, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "A", NULL,                      \
    "weight of the distillation term against cross-entropy (default 0.9 with labels, 1 without)")                 \
  X(BN, "bn", CLI_OPT_CHOICE, 0, 0, cli_bn_modes, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, NULL, "frozen",            \
    "BatchNormalization statistics")                                                                               \
  X(MASK, "mask", CLI_OPT_CHOICE, 0, 0, cli_mask_modes, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, NULL, "auto",        \
    "which zero weights stay zero: zeros = every zero (integer at its zero point); none = no mask; auto = "      \
    "zeros of float weights, and of quantized weights recorded as pruned or far more common than rounding "     \
    "explains (see README)")                                                                                      \
  X(TRAIN, "train", CLI_OPT_STRLIST, 0, 0, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "PATTERN", NULL,            \
    "also train float initializers matching this glob")                                                            \
  X(FREEZE, "freeze", CLI_OPT_STRLIST, 0, 0, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "PATTERN", NULL,          \
    "do not train initializers matching this glob")                                                                \
  X(SEED, "seed", CLI_OPT_INT, 0, CLI_OPT_NO_MAX, NULL, CLI_OPT_ANYWHERE, CLI_GROUP_TRAINING, "S", "1",            \
    "data order and split; same seed and threads give a byte-identical output file")                              \
  X(CHECKPOINT_EVERY, "checkpoint-every", CLI_OPT_INT, 0, CLI_OPT_NO_MAX, NULL, CLI_OPT_ANYWHERE,                  \
    CLI_GROUP_INTERRUPTION, "N", "500", "also write a checkpoint every N steps; 0 = epoch ends only")             \
  X(THREADS, "threads", CLI_OPT_INT, 0, 1024, NULL, CLI_OPT_BATCH_OWNED, CLI_GROUP_TRAINING, "N", NULL,            \
    "compute threads; 0 (the default) uses every online core")                                                                   \
  X(JSON, "json", CLI_OPT_FLAG, 0, 0, NULL, CLI_OPT_BATCH_OWNED, CLI_GROUP_OUTPUT, NULL, NULL,                     \
    "print the before/after results as JSON on stdout")                                                            \
  X(CHECKPOINT, "checkpoint", CLI_OPT_PATH, 0, 0, NULL, CLI_OPT_BATCH_OWNED, CLI_GROUP_INTERRUPTION, "FILE", NULL, \
    "where to keep the run's state (default OUT.ckpt; the previous one is kept as FILE.1); removed on success")   \
  X(RESUME, "resume", CLI_OPT_PATH, 0, 0, NULL, CLI_OPT_BATCH_OWNED, CLI_GROUP_INTERRUPTION, "FILE", NULL,         \
    "continue an interrupted run from its checkpoint; the result is byte-identical to an uninterrupted run")      \
  X(REPORT, "report", CLI_OPT_PATH, 0, 0, NULL, CLI_OPT_BATCH_OWNED, CLI_GROUP_OUTPUT, "DIR", NULL,                \
    "also write a report into DIR: report.html (charts), summary.csv, summary.md and JSON records")

typedef enum cli_opt_kind {
  CLI_OPT_PATH,    /* a file */
  CLI_OPT_DATA,    /* a file or NAME=FILE, repeatable */
  CLI_OPT_INT,
  CLI_OPT_NUM,
  CLI_OPT_CHOICE,  /* one of `choices` */
  CLI_OPT_NUMLIST, /* numbers joined with ',' */
  CLI_OPT_STRLIST, /* repeatable */
  CLI_OPT_FLAG,    /* takes no value */
  CLI_OPT_TERMS    /* loss terms: "kd=1,hint=0.5" */
} cli_opt_kind;

typedef enum cli_opt_where {
  CLI_OPT_ANYWHERE,   /* a manifest's "defaults" or a job */
  CLI_OPT_JOB_ONLY,   /* a manifest's job only */
  CLI_OPT_BATCH_OWNED /* set by recoup batch itself, never by a manifest */
} cli_opt_where;

typedef enum cli_opt_group {
  CLI_GROUP_MODELS,
  CLI_GROUP_DATA,
  CLI_GROUP_TRAINING,
  CLI_GROUP_INTERRUPTION,
  CLI_GROUP_OUTPUT,
  CLI_GROUP_COUNT
} cli_opt_group;

typedef enum cli_distill_opt {
#define CLI_DISTILL_OPT_ENUM(id, ...) CLI_DISTILL_##id,
  CLI_DISTILL_OPTIONS(CLI_DISTILL_OPT_ENUM)
#undef CLI_DISTILL_OPT_ENUM
  CLI_DISTILL_N_OPTIONS
} cli_distill_opt;

typedef struct cli_option {
  const char *name;
  cli_opt_kind kind;
  double lo, hi;
  const char *const *choices;
  cli_opt_where where;
  cli_opt_group group;
  const char *metavar;
  const char *dflt;
  const char *help;
} cli_option;

/* The table's rows, indexed by cli_distill_opt. */
extern const cli_option cli_distill_options[CLI_DISTILL_N_OPTIONS];

/* getopt_long's value for an option: its row plus this. */
#define CLI_OPT_BASE 256

/* Fill a getopt_long table (CLI_DISTILL_N_OPTIONS + 2 entries: the rows,
 * "help" as 'h', the terminator). `longopts` is a struct option array. */
void cli_distill_longopts(void *longopts);

/* Check a command-line value of option o against its kind and range (INT,
 * NUM, CHOICE): *num receives a NUM, *whole an INT or the choice's index.
 * Returns 0, or RC_EXIT_USAGE after a one-line error naming --NAME. */
int cli_option_value(const cli_option *o, const char *v, double *num, long *whole);

/* The --help lines of every option of `group`, in table order. */
void cli_distill_options_help(FILE *f, cli_opt_group group);

#endif
