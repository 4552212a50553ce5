/* recoup/distill.h: the public settings mapped onto the training loop's
 * full configuration (train/distill.h), the loss-term table and selection
 * rule read through public names. */
#include "recoup/distill.h"

#include <string.h>

#include "core/alloc.h"
#include "core/status.h"
#include "data/augment.h"
#include "train/distill.h"
#include "train/features.h"
#include "train/select.h"

void rc_distill_settings_init(rc_distill_settings *s) {
  rc_distill_config c;
  rc_distill_config_defaults(&c);
  memset(s, 0, sizeof *s);
  s->epochs = c.epochs;
  s->steps = c.steps;
  s->batch = c.batch;
  s->temperature = c.temperature;
  s->alpha = c.alpha;
  s->lr = 0; /* the optimizer's own default */
  s->seed = c.seed;
  s->optimizer = c.optim.kind == RC_OPTIM_SGD ? RC_DISTILL_OPT_SGD : RC_DISTILL_OPT_ADAMW;
  s->weight_decay = -1;
  s->momentum = -1;
  s->nesterov = 1;
  s->schedule = c.sched.kind == RC_SCHED_STEP       ? RC_DISTILL_SCHED_STEP
                : c.sched.kind == RC_SCHED_CONSTANT ? RC_DISTILL_SCHED_CONSTANT
                                                    : RC_DISTILL_SCHED_COSINE;
  s->warmup = c.sched.warmup;
  s->step_size = c.sched.step_size;
  s->gamma = c.sched.gamma;
  s->clip = c.clip;
  s->bn = c.bn;
  s->mask = c.mask;
  s->cache_bytes = c.cache_bytes;
}

/* The loop's notes (resumed, statistics re-estimated, projectors fitted,
 * steps rolled back) reach the caller as RC_DISTILL_NOTE progress events
 * when no logger is given. */
static void note_to_progress(void *user, rc_log_level level, const char *msg) {
  (void)level;
  const rc_distill_settings *s = user;
  rc_distill_progress p;
  memset(&p, 0, sizeof p);
  p.event = RC_DISTILL_NOTE;
  p.note = msg;
  s->progress(s->user, &p);
}

static void optim_from(rc_distill_config *c, const rc_distill_settings *s) {
  rc_optim_defaults(&c->optim, s->optimizer == RC_DISTILL_OPT_SGD ? RC_OPTIM_SGD : RC_OPTIM_ADAMW);
  if (s->lr > 0) c->optim.lr = s->lr;
  if (s->weight_decay >= 0) c->optim.weight_decay = s->weight_decay;
  if (s->momentum >= 0) c->optim.momentum = s->momentum;
  if (!s->nesterov) c->optim.nesterov = 0;
  c->sched.kind = s->schedule == RC_DISTILL_SCHED_STEP       ? RC_SCHED_STEP
                  : s->schedule == RC_DISTILL_SCHED_CONSTANT ? RC_SCHED_CONSTANT
                                                             : RC_SCHED_COSINE;
  c->sched.lr = c->optim.lr;
  c->sched.warmup = s->warmup;
  c->sched.step_size = s->step_size;
  c->sched.gamma = s->gamma;
}

static rc_status config_from(rc_distill_config *c, const rc_distill_settings *s, rc_err *e) {
  rc_distill_config_defaults(c);
  c->epochs = s->epochs;
  c->steps = s->steps;
  c->batch = s->batch;
  c->temperature = s->temperature;
  c->alpha = s->alpha;
  c->seed = s->seed;
  if (s->loss) RC_TRY(rc_loss_spec_parse(&c->terms, s->loss, e));
  c->pairs = s->pairs;
  c->pair_weights = s->pair_weights;
  c->n_pairs = s->n_pairs;
  optim_from(c, s);
  c->clip = s->clip;
  c->bn = s->bn;
  c->mask = s->mask;
  c->train_globs = s->train_globs;
  c->n_train = s->n_train;
  c->freeze_globs = s->freeze_globs;
  c->n_freeze = s->n_freeze;
  c->output_losses = s->output_losses;
  c->n_output_losses = s->n_output_losses;
  c->label_output = s->label_output;
  c->cache_bytes = s->cache_bytes;
  c->cache_dir = s->cache_dir;
  c->dist = s->dist;
  c->checkpoint_path = s->checkpoint_path;
  c->checkpoint_every = s->checkpoint_every;
  c->resume_path = s->resume_path;
  c->progress = s->progress;
  c->user = s->user;
  c->stop = s->stop;
  c->augment = s->augment;
  if (s->log.fn) {
    c->log = s->log;
  } else if (s->progress) {
    c->log.fn = note_to_progress;
    c->log.user = (void *)s;
    c->log.max_level = RC_LOG_INFO;
  }
  return RC_OK;
}

rc_status rc_distill_train(rc_distill_summary *out, rc_model *teacher, rc_model *student,
                           const rc_distill_data *data, const rc_distill_settings *s, rc_err *e) {
  memset(out, 0, sizeof *out);
  rc_distill_settings dflt;
  if (!s) {
    rc_distill_settings_init(&dflt);
    s = &dflt;
  }
  rc_distill_config c;
  RC_TRY(config_from(&c, s, e));
  rc_status st = rc_distill_run(out, teacher, student, data, &c, e);
  if (st != RC_OK) rc_distill_result_free(out);
  return st;
}

rc_status rc_distill_save(const rc_distill_summary *sum, rc_model *student, const char *path,
                          const rc_distill_data *data, rc_err *e) {
  RC_TRY(rc_model_save(student, path, sum->changed, sum->n_changed, e));
  const rc_tensor *ins = data->val_inputs ? data->val_inputs : data->inputs;
  int64_t n = ins[0].dims[0];
  double diff = 0;
  RC_TRY(rc_distill_verify_written(path, student, ins, data->n_inputs, n < 64 ? n : 64, &diff, e));
  return RC_OK;
}

void rc_distill_summary_free(rc_distill_summary *s) { rc_distill_result_free(s); }

const char *rc_distill_loss_term(int i, float *default_weight, const char **help) {
  const rc_term_info *t = i >= 0 && i < RC_TERM_COUNT ? rc_term_info_of((rc_term)i) : NULL;
  if (!t) return NULL;
  if (default_weight) *default_weight = t->default_weight;
  if (help) *help = t->help;
  return t->name;
}

rc_status rc_distill_loss_check(const char *text, rc_err *e) {
  rc_loss_spec spec;
  return rc_loss_spec_parse(&spec, text, e);
}

rc_status rc_distill_augment_check(const char *text, rc_err *e) {
  rc_augment aug;
  return rc__augment_parse(&aug, text, e);
}

rc_status rc_distill_pair_check(const rc_model *teacher, const rc_model *student, rc_err *e) {
  return rc_distill_check_pair(&teacher->graph, &student->graph, e);
}

rc_status rc_distill_verify(const char *path, rc_model *student, const rc_tensor *inputs, int n_inputs,
                            int64_t batch, double *max_diff, rc_err *e) {
  return rc_distill_verify_written(path, student, inputs, n_inputs, batch, max_diff, e);
}

double rc_distill_selection(const rc_metrics *m, double alpha) { return rc__select_measure(m, alpha); }

const char *rc_distill_selection_name(const rc_metrics *m, double alpha) { return rc__select_rule_name(m, alpha); }
