#!/usr/bin/python3
"""Reference values for the conv, pool and matmul kernels from PyTorch.

Run with Debian's python3 (python3-torch). For a fixed list of cases it
draws inputs with fixed seeds, computes the output with
torch.nn.functional (in float64, from the float32 inputs) and the gradients
of sum(y * dy) for a fixed upstream gradient dy, and writes every tensor as
raw little-endian float32 into OUT_DIR, plus OUT_DIR/index.txt with one line
per tensor:  <case>.<tensor> <rank> <dim>...
tests/test_ops_conv_ref.c reads them and runs recoup's kernels on the same
inputs; the ONNX attributes of each case are spelled out there.

Usage: ref_ops_conv.py OUT_DIR
"""
import os
import sys

import torch
import torch.nn.functional as F


def draw(gen, *shape):
    return (torch.rand(*shape, generator=gen, dtype=torch.float32) * 2 - 1)


class Writer:
    def __init__(self, out_dir):
        self.out_dir = out_dir
        self.lines = []

    def put(self, case, name, t):
        t = t.detach().to(torch.float32).contiguous()
        key = "%s.%s" % (case, name)
        with open(os.path.join(self.out_dir, key + ".bin"), "wb") as f:
            f.write(t.numpy().astype("<f4").tobytes())
        self.lines.append("%s %d %s" % (key, t.dim(), " ".join(str(d) for d in t.shape)))

    def close(self):
        tmp = os.path.join(self.out_dir, "index.txt.tmp")
        with open(tmp, "w") as f:
            f.write("\n".join(self.lines) + "\n")
        os.replace(tmp, os.path.join(self.out_dir, "index.txt"))


def run_case(w, gen, case, fn, inputs, extra=None):
    """inputs: list of (name, float32 tensor). Writes inputs, y, dy and g_<name>."""
    leaves = [t.to(torch.float64).requires_grad_(True) for _, t in inputs]
    y = fn(*leaves)
    dy = draw(gen, *y.shape)
    (y * dy.to(torch.float64)).sum().backward()
    for (name, t), leaf in zip(inputs, leaves):
        w.put(case, name, t)
        w.put(case, "g_" + name, leaf.grad)
    w.put(case, "y", y)
    w.put(case, "dy", dy)
    if extra:
        for name, t in extra(*[t.to(torch.float64) for _, t in inputs]).items():
            w.put(case, name, t)


