/* Per-output losses bound to a teacher and a student plan. */
#include "train/outputs.h"

#include <math.h>
#include <stdio.h>
#include <string.h>

#include "core/alloc.h"

typedef struct bound {
  rc_output_loss spec;
  int sv, tv;              /* output values in the student / teacher graph */
  int64_t per_sample;      /* elements per sample */
  float *target;           /* batch gather buffer, or NULL */
  int64_t *conf;           /* K x K counts (teacher argmax, student argmax) for kd */
} bound;

struct rc_outputs {
  int n;
  bound b[RC_OUTPUTS_MAX];
  int label_spec;          /* index of the kd spec labels belong to, -1: none */
  int64_t label_per_sample;
  int32_t *labels;         /* batch gather buffer */
  int32_t *pred_s, *pred_t;
  int64_t *conf_labels;    /* K x K counts (label, student argmax) */
};

static int find_output(const rc_graph *g, const char *name) {
  for (int i = 0; i < g->n_outputs; i++)
    if (!strcmp(g->values[g->outputs[i]].name, name)) return g->outputs[i];
  return -1;
}

static rc_status no_output(const rc_graph *g, const char *name, rc_err *e) {
  char known[512] = "";
  size_t used = 0;
  for (int i = 0; i < g->n_outputs && used < sizeof known; i++)
    used += (size_t)snprintf(known + used, sizeof known - used, "%s'%s'", i ? ", " : "", g->values[g->outputs[i]].name);
  return rc__fail(e, RC_ERR_INVALID, "output loss term on '%s': %s has no such output (outputs: %s)", name,
                  g->path, known);
}

static rc_status bind_one(bound *b, const rc_output_loss *spec, float default_t, rc_plan *teacher, rc_plan *student,
                          rc_err *e) {
  const rc_graph *sg = rc_plan_graph(student), *tg = rc_plan_graph(teacher);
  b->spec = *spec;
  b->sv = find_output(sg, spec->output);
  b->tv = find_output(tg, spec->output);
  if (b->sv < 0) return no_output(sg, spec->output, e);
  if (b->tv < 0) return no_output(tg, spec->output, e);
  const rc_tensor *s = rc_plan_tensor(student, b->sv), *t = rc_plan_tensor(teacher, b->tv);
  char sa[128], sb[128];
  if (s->dtype != RC_DTYPE_FLOAT || t->dtype != RC_DTYPE_FLOAT)
    return rc__fail(e, RC_ERR_SHAPE, "output '%s' is not float32", spec->output);
  if (!rc_shape_equal(s, t))
    return rc__fail(e, RC_ERR_SHAPE, "output '%s': student shape %s, teacher %s", spec->output,
                    rc_shape_str(s, sa, sizeof sa), rc_shape_str(t, sb, sizeof sb));
  if (s->rank < 2)
    return rc__fail(e, RC_ERR_SHAPE, "output '%s' has shape %s: per-output losses need (batch, ...)", spec->output,
                    rc_shape_str(s, sa, sizeof sa));
  RC_TRY(rc_output_loss_resolve(&b->spec, s->dims, s->rank, default_t, e));
  b->per_sample = rc_tensor_numel(s) / s->dims[0];
  if (rc_out_term_needs_targets(spec->term))
    b->target = rc__malloc(sizeof(float) * (size_t)rc_tensor_numel(s));
  if (spec->term == RC_OUT_KD) {
    int64_t k = s->dims[b->spec.axis];
    b->conf = rc__calloc((size_t)(k * k), sizeof(int64_t));
    if (!b->conf) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  }
  if (rc_out_term_needs_targets(spec->term) && !b->target) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  return RC_OK;
}

