#!/usr/bin/python3
"""PyTorch reference values for recoup's shape, resize and fake-quant kernels.

Run with Debian's python3 (python3-torch). Each case draws float32 inputs
from a fixed seed, evaluates a torch function (F.interpolate, F.pad,
index_select, permute, fake_quantize_*), takes the gradient of
sum(y * dy) for a drawn upstream gradient dy, and stores every tensor as raw
little-endian float32 in OUT_DIR/<case>-<tensor>.f32. OUT_DIR/cases.txt
lists them, one per line:  <case>-<tensor> <element count> <dims...>
tests/test_ops_shape_ref.c feeds the same inputs to the matching ONNX ops
(their attributes are spelled out there) and compares.

Usage: ref_ops_shape.py OUT_DIR
"""
import os
import sys

import torch
import torch.nn.functional as F

# Shared with tests/test_ops_shape_ref.c: keep both in step.
GATHER_INDEX = [[1, -1, 0], [-5, 3, 3]]   # Gather on axis 1 of a (4, 5, 6) tensor
FQ_TENSOR = (0.0625, 3, -128, 127)        # scale, zero point, qmin, qmax
FQ_TENSOR_ODD = (0.037, -4, -8, 7)        # a scale that is not a power of two, int4 range
FQ_CHANNEL_SCALE = [0.05, 0.02, 0.11]     # per channel on axis 1 of (2, 3, 4, 5)
FQ_CHANNEL_ZERO = [0, 10, -7]
FQ_CHANNEL_RANGE = (-128, 127)


class Store:
    def __init__(self, out_dir):
        os.makedirs(out_dir, exist_ok=True)
        self.out_dir = out_dir
        self.index = []

    def save(self, case, tensor_name, t):
        t = t.detach().to(torch.float32).contiguous()
        key = "%s-%s" % (case, tensor_name)
        path = os.path.join(self.out_dir, key + ".f32")
        with open(path + ".part", "wb") as f:
            f.write(t.numpy().astype("<f4").tobytes())
        os.replace(path + ".part", path)
        dims = " ".join(str(d) for d in t.shape)
        self.index.append("%s %d %s" % (key, t.numel(), dims))

    def finish(self):
        path = os.path.join(self.out_dir, "cases.txt")
        with open(path + ".part", "w") as f:
            f.write("\n".join(self.index) + "\n")
        os.replace(path + ".part", path)


def uniform(gen, shape, lo=-1.0, hi=1.0):
    return torch.rand(*shape, generator=gen, dtype=torch.float32) * (hi - lo) + lo


def record(store, gen, case, fn, x, dtype=torch.float64):
    """Writes x, y = fn(x), dy and dx = d sum(y * dy) / dx."""
    leaf = x.to(dtype).requires_grad_(True)
    y = fn(leaf)
    dy = uniform(gen, y.shape)
    (y * dy.to(dtype)).sum().backward()
    store.save(case, "x", x)
    store.save(case, "y", y)
    store.save(case, "dy", dy)
    store.save(case, "dx", leaf.grad)


def main():
    if len(sys.argv) != 2:
        sys.exit("usage: ref_ops_shape.py OUT_DIR")
    store = Store(sys.argv[1])
    gen = torch.Generator().manual_seed(20240611)

    # Resize against F.interpolate (sizes given; shapes chosen so no source
    # coordinate lands exactly on an integer except 0, where float rounding
    # of in/out could flip a floor).
    x = uniform(gen, (2, 3, 5, 7))
    record(store, gen, "nearest", lambda t: F.interpolate(t, size=(8, 4), mode="nearest"), x)
    record(store, gen, "bilinear_up",
           lambda t: F.interpolate(t, size=(9, 11), mode="bilinear", align_corners=False), x)
    record(store, gen, "bilinear_down",
           lambda t: F.interpolate(t, size=(3, 4), mode="bilinear", align_corners=False), x)
    record(store, gen, "bilinear_corners",
           lambda t: F.interpolate(t, size=(9, 4), mode="bilinear", align_corners=True), x)

    # Pad against F.pad: (left, right, top, bottom) on W and H.
    x = uniform(gen, (2, 3, 5, 6))
    record(store, gen, "pad_reflect", lambda t: F.pad(t, (2, 1, 1, 3), mode="reflect"), x)
    record(store, gen, "pad_replicate", lambda t: F.pad(t, (3, 1, 2, 4), mode="replicate"), x)

    # Gather against index_select (negative indices wrapped for torch).
    x = uniform(gen, (4, 5, 6))
    idx = torch.tensor(GATHER_INDEX).remainder(5)
    record(store, gen, "gather",
           lambda t: t.index_select(1, idx.flatten()).reshape(4, 2, 3, 6), x)

    # Transpose against permute.
    x = uniform(gen, (2, 3, 4, 5))
    record(store, gen, "permute_0231", lambda t: t.permute(0, 2, 3, 1), x)
    record(store, gen, "permute_3102", lambda t: t.permute(3, 1, 0, 2), x)

    # Fake quantization (float32, as the ops run) against torch's own.
    x = uniform(gen, (2, 3, 4, 5), -9.0, 9.0)
    s, z, lo, hi = FQ_TENSOR
    record(store, gen, "fq_tensor",
           lambda t: torch.fake_quantize_per_tensor_affine(t, s, z, lo, hi), x, torch.float32)
    x = uniform(gen, (2, 3, 4, 5), -0.5, 0.5)
    s, z, lo, hi = FQ_TENSOR_ODD
    record(store, gen, "fq_tensor_odd",
           lambda t: torch.fake_quantize_per_tensor_affine(t, s, z, lo, hi), x, torch.float32)
    x = uniform(gen, (2, 3, 4, 5), -4.0, 4.0)
    sc = torch.tensor(FQ_CHANNEL_SCALE, dtype=torch.float32)
    zp = torch.tensor(FQ_CHANNEL_ZERO, dtype=torch.int32)
    lo, hi = FQ_CHANNEL_RANGE
    record(store, gen, "fq_channel",
           lambda t: torch.fake_quantize_per_channel_affine(t, sc, zp, 1, lo, hi), x, torch.float32)

    store.finish()


if __name__ == "__main__":
    main()
