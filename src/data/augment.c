/* Augmentation of fetched float batches (augment.h). */
#include "data/augment.h"

#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core/rng.h"

/* The random resized crop's usual ranges (Szegedy et al. 2015, as common
 * practice writes them): 8% to all of the area, aspect ratio 3/4 to 4/3. */
#define RRC_SCALE_LO 0.08
#define RRC_SCALE_HI 1.0
#define RRC_RATIO_LO (3.0 / 4.0)
#define RRC_RATIO_HI (4.0 / 3.0)
#define RRC_ATTEMPTS 10

/* Stream tags keep the draws of each kind apart. */
#define TAG_SAMPLE 0x53414d504c45ULL /* "SAMPLE" */
#define TAG_MIX 0x4d4958ULL          /* "MIX" */

/* ---- Parsing ------------------------------------------------------------------- */

static int parse_num(const char *s, const char *end, double *out) {
  char buf[64];
  size_t n = (size_t)(end - s);
  if (n == 0 || n >= sizeof buf) return 0;
  memcpy(buf, s, n);
  buf[n] = 0;
  char *stop;
  errno = 0;
  *out = strtod(buf, &stop);
  return *stop == 0 && errno == 0 && isfinite(*out);
}

/* "LO-HI" within (0, max]: both ends positive, LO <= HI. */
static int parse_range(const char *s, const char *end, double *lo, double *hi, double max) {
  const char *dash = memchr(s, '-', (size_t)(end - s));
  if (!dash) return 0;
  return parse_num(s, dash, lo) && parse_num(dash + 1, end, hi) && *lo > 0 && *lo <= *hi && *hi <= max;
}

static rc_status parse_rrc(rc_augment *a, const char *v, const char *end, const char *item, rc_err *e) {
  a->rrc = 1;
  a->scale_lo = RRC_SCALE_LO;
  a->scale_hi = RRC_SCALE_HI;
  a->ratio_lo = RRC_RATIO_LO;
  a->ratio_hi = RRC_RATIO_HI;
  if (!v) return RC_OK;
  const char *colon = memchr(v, ':', (size_t)(end - v));
  const char *scale_end = colon ? colon : end;
  if (!parse_range(v, scale_end, &a->scale_lo, &a->scale_hi, 1.0) ||
      (colon && !parse_range(colon + 1, end, &a->ratio_lo, &a->ratio_hi, 1e3)))
    return rc__fail(e, RC_ERR_INVALID,
                    "augmentation item '%s': expected rrc, rrc=SMIN-SMAX or rrc=SMIN-SMAX:RMIN-RMAX "
                    "(area fractions in (0, 1], aspect ratios > 0, each minimum at most its maximum)",
                    item);
  return RC_OK;
}

static rc_status parse_item(rc_augment *a, const char *s, const char *end, rc_err *e) {
  char item[96];
  snprintf(item, sizeof item, "%.*s", (int)(end - s), s);
  const char *eq = memchr(s, '=', (size_t)(end - s));
  size_t name_n = (size_t)((eq ? eq : end) - s);
  const char *v = eq ? eq + 1 : NULL;
#define NAME_IS(w) (name_n == strlen(w) && !memcmp(s, w, name_n))
  double x = 0;
  if (NAME_IS("flip")) {
    if (v) return rc__fail(e, RC_ERR_INVALID, "augmentation item '%s': flip takes no value", item);
    a->flip = 1;
    return RC_OK;
  }
  if (NAME_IS("crop")) {
    if (!v || !parse_num(v, end, &x) || x < 1 || x > 4096 || x != floor(x))
      return rc__fail(e, RC_ERR_INVALID,
                      "augmentation item '%s': expected crop=N, N whole pixels of padding (1 to 4096)", item);
    a->pad = (int64_t)x;
    return RC_OK;
  }
  if (NAME_IS("rrc")) return parse_rrc(a, v, end, item, e);
  if (NAME_IS("mix") || NAME_IS("cutmix")) {
    if (!v || !parse_num(v, end, &x) || x <= 0 || x > 1e3)
      return rc__fail(e, RC_ERR_INVALID,
                      "augmentation item '%s': expected %.*s=A, A > 0 (the Beta(A, A) parameter)", item,
                      (int)name_n, s);
    *(NAME_IS("mix") ? &a->mix_alpha : &a->cutmix_alpha) = x;
    return RC_OK;
  }
#undef NAME_IS
  return rc__fail(e, RC_ERR_INVALID,
                  "unknown augmentation transform '%s' (known: flip, crop=N, rrc[=SMIN-SMAX[:RMIN-RMAX]], "
                  "mix=A, cutmix=A)",
                  item);
}

