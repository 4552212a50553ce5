#include "train/measure.h"

#include <math.h>
#include <stdio.h>
#include <string.h>

#include "core/alloc.h"
#include "plan/plan.h"
#include "ops/fakequant.h"
#include "ops/op.h"

/* ---- Which tensors --------------------------------------------------------- */

static int is_activation_grid(const rc_qat_site *q) { return q->q >= 0 && q->int_value < 0 && q->float_weight < 0; }

/* The tensor the rest of the student sees in place of v: past the pair when
 * v enters a QuantizeLinear→DequantizeLinear pair (rewritten for training as
 * FakeQuantLinear→Identity, the same values). */
static int past_qdq(const rc_graph *g, const rc_qat *qat, int v) {
  for (int i = 0; i < qat->n; i++) {
    const rc_qat_site *q = &qat->sites[i];
    if (q->q < 0 || g->nodes[q->q].in[0] != v) continue;
    const rc_node *dq = &g->nodes[q->dq];
    return dq->n_out > 0 && dq->out[0] >= 0 ? dq->out[0] : v;
  }
  return v;
}

static int output_named(const rc_graph *g, const char *name) {
  for (int i = 0; i < g->n_outputs; i++)
    if (!strcmp(g->values[g->outputs[i]].name, name)) return g->outputs[i];
  return -1;
}

/* Settle what one row compares. A teacher graph output is compared with the
 * student's output of that name: the deployed output, past any final QDQ
 * pair. Otherwise a teacher tensor named like the student's wins over a
 * pairing by position (a student whose BatchNormalization was folded into
 * its convolution gives the convolution the normalised tensor's name), and
 * the student side moves past its QDQ pair. Shapes are checked per batch. */
static void settle_pair(const rc_measure_setup *m, rc_pair *p) {
  const rc_graph *tg = m->teacher, *sg = m->student;
  int out = output_named(sg, tg->values[p->teacher].name);
  if (out >= 0) {
    p->student = out;
    return;
  }
  int same = rc__graph_find_value(tg, sg->values[p->student].name);
  if (same >= 0 && tg->values[same].kind == RC_VALUE_ACTIVATION) p->teacher = same;
  p->student = past_qdq(sg, m->qat, p->student);
}

static void copy_name(char *dst, size_t n, const char *src) { snprintf(dst, n, "%s", src); }

rc_status rc__measure_prepare(const rc_measure_setup *m, rc_pairing *pg, rc_distill_result *r, rc_err *e) {
  rc_tensor shapes[RC_DATASET_MAX_INPUTS];
  for (int i = 0; i < m->student->n_inputs; i++) {
    shapes[i] = m->student_shapes[i];
    shapes[i].dims[0] = 1;
  }
  RC_TRY(rc_pairing_init(pg, m->teacher, m->student, shapes, NULL, 0, 1, e));
  int k = 0;
  for (int i = 0; i < pg->n; i++)
    if (rc_shape_equal(&pg->pairs[i].t_shape, &pg->pairs[i].s_shape)) {
      pg->pairs[k] = pg->pairs[i];
      settle_pair(m, &pg->pairs[k++]);
    }
  pg->n = k;
  r->n_layers = k;
  r->layers = rc__calloc((size_t)k + 1, sizeof(rc_layer_error));
  int n_grids = 0;
  for (int i = 0; i < m->qat->n; i++) n_grids += is_activation_grid(&m->qat->sites[i]);
  r->ranges = rc__calloc((size_t)n_grids + 1, sizeof(rc_range_check));
  if (!r->layers || !r->ranges) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  for (int i = 0; i < k; i++) {
    rc_layer_error *l = &r->layers[i];
    copy_name(l->teacher, sizeof l->teacher, m->teacher->values[pg->pairs[i].teacher].name);
    copy_name(l->student, sizeof l->student, m->student->values[pg->pairs[i].student].name);
    l->sqnr_before_db = l->sqnr_after_db = NAN;
  }
  for (int i = 0; i < m->qat->n; i++)
    if (is_activation_grid(&m->qat->sites[i])) {
      int x = m->student->nodes[m->qat->sites[i].q].in[0];
      copy_name(r->ranges[r->n_ranges].tensor, sizeof r->ranges[0].tensor, m->student->values[x].name);
      r->n_ranges++;
    }
  return RC_OK;
}

/* ---- Activation ranges ------------------------------------------------------- */

/* Rows [0, rows) of the tensor entering one activation grid: count values
 * the grid clamps (round(x / s) + z outside [qmin, qmax], computed as the
 * kernel does) and keep the one furthest outside. */
