/* NumPy .npy / .npz writers (results of `eval --out`, reference tensors). */
#ifndef RC_DATA_NPY_WRITE_H
#define RC_DATA_NPY_WRITE_H

#include <stddef.h>

#include "core/status.h"
#include "recoup/tensor.h"

/* Encode t as an .npy (format 1.0) image in a new rc__malloc buffer. */
rc_status rc_npy_encode(unsigned char **out, size_t *out_n, const rc_tensor *t, rc_err *e);
/* Write t to path atomically. */
rc_status rc_npy_write(const char *path, const rc_tensor *t, rc_err *e);
/* Write n tensors as members "<name>.npy" of a stored zip, atomically. */
rc_status rc_npz_write(const char *path, const char *const *names, const rc_tensor *tensors, int n,
                       rc_err *e);

#endif
