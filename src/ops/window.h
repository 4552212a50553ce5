/* Sliding-window geometry shared by the conv and pool families: reading
 * kernel_shape / strides / dilations / pads / auto_pad, and resolving them
 * against a concrete input into begin/end pads and an output size. */
#ifndef RC_OPS_WINDOW_H
#define RC_OPS_WINDOW_H

#include <stdint.h>

#include "ops/op.h"

/* Spatial axes a window op supports (1-D, 2-D and 3-D). */
#define RC_WIN_MAX_AXES 3

typedef enum rc__auto_pad {
  RC_AUTO_PAD_NOTSET = 0,
  RC_AUTO_PAD_VALID,
  RC_AUTO_PAD_SAME_UPPER,
  RC_AUTO_PAD_SAME_LOWER
} rc__auto_pad;

/* Attributes as written in the node; n_* is 0 where an attribute is absent. */
typedef struct rc__window {
  int n_kernel, n_strides, n_dilations, n_pads;
  int64_t kernel[RC_WIN_MAX_AXES], strides[RC_WIN_MAX_AXES], dilations[RC_WIN_MAX_AXES];
  int64_t pads[2 * RC_WIN_MAX_AXES]; /* all begins, then all ends */
  rc__auto_pad auto_pad;
} rc__window;

/* Read and validate the window attributes of n; `dilations` is refused when
 * allow_dilations is 0 (ops and opsets that do not define it). */
rc_status rc__window_parse(const rc_node *n, rc__window *w, int allow_dilations, rc_err *e);

/* Resolve for nsp spatial axes with input sizes in[] and kernel k[]: writes
 * out[], pad_begin[], pad_end[], strides s[] and dilations d[]. ceil_mode
 * rounds the output size up as pools do, with the last window required to
 * start inside the input or the begin padding. */
rc_status rc__window_resolve(const rc_node *n, const rc__window *w, int nsp, const int64_t *in,
                             const int64_t *k, int ceil_mode, int64_t *out, int64_t *pad_begin,
                             int64_t *pad_end, int64_t *s, int64_t *d, rc_err *e);

#endif
