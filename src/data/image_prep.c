/* Channel conversion, antialiased resizing and centre cropping of decoded
 * images. The resampler is the usual separable triangle filter: for each
 * output pixel the filter is centred on the matching input position and, when
 * shrinking by a factor f > 1, stretched to a support of f input pixels on
 * each side so every input pixel contributes (antialiasing). Weights are
 * normalised per output pixel; each pass rounds to 8 bits, the horizontal
 * pass first (common practice in image libraries). */
#include <math.h>
#include <string.h>

#include "core/alloc.h"
#include "core/status.h"
#include "recoup/image.h"

rc_status rc_image_to_channels(rc_image *im, int channels, rc_err *e) {
  if (channels != 1 && channels != 3)
    return rc__fail(e, RC_ERR_INVALID, "images convert to 1 or 3 channels, not %d", channels);
  if (im->c == channels) return RC_OK;
  size_t n = (size_t)im->w * (size_t)im->h;
  uint8_t *px = rc__malloc(n * (size_t)channels);
  if (!px) return rc__fail(e, RC_ERR_NOMEM, "out of memory converting an image of %dx%d", im->w, im->h);
  if (channels == 3) {
    for (size_t i = 0; i < n; i++) px[3 * i] = px[3 * i + 1] = px[3 * i + 2] = im->px[i];
  } else {
    /* ITU-R BT.601 luma weights in 16-bit fixed point. */
    for (size_t i = 0; i < n; i++) {
      const uint8_t *q = im->px + 3 * i;
      px[i] = (uint8_t)((19595u * q[0] + 38470u * q[1] + 7471u * q[2] + 32768u) >> 16);
    }
  }
  rc__free(im->px);
  im->px = px;
  im->c = channels;
  return RC_OK;
}

/* Taps of one output position: `count` weights from input index `first`. */
typedef struct taps {
  int first, count;
} taps;

/* Weights for resampling n_in samples to n_out: out[i] = sum w[i][k] in[first + k]. */
static rc_status make_taps(taps **t_out, double **w_out, int *ksize_out, int n_in, int n_out) {
  double scale = (double)n_in / n_out;
  double stretch = scale > 1.0 ? scale : 1.0;
  double support = stretch; /* the triangle's support is 1 */
  int ksize = (int)ceil(support) * 2 + 1;
  taps *t = rc__malloc(sizeof(taps) * (size_t)n_out);
  double *w = rc__calloc((size_t)n_out * (size_t)ksize, sizeof(double));
  if (!t || !w) {
    rc__free(t);
    rc__free(w);
    return RC_ERR_NOMEM;
  }
  for (int i = 0; i < n_out; i++) {
    double centre = (i + 0.5) * scale;
    int lo = (int)(centre - support + 0.5), hi = (int)(centre + support + 0.5);
    if (lo < 0) lo = 0;
    if (hi > n_in) hi = n_in;
    double *wi = w + (size_t)i * (size_t)ksize, sum = 0;
    int count = hi - lo;
    if (count > ksize) count = ksize;
    for (int k = 0; k < count; k++) {
      double x = (lo + k - centre + 0.5) / stretch;
      double v = fabs(x) < 1.0 ? 1.0 - fabs(x) : 0.0;
      wi[k] = v;
      sum += v;
    }
    for (int k = 0; k < count && sum > 0; k++) wi[k] /= sum;
    t[i].first = lo;
    t[i].count = count;
  }
  *t_out = t;
  *w_out = w;
  *ksize_out = ksize;
  return RC_OK;
}

static uint8_t round_u8(double v) {
  if (v <= 0) return 0;
  if (v >= 255) return 255;
  return (uint8_t)(v + 0.5);
}

/* One pass along rows (horizontal) or columns (vertical) of an interleaved image. */
static void resample(uint8_t *dst, const uint8_t *src, int w, int h, int c, int out_w, int out_h, int horizontal,
                     const taps *t, const double *wts, int ksize) {
  for (int y = 0; y < out_h; y++)
    for (int x = 0; x < out_w; x++)
      for (int ch = 0; ch < c; ch++) {
        int i = horizontal ? x : y;
        const double *wi = wts + (size_t)i * (size_t)ksize;
        double acc = 0;
        for (int k = 0; k < t[i].count; k++) {
          int sx = horizontal ? t[i].first + k : x, sy = horizontal ? y : t[i].first + k;
          acc += wi[k] * src[((size_t)sy * (size_t)w + (size_t)sx) * (size_t)c + (size_t)ch];
        }
        dst[((size_t)y * (size_t)out_w + (size_t)x) * (size_t)c + (size_t)ch] = round_u8(acc);
      }
  (void)h;
}

static rc_status resize_axis(rc_image *im, int out_w, int out_h, int horizontal, rc_err *e) {
  int n_in = horizontal ? im->w : im->h, n_out = horizontal ? out_w : out_h;
  if (n_in == n_out) return RC_OK;
  taps *t = NULL;
  double *w = NULL;
  int ksize = 0;
  uint8_t *px = rc__malloc((size_t)out_w * (size_t)out_h * (size_t)im->c);
  if (!px || make_taps(&t, &w, &ksize, n_in, n_out) != RC_OK) {
    rc__free(px);
    return rc__fail(e, RC_ERR_NOMEM, "out of memory resizing an image to %dx%d", out_w, out_h);
  }
  resample(px, im->px, im->w, im->h, im->c, out_w, out_h, horizontal, t, w, ksize);
  rc__free(t);
  rc__free(w);
  rc__free(im->px);
  im->px = px;
  im->w = out_w;
  im->h = out_h;
  return RC_OK;
}

rc_status rc_image_resize(rc_image *im, int w, int h, rc_err *e) {
  if (w <= 0 || h <= 0) return rc__fail(e, RC_ERR_INVALID, "cannot resize an image to %dx%d", w, h);
  RC_TRY(resize_axis(im, w, im->h, 1, e));
  return resize_axis(im, w, h, 0, e);
}

void rc_image_shorter_side(int w, int h, int s, int *out_w, int *out_h) {
  if (w <= h) {
    *out_w = s;
    *out_h = (int)((int64_t)h * s / w);
  } else {
    *out_h = s;
    *out_w = (int)((int64_t)w * s / h);
  }
  if (*out_w < 1) *out_w = 1;
  if (*out_h < 1) *out_h = 1;
}

rc_status rc_image_prepare(uint8_t *out, rc_image *im, const rc_image_prep *p, rc_err *e) {
  RC_TRY(rc_image_to_channels(im, p->channels, e));
  if (p->resize > 0) {
    int w, h;
    rc_image_shorter_side(im->w, im->h, p->resize, &w, &h);
    RC_TRY(rc_image_resize(im, w, h, e));
  }
  if (im->w < p->width || im->h < p->height)
    return rc__fail(e, RC_ERR_SHAPE, "image of %dx%d is smaller than the model's %dx%d input%s", im->w, im->h,
                    p->width, p->height, p->resize > 0 ? "" : " and no resize is set");
  int top = (im->h - p->height) / 2, left = (im->w - p->width) / 2;
  size_t plane = (size_t)p->height * (size_t)p->width;
  for (int ch = 0; ch < p->channels; ch++)
    for (int y = 0; y < p->height; y++) {
      const uint8_t *row = im->px + ((size_t)(top + y) * (size_t)im->w + (size_t)left) * (size_t)im->c + (size_t)ch;
      uint8_t *dst = out + (size_t)ch * plane + (size_t)y * (size_t)p->width;
      for (int x = 0; x < p->width; x++) dst[x] = row[(size_t)x * (size_t)im->c];
    }
  return RC_OK;
}
