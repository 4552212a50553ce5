"""Sparse students end to end: a 95%-pruned student of the bundled garment
classifier (Fashion-MNIST, Xiao, Rasul and Vollgraf 2017; Debian package
dataset-fashion-mnist) distilled with the sparse kernels forced on
(RECOUP_CONV_PATH=sparse) and forced off (=dense) or, with the argument
"2:4", a 2:4 student (`prune --pattern 2:4`) with the N:M kernels forced on
(=nm-on) and off (=nm-off), recovers the same
accuracy within float tolerance (the kernels add in another order, so the
trained weights differ in their last bits; we allow 0.002, 20 of the
10,000 test images), keeps every pruned zero, and two runs with the same
seed and threads write byte-identical files. Like the property runs of
distill_test.py it trains on the 10,000 test images to stay short: the
figures compare two runs with each other, they are no recovery claim.

Usage: sparse_test.py RECOUP SOURCE_DIR WORK_DIR [2:4]"""
import hashlib
import os
import sys
import time

import onnx
from onnx import numpy_helper

from e2e import SCALE, TEST_IMAGES, Run, require_data

RECOUP, SRC, WORK = sys.argv[1:4]
NM = sys.argv[4:5] == ["2:4"]
# (label, RECOUP_CONV_PATH) of the run with the kernels on and off; how the student is pruned
ON, OFF = (("nm", "nm-on"), ("dense", "nm-off")) if NM else (("sparse", "sparse"), ("dense", "dense"))
PRUNE = ["--pattern", "2:4"] if NM else ["--sparsity", "0.95"]
os.makedirs(WORK, exist_ok=True)
require_data(TEST_IMAGES)
DENSE = os.path.join(SRC, "models", "garment_dense.onnx")
run = Run(RECOUP)
check = run.check


def zeros(path):
    """Exact zeros of each weight initializer, read with Debian's python3-onnx."""
    return {t.name: int((numpy_helper.to_array(t) == 0).sum()) for t in onnx.load(path).graph.initializer
            if t.name.endswith("weight")}


def digest(path):
    with open(path, "rb") as f:
        return hashlib.sha256(f.read()).hexdigest()


def distill(mode, out):
    start = time.monotonic()
    saved = os.environ.get("RECOUP_CONV_PATH")
    os.environ["RECOUP_CONV_PATH"] = mode
    try:
        run(["distill", "--teacher", DENSE, "--student", student, "--data", TEST_IMAGES, "--scale", SCALE,
             "--steps", "60", "--val-split", "0.05", "--seed", "7", "--threads", "2", "--json", "--out", out])
    finally:
        if saved is None:
            del os.environ["RECOUP_CONV_PATH"]
        else:
            os.environ["RECOUP_CONV_PATH"] = saved
    return time.monotonic() - start


student = os.path.join(WORK, "pruned_2of4.onnx" if NM else "pruned95.onnx")
run(["prune", DENSE, "--out", student] + PRUNE + ["--json"])
before = zeros(student)
on, off = ON[0], OFF[0]
modes = {on: ON[1], on + "_again": ON[1], off: OFF[1]}
outs = {m: os.path.join(WORK, f"recovered_{m}.onnx") for m in modes}
secs = {m: distill(modes[m], outs[m]) for m in outs}
print("whole command, seconds (one run each, not a benchmark): " +
      ", ".join(f"{m} {s:.1f}" for m, s in secs.items()))

acc = {m: run.test_accuracy(outs[m]) for m in (on, off)}
check(f"{on} and {off} kernels recover the same accuracy within 0.002",
      abs(acc[on] - acc[off]) <= 0.002, f"({on} {acc[on]:.4f}, {off} {acc[off]:.4f})")
check(f"same seed and threads with {on} kernels: byte-identical files", digest(outs[on]) == digest(outs[on + "_again"]))
for m in (on, off):
    after = zeros(outs[m])
    kept = all(after[k] >= v for k, v in before.items())
    check(f"{m} kernels: every pruned zero is still zero", kept,
          ", ".join(f"{k} {before[k]} -> {after[k]}" for k in before if before[k]))
run.finish()