static rc_status range_batch(rc_range_stats *st, rc_plan *p, const rc_node *qn, int64_t rows, int64_t batch,
                             rc_err *e) {
  const rc_fake_quant_params *fp = qn->params;
  const rc_tensor *x = rc_plan_tensor(p, qn->in[0]), *sc = rc_plan_tensor(p, qn->in[1]);
  const rc_tensor *zt = qn->n_in > 2 && qn->in[2] >= 0 ? rc_plan_tensor(p, qn->in[2]) : NULL;
  /* Only a tensor with the batch as its first axis splits into samples. */
  if (!x->data || !sc->data || x->rank < 1 || x->dims[0] != batch) return RC_OK;
  int64_t ns = rc_tensor_numel(sc), channels = 1, inner = rc_tensor_numel(x) / x->dims[0];
  if (ns > 1) {
    int axis;
    RC_TRY(rc__axis(qn, fp->axis, x->rank, &axis, e));
    if (axis == 0) return RC_OK; /* a grid along the batch axis is not an activation grid */
    channels = ns;
    inner = 1;
    for (int d = axis + 1; d < x->rank; d++) inner *= x->dims[d];
  }
  const float *v = x->data, *s = sc->data;
  int64_t per = rc_tensor_numel(x) / x->dims[0];
  double worst_excess = st->values_out ? fabs(st->worst - st->bound) : 0;
  for (int64_t r = 0; r < rows; r++) {
    int row_out = 0;
    for (int64_t i = r * per; i < (r + 1) * per; i++) {
      int64_t c = (i / inner) % channels;
      int32_t z = zt && zt->data ? (int32_t)rc__int_at(zt, c) : 0;
      float q = rintf(v[i] / s[c]) + (float)z;
      if (q <= (float)fp->qmax && q >= (float)fp->qmin) continue;
      double bound = (double)((q > (float)fp->qmax ? fp->qmax : fp->qmin) - z) * s[c];
      double excess = fabs((double)v[i] - bound);
      row_out = 1;
      st->values_out++;
      if (excess > worst_excess || st->values_out == 1) {
        worst_excess = excess;
        st->worst = v[i];
        st->bound = bound;
      }
    }
    st->samples_out += row_out;
  }
  st->values += rows * per;
  st->samples += rows;
  return RC_OK;
}

/* ---- One pass ---------------------------------------------------------------- */

typedef struct sums {
  double *sig, *noise;
  int64_t *rows;
} sums;

/* Sums of t^2 and (t - x)^2 over n values, in double, eight lanes. */
static void block_sums(const float *t, const float *x, int64_t n, double *sig, double *noise) {
  double s[8] = {0}, q[8] = {0};
  int64_t k = 0;
  for (; k + 8 <= n; k += 8)
    for (int l = 0; l < 8; l++) {
      const double v = t[k + l], d = v - x[k + l];
      s[l] += v * v;
      q[l] += d * d;
    }
  for (; k < n; k++) {
    const double v = t[k], d = v - x[k];
    s[0] += v * v;
    q[0] += d * d;
  }
  *sig = ((s[0] + s[1]) + (s[2] + s[3])) + ((s[4] + s[5]) + (s[6] + s[7]));
  *noise = ((q[0] + q[1]) + (q[2] + q[3])) + ((q[4] + q[5]) + (q[6] + q[7]));
}

/* Rows [0, rows) of one paired tensor; a tensor without the batch as its
 * first axis can only be split into samples when the batch is full. */
static void add_pair(sums *acc, int i, const rc_tensor *t, const rc_tensor *x, int64_t rows, int64_t batch) {
  int64_t n = rc_tensor_numel(t);
  if (!rc_shape_equal(t, x) || !t->data || !x->data) return;
  if (t->rank < 1 || t->dims[0] != batch) {
    if (rows != batch) return;
  } else {
    n = n / batch * rows;
  }
  const float *a = t->data, *c = x->data;
  /* Fixed blocks summed in a fixed order: the figures do not depend on the
   * thread count, and lanes free the sums from one long chain of additions
   * (the pass took as long as the two models' forward passes). */
  enum { BLOCK = 4096, GROUP = 64 };
  const int64_t blocks = (n + BLOCK - 1) / BLOCK;
  for (int64_t g0 = 0; g0 < blocks; g0 += GROUP) {
    const int64_t g1 = g0 + GROUP < blocks ? g0 + GROUP : blocks;
    double sig[GROUP], noise[GROUP];
#pragma omp parallel for schedule(static) if (g1 - g0 > 4)
    for (int64_t b = g0; b < g1; b++) {
      const int64_t lo = b * BLOCK, len = n - lo < BLOCK ? n - lo : BLOCK;
      block_sums(a + lo, c + lo, len, &sig[b - g0], &noise[b - g0]);
    }
    for (int64_t b = g0; b < g1; b++) {
      acc->sig[i] += sig[b - g0];
      acc->noise[i] += noise[b - g0];
    }
  }
  acc->rows[i] += rows;
}

