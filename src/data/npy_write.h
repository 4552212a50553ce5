/* NumPy .npy / .npz writers (results of `eval --out`, reference tensors). */
#ifndef RC_DATA_NPY_WRITE_H
#define RC_DATA_NPY_WRITE_H

#include <stddef.h>

#include "core/status.h"
#include "recoup/data.h"
#include "recoup/tensor.h"

/* Encode t as an .npy (format 1.0) image in a new rc__malloc buffer. */
rc_status rc_npy_encode(unsigned char **out, size_t *out_n, const rc_tensor *t, rc_err *e);
/* rc_npy_write and rc_npz_write are declared in recoup/data.h. */

#endif