rc_status rc__outputs_create(rc_outputs **out, const rc_output_loss *specs, int n, float default_t, rc_plan *teacher,
                             rc_plan *student, const char *label_output, rc_err *e) {
  *out = NULL;
  if (n < 1 || n > RC_OUTPUTS_MAX)
    return rc__fail(e, RC_ERR_INVALID, "output losses: between 1 and %d terms, got %d", RC_OUTPUTS_MAX, n);
  rc_outputs *o = rc__calloc(1, sizeof *o);
  if (!o) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  *out = o;
  o->label_spec = -1;
  for (int i = 0; i < n; i++) {
    for (int j = 0; j < i; j++)
      if (!strcmp(specs[i].output, specs[j].output) && specs[i].term == specs[j].term)
        return rc__fail(e, RC_ERR_INVALID, "output loss %s on '%s' given twice", rc_out_term_name(specs[i].term),
                        specs[i].output);
    RC_TRY(bind_one(&o->b[i], &specs[i], default_t, teacher, student, e));
    o->n++;
  }
  if (!label_output) return RC_OK;
  for (int i = 0; i < n; i++)
    if (specs[i].term == RC_OUT_KD && !strcmp(specs[i].output, label_output)) o->label_spec = i;
  if (o->label_spec < 0)
    return rc__fail(e, RC_ERR_INVALID, "dense labels belong to output '%s', which has no kd term", label_output);
  const bound *b = &o->b[o->label_spec];
  const rc_tensor *s = rc_plan_tensor(student, b->sv);
  int64_t k = s->dims[b->spec.axis];
  o->label_per_sample = b->per_sample / k;
  o->labels = rc__malloc(sizeof(int32_t) * (size_t)(o->label_per_sample * s->dims[0]));
  o->pred_s = rc__malloc(sizeof(int32_t) * (size_t)(o->label_per_sample * s->dims[0]));
  o->pred_t = rc__malloc(sizeof(int32_t) * (size_t)(o->label_per_sample * s->dims[0]));
  o->conf_labels = rc__calloc((size_t)(k * k), sizeof(int64_t));
  if (!o->labels || !o->pred_s || !o->pred_t || !o->conf_labels) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  return RC_OK;
}

void rc__outputs_free(rc_outputs *o) {
  if (!o) return;
  for (int i = 0; i < o->n; i++) {
    rc__free(o->b[i].target);
    rc__free(o->b[i].conf);
  }
  rc__free(o->labels);
  rc__free(o->pred_s);
  rc__free(o->pred_t);
  rc__free(o->conf_labels);
  rc__free(o);
}

int64_t rc__outputs_per_sample(const rc_outputs *o, int i) { return o->b[i].per_sample; }
int64_t rc__outputs_label_per_sample(const rc_outputs *o) { return o->label_spec < 0 ? 0 : o->label_per_sample; }

rc_status rc__outputs_copy_inputs(rc_plan *teacher, rc_plan *student, rc_err *e) {
  const rc_graph *tg = rc_plan_graph(teacher), *sg = rc_plan_graph(student);
  for (int i = 0; i < tg->n_inputs; i++) {
    int j = 0;
    while (j < sg->n_inputs && strcmp(sg->values[sg->inputs[j]].name, tg->values[tg->inputs[i]].name)) j++;
    if (j == sg->n_inputs)
      return rc__fail(e, RC_ERR_INVALID, "teacher input '%s' is not a student input", tg->values[tg->inputs[i]].name);
    rc_tensor *dst = rc_plan_tensor(teacher, tg->inputs[i]);
    const rc_tensor *src = rc_plan_tensor(student, sg->inputs[j]);
    if (rc_tensor_nbytes(dst) != rc_tensor_nbytes(src))
      return rc__fail(e, RC_ERR_SHAPE, "input '%s': teacher and student plans differ in size", sg->values[sg->inputs[j]].name);
    memcpy(dst->data, src->data, rc_tensor_nbytes(dst));
  }
  return RC_OK;
}

