/* Losses per model output; see output_loss.h for the formulas. */
#include "train/output_loss.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

/* Keys a term takes, as bits. */
enum { K_AXIS = 1, K_T = 2, K_WEIGHT = 4, K_WEIGHTS = 8, K_BETA = 16, K_MARGIN = 32, K_BINS = 64 };

typedef struct term_entry {
  const char *name;
  unsigned keys;
  int default_axis;       /* RC_OUT_AXIS_DEFAULT: none (elementwise) */
  float default_t;        /* 0: the run's --temperature */
  rc_out_kind kind;
  int needs_targets;
} term_entry;

/* The one table of output terms. Defaults: kd takes the run's temperature;
 * kd-sigmoid compares the probabilities as they are (T = 1); edge-kd's
 * T = 10 is the value Zheng et al. 2022 report using (recalled from memory);
 * smooth-l1's beta = 1 is PyTorch's default; bounded-l2's margin 0 makes the
 * student's error count whenever it is not below the teacher's. */
static const term_entry TERMS[RC_OUT_TERM_COUNT] = {
    [RC_OUT_KD] = {"kd", K_AXIS | K_T | K_WEIGHT | K_WEIGHTS, 1, 0.0f, RC_OUT_CLASSES, 0},
    [RC_OUT_KD_SIGMOID] = {"kd-sigmoid", K_T | K_WEIGHT, RC_OUT_AXIS_DEFAULT, 1.0f, RC_OUT_CLASSES, 0},
    [RC_OUT_MSE] = {"mse", K_WEIGHT, RC_OUT_AXIS_DEFAULT, 1.0f, RC_OUT_VALUES, 0},
    [RC_OUT_SMOOTH_L1] = {"smooth-l1", K_WEIGHT | K_BETA, RC_OUT_AXIS_DEFAULT, 1.0f, RC_OUT_VALUES, 0},
    [RC_OUT_BOUNDED_L2] = {"bounded-l2", K_AXIS | K_WEIGHT | K_MARGIN, -1, 1.0f, RC_OUT_VALUES, 1},
    [RC_OUT_EDGE_KD] = {"edge-kd", K_AXIS | K_T | K_WEIGHT | K_BINS, -1, 10.0f, RC_OUT_VALUES, 0},
};

const char *rc_out_term_name(rc_out_term t) { return t < RC_OUT_TERM_COUNT ? TERMS[t].name : "?"; }
rc_out_kind rc_out_term_kind(rc_out_term t) { return TERMS[t].kind; }
int rc_out_term_needs_targets(rc_out_term t) { return TERMS[t].needs_targets; }
const char *rc_out_term_list(void) { return "kd, kd-sigmoid, mse, smooth-l1, bounded-l2, edge-kd"; }

static int parse_number(const char *v, double *out) {
  char *end;
  *out = strtod(v, &end);
  return end != v && !*end && isfinite(*out);
}

