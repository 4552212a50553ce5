#!/usr/bin/python3
"""`recoup distill` with Conv on oneDNN's path (RECOUP_CONV_PATH=dnnl), on the
bundled garment pair and Fashion-MNIST (Xiao, Rasul and Vollgraf 2017;
Debian package dataset-fashion-mnist):

- two runs with the same seed and thread count give byte-identical files;
- the run follows recoup's own path: a different file (another summation
  order), with the same loss curve and figures to float tolerance;
- the file passes onnx.checker (Debian's python3-onnx).

Usage: conv_dnnl_test.py RECOUP SOURCE_DIR WORK_DIR
"""

import hashlib
import json
import os
import subprocess
import sys

from e2e import SCALE, TEST_IMAGES, checker_verdict, require_data

RECOUP, SRC, WORK = sys.argv[1:4]
os.makedirs(WORK, exist_ok=True)
require_data(TEST_IMAGES)
DENSE = os.path.join(SRC, "models", "garment_dense.onnx")
PRUNED = os.path.join(SRC, "models", "garment_pruned90.onnx")
failed = []


def check(what, ok, detail=""):
    print(f"{'ok  ' if ok else 'FAIL'} {what} {detail}")
    if not ok:
        failed.append(what)


def distill(path, out):
    env = dict(os.environ, RECOUP_CONV_PATH=path)
    r = subprocess.run([RECOUP, "distill", "--teacher", DENSE, "--student", PRUNED, "--data", TEST_IMAGES,
                        "--scale", SCALE, "--steps", "40", "--seed", "7", "--threads", "2", "--json", "--out", out],
                       capture_output=True, text=True, env=env, timeout=600)
    if r.returncode != 0:
        raise SystemExit(f"FAIL: distill on path {path} ({r.returncode}): {r.stderr.strip()[-400:]}")
    return json.loads(r.stdout)


def digest(path):
    with open(path, "rb") as f:
        return hashlib.sha256(f.read()).hexdigest()


a, b, own = (os.path.join(WORK, n) for n in ("dnnl_a.onnx", "dnnl_b.onnx", "builtin.onnx"))
ja, _, jo = distill("dnnl", a), distill("dnnl", b), distill("builtin", own)
check("same seed and threads give a byte-identical file", digest(a) == digest(b),
      f"(SHA-256 {digest(a)[:16]} vs {digest(b)[:16]})")
check("oneDNN's path ran (its file differs from recoup's own path's)", digest(a) != digest(own),
      f"(SHA-256 {digest(a)[:16]} vs {digest(own)[:16]})")
# Float rounding differs from step 1 on and training amplifies it a little;
# 0.1% of the loss and 1 point of agreement are far above what 40 steps show
# (4e-6 and 0 measured).
worst = max(abs(x[1] - y[1]) / abs(y[1]) for x, y in zip(ja["loss_trace"], jo["loss_trace"]))
check("loss curve follows recoup's own path", len(ja["loss_trace"]) == len(jo["loss_trace"]) and worst < 1e-3,
      f"(worst relative difference {worst:.2e} over {len(jo['loss_trace'])} steps, tolerance 1e-3)")
ag_a, ag_o = ja["recovered"]["agreement"], jo["recovered"]["agreement"]
check("agreement with the teacher as on recoup's own path", abs(ag_a - ag_o) <= 0.01,
      f"(oneDNN {ag_a:.4f}, own {ag_o:.4f}, tolerance 0.01)")
accepted, said = checker_verdict(a)
check("onnx.checker accepts the file", accepted, said)
if failed:
    sys.exit(f"{len(failed)} check(s) failed: {', '.join(failed)}")
print("all checks passed")