/* Side data rows of the batch's samples into the gather buffers. */
static rc_status gather_side(rc_outputs *o, const rc_output_side *side, const int64_t *samples, int64_t count,
                             int *have_labels, rc_err *e) {
  *have_labels = 0;
  for (int i = 0; i < o->n; i++) {
    bound *b = &o->b[i];
    if (!b->target) continue;
    if (!side || !side->targets[i] || !samples)
      return rc__fail(e, RC_ERR_INVALID, "output '%s': %s needs targets, and none were given", b->spec.output,
                      rc_out_term_name(b->spec.term));
    for (int64_t r = 0; r < count; r++)
      memcpy(b->target + r * b->per_sample, side->targets[i] + samples[r] * b->per_sample,
             sizeof(float) * (size_t)b->per_sample);
  }
  if (o->label_spec >= 0 && side && side->labels && samples) {
    for (int64_t r = 0; r < count; r++)
      memcpy(o->labels + r * o->label_per_sample, side->labels + samples[r] * o->label_per_sample,
             sizeof(int32_t) * (size_t)o->label_per_sample);
    *have_labels = 1;
  }
  return RC_OK;
}

/* The output's dims with the batch cut to the batch's real rows. */
static void rows_dims(int64_t *dims, const rc_tensor *t, int64_t count) {
  memcpy(dims, t->dims, sizeof(int64_t) * (size_t)t->rank);
  dims[0] = count;
}

/* The student's gradient buffer of b's output when a gradient is wanted (scale > 0). */
static rc_status output_grad(float **grad, rc_plan *student, const bound *b, float scale, rc_err *e) {
  *grad = NULL;
  if (!(scale > 0)) return RC_OK;
  rc_tensor *g = rc_plan_grad(student, b->sv);
  if (!g) return rc__fail(e, RC_ERR_INVALID, "no trainable tensor reaches output '%s'", b->spec.output);
  *grad = g->data;
  return RC_OK;
}

/* Weighted terms of the batch's first `count` rows; grad_scale 0: no gradient. */
static rc_status batch_terms(rc_outputs *o, rc_plan *teacher, rc_plan *student, int64_t count, float scale,
                             double *sum, rc_err *e) {
  *sum = 0;
  for (int i = 0; i < o->n; i++) {
    bound *b = &o->b[i];
    if (!(b->spec.weight > 0)) continue;
    const rc_tensor *s = rc_plan_tensor(student, b->sv), *t = rc_plan_tensor(teacher, b->tv);
    float *grad = NULL;
    RC_TRY(output_grad(&grad, student, b, scale, e));
    int64_t dims[RC_MAX_RANK];
    rows_dims(dims, s, count);
    double v = 0;
    RC_TRY(rc_output_loss_compute(&v, grad, scale * b->spec.weight, &b->spec, dims, s->rank, s->data, t->data,
                                  b->target, e));
    *sum += b->spec.weight * v;
  }
  return RC_OK;
}

static rc_status label_ce(rc_outputs *o, rc_plan *student, int64_t count, float scale, double *ce, int64_t *counted,
                          rc_err *e, int32_t ignore) {
  const bound *b = &o->b[o->label_spec];
  const rc_tensor *s = rc_plan_tensor(student, b->sv);
  float *grad = NULL;
  RC_TRY(output_grad(&grad, student, b, scale, e));
  int64_t dims[RC_MAX_RANK];
  rows_dims(dims, s, count);
  rc_status st = rc_output_ce(ce, counted, grad, scale, dims, s->rank, b->spec.axis, s->data, o->labels, ignore, e);
  if (st != RC_OK) rc__wrap(e, "dense labels of output '%s'", b->spec.output);
  return st;
}

rc_status rc__outputs_step(rc_outputs *o, rc_plan *teacher, rc_plan *student, const rc_output_side *side,
                           const int64_t *samples, int64_t count, float alpha, double *loss, rc_err *e) {
  int have_labels = 0;
  RC_TRY(gather_side(o, side, samples, count, &have_labels, e));
  float a = have_labels ? alpha : 1.0f;
  double terms = 0, ce = 0;
  int64_t counted = 0;
  if (a > 0) RC_TRY(batch_terms(o, teacher, student, count, a, &terms, e));
  if (have_labels && a < 1) RC_TRY(label_ce(o, student, count, 1 - a, &ce, &counted, e, side->ignore));
  *loss = a * terms + (have_labels && a < 1 ? (1 - a) * ce : 0);
  return RC_OK;
}

/* ---- Validation ------------------------------------------------------------- */

