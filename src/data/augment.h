/* Augmentation of a float image batch (N, C, H, W) after it is fetched:
 * geometric transforms per sample (horizontal flip, random crop from a
 * zero-padded image, random resized crop) and mixing of two samples
 * (mixup, CutMix) per batch.
 *
 * Every draw is a function of (run seed, step, position in the global
 * batch), never of a generator carried along, so a resumed run, any thread
 * count and any split of the batch over ranks draw the same transforms. */
#ifndef RC_DATA_AUGMENT_H
#define RC_DATA_AUGMENT_H

#include <stddef.h>
#include <stdint.h>

#include "core/status.h"
#include "recoup/distill.h"
#include "recoup/tensor.h"

/* The public summary holds the canonical list (recoup/distill.h). */
#define RC_AUGMENT_TEXT_MAX RC_DISTILL_AUGMENT_MAX

/* What a list such as "flip,crop=4,mix=0.2" asks for. */
typedef struct rc_augment {
  int flip;                  /* horizontal flip with probability 1/2 */
  int64_t pad;               /* crop=N: pad N zeros per side, crop back to H x W (0: off) */
  int rrc;                   /* random resized crop */
  double scale_lo, scale_hi; /* its area fraction range */
  double ratio_lo, ratio_hi; /* its width/height range */
  double mix_alpha;          /* mix=A: mixup with Beta(A, A) weights (0: off) */
  double cutmix_alpha;       /* cutmix=A: CutMix with Beta(A, A) weights (0: off) */
} rc_augment;

/* Parse a comma-separated list; NULL or "" means none. Errors name the item. */
rc_status rc__augment_parse(rc_augment *a, const char *text, rc_err *e);
int rc__augment_any(const rc_augment *a);
int rc__augment_mixes(const rc_augment *a);
/* The list in canonical form with every default written out (for --json,
 * reports and the checkpoint's fingerprint). */
void rc__augment_describe(const rc_augment *a, char *buf, size_t n);
/* Refuse what makes no sense for an input of this shape (a crop wider than
 * the image, a non-image input). `what` names the input in the message. */
rc_status rc__augment_check(const rc_augment *a, const rc_tensor *input, const char *what, rc_err *e);

/* The geometric transforms drawn for one sample. */
typedef struct rc_augment_draw {
  int flip;
  int64_t dy, dx;         /* crop offset inside the padded image, 0..2*pad */
  int64_t ry, rx, rh, rw; /* resized crop's box (rh = 0: none) */
} rc_augment_draw;

void rc__augment_draw_sample(const rc_augment *a, rc_augment_draw *d, int64_t h, int64_t w, uint64_t seed,
                             int64_t step, int64_t pos);
/* Apply a draw to one (C, H, W) image in place; work holds C*H*W floats. */
void rc__augment_apply_sample(const rc_augment_draw *d, int64_t pad, float *x, int64_t c, int64_t h, int64_t w,
                              float *work);

typedef enum rc_mix_kind { RC_MIX_NONE = 0, RC_MIX_MIXUP = 1, RC_MIX_CUTMIX = 2 } rc_mix_kind;

/* The mixing drawn for one batch: each sample j becomes lambda of itself
 * and 1 - lambda of sample partner[j] (mixup: every pixel; CutMix: the box
 * [y0, y1) x [x0, x1) comes from the partner, and lambda is the share of
 * the image left outside the box). */
typedef struct rc_augment_mix {
  rc_mix_kind kind;
  double lambda;
  double drawn; /* the Beta(alpha, alpha) variate (CutMix's box is cut from it) */
  int64_t y0, y1, x0, x1;
} rc_augment_mix;

/* partner: batch entries, a seeded permutation of 0..batch-1. */
void rc__augment_draw_mix(const rc_augment *a, rc_augment_mix *m, int64_t *partner, int64_t batch, int64_t h,
                          int64_t w, uint64_t seed, int64_t step);
void rc__augment_apply_mix(const rc_augment_mix *m, float *x, const float *other, int64_t c, int64_t h, int64_t w);

#endif