static rc_status parse_key(rc_output_loss *o, const term_entry *te, const char *key, const char *val,
                           const char *spec, rc_err *e) {
  static const struct { const char *name; unsigned bit; } keys[] = {
      {"axis", K_AXIS}, {"t", K_T}, {"weight", K_WEIGHT}, {"weights", K_WEIGHTS},
      {"beta", K_BETA}, {"margin", K_MARGIN}, {"bins", K_BINS}};
  unsigned bit = 0;
  for (size_t i = 0; i < sizeof keys / sizeof keys[0]; i++)
    if (!strcmp(key, keys[i].name)) bit = keys[i].bit;
  if (!bit || !(te->keys & bit))
    return rc__fail(e, RC_ERR_INVALID, "output loss '%s': %s takes no key '%s'", spec, te->name, key);
  double d = 0;
  if (bit == K_WEIGHTS) {
    const char *p = val;
    o->n_class_weights = 0;
    while (*p) {
      char *end;
      double w = strtod(p, &end);
      if (end == p || !isfinite(w) || w < 0 || o->n_class_weights == RC_OUT_MAX_CLASS_WEIGHTS)
        return rc__fail(e, RC_ERR_INVALID, "output loss '%s': weights must be up to %d non-negative numbers", spec,
                        RC_OUT_MAX_CLASS_WEIGHTS);
      o->class_weights[o->n_class_weights++] = (float)w;
      p = *end == ',' ? end + 1 : end;
      if (*end && *end != ',') return rc__fail(e, RC_ERR_INVALID, "output loss '%s': bad weights", spec);
    }
    if (!o->n_class_weights) return rc__fail(e, RC_ERR_INVALID, "output loss '%s': empty weights", spec);
    return RC_OK;
  }
  if (!parse_number(val, &d))
    return rc__fail(e, RC_ERR_INVALID, "output loss '%s': %s needs a number, got '%s'", spec, key, val);
  switch (bit) {
    case K_AXIS:
      if (d != floor(d) || fabs(d) > 8) return rc__fail(e, RC_ERR_INVALID, "output loss '%s': bad axis", spec);
      o->axis = (int)d;
      return RC_OK;
    case K_T:
      if (!(d > 0) || d > 1e3)
        return rc__fail(e, RC_ERR_INVALID, "output loss '%s': t must lie in (0, 1000]", spec);
      o->temperature = (float)d;
      return RC_OK;
    case K_WEIGHT:
      if (d < 0 || d > 1e6)
        return rc__fail(e, RC_ERR_INVALID, "output loss '%s': weight must lie in [0, 1e6]", spec);
      o->weight = (float)d;
      return RC_OK;
    case K_BETA:
      if (d < 0 || d > 1e6) return rc__fail(e, RC_ERR_INVALID, "output loss '%s': beta must be >= 0", spec);
      o->beta = (float)d;
      return RC_OK;
    case K_MARGIN:
      o->margin = (float)d;
      return RC_OK;
    default:
      if (d != floor(d) || d < 2 || d > 1 << 20)
        return rc__fail(e, RC_ERR_INVALID, "output loss '%s': bins must be an integer >= 2", spec);
      o->bins = (int)d;
      return RC_OK;
  }
}

rc_status rc_output_loss_parse(rc_output_loss *o, const char *spec, rc_err *e) {
  memset(o, 0, sizeof *o);
  o->weight = 1.0f;
  o->axis = RC_OUT_AXIS_DEFAULT;
  o->beta = 1.0f;
  char buf[2048];
  if (strlen(spec) >= sizeof buf) return rc__fail(e, RC_ERR_INVALID, "output loss: text too long");
  strcpy(buf, spec);
  char *eq = strchr(buf, '=');
  if (!eq || eq == buf || (size_t)(eq - buf) >= sizeof o->output)
    return rc__fail(e, RC_ERR_INVALID, "output loss '%s': expected OUTPUT=TERM[:key=value...]", spec);
  *eq = 0;
  strcpy(o->output, buf);
  char *term = eq + 1, *rest = strchr(term, ':');
  if (rest) *rest++ = 0;
  int found = -1;
  for (int i = 0; i < RC_OUT_TERM_COUNT; i++)
    if (!strcmp(term, TERMS[i].name)) found = i;
  if (found < 0)
    return rc__fail(e, RC_ERR_INVALID, "output loss '%s': unknown term '%s' (known: %s)", spec, term,
                    rc_out_term_list());
  o->term = (rc_out_term)found;
  while (rest && *rest) {
    char *next = strchr(rest, ':');
    if (next) *next++ = 0;
    char *kv = strchr(rest, '=');
    if (!kv) return rc__fail(e, RC_ERR_INVALID, "output loss '%s': expected key=value, got '%s'", spec, rest);
    *kv = 0;
    RC_TRY(parse_key(o, &TERMS[found], rest, kv + 1, spec, e));
    rest = next;
  }
  if (o->term == RC_OUT_EDGE_KD && !o->bins)
    return rc__fail(e, RC_ERR_INVALID, "output loss '%s': edge-kd needs bins=N (entries per box edge)", spec);
  return RC_OK;
}

