#!/usr/bin/python3
"""No command writes over a file it reads. For every command that writes
(eval --out, distill --out/--checkpoint/--report, prune, quantize, batch
outputs, reports and state, merged reports), an output that is an input
under another name (a symbolic link, a hard link, "./x", "d/../x") must be
refused: exit status 1, exactly one line on stderr that says so, and the
input's bytes unchanged (SHA-256 from Python's hashlib before and after).

Models are built by cli_models.py with the onnx package (Debian python3-onnx) and data
with NumPy (Debian python3-numpy); the ONNX checker accepts each model first.

Usage: cli_outputs_test.py RECOUP_BINARY WORK_DIR
"""

import hashlib
import json
import os
import re
import shutil
import subprocess
import sys

import numpy as np

from cli_models import mlp
from e2e import Run

RECOUP, WORK = os.path.abspath(sys.argv[1]), os.path.abspath(sys.argv[2])
shutil.rmtree(WORK, ignore_errors=True)
os.makedirs(WORK)
T = Run(RECOUP)


def digest(path):
    with open(path, "rb") as f:
        return hashlib.sha256(f.read()).hexdigest()


# How recoup's refusals read (write.c, core/path.c, the manifest checks).
SAYS_INPUT = re.compile(r"refusing to overwrite an input|never overwrites its input|is one of this job's inputs|"
                        r"is an input of job|is the manifest itself")


def refused(name, args, watched, cwd=WORK):
    """recoup must exit 1 with one stderr line saying it refuses, and every
    watched file must keep its bytes."""
    before = {p: digest(p) for p in watched}
    keep = {p: open(p, "rb").read() for p in watched}
    r = subprocess.run([RECOUP] + args, capture_output=True, text=True, timeout=300, cwd=cwd)
    lines = [l for l in r.stderr.splitlines() if l.strip()]
    problems = []
    if r.returncode != 1:
        problems.append(f"exit status {r.returncode}, expected 1")
    if len(lines) != 1:
        problems.append(f"{len(lines)} stderr lines, expected 1")
    elif not SAYS_INPUT.search(lines[0]):
        problems.append("the error line does not say an input would be overwritten")
    for p, d in before.items():
        after = digest(p)
        if after != d:
            problems.append(f"{os.path.basename(p)} changed: sha256 {d[:12]} before, {after[:12]} after")
            with open(p, "wb") as f:  # so the next case starts from the same files
                f.write(keep[p])
    T.check(name, not problems, f"{'; '.join(problems)}; stderr: {r.stderr.strip()[:400]}" if problems
            else lines[0])


def w(*parts):
    return os.path.join(WORK, *parts)


dense = mlp(w("dense.onnx"))
pruned = mlp(w("pruned.onnx"), zero_fraction=0.5)
x = np.random.RandomState(1).randn(64, 6).astype(np.float32)
np.save(w("x.npy"), x)
np.savez(w("xs.npz"), x=x)
np.save(w("labels.npy"), np.arange(64) % 4)
os.symlink("x.npy", w("x_link.npy"))
os.link(w("x.npy"), w("x_hard.npy"))
os.symlink("pruned.onnx", w("pruned_link.onnx"))
os.makedirs(w("sub"))
watch = [dense, pruned, w("x.npy"), w("xs.npz"), w("labels.npy")]

# eval --out
refused("eval --out is the data", ["eval", dense, "--data", w("x.npy"), "--out", w("x.npy")], watch)
refused("eval --out ./x.npy (relative, run in the data's folder)",
        ["eval", "dense.onnx", "--data", "x.npy", "--out", "./x.npy"], watch)
refused("eval --out sub/../x.npy", ["eval", dense, "--data", w("x.npy"), "--out", w("sub", "..", "x.npy")], watch)
refused("eval --out a symbolic link to the data", ["eval", dense, "--data", w("x.npy"), "--out", w("x_link.npy")],
        watch)
refused("eval --out a hard link of the data", ["eval", dense, "--data", w("x.npy"), "--out", w("x_hard.npy")],
        watch)
refused("eval --out is the data given by input name",
        ["eval", dense, "--data", "x=" + w("x.npy"), "--out", "./x.npy"], watch)
refused("eval --out is the .npz data", ["eval", dense, "--data", w("xs.npz"), "--out", w("xs.npz")], watch)
refused("eval --out is the labels",
        ["eval", dense, "--data", w("x.npy"), "--labels", w("labels.npy"), "--out", "./labels.npy"], watch)

# distill --out, --checkpoint, --report
base = ["distill", "--teacher", dense, "--student", pruned, "--data", w("x.npy"), "--steps", "2"]
refused("distill --out ./pruned.onnx", base + ["--out", "./pruned.onnx"], watch)
refused("distill --out a link to the student", base + ["--out", w("pruned_link.onnx")], watch)
refused("distill --out a link to the data", base + ["--out", w("x_link.npy")], watch)
refused("distill --checkpoint is the data", base + ["--out", w("r.onnx"), "--checkpoint", "./x.npy"], watch)
with open(w("x.1"), "wb") as f:  # the previous checkpoint's name, held by an input
    f.write(b"\x93NUMPY keep me")