typedef struct val_acc {
  double loss, ce;
  int64_t rows, ce_batches;
  int64_t agree[RC_OUTPUTS_MAX], positions[RC_OUTPUTS_MAX];
  double abs_diff[RC_OUTPUTS_MAX];
  int64_t values[RC_OUTPUTS_MAX];
  int64_t label_hits, label_count;
} val_acc;

static void class_stats(bound *b, val_acc *a, int i, const rc_tensor *s, const rc_tensor *t, int64_t count,
                        int32_t *ps, int32_t *pt) {
  int64_t dims[RC_MAX_RANK], outer, k, inner;
  rows_dims(dims, s, count);
  const float *sd = s->data, *td = t->data;
  if (b->spec.term == RC_OUT_KD_SIGMOID) {
    int64_t n = rc_tensor_numel(s) / s->dims[0] * count;
    for (int64_t x = 0; x < n; x++) a->agree[i] += (sd[x] > 0) == (td[x] > 0);
    a->positions[i] += n;
    return;
  }
  rc_out_layout(dims, s->rank, b->spec.axis, &outer, &k, &inner);
  rc_output_argmax(ps, sd, outer, k, inner);
  rc_output_argmax(pt, td, outer, k, inner);
  for (int64_t p = 0; p < outer * inner; p++) {
    a->agree[i] += ps[p] == pt[p];
    b->conf[pt[p] * k + ps[p]]++;
  }
  a->positions[i] += outer * inner;
}

static void value_stats(const bound *b, val_acc *a, int i, const rc_tensor *s, const rc_tensor *t, int64_t count) {
  int64_t n = b->per_sample * count;
  const float *sd = s->data, *td = t->data;
  double sum = 0;
  for (int64_t x = 0; x < n; x++) sum += fabs((double)sd[x] - td[x]);
  a->abs_diff[i] += sum;
  a->values[i] += n;
}

static void label_stats(rc_outputs *o, val_acc *a, const rc_plan *student_plan, int64_t count, int32_t ignore) {
  const bound *b = &o->b[o->label_spec];
  const rc_tensor *s = rc_plan_tensor((rc_plan *)student_plan, b->sv);
  int64_t dims[RC_MAX_RANK], outer, k, inner;
  rows_dims(dims, s, count);
  rc_out_layout(dims, s->rank, b->spec.axis, &outer, &k, &inner);
  rc_output_argmax(o->pred_s, s->data, outer, k, inner);
  for (int64_t p = 0; p < outer * inner; p++) {
    int32_t l = o->labels[p];
    if (l == ignore || l < 0 || l >= k) continue;
    a->label_hits += o->pred_s[p] == l;
    a->label_count++;
    o->conf_labels[l * k + o->pred_s[p]]++;
  }
}

static void reset_counts(rc_outputs *o, const rc_plan *student) {
  for (int i = 0; i < o->n; i++)
    if (o->b[i].conf) {
      int64_t k = rc_plan_tensor((rc_plan *)student, o->b[i].sv)->dims[o->b[i].spec.axis];
      memset(o->b[i].conf, 0, sizeof(int64_t) * (size_t)(k * k));
    }
  if (o->conf_labels) {
    int64_t k = rc_plan_tensor((rc_plan *)student, o->b[o->label_spec].sv)->dims[o->b[o->label_spec].spec.axis];
    memset(o->conf_labels, 0, sizeof(int64_t) * (size_t)(k * k));
  }
}