rc_status rc__augment_parse(rc_augment *a, const char *text, rc_err *e) {
  memset(a, 0, sizeof *a);
  if (!text) return RC_OK;
  const char *s = text;
  while (*s) {
    const char *end = strchr(s, ',');
    if (!end) end = s + strlen(s);
    if (end == s) return rc__fail(e, RC_ERR_INVALID, "augmentation list '%s': empty item", text);
    RC_TRY(parse_item(a, s, end, e));
    s = *end ? end + 1 : end;
  }
  return RC_OK;
}

int rc__augment_any(const rc_augment *a) { return a->flip || a->pad > 0 || a->rrc || rc__augment_mixes(a); }

int rc__augment_mixes(const rc_augment *a) { return a->mix_alpha > 0 || a->cutmix_alpha > 0; }

void rc__augment_describe(const rc_augment *a, char *buf, size_t n) {
  size_t o = 0;
  buf[0] = 0;
#define ADD(...) o += (size_t)snprintf(buf + o, o < n ? n - o : 0, __VA_ARGS__)
  if (a->rrc) ADD("%srrc=%g-%g:%g-%g", o ? "," : "", a->scale_lo, a->scale_hi, a->ratio_lo, a->ratio_hi);
  if (a->pad) ADD("%scrop=%lld", o ? "," : "", (long long)a->pad);
  if (a->flip) ADD("%sflip", o ? "," : "");
  if (a->mix_alpha > 0) ADD("%smix=%g", o ? "," : "", a->mix_alpha);
  if (a->cutmix_alpha > 0) ADD("%scutmix=%g", o ? "," : "", a->cutmix_alpha);
#undef ADD
}

rc_status rc__augment_check(const rc_augment *a, const rc_tensor *input, const char *what, rc_err *e) {
  if (!rc__augment_any(a)) return RC_OK;
  if (input->rank != 4 || input->dtype != RC_DTYPE_FLOAT)
    return rc__fail(e, RC_ERR_INVALID, "augmentation needs a float image input (N, C, H, W); %s is %s of rank %d",
                    what, rc_dtype_name(input->dtype), input->rank);
  int64_t h = input->dims[2], w = input->dims[3];
  if (a->pad && (a->pad >= h || a->pad >= w))
    return rc__fail(e, RC_ERR_INVALID,
                    "augmentation crop=%lld: the padding must be smaller than the %lld x %lld image "
                    "of %s",
                    (long long)a->pad, (long long)h, (long long)w, what);
  return RC_OK;
}

/* ---- Draws ---------------------------------------------------------------------- */

/* SplitMix64's finaliser (Steele, Lea and Flood 2014): spreads (seed, step,
 * position) over the generator's state so neighbouring values give
 * unrelated sequences. */
static uint64_t spread(uint64_t z) {
  z += 0x9e3779b97f4a7c15ULL;
  z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
  z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
  return z ^ (z >> 31);
}

static void seed_for(rc_rng *r, uint64_t seed, int64_t step, int64_t pos, uint64_t tag) {
  rc__rng_seed(r, spread(seed ^ spread((uint64_t)step ^ spread(tag))), spread((uint64_t)pos ^ tag));
}

/* Uniform in the open interval (0, 1), 53 bits. */
static double unit(rc_rng *r) { return ((double)(rc__rng_next64(r) >> 11) + 0.5) * (1.0 / 9007199254740992.0); }

static double uniform(rc_rng *r, double lo, double hi) { return lo + (hi - lo) * unit(r); }

static double normal(rc_rng *r) { /* Box and Muller 1958 */
  return sqrt(-2.0 * log(unit(r))) * cos(6.283185307179586 * unit(r));
}

/* log of a Gamma(shape, 1) variate: Marsaglia and Tsang 2000 for shape >= 1,
 * and for shape < 1 their boost Gamma(shape + 1) * U^(1/shape), kept in logs
 * so that small shapes do not underflow to 0. */
static double log_gamma_variate(rc_rng *r, double shape) {
  double boost = 0;
  if (shape < 1) {
    boost = log(unit(r)) / shape;
    shape += 1;
  }
  double d = shape - 1.0 / 3.0, c = 1.0 / sqrt(9.0 * d);
  for (;;) {
    double x = normal(r), v = 1 + c * x;
    if (v <= 0) continue;
    v = v * v * v;
    double u = unit(r);
    if (u < 1 - 0.0331 * x * x * x * x || log(u) < 0.5 * x * x + d * (1 - v + log(v))) return log(d * v) + boost;
  }
}