watch_x1 = watch + [w("x.1")]
refused("distill --checkpoint whose .1 is the labels",
        base + ["--labels", w("x.1"), "--out", w("r.onnx"), "--checkpoint", w("x")], watch_x1)
refused("distill --checkpoint is the output", base + ["--out", w("r.onnx"), "--checkpoint", "./r.onnx"], watch)
os.makedirs(w("rep"))
cfg = w("rep", "summary.csv")
with open(cfg, "w") as f:
    json.dump({"loss": {"kd": 1}}, f)
refused("distill --report holds the --config file", base + ["--config", cfg, "--out", w("r.onnx"), "--report",
                                                            w("rep")], watch + [cfg])

# prune and quantize
refused("prune --out ./dense.onnx", ["prune", "dense.onnx", "--sparsity", "0.5", "--out", "./dense.onnx"], watch)
os.symlink("dense.onnx", w("dense_link.onnx"))
refused("prune --out a link to the input", ["prune", dense, "--sparsity", "0.5", "--out", w("dense_link.onnx")],
        watch)
refused("quantize --out ./dense.onnx", ["quantize", "dense.onnx", "--data", "x.npy", "--out", "./dense.onnx"], watch)
refused("quantize --out a link to the calibration data",
        ["quantize", dense, "--data", w("x.npy"), "--out", w("x_link.npy")], watch)

# batch: job outputs, their checkpoints and logs, the state file, the report
# folder's files, merged reports.
os.makedirs(w("zoo"))
for f in ("dense.onnx", "pruned.onnx", "x.npy"):
    shutil.copy(w(f), w("zoo", f))
os.symlink("pruned.onnx", w("zoo", "student_link.onnx"))
zoo_watch = [w("zoo", f) for f in ("dense.onnx", "pruned.onnx", "x.npy")]


def manifest(name, jobs):
    path = w("zoo", name)
    with open(path, "w") as f:
        json.dump({"defaults": {"teacher": "dense.onnx", "data": "x.npy", "steps": 2}, "jobs": jobs}, f)
    return path


m = manifest("link.json", [{"name": "a", "student": "pruned.onnx", "out": "student_link.onnx"}])
refused("batch job output a link to its student", ["batch", m], zoo_watch + [m])
m = manifest("ckpt.json", [{"name": "a", "student": "pruned.onnx", "out": "out.onnx"},
                           {"name": "b", "student": "pruned.onnx", "out": "r.onnx", "data": "out.onnx.ckpt"}])
refused("batch job checkpoint is another job's data", ["batch", m], zoo_watch + [m])
m = manifest("self.json", [{"name": "a", "student": "pruned.onnx", "out": "./self.json"}])
refused("batch job output is the manifest", ["batch", m], zoo_watch + [m])
os.makedirs(w("zoo", "rep"))
m = w("zoo", "rep", "summary.md")
with open(m, "w") as f:
    json.dump({"defaults": {"teacher": "../dense.onnx", "data": "../x.npy", "steps": 2},
               "jobs": [{"name": "a", "student": "../pruned.onnx", "out": "../a.onnx"}]}, f)
refused("batch --report would write over the manifest", ["batch", m, "--report", w("zoo", "rep"),
                                                         "--allow-outside"], zoo_watch + [m])
os.makedirs(w("zoo", "rep2", "jobs"))
shutil.copy(w("x.npy"), w("zoo", "rep2", "jobs", "x.json"))  # odd name, but what the job reads
m = manifest("zoo.json", [{"name": "x", "student": "pruned.onnx", "out": "a.onnx", "data": "rep2/jobs/x.json"}])
refused("batch --report whose jobs/NAME.json is a job's data", ["batch", m, "--report", "./rep2"],
        zoo_watch + [m, w("zoo", "rep2", "jobs", "x.json")], cwd=w("zoo"))
m = manifest("state.json", [{"name": "a", "student": "pruned.onnx", "out": "a.onnx", "data": "state.json.state.json"}])
shutil.copy(w("x.npy"), w("zoo", "state.json.state.json"))
refused("batch state file is a job's data", ["batch", m], zoo_watch + [m, w("zoo", "state.json.state.json")])
os.makedirs(w("shard"))
with open(w("shard", "report.json"), "w") as f:
    json.dump({"meta": {"manifest_sha256": "0" * 64, "total_jobs": 0}, "jobs": []}, f)
refused("batch --merge-reports into a folder being merged",
        ["batch", "--merge-reports", w("shard"), "--report", w("sub", "..", "shard")], [w("shard", "report.json")])

T.finish()