rc_status rc_output_loss_resolve(rc_output_loss *o, const int64_t *dims, int rank, float default_temperature,
                                 rc_err *e) {
  const term_entry *te = &TERMS[o->term];
  if (o->temperature <= 0) o->temperature = te->default_t > 0 ? te->default_t : default_temperature;
  if (te->default_axis == RC_OUT_AXIS_DEFAULT) {
    o->axis = -1000 - 1; /* marks "no axis" once resolved */
    return RC_OK;
  }
  int axis = o->axis == RC_OUT_AXIS_DEFAULT ? te->default_axis : o->axis;
  int given = axis;
  if (axis < 0) axis += rank;
  if (axis < 1 || axis >= rank)
    return rc__fail(e, RC_ERR_SHAPE, "output '%s' (rank %d): %s axis %d is out of range (1..%d; axis 0 is the "
                    "batch)", o->output, rank, te->name, given, rank - 1);
  o->axis = axis;
  int64_t k = dims[axis];
  if (o->term == RC_OUT_EDGE_KD && (k % o->bins != 0))
    return rc__fail(e, RC_ERR_SHAPE, "output '%s': axis %d has %lld entries, not a multiple of bins=%d", o->output,
                    axis, (long long)k, o->bins);
  if (o->n_class_weights && o->n_class_weights != k)
    return rc__fail(e, RC_ERR_SHAPE, "output '%s': %d class weights for %lld classes on axis %d", o->output,
                    o->n_class_weights, (long long)k, axis);
  return RC_OK;
}

void rc_out_layout(const int64_t *dims, int rank, int axis, int64_t *outer, int64_t *k, int64_t *inner) {
  int64_t n = 1;
  for (int d = 0; d < rank; d++) n *= dims[d];
  if (axis < 0 || axis >= rank) {
    *outer = n, *k = 1, *inner = 1;
    return;
  }
  *outer = 1, *inner = 1;
  for (int d = 0; d < axis; d++) *outer *= dims[d];
  for (int d = axis + 1; d < rank; d++) *inner *= dims[d];
  *k = dims[axis];
}

/* ---- kd and edge-kd: softmax KL over groups of `g` entries along the axis ---- */

/* One group at one position: x[j * inner] for j < g. Returns the weighted
 * KL and adds gscale * (ps_j W - w_j pt_j) to the gradient. */
static double kl_group(float *grad, const float *s, const float *t, int64_t g, int64_t inner, double temp,
                       const float *w, double gscale) {
  double ms = -INFINITY, mt = -INFINITY;
  for (int64_t j = 0; j < g; j++) {
    if (s[j * inner] > ms) ms = s[j * inner];
    if (t[j * inner] > mt) mt = t[j * inner];
  }
  double zs = 0, zt = 0;
  for (int64_t j = 0; j < g; j++) {
    zs += exp((s[j * inner] - ms) / temp);
    zt += exp((t[j * inner] - mt) / temp);
  }
  double lzs = log(zs), lzt = log(zt), kl = 0, wsum = 0;
  for (int64_t j = 0; j < g; j++) {
    double lt = (t[j * inner] - mt) / temp - lzt, ls = (s[j * inner] - ms) / temp - lzs;
    double pt = exp(lt), wj = w ? w[j] : 1.0;
    if (pt > 0) kl += wj * pt * (lt - ls);
    wsum += wj * pt;
  }
  if (grad)
    for (int64_t j = 0; j < g; j++) {
      double lt = (t[j * inner] - mt) / temp - lzt, ls = (s[j * inner] - ms) / temp - lzs;
      double wj = w ? w[j] : 1.0;
      grad[j * inner] += (float)(gscale * (exp(ls) * wsum - wj * exp(lt)));
    }
  return kl;
}

static double softmax_kl(float *grad, double grad_scale, const float *s, const float *t, int64_t outer, int64_t k,
                         int64_t inner, int64_t g, double temp, const float *w) {
  double positions = (double)outer * (double)inner;
  double gscale = grad_scale * temp / positions, total = 0;
  for (int64_t o = 0; o < outer; o++)
    for (int64_t i = 0; i < inner; i++)
      for (int64_t start = 0; start < k; start += g) {
        int64_t off = (o * k + start) * inner + i;
        total += kl_group(grad ? grad + off : NULL, s + off, t + off, g, inner, temp, w ? w + start : NULL, gscale);
      }
  return temp * temp * total / positions;
}

