#!/usr/bin/python3
"""Reference values for recoup's sparse Conv, Gemm and MatMul kernels from PyTorch.

Run with Debian's python3 (python3-torch). Each case draws inputs with a
fixed seed, prunes the weight with a mask (a fraction at random, a whole
output row, or two kept of every four consecutive weights, the larger two),
computes the output of torch.nn.functional / torch.matmul with the pruned
weight in float64 and the gradients of sum(y * dy) for a fixed dy, and
writes every array as raw little-endian float32 OUT_DIR/<case>_<name>.f32,
listed in OUT_DIR/index.txt as "<case>_<name> <count>". The mask is written
as 0/1 floats. tests/test_ops_sparse_ref.c runs the same inputs through the
sparse kernels; the ONNX attributes of each case are spelled out there.

Usage: ref_ops_sparse.py OUT_DIR
"""
import os
import sys

import torch
import torch.nn.functional as F


class Out:
    def __init__(self, out_dir):
        self.out_dir = out_dir
        self.lines = []

    def put(self, name, t):
        t = t.detach().to(torch.float32).contiguous()
        with open(os.path.join(self.out_dir, name + ".f32"), "wb") as f:
            f.write(t.numpy().astype("<f4").tobytes())
        self.lines.append("%s %d" % (name, t.numel()))

    def close(self):
        tmp = os.path.join(self.out_dir, "index.txt.tmp")
        with open(tmp, "w") as f:
            f.write("\n".join(self.lines) + "\n")
        os.replace(tmp, os.path.join(self.out_dir, "index.txt"))


def draw(gen, *shape):
    return torch.rand(*shape, generator=gen, dtype=torch.float32) * 2 - 1


def mask_of(gen, w, pruned, empty_row=None):
    """pruned: fraction pruned at random, "2:4" (groups of consecutive
    weights), or (n, m): n kept of every m input channels (axis 1) at each
    kernel cell, as `recoup prune --pattern n:m` groups them."""
    if isinstance(pruned, tuple):
        n, m = pruned
        groups = w.reshape(w.shape[0], w.shape[1] // m, m, -1).abs()
        keep = torch.zeros_like(groups)
        keep.scatter_(2, groups.topk(n, dim=2).indices, 1.0)
        keep = keep.reshape(w.shape)
    elif pruned == "2:4":
        groups = w.reshape(-1, 4).abs()
        keep = torch.zeros_like(groups)
        keep.scatter_(1, groups.topk(2, dim=1).indices, 1.0)
        keep = keep.reshape(w.shape)
    else:
        keep = (torch.rand(*w.shape, generator=gen) >= pruned).to(torch.float32)
    if empty_row is not None:
        keep[empty_row] = 0.0
    return keep


def case(out, gen, name, fn, x, w, b, pruned, empty_row=None):
    keep = mask_of(gen, w, pruned, empty_row)
    w = w * keep
    leaves = [t.to(torch.float64).requires_grad_(True) for t in (x, w, b)]
    y = fn(*leaves)
    dy = draw(gen, *y.shape)
    (y * dy.to(torch.float64)).sum().backward()
    for n, t in (("x", x), ("w", w), ("b", b), ("mask", keep), ("y", y), ("dy", dy)):
        out.put("%s_%s" % (name, n), t)
    for n, leaf in zip(("x", "w", "b"), leaves):
        out.put("%s_g_%s" % (name, n), leaf.grad)


def main():
    if len(sys.argv) != 2:
        sys.exit("usage: ref_ops_sparse.py OUT_DIR")
    os.makedirs(sys.argv[1], exist_ok=True)
    torch.set_num_threads(1)
    gen = torch.Generator().manual_seed(20261205)
    out = Out(sys.argv[1])
    case(out, gen, "c3", lambda x, w, b: F.conv2d(x, w, b, padding=1),
         draw(gen, 3, 8, 9, 7), draw(gen, 12, 8, 3, 3), draw(gen, 12), 0.95, empty_row=2)
    case(out, gen, "cg", lambda x, w, b: F.conv2d(x, w, b, stride=(2, 1), padding=(1, 0), dilation=(1, 2),
                                                  groups=2),
         draw(gen, 2, 6, 10, 9), draw(gen, 8, 3, 3, 2), draw(gen, 8), "2:4")
    case(out, gen, "c1", lambda x, w, b: F.conv2d(x, w, b),
         draw(gen, 1, 16, 5, 5), draw(gen, 10, 16, 1, 1), draw(gen, 10), 0.8)
    case(out, gen, "cd", lambda x, w, b: F.conv1d(x, w, b, stride=2, padding=1),
         draw(gen, 4, 3, 13), draw(gen, 5, 3, 3), draw(gen, 5), 0.5)
    # Gemm(transB=1) with C of shape (N,) is F.linear.
    case(out, gen, "lin", lambda x, w, b: F.linear(x, w, b),
         draw(gen, 5, 24), draw(gen, 10, 24), draw(gen, 10), 0.8, empty_row=3)
    # Gemm(transB=0, alpha=-2, beta=0.5) with C of shape (N,).
    case(out, gen, "gnt", lambda a, w, c: torch.addmm(c, a, w, beta=0.5, alpha=-2.0),
         draw(gen, 6, 12), draw(gen, 12, 5), draw(gen, 5), 0.95)
    # MatMul with a shared (K, N) weight; b is unused by the op (kept for a uniform layout).
    case(out, gen, "mm", lambda a, w, b: torch.matmul(a, w) + 0 * b.sum(),
         draw(gen, 2, 3, 16), draw(gen, 16, 7), draw(gen, 1), "2:4")
    # N:M along input channels (the N:M Conv kernels take these).
    case(out, gen, "n3", lambda x, w, b: F.conv2d(x, w, b, padding=1),
         draw(gen, 2, 8, 9, 11), draw(gen, 12, 8, 3, 3), draw(gen, 12), (2, 4))
    case(out, gen, "ns", lambda x, w, b: F.conv2d(x, w, b, stride=(2, 1), padding=(1, 0), dilation=(1, 2)),
         draw(gen, 1, 8, 11, 12), draw(gen, 6, 8, 3, 2), draw(gen, 6), (2, 4))
    case(out, gen, "n1", lambda x, w, b: F.conv2d(x, w, b),
         draw(gen, 3, 16, 9, 8), draw(gen, 10, 16, 1, 1), draw(gen, 10), (2, 4))
    case(out, gen, "nd", lambda x, w, b: F.conv1d(x, w, b, padding=1),
         draw(gen, 2, 8, 70), draw(gen, 5, 8, 3), draw(gen, 5), (4, 8))
    out.close()


if __name__ == "__main__":
    main()
