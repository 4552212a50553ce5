#!/usr/bin/python3
"""Command-line behaviour on bad input: every case must end with exit status 1
(or 2 for a usage error), exactly one error line on stderr that names the file
or field at fault, no signal, nothing written, and inputs untouched.

Models are built here with the onnx package (Debian python3-onnx) so that the
test depends on no other fixture; the ONNX checker accepts each of them first.

Usage: cli_errors_test.py RECOUP_BINARY WORK_DIR
"""

import hashlib
import json
import os
import subprocess
import sys

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

RECOUP, WORK = sys.argv[1], sys.argv[2]
os.makedirs(WORK, exist_ok=True)
failures = []
passed = 0


def classifier(path, classes=4, zero_fraction=0.0, seed=0, batch="N"):
    """x (N, 6) -> Gemm -> Relu -> Gemm -> logits (N, classes); batch may be
    fixed (an int), as some exporters write it."""
    rng = np.random.RandomState(seed)
    w1 = rng.randn(8, 6).astype(np.float32)
    w2 = rng.randn(classes, 8).astype(np.float32)
    if zero_fraction:
        w1[np.abs(w1) < np.quantile(np.abs(w1), zero_fraction)] = 0
    inits = [numpy_helper.from_array(w1, "w1"), numpy_helper.from_array(np.zeros(8, np.float32), "b1"),
             numpy_helper.from_array(w2, "w2"), numpy_helper.from_array(np.zeros(classes, np.float32), "b2")]
    nodes = [helper.make_node("Gemm", ["x", "w1", "b1"], ["h"], transB=1, name="fc1"),
             helper.make_node("Relu", ["h"], ["r"], name="act"),
             helper.make_node("Gemm", ["r", "w2", "b2"], ["logits"], transB=1, name="fc2")]
    return save_checked(path, nodes, inits, [batch, 6], [batch, classes])


def save_checked(path, nodes, inits, x_dims, logits_dims):
    """Graph x -> ... -> logits at opset 13, accepted by the ONNX checker, saved to path."""
    g = helper.make_graph(nodes, "clf", [helper.make_tensor_value_info("x", TensorProto.FLOAT, x_dims)],
                          [helper.make_tensor_value_info("logits", TensorProto.FLOAT, logits_dims)], inits)
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 13)])
    m.ir_version = 8
    onnx.checker.check_model(m)
    onnx.save(m, path)
    return path


def digest(path):
    with open(path, "rb") as f:
        return hashlib.sha256(f.read()).hexdigest()


def expect_error(name, args, must_name, code=1, absent=None):
    """Run recoup; require the exit code, one stderr line naming `must_name` (a tuple: each of them)."""
    global passed
    watched = [a for a in args if os.path.isfile(a)]
    before = {p: digest(p) for p in watched}
    r = subprocess.run([RECOUP] + args, capture_output=True, text=True, timeout=300)
    err_lines = [l for l in r.stderr.splitlines() if l.strip()]
    problems = []
    if r.returncode < 0:
        problems.append(f"killed by signal {-r.returncode}")
    elif r.returncode != code:
        problems.append(f"exit status {r.returncode}, expected {code}")
    if code == 1 and len(err_lines) != 1:
        problems.append(f"{len(err_lines)} stderr lines, expected one")
    for name_ in must_name if isinstance(must_name, tuple) else (must_name,):
        if name_ not in r.stderr:
            problems.append(f"stderr does not name '{name_}'")
    if absent and os.path.exists(absent):
        problems.append(f"{absent} was written")
    for p, d in before.items():
        if digest(p) != d:
            problems.append(f"input {p} was modified")
    if problems:
        failures.append(f"{name}: {'; '.join(problems)}\n    stderr: {r.stderr.strip()[:400]}")
    else:
        passed += 1
        print(f"ok   {name}: {err_lines[0] if err_lines else ''}")


def w(name):
    return os.path.join(WORK, name)


dense = classifier(w("dense.onnx"))
pruned = classifier(w("pruned.onnx"), zero_fraction=0.5)
wide = classifier(w("wide.onnx"), classes=5)
x = np.random.RandomState(1).randn(200, 6).astype(np.float32)
np.save(w("x.npy"), x)
np.save(w("x_wrong.npy"), np.random.RandomState(1).randn(200, 7).astype(np.float32))
xn = x.copy()
xn[17, 3] = np.nan
np.save(w("x_nan.npy"), xn)
np.save(w("labels_bad.npy"), np.full(200, 9, np.int64))
np.save(w("labels_short.npy"), np.zeros(150, np.int64))
with open(w("not_onnx.onnx"), "wb") as f:
    f.write(b"this is plain text, not a model\n" * 20)