/* log sigmoid(x) = -softplus(-x), computed without overflow. */
static double log_sigmoid(double x) { return x >= 0 ? -log1p(exp(-x)) : x - log1p(exp(x)); }

static double sigmoid_kl(float *grad, double grad_scale, const float *s, const float *t, int64_t n, double temp) {
  double total = 0, gscale = grad_scale * temp / (double)n;
  for (int64_t i = 0; i < n; i++) {
    double xs = s[i] / temp, xt = t[i] / temp;
    double lps = log_sigmoid(xs), lqs = log_sigmoid(-xs), lpt = log_sigmoid(xt), lqt = log_sigmoid(-xt);
    double pt = exp(lpt), qt = exp(lqt);
    total += (pt > 0 ? pt * (lpt - lps) : 0) + (qt > 0 ? qt * (lqt - lqs) : 0);
    if (grad) grad[i] += (float)(gscale * (exp(lps) - pt));
  }
  return temp * temp * total / (double)n;
}

static double mse(float *grad, double grad_scale, const float *s, const float *t, int64_t n) {
  double total = 0, gscale = 2 * grad_scale / (double)n;
  for (int64_t i = 0; i < n; i++) {
    double d = (double)s[i] - t[i];
    total += d * d;
    if (grad) grad[i] += (float)(gscale * d);
  }
  return total / (double)n;
}

static double smooth_l1(float *grad, double grad_scale, const float *s, const float *t, int64_t n, double beta) {
  double total = 0, gscale = grad_scale / (double)n;
  for (int64_t i = 0; i < n; i++) {
    double d = (double)s[i] - t[i], a = fabs(d);
    if (a < beta) {
      total += 0.5 * d * d / beta;
      if (grad) grad[i] += (float)(gscale * d / beta);
    } else {
      total += a - 0.5 * beta;
      if (grad) grad[i] += (float)(gscale * (d > 0 ? 1.0 : d < 0 ? -1.0 : 0.0));
    }
  }
  return total / (double)n;
}

static double bounded_l2(float *grad, double grad_scale, const float *s, const float *t, const float *y,
                         int64_t outer, int64_t k, int64_t inner, double margin) {
  int64_t valid = 0;
  for (int64_t o = 0; o < outer; o++)
    for (int64_t i = 0; i < inner; i++) {
      int ok = 1;
      for (int64_t j = 0; j < k; j++) ok &= !isnan(y[(o * k + j) * inner + i]);
      valid += ok;
    }
  if (!valid) return 0;
  double total = 0, gscale = 2 * grad_scale / (double)valid;
  for (int64_t o = 0; o < outer; o++)
    for (int64_t i = 0; i < inner; i++) {
      double es = 0, et = 0;
      int ok = 1;
      for (int64_t j = 0; j < k; j++) {
        int64_t x = (o * k + j) * inner + i;
        if (isnan(y[x])) ok = 0;
        double ds = (double)s[x] - y[x], dt = (double)t[x] - y[x];
        es += ds * ds;
        et += dt * dt;
      }
      /* NaN student values keep the term (es is NaN) so the caller sees them. */
      if (!ok || (es + margin <= et)) continue;
      total += es;
      if (grad)
        for (int64_t j = 0; j < k; j++) {
          int64_t x = (o * k + j) * inner + i;
          grad[x] += (float)(gscale * ((double)s[x] - y[x]));
        }
    }
  return total / (double)valid;
}