static void finish_metrics(rc_outputs *o, const val_acc *a, rc_plan *student, rc_metrics *m) {
  memset(m, 0, sizeof *m);
  m->outputs = 1;
  m->n = a->rows;
  m->top5 = -1;
  m->has_ref = 1;
  m->kl = a->rows ? a->loss / (double)a->rows : NAN;
  double agree = 0, miou = 0, mad = 0;
  int n_class = 0, n_kd = 0, n_val = 0;
  for (int i = 0; i < o->n; i++) {
    const bound *b = &o->b[i];
    if (rc_out_term_kind(b->spec.term) == RC_OUT_CLASSES) {
      agree += a->positions[i] ? (double)a->agree[i] / (double)a->positions[i] : NAN;
      n_class++;
      if (b->conf) {
        miou += rc_output_miou(b->conf, rc_plan_tensor(student, b->sv)->dims[b->spec.axis]);
        n_kd++;
      }
    } else {
      mad += a->values[i] ? a->abs_diff[i] / (double)a->values[i] : NAN;
      n_val++;
    }
  }
  m->agreement = n_class ? agree / n_class : NAN;
  m->miou_ref = n_kd ? miou / n_kd : NAN;
  m->value_mad = n_val ? mad / n_val : NAN;
  m->miou_labels = NAN;
  if (a->label_count) {
    const bound *b = &o->b[o->label_spec];
    m->has_labels = 1;
    m->top1 = (double)a->label_hits / (double)a->label_count;
    m->ce = a->ce_batches ? a->ce / (double)a->rows : NAN;
    m->miou_labels = rc_output_miou(o->conf_labels, rc_plan_tensor(student, b->sv)->dims[b->spec.axis]);
  }
}

rc_status rc__outputs_validate(rc_outputs *o, rc_plan *teacher, rc_plan *student, const rc_dataset *d,
                               const rc_output_side *side, const int64_t *samples, rc_metrics *m, rc_err *e) {
  const rc_graph *sg = rc_plan_graph(student);
  int64_t batch = rc_plan_tensor(student, sg->inputs[0])->dims[0];
  void *in_bufs[RC_DATASET_MAX_INPUTS];
  for (int i = 0; i < d->n_inputs; i++) in_bufs[i] = rc_plan_tensor(student, sg->inputs[i])->data;
  reset_counts(o, student);
  val_acc a;
  memset(&a, 0, sizeof a);
  int64_t nb = rc_dataset_n_batches(d, batch, 0);
  for (int64_t bi = 0; bi < nb; bi++) {
    int64_t count = 0;
    RC_TRY(rc_dataset_gather(in_bufs, NULL, &count, d, bi, batch, e));
    for (int i = 0; count < batch && i < d->n_inputs; i++)
      memset((unsigned char *)in_bufs[i] + (size_t)count * d->sample_bytes[i], 0,
             (size_t)(batch - count) * d->sample_bytes[i]);
    RC_TRY(rc_plan_forward(student, e));
    if (teacher != student) {
      RC_TRY(rc__outputs_copy_inputs(teacher, student, e));
      RC_TRY(rc_plan_forward(teacher, e));
    }
    int have_labels = 0;
    RC_TRY(gather_side(o, side, samples ? samples + bi * batch : NULL, count, &have_labels, e));
    double terms = 0;
    RC_TRY(batch_terms(o, teacher, student, count, 0, &terms, e));
    a.loss += terms * (double)count;
    a.rows += count;
    for (int i = 0; i < o->n; i++) {
      const rc_tensor *s = rc_plan_tensor(student, o->b[i].sv), *t = rc_plan_tensor(teacher, o->b[i].tv);
      if (rc_out_term_kind(o->b[i].spec.term) == RC_OUT_CLASSES) {
        int32_t *ps = o->pred_s, *pt = o->pred_t;
        int64_t need = rc_tensor_numel(s);
        int32_t *tmp = NULL;
        if (!ps || o->label_per_sample * s->dims[0] < need) {
          tmp = rc__malloc(sizeof(int32_t) * 2 * (size_t)need);
          if (!tmp) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
          ps = tmp, pt = tmp + need;
        }
        class_stats(&o->b[i], &a, i, s, t, count, ps, pt);
        rc__free(tmp);
      } else {
        value_stats(&o->b[i], &a, i, s, t, count);
      }
    }
    if (have_labels) {
      double ce = 0;
      int64_t counted = 0;
      RC_TRY(label_ce(o, student, count, 0, &ce, &counted, e, side->ignore));
      a.ce += ce * (double)count;
      a.ce_batches++;
      label_stats(o, &a, student, count, side->ignore);
    }
  }
  finish_metrics(o, &a, student, m);
  return RC_OK;
}