static double sqnr_db(double sig, double noise, int64_t rows) {
  if (rows == 0) return NAN;
  if (noise == 0) return INFINITY;
  return 10.0 * log10(sig / noise);
}

void rc__measure_keep(const rc_measure_setup *m, const rc_pairing *pg, unsigned char *tkeep,
                      unsigned char *skeep) {
  for (int i = 0; i < pg->n; i++) {
    tkeep[pg->pairs[i].teacher] = 1;
    skeep[pg->pairs[i].student] = 1;
  }
  for (int i = 0; i < m->qat->n; i++)
    if (is_activation_grid(&m->qat->sites[i])) skeep[m->student->nodes[m->qat->sites[i].q].in[0]] = 1;
}

static rc_status make_plans(const rc_measure_setup *m, const rc_pairing *pg, rc_plan **tp, rc_plan **sp, rc_err *e) {
  const rc_graph *tg = m->teacher, *sg = m->student;
  unsigned char *tkeep = rc__calloc((size_t)tg->n_values + 1, 1), *skeep = rc__calloc((size_t)sg->n_values + 1, 1);
  rc_status s = RC_OK;
  if (!tkeep || !skeep) {
    s = rc__fail(e, RC_ERR_NOMEM, "out of memory");
    goto out;
  }
  rc__measure_keep(m, pg, tkeep, skeep);
  rc_plan_opts to = {.training = 0, .trainable = NULL, .keep = tkeep, .bn_batch_stats = 0};
  rc_plan_opts so = {
      .training = 0, .trainable = m->live, .keep = skeep, .bn_batch_stats = 0, .patterns = m->patterns};
  if ((s = rc_plan_init(tp, tg, m->teacher_shapes, &to, e)) == RC_OK) s = rc_plan_init(sp, sg, m->student_shapes, &so, e);
out:
  rc__free(tkeep);
  rc__free(skeep);
  return s;
}

static int input_position(const rc_graph *g, const char *name) {
  for (int i = 0; i < g->n_inputs; i++)
    if (!strcmp(g->values[g->inputs[i]].name, name)) return i;
  return -1;
}

/* ---- Over the ranks ------------------------------------------------------------ */

/* Doubles per range grid: its four counts, then per rank the values it
 * found outside and its worst value with the bound it passed. */
static size_t range_slots(int ranks) { return 4 + 3 * (size_t)ranks; }

static void range_pack(double *p, const rc_range_stats *rs, int rank) {
  p[0] = (double)rs->values;
  p[1] = (double)rs->values_out;
  p[2] = (double)rs->samples;
  p[3] = (double)rs->samples_out;
  double *mine = p + 4 + 3 * (size_t)rank;
  mine[0] = (double)rs->values_out;
  mine[1] = rs->worst;
  mine[2] = rs->bound;
}

/* The worst value of the lowest rank with the largest excess: ranks hold
 * consecutive samples, so this is the value one process would keep. */
static void range_unpack(rc_range_stats *rs, const double *p, int ranks) {
  rs->values = (int64_t)p[0];
  rs->values_out = (int64_t)p[1];
  rs->samples = (int64_t)p[2];
  rs->samples_out = (int64_t)p[3];
  rs->worst = rs->bound = 0;
  double worst_excess = -1;
  for (int k = 0; k < ranks; k++) {
    const double *q = p + 4 + 3 * (size_t)k;
    if (q[0] > 0 && fabs(q[1] - q[2]) > worst_excess) {
      worst_excess = fabs(q[1] - q[2]);
      rs->worst = q[1];
      rs->bound = q[2];
    }
  }
}

/* Every rank's sums and range figures added up, on every rank. */
static rc_status combine_ranks(const rc_measure_setup *m, const rc_pairing *pg, rc_distill_result *r, int after,
                               sums *acc, rc_err *e) {
  int ranks = rc_dist_size(m->dist);
  if (ranks < 2) return RC_OK;
  size_t per = range_slots(ranks), n = 3 * (size_t)pg->n + per * (size_t)r->n_ranges;
  double *buf = rc__calloc(n + 1, sizeof(double));
  if (!buf) return rc__fail(e, RC_ERR_NOMEM, "out of memory");
  for (int i = 0; i < pg->n; i++) {
    buf[3 * i] = acc->sig[i];
    buf[3 * i + 1] = acc->noise[i];
    buf[3 * i + 2] = (double)acc->rows[i];
  }
  double *ranges = buf + 3 * (size_t)pg->n;
  for (int i = 0; i < r->n_ranges; i++)
    range_pack(ranges + per * (size_t)i, after ? &r->ranges[i].after : &r->ranges[i].before,
               rc_dist_rank(m->dist));
  rc_status s = rc_dist_sum_f64(m->dist, buf, n, e);
  for (int i = 0; s == RC_OK && i < pg->n; i++) {
    acc->sig[i] = buf[3 * i];
    acc->noise[i] = buf[3 * i + 1];
    acc->rows[i] = (int64_t)buf[3 * i + 2];
  }
  for (int i = 0; s == RC_OK && i < r->n_ranges; i++)
    range_unpack(after ? &r->ranges[i].after : &r->ranges[i].before, ranges + per * (size_t)i, ranks);
  rc__free(buf);
  return s;
}