/* Beta(alpha, alpha) = X / (X + Y) with X, Y ~ Gamma(alpha, 1). */
static double beta_variate(rc_rng *r, double alpha) {
  double lx = log_gamma_variate(r, alpha), ly = log_gamma_variate(r, alpha);
  return 1.0 / (1.0 + exp(ly - lx));
}

/* The random resized crop's box, drawn as common practice does: up to ten
 * tries at an area fraction and a log-uniform aspect ratio that fit, else the
 * whole image cut to the nearest allowed ratio, centred. */
static void draw_rrc(const rc_augment *a, rc_rng *r, int64_t h, int64_t w, rc_augment_draw *d) {
  double area = (double)h * (double)w;
  for (int t = 0; t < RRC_ATTEMPTS; t++) {
    double target = area * uniform(r, a->scale_lo, a->scale_hi);
    double ratio = exp(uniform(r, log(a->ratio_lo), log(a->ratio_hi)));
    int64_t cw = (int64_t)llround(sqrt(target * ratio)), ch = (int64_t)llround(sqrt(target / ratio));
    if (cw > 0 && ch > 0 && cw <= w && ch <= h) {
      d->ry = (int64_t)rc__rng_below(r, (uint64_t)(h - ch + 1));
      d->rx = (int64_t)rc__rng_below(r, (uint64_t)(w - cw + 1));
      d->rh = ch;
      d->rw = cw;
      return;
    }
  }
  double in_ratio = (double)w / (double)h;
  d->rh = h;
  d->rw = w;
  if (in_ratio < a->ratio_lo) d->rh = (int64_t)llround((double)w / a->ratio_lo);
  if (in_ratio > a->ratio_hi) d->rw = (int64_t)llround((double)h * a->ratio_hi);
  if (d->rh < 1) d->rh = 1;
  if (d->rw < 1) d->rw = 1;
  d->ry = (h - d->rh) / 2;
  d->rx = (w - d->rw) / 2;
}

void rc__augment_draw_sample(const rc_augment *a, rc_augment_draw *d, int64_t h, int64_t w, uint64_t seed,
                             int64_t step, int64_t pos) {
  memset(d, 0, sizeof *d);
  rc_rng r;
  seed_for(&r, seed, step, pos, TAG_SAMPLE);
  if (a->rrc) draw_rrc(a, &r, h, w, d);
  if (a->pad) {
    d->dy = (int64_t)rc__rng_below(&r, (uint64_t)(2 * a->pad + 1));
    d->dx = (int64_t)rc__rng_below(&r, (uint64_t)(2 * a->pad + 1));
  }
  if (a->flip) d->flip = rc__rng_below(&r, 2) == 1;
}

/* ---- Applying ------------------------------------------------------------------- */

/* Box [ry, ry+rh) x [rx, rx+rw) of one plane scaled to h x w: bilinear at
 * pixel centres, neighbours clamped to the image (the box only says where
 * to sample), which is what an image library's bilinear resize of a box
 * computes when it enlarges. The box is never larger than the image, so
 * this only enlarges and needs no antialiasing. */
/* Where output pixel i of n samples a box [start, start + len) of an axis of
 * n pixels: the two neighbours and the weight of the second. */
typedef struct tap {
  int64_t lo, hi;
  double f;
} tap;

static tap box_tap(int64_t i, int64_t n, int64_t start, int64_t len) {
  double at = (double)start + ((double)i + 0.5) * (double)len / (double)n - 0.5;
  if (at < 0) at = 0;
  if (at > (double)(n - 1)) at = (double)(n - 1);
  tap t = {(int64_t)at, 0, 0};
  t.hi = t.lo + 1 < n ? t.lo + 1 : t.lo;
  t.f = at - (double)t.lo;
  return t;
}

static void resize_box(float *dst, const float *src, int64_t h, int64_t w, const rc_augment_draw *d) {
  for (int64_t y = 0; y < h; y++) {
    tap ty = box_tap(y, h, d->ry, d->rh);
    for (int64_t x = 0; x < w; x++) {
      tap tx = box_tap(x, w, d->rx, d->rw);
      double top = (1 - tx.f) * src[ty.lo * w + tx.lo] + tx.f * src[ty.lo * w + tx.hi];
      double bottom = (1 - tx.f) * src[ty.hi * w + tx.lo] + tx.f * src[ty.hi * w + tx.hi];
      dst[y * w + x] = (float)((1 - ty.f) * top + ty.f * bottom);
    }
  }
}

