#!/usr/bin/python3
"""Make the pruned demo model: the dense garment classifier with 90% of its
Conv and Gemm weights set to zero by global magnitude (the smallest |w| over
all those weight tensors together; biases and BatchNormalization untouched).
Only those initializers change in the ONNX file; graph, names and every other
field stay as they were.

Usage: /usr/bin/python3 scripts/make_pruned_demo.py [DENSE.onnx] [OUT.onnx] [--sparsity 0.9]

Prints the pruned model's accuracy on the 10,000 Fashion-MNIST test images
(Debian dataset-fashion-mnist), computed with torch from the file's weights.
"""

import argparse
import os
import sys

import numpy as np
import onnx
from onnx import numpy_helper

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import garment_demo as gd  # noqa: E402


def prunable_weights(model):
    """Names of the weight initializers of Conv and Gemm nodes (input 1)."""
    inits = {t.name for t in model.graph.initializer}
    names = []
    for node in model.graph.node:
        if node.op_type in ("Conv", "Gemm") and len(node.input) > 1 and node.input[1] in inits:
            if node.input[1] not in names:
                names.append(node.input[1])
    return names


def prune_global_magnitude(model, sparsity):
    """Zero exactly floor(sparsity * total) weights with the smallest
    magnitude across all prunable tensors (ties broken by position, so the
    result is deterministic). Returns {name: (zeros, size)}."""
    names = prunable_weights(model)
    if not names:
        raise SystemExit("no Conv/Gemm weight initializers found")
    by_name = {t.name: t for t in model.graph.initializer}
    arrays = [numpy_helper.to_array(by_name[n]).astype(np.float32) for n in names]
    flat = np.concatenate([np.abs(a).ravel() for a in arrays])
    k = int(np.floor(sparsity * flat.size))
    mask = np.ones(flat.size, dtype=bool)
    mask[np.argsort(flat, kind="stable")[:k]] = False
    report, off = {}, 0
    for name, arr in zip(names, arrays):
        m = mask[off:off + arr.size].reshape(arr.shape)
        off += arr.size
        pruned = np.where(m, arr, np.float32(0)).astype(np.float32)
        by_name[name].CopyFrom(numpy_helper.from_array(pruned, name))
        report[name] = (int(arr.size - m.sum()), int(arr.size))
    return report


def main():
    root = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "models")
    ap = argparse.ArgumentParser(description="Prune the demo model by global magnitude.")
    ap.add_argument("dense", nargs="?", default=os.path.join(root, "garment_dense.onnx"))
    ap.add_argument("out", nargs="?", default=os.path.join(root, "garment_pruned90.onnx"))
    ap.add_argument("--sparsity", type=float, default=0.9)
    args = ap.parse_args()
    if not 0.0 <= args.sparsity < 1.0:
        raise SystemExit(f"--sparsity {args.sparsity}: expected a value in [0, 1)")

    model = onnx.load(args.dense)
    report = prune_global_magnitude(model, args.sparsity)
    onnx.checker.check_model(model)
    out = os.path.abspath(args.out)
    tmp = out + ".tmp"
    onnx.save(model, tmp)
    os.replace(tmp, out)

    zeros = sum(z for z, _ in report.values())
    total = sum(n for _, n in report.values())
    for name, (z, n) in report.items():
        print(f"  {name}: {z}/{n} zero ({z / n:.1%})")
    print(f"wrote {out}: {zeros}/{total} Conv/Gemm weights zero ({zeros / total:.1%})")
    x_test, y_test = gd.load_split("test")
    acc = gd.accuracy(gd.model_from_onnx(out), x_test, y_test)
    print(f"test accuracy on the 10,000 Fashion-MNIST test images: {acc:.4f}")


if __name__ == "__main__":
    main()
