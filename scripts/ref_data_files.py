#!/usr/bin/python3
"""Reference data files written by NumPy, for tests/test_data_ref.c.

Run with Debian's python3 (python3-numpy, python3-onnx): ref_data_files.py OUT_DIR.
Every array is made from a simple formula that the C test recomputes, so the
check is "what NumPy wrote is what recoup reads":

  v1_f4.npy        np.save, format 1.0: (arange(24) - 5) * 0.25, float32 (2,3,4)
  v2_i2.npy        format 2.0: arange(-6, 6), int16 (3,4)
  v3_u1.npy        format 3.0: arange(10) * 25, uint8 (10,)
  scalar_f8.npy    np.save of float64 3.5, shape ()
  dtypes.npz       np.savez (stored): one member per dtype, values below
  compressed.npz   np.savez_compressed (deflated): x float64 (30,100) =
                   (arange(3000) % 17) * 0.125, y int64 (30,) = arange(30) % 10,
                   yf float32 (30,1) = same labels as floats
  fortran.npy      np.save of a Fortran-ordered (2,3) array (refused on read)
  object.npy       np.save of an object array (pickled; refused on read)
  big_endian.npy   np.save of a '>f4' array (refused on read)
  images-idx3-ubyte.gz  IDX uint8 (4,5,6) = (i * 7) % 256, gzip
  floats-idx2.gz   IDX float32 (3,4) = arange(12) * 0.5 - 1, gzip
  raw_f4.pb        onnx.numpy_helper.from_array (raw_data): arange(6) * 1.5 - 2,
                   float32 (2,3)
  typed_i64.pb     onnx.helper.make_tensor (int64_data): [-7, 0, 9, 2**40], (4,)

dtypes.npz members: signed ints are [-3,-2,-1,0,1,2,3,100], unsigned ints
[0,1,2,3,4,5,6,200], floats the signed values * 0.5, bool (i % 3 == 0).
"""
import gzip
import os
import struct
import sys

import numpy as np
import onnx
from onnx import helper, numpy_helper


def write_idx_gz(path, arr, code):
    with gzip.open(path, "wb") as f:
        f.write(struct.pack(">BBBB", 0, 0, code, arr.ndim))
        for d in arr.shape:
            f.write(struct.pack(">I", d))
        f.write(arr.astype(arr.dtype.newbyteorder(">")).tobytes())


def main():
    out = sys.argv[1]
    os.makedirs(out, exist_ok=True)
    p = lambda name: os.path.join(out, name)

    np.save(p("v1_f4.npy"), ((np.arange(24) - 5) * 0.25).astype(np.float32).reshape(2, 3, 4))
    with open(p("v2_i2.npy"), "wb") as f:
        np.lib.format.write_array(f, np.arange(-6, 6, dtype=np.int16).reshape(3, 4), version=(2, 0))
    with open(p("v3_u1.npy"), "wb") as f:
        np.lib.format.write_array(f, (np.arange(10) * 25).astype(np.uint8), version=(3, 0))
    np.save(p("scalar_f8.npy"), np.float64(3.5))

    signed = np.array([-3, -2, -1, 0, 1, 2, 3, 100])
    unsigned = np.array([0, 1, 2, 3, 4, 5, 6, 200])
    members = {"b1": (np.arange(8) % 3 == 0)}
    for t in ("i1", "i2", "i4", "i8"):
        members[t] = signed.astype("<" + t)
    for t in ("u1", "u2"):
        members[t] = unsigned.astype("<" + t)
    for t in ("f4", "f8"):
        members[t] = (signed * 0.5).astype("<" + t)
    np.savez(p("dtypes.npz"), **members)

    y = np.arange(30) % 10
    np.savez_compressed(p("compressed.npz"),
                        x=((np.arange(3000) % 17) * 0.125).reshape(30, 100),
                        y=y.astype(np.int64), yf=y.astype(np.float32).reshape(30, 1))

    np.save(p("fortran.npy"), np.asfortranarray(np.arange(6, dtype=np.float32).reshape(2, 3)))
    np.save(p("object.npy"), np.array([{"a": 1}, None], dtype=object), allow_pickle=True)
    np.save(p("big_endian.npy"), np.arange(4, dtype=">f4"))

    write_idx_gz(p("images-idx3-ubyte.gz"), ((np.arange(120) * 7) % 256).astype(np.uint8).reshape(4, 5, 6), 0x08)
    write_idx_gz(p("floats-idx2.gz"), (np.arange(12) * 0.5 - 1).astype(np.float32).reshape(3, 4), 0x0D)
    with open(p("raw_f4.pb"), "wb") as f:
        f.write(numpy_helper.from_array((np.arange(6) * 1.5 - 2).astype(np.float32).reshape(2, 3),
                                        "raw").SerializeToString())
    with open(p("typed_i64.pb"), "wb") as f:
        f.write(helper.make_tensor("typed", onnx.TensorProto.INT64, [4], [-7, 0, 9, 2**40]).SerializeToString())
    print("reference data files written to", out)


if __name__ == "__main__":
    main()