raw = open(dense, "rb").read()
with open(w("truncated.onnx"), "wb") as f:
    f.write(raw[: len(raw) // 2])
with open(w("x_trunc.npy"), "wb") as f:
    f.write(open(w("x.npy"), "rb").read()[:1000])
out = w("out.onnx")
base = ["distill", "--teacher", dense, "--student", pruned, "--steps", "2"]

expect_error("missing model", ["inspect", w("nope.onnx")], "nope.onnx")
expect_error("not ONNX", ["inspect", w("not_onnx.onnx")], "not_onnx.onnx")
expect_error("truncated ONNX", ["eval", w("truncated.onnx"), "--data", w("x.npy")], "truncated.onnx")
expect_error("truncated .npy", ["eval", dense, "--data", w("x_trunc.npy")], "x_trunc.npy")
expect_error("data of the wrong shape", ["eval", dense, "--data", w("x_wrong.npy")], "x_wrong.npy")
expect_error("NaN in data", ["eval", dense, "--data", w("x_nan.npy")], "sample 17")
expect_error("labels out of range", ["eval", dense, "--data", w("x.npy"), "--labels", w("labels_bad.npy")],
             "labels_bad.npy")
expect_error("label count", ["eval", dense, "--data", w("x.npy"), "--labels", w("labels_short.npy")],
             "labels_short.npy")
expect_error("unknown command", ["frobnicate"], "frobnicate", code=2)
expect_error("missing required option", ["distill", "--teacher", dense], "required", code=2)
expect_error("bad option value", base + ["--data", w("x.npy"), "--out", out, "--lr", "-1"], "--lr", code=2,
             absent=out)
expect_error("output is the student", base + ["--data", w("x.npy"), "--out", pruned], "refusing", absent=None)
expect_error("output is the data", base + ["--data", w("x.npy"), "--out", w("x.npy")], "refusing")
expect_error("output folder missing", base + ["--data", w("x.npy"), "--out", w("no/such/dir/out.onnx")],
             "no/such/dir")
expect_error("teacher and student disagree", ["distill", "--teacher", wide, "--student", pruned, "--steps", "2",
                                              "--data", w("x.npy"), "--out", out], "wide.onnx", absent=out)
expect_error("distill on NaN data", base + ["--data", w("x_nan.npy"), "--out", out], "sample 17", absent=out)
expect_error("distill labels out of range",
             base + ["--data", w("x.npy"), "--labels", w("labels_bad.npy"), "--out", out], "labels_bad.npy",
             absent=out)
expect_error("distill wrong data shape", base + ["--data", w("x_wrong.npy"), "--out", out], "x_wrong.npy",
             absent=out)
fixed = classifier(w("fixed_batch.onnx"), zero_fraction=0.5, batch=2)
expect_error("student with a fixed batch size", ["distill", "--teacher", dense, "--student", fixed, "--steps", "2",
                                                 "--data", w("x.npy"), "--out", out], "fixed_batch.onnx", absent=out)
expect_error("attention-map without attention maps",
             base + ["--data", w("x.npy"), "--loss", "kd=1,attention-map=1", "--out", out], "attention maps",
             absent=out)


# Values the command line passes to the library: the library's message says
# what is wrong in its own words, and the command line puts the option the
# value came from in front (src/cli: cli_option_context), so each line below
# must start its message with the option typed.
def image_classifier(path, zero_fraction=0.0):
    """x (N, 1, 8, 8) -> Flatten -> Gemm -> logits (N, 4): fed by image folders and lists."""
    w1 = np.random.RandomState(3).randn(4, 64).astype(np.float32)
    if zero_fraction:
        w1[np.abs(w1) < np.quantile(np.abs(w1), zero_fraction)] = 0
    inits = [numpy_helper.from_array(w1, "w1"), numpy_helper.from_array(np.zeros(4, np.float32), "b1")]
    nodes = [helper.make_node("Flatten", ["x"], ["f"], name="flat"),
             helper.make_node("Gemm", ["f", "w1", "b1"], ["logits"], transB=1, name="fc")]
    return save_checked(path, nodes, inits, ["N", 1, 8, 8], ["N", 4])


def grey_pngs(folder, side, count):
    """count grey PNG files of side x side pixels (python3-pil writes them)."""
    from PIL import Image
    os.makedirs(folder, exist_ok=True)
    for i in range(count):
        Image.fromarray(np.full((side, side), 40 * i, np.uint8), "L").save(os.path.join(folder, f"{i}.png"))
    return folder


img_dense, img_pruned = image_classifier(w("img.onnx")), image_classifier(w("img_pruned.onnx"), 0.5)
small = grey_pngs(w("small_pngs"), 4, 3)  # smaller than the 8 x 8 input
big = grey_pngs(w("pngs"), 8, 3)
np.save(w("x_img.npy"), np.random.RandomState(2).rand(16, 1, 8, 8).astype(np.float32))
with open(w("pngs.txt"), "w") as f:
    f.write("".join(f"pngs/{i}.png {i}\n" for i in range(3)))
with open(w("pngs_nolabel.txt"), "w") as f:
    f.write("pngs/0.png\n")
expect_error("eval --output-loss with an unknown term names the option",
             ["eval", dense, "--data", w("x.npy"), "--output-loss", "logits=zz"],
             "--output-loss: output loss 'logits=zz': unknown term 'zz'", code=2)
np.save(w("targets.npy"), np.zeros((200, 4), np.float32))
np.save(w("classes.npy"), np.arange(200) % 4)
expect_error("bounded-l2 with training targets only: names --val-targets",
             base + ["--data", w("x.npy"), "--val-data", w("x.npy"), "--output-loss", "logits=bounded-l2",
                     "--targets", "logits=" + w("targets.npy"), "--out", out],
             "--val-targets: output 'logits': bounded-l2 needs targets of the validation samples", absent=out)
expect_error("dense labels without a kd term: names --labels",
             base + ["--data", w("x.npy"), "--output-loss", "logits=mse", "--labels", w("classes.npy"), "--out", out],
             "--labels: dense labels need a kd output loss term", absent=out)
expect_error("dense labels for the training samples only: names --val-labels",
             base + ["--data", w("x.npy"), "--val-data", w("x.npy"), "--output-loss", "logits=kd", "--labels",
                     w("classes.npy"), "--out", out],
             "--val-labels: dense labels of the training samples but none of the validation samples", absent=out)
# eval's per-output messages: the library names the part (terms, dense
# labels) that failed, the command puts the option it came from in front.
expect_error("eval --output-loss on an output the model lacks: names --output-loss",
             ["eval", dense, "--data", w("x.npy"), "--labels", w("classes.npy"), "--output-loss", "scores=kd"],
             ("--output-loss: output term on 'scores'", "has no such output"))
expect_error("eval dense labels without a kd term: names --labels",
             ["eval", dense, "--data", w("x.npy"), "--labels", w("classes.npy"), "--output-loss", "logits=mse"],
             "--labels: dense labels need a kd output term")
expect_error("eval dense labels of the wrong count: names --labels and the file",
             ["eval", dense, "--data", w("x.npy"), "--labels", w("labels_short.npy"), "--output-loss", "logits=kd"],
             ("--labels: ", "labels_short.npy"))
expect_error("--labels folders on a list file names the option",
             ["eval", img_dense, "--data", w("pngs.txt"), "--labels", "folders"],
             f"--labels folders: {w('pngs.txt')}: labels from folders need a folder of images")
expect_error("--labels list on a folder names the option", ["eval", img_dense, "--data", big, "--labels", "list"],
             f"--labels list: {big}: labels from a list need a list file")
expect_error("--labels list with a line without a label names the option and the line",
             ["eval", img_dense, "--data", w("pngs_nolabel.txt"), "--labels", "list"],
             f"--labels list: {w('pngs_nolabel.txt')}:1: no label after the path")
expect_error("images smaller than the input without --resize: the message points to --resize",
             ["eval", img_dense, "--data", small],
             (f"--resize: {small}/", "image of 4x4 is smaller than the model's 8x8 input and no resize is set"))
expect_error("--val-labels folders on a list file names --val-labels",
             ["distill", "--teacher", img_dense, "--student", img_pruned, "--steps", "2", "--data", w("x_img.npy"),
              "--val-data", w("pngs.txt"), "--val-labels", "folders", "--out", out],
             f"--val-labels folders: {w('pngs.txt')}: labels from folders need", absent=out)

# A learning rate that blows up: non-finite steps roll back to the last good
# state with half the rate, at most three times, then training stops and the
# best state (here the input's) is written with its zeros intact.
blown = w("blown.onnx")
r = subprocess.run([RECOUP] + base + ["--data", w("x.npy"), "--steps", "60", "--optimizer", "sgd", "--lr", "10",
                                      "--clip", "0", "--json", "--out", blown], capture_output=True, text=True,
                   timeout=300)
try:
    res = json.loads(r.stdout) if r.returncode == 0 else {}
except ValueError:
    res = {}
zeros_kept = os.path.exists(blown) and all(
    np.array_equal(numpy_helper.to_array(a) == 0, numpy_helper.to_array(b) == 0)
    for a, b in zip(onnx.load(pruned).graph.initializer, onnx.load(blown).graph.initializer))
if r.returncode == 0 and res.get("rollbacks", 0) >= 1 and "rolled back" in r.stderr and zeros_kept:
    passed += 1
    print(f"ok   non-finite steps rolled back: {res['rollbacks']} rollbacks, best state written")
else:
    failures.append(f"rollback on a blown-up learning rate: status {r.returncode}, {r.stderr.strip()[-300:]}")

# Every command answers --help with usage on stdout and exit status 0.
for cmd in ([], ["inspect"], ["eval"], ["distill"], ["batch"], ["prune"], ["quantize"]):
    r = subprocess.run([RECOUP] + cmd + ["--help"], capture_output=True, text=True, timeout=60)
    if r.returncode != 0 or "Usage: recoup" not in r.stdout:
        failures.append(f"--help for '{' '.join(cmd) or 'recoup'}': status {r.returncode}")
    else:
        passed += 1

for f in failures:
    print("FAIL", f)
print(f"{passed} passed, {len(failures)} failed")
sys.exit(1 if failures else 0)
