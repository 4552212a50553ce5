/* recoup/distill.h: the public settings mapped onto the training loop's
 * full configuration (train/distill.h), whose other fields keep their
 * defaults. */
#include <string.h>

#include "core/alloc.h"
#include "core/status.h"
#include "recoup/distill.h"
#include "train/distill.h"

void rc_distill_settings_init(rc_distill_settings *s) {
  rc_distill_config c;
  rc_distill_config_defaults(&c);
  memset(s, 0, sizeof *s);
  s->epochs = c.epochs;
  s->steps = c.steps;
  s->batch = c.batch;
  s->temperature = c.temperature;
  s->alpha = c.alpha;
  s->lr = c.sched.lr;
  s->seed = c.seed;
}

/* The loop's notes (resumed, statistics re-estimated, projectors fitted,
 * steps rolled back) reach the caller as RC_DISTILL_NOTE progress events. */
static void note_to_progress(void *user, rc_log_level level, const char *msg) {
  const rc_distill_settings *s = user;
  rc_distill_progress p;
  memset(&p, 0, sizeof p);
  p.event = RC_DISTILL_NOTE;
  p.note = msg;
  s->progress(s->user, &p);
}

static void config_from(rc_distill_config *c, const rc_distill_settings *s) {
  rc_distill_config_defaults(c);
  c->epochs = s->epochs;
  c->steps = s->steps;
  c->batch = s->batch;
  c->temperature = s->temperature;
  c->alpha = s->alpha;
  if (s->lr > 0) c->optim.lr = c->sched.lr = s->lr;
  c->seed = s->seed;
  c->checkpoint_path = s->checkpoint_path;
  c->checkpoint_every = s->checkpoint_every;
  c->resume_path = s->resume_path;
  c->progress = s->progress;
  c->user = s->user;
  c->stop = s->stop;
  c->augment = s->augment;
  if (s->progress) {
    c->log.fn = note_to_progress;
    c->log.user = (void *)s;
    c->log.max_level = RC_LOG_INFO;
  }
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
  config_from(&c, s);
  rc_distill_result r;
  memset(&r, 0, sizeof r);
  rc_status st = rc_distill_run(&r, teacher, student, data, &c, e);
  if (st == RC_OK) {
    out->teacher = r.teacher;
    out->before = r.before;
    out->after = r.after;
    out->n_train = r.n_train;
    out->n_val = r.n_val;
    out->steps_done = r.steps_done;
    out->best_epoch = r.best_epoch;
    out->improved = r.improved;
    out->mask_ok = r.mask_ok;
    out->n_grids = r.n_grids;
    out->seconds = r.seconds;
    out->changed = r.changed; /* handed over */
    out->n_changed = r.n_changed;
    r.changed = NULL;
  }
  rc_distill_result_free(&r);
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

void rc_distill_summary_free(rc_distill_summary *s) {
  rc__free(s->changed);
  memset(s, 0, sizeof *s);
}