rc_status rc__measure_run(const rc_measure_setup *m, const rc_pairing *pg, rc_distill_result *r, int after,
                          rc_err *e) {
  if (!pg->n && !r->n_ranges) return RC_OK;
  const rc_graph *tg = m->teacher, *sg = m->student;
  rc_plan *tp = m->teacher_plan, *sp = m->student_plan, *own_tp = NULL, *own_sp = NULL;
  sums acc = {rc__calloc((size_t)pg->n + 1, sizeof(double)), rc__calloc((size_t)pg->n + 1, sizeof(double)),
              rc__calloc((size_t)pg->n + 1, sizeof(int64_t))};
  rc_status s = RC_OK;
  if (!acc.sig || !acc.noise || !acc.rows) {
    s = rc__fail(e, RC_ERR_NOMEM, "out of memory");
    goto out;
  }
  if (!tp || !sp) {
    if ((s = make_plans(m, pg, &own_tp, &own_sp, e)) != RC_OK) goto out;
    tp = own_tp;
    sp = own_sp;
  }
  for (int i = 0; i < r->n_ranges; i++) {
    rc_range_stats *rs = after ? &r->ranges[i].after : &r->ranges[i].before;
    memset(rs, 0, sizeof *rs);
  }
  void *sb[RC_DATASET_MAX_INPUTS];
  for (int i = 0; i < sg->n_inputs; i++) sb[i] = rc_plan_tensor(sp, sg->inputs[i])->data;
  /* This rank's samples: whole batches of the first `limit`. */
  int64_t limit = m->val->n < RC_MEASURE_MAX_SAMPLES ? m->val->n : RC_MEASURE_MAX_SAMPLES, lo, hi;
  rc_dist_share_blocks(limit, m->batch, rc_dist_rank(m->dist), rc_dist_size(m->dist), &lo, &hi);
  for (int64_t b = lo / m->batch, done = lo; done < hi; b++) {
    int64_t count;
    if ((s = rc_dataset_gather(sb, NULL, &count, m->val, b, m->batch, e)) != RC_OK) goto out;
    if (count < m->batch) /* no stale or uninitialised rows in a short batch */
      for (int i = 0; i < sg->n_inputs; i++)
        memset((unsigned char *)sb[i] + (size_t)count * m->val->sample_bytes[i], 0,
               (size_t)(m->batch - count) * m->val->sample_bytes[i]);
    if (done + count > hi) count = hi - done;
    for (int i = 0; i < tg->n_inputs; i++) {
      const rc_tensor *ti = rc_plan_tensor(tp, tg->inputs[i]);
      int j = input_position(sg, tg->values[tg->inputs[i]].name);
      memcpy(ti->data, sb[j < 0 ? i : j], rc_tensor_nbytes(ti));
    }
    if ((s = rc_plan_forward(tp, e)) != RC_OK || (s = rc_plan_forward(sp, e)) != RC_OK) goto out;
    for (int i = 0; i < pg->n; i++)
      add_pair(&acc, i, rc_plan_tensor(tp, pg->pairs[i].teacher), rc_plan_tensor(sp, pg->pairs[i].student), count,
               m->batch);
    for (int i = 0, k = 0; i < m->qat->n; i++) {
      if (!is_activation_grid(&m->qat->sites[i])) continue;
      rc_range_stats *rs = after ? &r->ranges[k].after : &r->ranges[k].before;
      k++;
      if ((s = range_batch(rs, sp, &sg->nodes[m->qat->sites[i].q], count, m->batch, e)) != RC_OK) goto out;
    }
    done += count;
  }
  if ((s = combine_ranks(m, pg, r, after, &acc, e)) != RC_OK) goto out;
  for (int i = 0; i < pg->n; i++) {
    rc_layer_error *l = &r->layers[i];
    double db = sqnr_db(acc.sig[i], acc.noise[i], acc.rows[i]);
    if (after) l->sqnr_after_db = db, l->samples_after = acc.rows[i];
    else l->sqnr_before_db = db, l->samples_before = acc.rows[i];
  }
out:
  rc_plan_free(own_tp);
  rc_plan_free(own_sp);
  rc__free(acc.sig);
  rc__free(acc.noise);
  rc__free(acc.rows);
  return s;
}