/* The padded image (zeros outside) read at offset (dy - pad, dx - pad). */
static void shift_plane(float *dst, const float *src, int64_t h, int64_t w, int64_t oy, int64_t ox) {
  for (int64_t y = 0; y < h; y++)
    for (int64_t x = 0; x < w; x++) {
      int64_t sy = y + oy, sx = x + ox;
      dst[y * w + x] = sy >= 0 && sy < h && sx >= 0 && sx < w ? src[sy * w + sx] : 0.0f;
    }
}

static void flip_plane(float *p, int64_t h, int64_t w) {
  for (int64_t y = 0; y < h; y++)
    for (int64_t x = 0; x < w / 2; x++) {
      float t = p[y * w + x];
      p[y * w + x] = p[y * w + w - 1 - x];
      p[y * w + w - 1 - x] = t;
    }
}

void rc__augment_apply_sample(const rc_augment_draw *d, int64_t pad, float *x, int64_t c, int64_t h, int64_t w,
                              float *work) {
  size_t plane = (size_t)(h * w);
  for (int64_t ch = 0; ch < c; ch++) {
    float *p = x + (size_t)ch * plane;
    if (d->rh) {
      resize_box(work, p, h, w, d);
      memcpy(p, work, sizeof(float) * plane);
    }
    if (pad) {
      shift_plane(work, p, h, w, d->dy - pad, d->dx - pad);
      memcpy(p, work, sizeof(float) * plane);
    }
    if (d->flip) flip_plane(p, h, w);
  }
}

/* CutMix's box (Yun et al. 2019): sides sqrt(1 - lambda) of the image's,
 * centred uniformly, clipped to the image; lambda becomes the share left. */
static void draw_box(rc_augment_mix *m, rc_rng *r, int64_t h, int64_t w) {
  double cut = sqrt(1.0 - m->drawn);
  int64_t bh = (int64_t)((double)h * cut), bw = (int64_t)((double)w * cut);
  int64_t cy = (int64_t)rc__rng_below(r, (uint64_t)h), cx = (int64_t)rc__rng_below(r, (uint64_t)w);
  m->y0 = cy - bh / 2 < 0 ? 0 : cy - bh / 2;
  m->y1 = cy + bh / 2 > h ? h : cy + bh / 2;
  m->x0 = cx - bw / 2 < 0 ? 0 : cx - bw / 2;
  m->x1 = cx + bw / 2 > w ? w : cx + bw / 2;
  m->lambda = 1.0 - (double)((m->y1 - m->y0) * (m->x1 - m->x0)) / ((double)h * (double)w);
}

void rc__augment_draw_mix(const rc_augment *a, rc_augment_mix *m, int64_t *partner, int64_t batch, int64_t h,
                          int64_t w, uint64_t seed, int64_t step) {
  memset(m, 0, sizeof *m);
  m->lambda = 1;
  for (int64_t j = 0; j < batch; j++) partner[j] = j;
  if (!rc__augment_mixes(a)) return;
  rc_rng r;
  seed_for(&r, seed, step, -1, TAG_MIX);
  /* With both, each batch takes one of them with probability 1/2 (common practice). */
  int cutmix = a->cutmix_alpha > 0 && (a->mix_alpha <= 0 || rc__rng_below(&r, 2) == 1);
  m->kind = cutmix ? RC_MIX_CUTMIX : RC_MIX_MIXUP;
  m->drawn = beta_variate(&r, cutmix ? a->cutmix_alpha : a->mix_alpha);
  m->lambda = m->drawn;
  if (cutmix) draw_box(m, &r, h, w);
  rc__rng_shuffle_i64(&r, partner, batch);
}

void rc__augment_apply_mix(const rc_augment_mix *m, float *x, const float *other, int64_t c, int64_t h,
                           int64_t w) {
  size_t n = (size_t)(c * h * w);
  if (m->kind == RC_MIX_MIXUP) {
    float l = (float)m->lambda, k = (float)(1.0 - m->lambda);
    for (size_t i = 0; i < n; i++) x[i] = l * x[i] + k * other[i];
    return;
  }
  if (m->kind != RC_MIX_CUTMIX) return;
  for (int64_t ch = 0; ch < c; ch++)
    for (int64_t y = m->y0; y < m->y1; y++) {
      size_t row = (size_t)((ch * h + y) * w);
      memcpy(x + row + m->x0, other + row + m->x0, sizeof(float) * (size_t)(m->x1 - m->x0));
    }
}
