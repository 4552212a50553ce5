#!/usr/bin/python3
"""End-to-end check of run-time shape computations against PyTorch.

Run with Debian's python3 (python3-torch, python3-numpy). A small module of
our own whose export is full of computed shapes (Shape -> Gather ->
Unsqueeze -> Concat -> Reshape, Cast/Div for interpolate sizes,
ConstantOfShape/Equal/Where -> Expand, Slice with steps, Pad reflect,
Resize, Transpose, ReduceMean/Max/Sum) is exported by torch.onnx with a
dynamic batch axis at opsets 11, 13 and 17. `recoup eval` runs each file
over 5 samples in batches of 2 (so the last batch has another size and the
shape subgraph is planned twice) and its outputs are compared with the
module's own (PyTorch) outputs: |recoup - torch| <= 1e-4 * (1 + |torch|).

Usage: check_shape_export.py RECOUP_BIN OUT_DIR
"""
import os
import subprocess
import sys
import warnings

import numpy as np
import torch
import torch.nn as nn
import torch.nn.functional as F


class ShapeHeavy(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 4, 3, padding=1)

    def forward(self, x):
        y = self.conv(x)
        y = F.pad(y, (1, 2, 2, 1), mode="reflect")
        y = F.interpolate(y, scale_factor=2, mode="bilinear", align_corners=False)
        y = F.interpolate(y, size=(y.shape[2] // 3, y.shape[3] // 2), mode="nearest")
        b = y.shape[0]
        z = y.permute(0, 2, 3, 1).reshape(b, -1, 4)
        z = z[:, 1::2, :].mean(dim=1) + z.amax(dim=1) + z.sum(dim=1)
        w = torch.cat([z, z[:, :2].flip(1)], dim=1)
        w = w.unsqueeze(1).expand(b, 3, 6).reshape(b, 18)
        return w[:, torch.tensor([0, 5, -1, 7])]


def main():
    if len(sys.argv) != 3:
        sys.exit("usage: check_shape_export.py RECOUP_BIN OUT_DIR")
    recoup, out_dir = sys.argv[1], sys.argv[2]
    if not os.access(recoup, os.X_OK):
        sys.exit("recoup binary %s is missing: build the 'recoup' target first" % recoup)
    os.makedirs(out_dir, exist_ok=True)
    torch.manual_seed(7)
    model = ShapeHeavy().eval()
    x = torch.randn(5, 3, 10, 12)
    with torch.no_grad():
        want = model(x).numpy()
    x_path = os.path.join(out_dir, "x.npy")
    np.save(x_path, x.numpy())
    failed = 0
    for opset in (11, 13, 17):
        onnx_path = os.path.join(out_dir, "shape_heavy_%d.onnx" % opset)
        y_path = os.path.join(out_dir, "y_%d.npy" % opset)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            torch.onnx.export(model, x, onnx_path, opset_version=opset, input_names=["x"],
                              output_names=["y"], dynamic_axes={"x": {0: "n"}, "y": {0: "n"}})
        run = subprocess.run([recoup, "eval", onnx_path, "--data", x_path, "--batch", "2",
                              "--out", y_path], capture_output=True, text=True)
        if run.returncode != 0:
            print("opset %d: recoup eval failed (%d): %s" % (opset, run.returncode, run.stderr.strip()))
            failed += 1
            continue
        got = np.load(y_path)
        if got.shape != want.shape:
            print("opset %d: shape %s, PyTorch gives %s" % (opset, got.shape, want.shape))
            failed += 1
            continue
        err = np.abs(got - want) / (1 + np.abs(want))
        print("opset %d: worst |recoup - PyTorch| / (1 + |PyTorch|) = %.3g" % (opset, err.max()))
        if not err.max() <= 1e-4:
            failed += 1
    sys.exit(1 if failed else 0)


if __name__ == "__main__":
    main()