rc_status rc_output_loss_compute(double *loss, float *grad, float grad_scale, const rc_output_loss *o,
                                 const int64_t *dims, int rank, const float *s, const float *t, const float *y,
                                 rc_err *e) {
  if (!s || !t) return rc__fail(e, RC_ERR_INVALID, "output '%s': missing values", o->output);
  if (TERMS[o->term].needs_targets && !y)
    return rc__fail(e, RC_ERR_INVALID, "output '%s': %s needs targets, and none were given", o->output,
                    TERMS[o->term].name);
  int64_t outer, k, inner;
  rc_out_layout(dims, rank, o->axis, &outer, &k, &inner);
  int64_t n = outer * k * inner;
  if (n < 1) return rc__fail(e, RC_ERR_SHAPE, "output '%s' is empty", o->output);
  double temp = o->temperature > 0 ? o->temperature : 1.0, v = 0;
  switch (o->term) {
    case RC_OUT_KD:
      v = softmax_kl(grad, grad_scale, s, t, outer, k, inner, k, temp, o->n_class_weights ? o->class_weights : NULL);
      break;
    case RC_OUT_EDGE_KD: v = softmax_kl(grad, grad_scale, s, t, outer, k, inner, o->bins, temp, NULL); break;
    case RC_OUT_KD_SIGMOID: v = sigmoid_kl(grad, grad_scale, s, t, n, temp); break;
    case RC_OUT_MSE: v = mse(grad, grad_scale, s, t, n); break;
    case RC_OUT_SMOOTH_L1: v = smooth_l1(grad, grad_scale, s, t, n, o->beta); break;
    case RC_OUT_BOUNDED_L2: v = bounded_l2(grad, grad_scale, s, t, y, outer, k, inner, o->margin); break;
    default: return rc__fail(e, RC_ERR_INVALID, "output '%s': unknown term", o->output);
  }
  if (loss) *loss = v;
  return RC_OK;
}

rc_status rc_output_ce(double *loss, int64_t *counted, float *grad, float grad_scale, const int64_t *dims, int rank,
                       int axis, const float *x, const int32_t *labels, int32_t ignore, rc_err *e) {
  int64_t outer, k, inner;
  rc_out_layout(dims, rank, axis, &outer, &k, &inner);
  int64_t count = 0;
  for (int64_t p = 0; p < outer * inner; p++) {
    if (labels[p] == ignore) continue;
    if (labels[p] < 0 || labels[p] >= k)
      return rc__fail(e, RC_ERR_INVALID, "label %d at position %lld is outside [0, %lld) and not the ignore value %d",
                      (int)labels[p], (long long)p, (long long)k, (int)ignore);
    count++;
  }
  *counted = count;
  if (loss) *loss = 0;
  if (!count) return RC_OK;
  double total = 0, gscale = grad_scale / (double)count;
  for (int64_t o = 0; o < outer; o++)
    for (int64_t i = 0; i < inner; i++) {
      int32_t lab = labels[o * inner + i];
      if (lab == ignore) continue;
      const float *r = x + o * k * inner + i;
      double m = -INFINITY, z = 0;
      for (int64_t j = 0; j < k; j++)
        if (r[j * inner] > m) m = r[j * inner];
      for (int64_t j = 0; j < k; j++) z += exp(r[j * inner] - m);
      double lz = log(z);
      total -= (r[lab * inner] - m) - lz;
      if (grad)
        for (int64_t j = 0; j < k; j++)
          grad[o * k * inner + j * inner + i] +=
              (float)(gscale * (exp(r[j * inner] - m - lz) - (j == lab ? 1.0 : 0.0)));
    }
  if (loss) *loss = total / (double)count;
  return RC_OK;
}

void rc_output_argmax(int32_t *pred, const float *x, int64_t outer, int64_t k, int64_t inner) {
  for (int64_t o = 0; o < outer; o++)
    for (int64_t i = 0; i < inner; i++) {
      const float *r = x + o * k * inner + i;
      int64_t best = -1;
      for (int64_t j = 0; j < k; j++)
        if (!isnan(r[j * inner]) && (best < 0 || r[j * inner] > r[best * inner])) best = j;
      pred[o * inner + i] = (int32_t)(best < 0 ? 0 : best);
    }
}

double rc_output_miou(const int64_t *conf, int64_t k) {
  double sum = 0;
  int64_t classes = 0;
  for (int64_t c = 0; c < k; c++) {
    int64_t inter = conf[c * k + c], row = 0, col = 0;
    for (int64_t j = 0; j < k; j++) {
      row += conf[c * k + j];
      col += conf[j * k + c];
    }
    int64_t uni = row + col - inter;
    if (uni > 0) {
      sum += (double)inter / (double)uni;
      classes++;
    }
  }
  return classes ? sum / (double)classes : NAN;
}