def main():
    if len(sys.argv) != 2:
        sys.exit("usage: ref_ops_conv.py OUT_DIR")
    out_dir = sys.argv[1]
    os.makedirs(out_dir, exist_ok=True)
    torch.manual_seed(0)
    torch.set_num_threads(1)
    gen = torch.Generator().manual_seed(20240601)
    w = Writer(out_dir)

    # Conv: torch padding is symmetric, so ONNX pads are [p0, p1, p0, p1].
    run_case(w, gen, "conv2d_basic",
             lambda x, k, b: F.conv2d(x, k, b, stride=(2, 1), padding=(1, 2), dilation=(1, 2)),
             [("x", draw(gen, 2, 3, 7, 6)), ("w", draw(gen, 4, 3, 3, 3)), ("b", draw(gen, 4))])
    run_case(w, gen, "conv2d_group",
             lambda x, k, b: F.conv2d(x, k, b, padding=1, groups=2),
             [("x", draw(gen, 2, 4, 6, 6)), ("w", draw(gen, 6, 2, 3, 3)), ("b", draw(gen, 6))])
    run_case(w, gen, "conv2d_depthwise",
             lambda x, k, b: F.conv2d(x, k, b, stride=2, padding=1, dilation=2, groups=3),
             [("x", draw(gen, 2, 3, 8, 8)), ("w", draw(gen, 3, 1, 3, 3)), ("b", draw(gen, 3))])
    run_case(w, gen, "conv2d_1x1",
             lambda x, k, b: F.conv2d(x, k, b),
             [("x", draw(gen, 2, 5, 4, 4)), ("w", draw(gen, 3, 5, 1, 1)), ("b", draw(gen, 3))])
    # Shapes that take Conv's fast paths (tests/test_ops_conv_ref.c names them):
    # several samples per GEMM with a remainder chunk, a 1x1 over a batch,
    # direct depthwise kernels at stride 1 and 2, batch 1 and 1-D.
    run_case(w, gen, "conv2d_chunk",
             lambda x, k, b: F.conv2d(x, k, b, padding=1),
             [("x", draw(gen, 6, 3, 8, 8)), ("w", draw(gen, 5, 3, 3, 3)), ("b", draw(gen, 5))])
    run_case(w, gen, "conv2d_1x1_batch",
             lambda x, k, b: F.conv2d(x, k, b),
             [("x", draw(gen, 5, 7, 3, 5)), ("w", draw(gen, 9, 7, 1, 1)), ("b", draw(gen, 9))])
    run_case(w, gen, "conv2d_dw_s1",
             lambda x, k, b: F.conv2d(x, k, b, padding=1, groups=5),
             [("x", draw(gen, 3, 5, 9, 7)), ("w", draw(gen, 5, 1, 3, 3)), ("b", draw(gen, 5))])
    run_case(w, gen, "conv2d_dw_s2_b1",
             lambda x, k, b: F.conv2d(x, k, b, stride=2, padding=(1, 2), groups=6),
             [("x", draw(gen, 1, 6, 9, 8)), ("w", draw(gen, 6, 1, 3, 3)), ("b", draw(gen, 6))])
    run_case(w, gen, "conv1d_dw",
             lambda x, k, b: F.conv1d(x, k, b, padding=2, dilation=2, groups=4),
             [("x", draw(gen, 3, 4, 17)), ("w", draw(gen, 4, 1, 5)), ("b", draw(gen, 4))])
    # Depthwise: a channel multiplier of 2 (group = in channels, out = 2x in);
    # rows of 16 outputs or more (computed row by row): stride 2, and stride 1
    # with dilation 2 and no padding.
    run_case(w, gen, "conv2d_dw_rows_s2",
             lambda x, k, b: F.conv2d(x, k, b, stride=2, padding=1, groups=3),
             [("x", draw(gen, 2, 3, 35, 33)), ("w", draw(gen, 3, 1, 3, 3)), ("b", draw(gen, 3))])
    run_case(w, gen, "conv2d_dw_mult2",
             lambda x, k, b: F.conv2d(x, k, b, stride=2, padding=1, groups=3),
             [("x", draw(gen, 2, 3, 7, 9)), ("w", draw(gen, 6, 1, 3, 3)), ("b", draw(gen, 6))])
    run_case(w, gen, "conv2d_dw_rows_dil2",
             lambda x, k, b: F.conv2d(x, k, b, dilation=2, groups=4),
             [("x", draw(gen, 2, 4, 9, 21)), ("w", draw(gen, 4, 1, 3, 3)), ("b", draw(gen, 4))])
    run_case(w, gen, "conv1d",
             lambda x, k, b: F.conv1d(x, k, b, stride=2, padding=1),
             [("x", draw(gen, 3, 2, 10)), ("w", draw(gen, 4, 2, 3)), ("b", draw(gen, 4))])
    # Channel counts in multiples of 16, the blocks in which oneDNN's direct
    # kernels lay tensors out (RECOUP_CONV_PATH=dnnl reorders into them).
    run_case(w, gen, "conv2d_blocked_s2",
             lambda x, k, b: F.conv2d(x, k, b, stride=2, padding=1),
             [("x", draw(gen, 3, 16, 9, 9)), ("w", draw(gen, 32, 16, 3, 3)), ("b", draw(gen, 32))])
    run_case(w, gen, "conv2d_blocked_group_dil",
             lambda x, k, b: F.conv2d(x, k, b, padding=2, dilation=2, groups=2),
             [("x", draw(gen, 2, 32, 7, 6)), ("w", draw(gen, 32, 16, 3, 3)), ("b", draw(gen, 32))])
    run_case(w, gen, "conv2d_blocked_b1",
             lambda x, k, b: F.conv2d(x, k, b, padding=1),
             [("x", draw(gen, 1, 16, 8, 8)), ("w", draw(gen, 16, 16, 3, 3)), ("b", draw(gen, 16))])
    # 1x1 convolutions for the batched matmul path (RECOUP_CONV_PATH=dnnl takes
    # it at every map size): odd channel counts, maps 1x1, 2x2, 7x7 and 32x32,
    # batch 1, with and without bias.
    run_case(w, gen, "conv2d_1x1_map1",
             lambda x, k, b: F.conv2d(x, k, b),
             [("x", draw(gen, 4, 3, 1, 1)), ("w", draw(gen, 5, 3, 1, 1)), ("b", draw(gen, 5))])
    run_case(w, gen, "conv2d_1x1_map2_nobias",
             lambda x, k: F.conv2d(x, k),
             [("x", draw(gen, 3, 17, 2, 2)), ("w", draw(gen, 33, 17, 1, 1))])
    run_case(w, gen, "conv2d_1x1_map7_b1",
             lambda x, k, b: F.conv2d(x, k, b),
             [("x", draw(gen, 1, 17, 7, 7)), ("w", draw(gen, 33, 17, 1, 1)), ("b", draw(gen, 33))])
    run_case(w, gen, "conv2d_1x1_map32_nobias",
             lambda x, k: F.conv2d(x, k),
             [("x", draw(gen, 2, 3, 32, 32)), ("w", draw(gen, 5, 3, 1, 1))])
    # ConvTranspose: weight (C_in, C_out/groups, k...), as in ONNX.
    run_case(w, gen, "convt2d_group",
             lambda x, k, b: F.conv_transpose2d(x, k, b, stride=2, padding=1, output_padding=1, groups=2),
             [("x", draw(gen, 2, 4, 3, 4)), ("w", draw(gen, 4, 3, 3, 3)), ("b", draw(gen, 6))])
    run_case(w, gen, "convt2d_dilated",
             lambda x, k, b: F.conv_transpose2d(x, k, b, stride=(1, 2), padding=(0, 1),
                                                output_padding=(1, 1), dilation=(2, 1)),
             [("x", draw(gen, 1, 2, 4, 4)), ("w", draw(gen, 2, 2, 2, 3)), ("b", draw(gen, 2))])
    # Pools. max_pool2d also returns plane-local argmax indices.
    run_case(w, gen, "maxpool_ceil",
             lambda x: F.max_pool2d(x, 3, stride=2, padding=1, ceil_mode=True),
             [("x", draw(gen, 2, 3, 8, 7))],
             extra=lambda x: {"idx": F.max_pool2d(x, 3, stride=2, padding=1, ceil_mode=True,
                                                  return_indices=True)[1].to(torch.float32)})
    run_case(w, gen, "maxpool_dilated",
             lambda x: F.max_pool2d(x, (2, 3), stride=2, padding=1, dilation=(2, 1), ceil_mode=True),
             [("x", draw(gen, 1, 2, 9, 8))])
    run_case(w, gen, "avgpool_incl",
             lambda x: F.avg_pool2d(x, 3, stride=2, padding=1, ceil_mode=True, count_include_pad=True),
             [("x", draw(gen, 2, 2, 8, 7))])
    run_case(w, gen, "avgpool_excl",
             lambda x: F.avg_pool2d(x, 3, stride=2, padding=1, ceil_mode=True, count_include_pad=False),
             [("x", draw(gen, 2, 2, 8, 7))])
    run_case(w, gen, "avgpool_plain",
             lambda x: F.avg_pool2d(x, (2, 3), stride=(2, 3)),
             [("x", draw(gen, 2, 3, 6, 9))])
    run_case(w, gen, "global_avg", lambda x: F.adaptive_avg_pool2d(x, 1), [("x", draw(gen, 2, 3, 5, 4))])
    run_case(w, gen, "global_max", lambda x: F.adaptive_max_pool2d(x, 1), [("x", draw(gen, 2, 3, 5, 4))])
    # Gemm: linear is Gemm(transB=1) with C of shape (N,); addmm covers alpha, beta and broadcast C.
    run_case(w, gen, "linear", lambda x, k, b: F.linear(x, k, b),
             [("x", draw(gen, 5, 7)), ("w", draw(gen, 4, 7)), ("b", draw(gen, 4))])
    run_case(w, gen, "gemm_ta_beta", lambda a, b, c: torch.addmm(c, a.t(), b, beta=0.5, alpha=-2.0),
             [("a", draw(gen, 6, 3)), ("b", draw(gen, 6, 5)), ("c", draw(gen, 3, 1))])
    # MatMul: numpy semantics.
    run_case(w, gen, "matmul_bcast", torch.matmul, [("a", draw(gen, 2, 1, 3, 4)), ("b", draw(gen, 3, 4, 5))])
    run_case(w, gen, "matmul_2d_right", torch.matmul, [("a", draw(gen, 2, 3, 4, 5)), ("b", draw(gen, 5, 6))])
    run_case(w, gen, "matmul_1d_left", torch.matmul, [("a", draw(gen, 4)), ("b", draw(gen, 2, 4, 3))])
    run_case(w, gen, "matmul_1d_right", torch.matmul, [("a", draw(gen, 3, 4)), ("b", draw(gen, 4))])
    w.close()


if __name__ == "__main__":
    main()
