#!/usr/bin/python3
"""The figures `recoup distill` prints, checked against values computed
outside it, on Fashion-MNIST (Xiao, Rasul and Vollgraf 2017; Debian package
dataset-fashion-mnist) and the bundled demo models:

- per-layer signal-to-noise ratios count partial batches: 63 validation
  samples at --batch 64 give finite figures for every layer, and a student
  equal to its teacher reads "identical", never inf;
- for a QDQ student (made by `recoup quantize`), the output row's dB before
  and after equal 10·log10(Σt²/Σ(t−s)²) computed with NumPy from the deployed
  outputs (`recoup eval --out` and onnxruntime-web, npm, with graph
  optimisations disabled) of the dense, quantized and recovered files;
- a quantized student whose output grid is too narrow (its scale divided by
  8 with Debian's python3-onnx) gets a range warning whose counts equal a
  NumPy count of the values QuantizeLinear clamps (ONNX operator
  specification: saturate(round(x / scale) + zero_point));
- the kept epoch is the one with the lowest validation KL to the dense model
  of the recorded history (with labels: the lowest 0.9·KL + 0.1·CE);
- a 15-epoch report collapses its epoch table to the input, first, kept and
  last epochs with the rest behind a <details> disclosure (read with Python's
  html.parser), and no KL or loss prints as 0.0000.

Usage: figures_test.py RECOUP SOURCE_DIR WORK_DIR
"""

import gzip
import json
import math
import os
import shutil
import subprocess
import sys
from html.parser import HTMLParser

import numpy as np
import onnx
from onnx import helper, numpy_helper

from e2e import DATA, Run, SCALE, TRAIN_IMAGES, require

RECOUP, SRC, WORK = sys.argv[1:4]
os.makedirs(WORK, exist_ok=True)
DENSE = os.path.join(SRC, "models", "garment_dense.onnx")
PRUNED = os.path.join(SRC, "models", "garment_pruned90.onnx")
TRAIN_LABELS = f"{DATA}/train-labels-idx1-ubyte.gz"
require(DENSE, PRUNED, TRAIN_IMAGES, TRAIN_LABELS)
run = Run(RECOUP)
check = run.check


def path(name):
    return os.path.join(WORK, name)


def run_both(args):
    """stdout and stderr of a command that must succeed."""
    r = run(args)
    return r.stdout, r.stderr


with gzip.open(TRAIN_IMAGES, "rb") as f:
    images = np.frombuffer(f.read(), np.uint8, offset=16).reshape(-1, 1, 28, 28)
with gzip.open(TRAIN_LABELS, "rb") as f:
    labels = np.frombuffer(f.read(), np.uint8, offset=8).astype(np.int64)
np.save(path("train.npy"), images[:2000])
np.save(path("train_labels.npy"), labels[:2000])
np.save(path("small.npy"), images[:320])
np.save(path("calib.npy"), images[:1000])
np.save(path("val63.npy"), images[50000:50063])
np.save(path("val300.npy"), images[50000:50300])
COMMON = ["--scale", SCALE, "--seed", "3", "--threads", "2"]


def deployed(model, data, name):
    """The model's first output on `data`, by recoup eval --out."""
    out = path(name + ".npy")
    run(["eval", model, "--data", data, "--scale", SCALE, "--out", out])
    return np.load(out).astype(np.float64)


def snr_db(t, s):
    return 10 * math.log10(float((t * t).sum()) / float(((t - s) ** 2).sum()))


# ---- Partial batches and "identical" ---------------------------------------------
res = run.json(["distill", "--teacher", DENSE, "--student", PRUNED, "--data", path("train.npy"), "--val-data",
                path("val63.npy"), "--batch", "64", "--steps", "10", "--json", "--out", path("p63.onnx")] + COMMON)
layers = res["layers"]
finite = [l for l in layers if isinstance(l["sqnr_before_db"], (int, float)) and
          isinstance(l["sqnr_after_db"], (int, float)) and math.isfinite(l["sqnr_before_db"]) and
          math.isfinite(l["sqnr_after_db"])]
check("63 validation samples at --batch 64: every layer measured", len(layers) > 0 and len(finite) == len(layers),
      f"({len(finite)} of {len(layers)} layers finite)")
check("every layer counts all 63 samples", all(l["samples"] == 63 and l["state_after"] == "measured" for l in layers),
      f"(samples {[l['samples'] for l in layers]})")
out, _ = run_both(["distill", "--teacher", DENSE, "--student", PRUNED, "--data", path("train.npy"), "--val-data",
                   path("val63.npy"), "--batch", "64", "--steps", "10", "--out", path("p63t.onnx")] + COMMON)
check("the table prints no inf", "inf" not in out.split("Layer outputs")[1].split("\n\n")[0])

same = path("dense_copy.onnx")
shutil.copyfile(DENSE, same)
res = run.json(["distill", "--teacher", DENSE, "--student", same, "--data", path("small.npy"), "--steps", "2",
                "--json", "--out", path("same_out.onnx")] + COMMON)
states = {l["state_before"] for l in res["layers"]}
check("a student equal to its teacher reads identical (JSON null plus state)",
      states == {"identical"} and all(l["sqnr_before_db"] is None for l in res["layers"]), f"({states})")
out, _ = run_both(["distill", "--teacher", DENSE, "--student", same, "--data", path("small.npy"), "--steps", "2",
                   "--out", path("same_out2.onnx")] + COMMON)
table = out.split("Layer outputs")[1].split("\n\n")[0]
check("the table says identical, not inf", "identical" in table and "inf" not in table)

# ---- The output row of a QDQ student compares deployed outputs ---------------------
q4 = path("garment_w4a8.onnx")
run(["quantize", DENSE, "--data", path("calib.npy"), "--scale", SCALE, "--weight-bits", "4", "--activation-bits", "8",
     "--out", q4])
rec = path("recovered_w4a8.onnx")
res = run.json(["distill", "--teacher", DENSE, "--student", q4, "--data", path("train.npy"), "--val-data",
                path("val300.npy"), "--steps", "100", "--json", "--out", rec] + COMMON)
out_name = onnx.load(DENSE).graph.output[0].name
row = [l for l in res["layers"] if l["teacher"] == out_name]
check("the output row pairs the deployed outputs", len(row) == 1 and row[0]["student"] == out_name,
      f"({[(l['teacher'], l['student']) for l in row]})")
t = deployed(DENSE, path("val300.npy"), "dense300")
before, after = snr_db(t, deployed(q4, path("val300.npy"), "q4_300")), snr_db(t, deployed(rec, path("val300.npy"), "rec300"))
if row:
    rb, ra = row[0]["sqnr_before_db"], row[0]["sqnr_after_db"]
    print(f"output row: recoup {rb:.4f} -> {ra:.4f} dB; NumPy from eval --out {before:.4f} -> {after:.4f} dB")
    check("output row before equals NumPy's figure (0.01 dB)", abs(rb - before) <= 0.01)
    check("output row after equals NumPy's figure (0.01 dB)", abs(ra - after) <= 0.01)
node = os.environ.get("RECOUP_NODE") or shutil.which("node")
x = images[50000:50300].astype(np.float32) * np.float32(float(SCALE))
np.save(path("x300.npy"), x)
ort_db = []
for m in (DENSE, q4, rec):
    d = path("ort_" + os.path.basename(m))
    os.makedirs(d, exist_ok=True)
    r = subprocess.run([node, os.path.join(SRC, "tests", "ort", "run.mjs"), m, d, path("x300.npy"), "--opt",
                        "disabled"], capture_output=True, text=True, timeout=600)
    if r.returncode != 0:
        raise SystemExit(f"onnxruntime-web failed on {m}: {r.stderr.strip()[:300]}")
    ort_db.append(np.load(os.path.join(d, "0.npy")).astype(np.float64))
ob, oa = snr_db(ort_db[0], ort_db[1]), snr_db(ort_db[0], ort_db[2])
if row:
    # onnxruntime-web may round a requantized value to the neighbouring step
    # where recoup's float sums land on the other side of a tie, so its
    # figure is compared within 0.5 dB.
    print(f"output row from onnxruntime-web: {ob:.4f} -> {oa:.4f} dB")
    check("output row before matches onnxruntime-web (0.5 dB)", abs(row[0]["sqnr_before_db"] - ob) <= 0.5)
    check("output row after matches onnxruntime-web (0.5 dB)", abs(row[0]["sqnr_after_db"] - oa) <= 0.5)

# ---- Values outside an activation grid --------------------------------------------
m = onnx.load(q4)
ini = {i.name: i for i in m.graph.initializer}
final_q = [n for n in m.graph.node if n.op_type == "QuantizeLinear" and
           any(d.op_type == "DequantizeLinear" and d.input[0] == n.output[0] and d.output[0] == out_name
               for d in m.graph.node)][0]
pre = final_q.input[0]
scale = numpy_helper.to_array(ini[final_q.input[1]]).astype(np.float32) / np.float32(8)
ini[final_q.input[1]].CopyFrom(numpy_helper.from_array(scale, final_q.input[1]))
narrow = path("garment_w4a8_narrow.onnx")
onnx.save(m, narrow)
rec_n = path("recovered_narrow.onnx")
r = run(["distill", "--teacher", DENSE, "--student", narrow, "--data", path("train.npy"), "--val-data",
         path("val300.npy"), "--steps", "30", "--json", "--out", rec_n] + COMMON)
res = json.loads(r.stdout)
warn = [w for w in res["range_warnings"] if w["tensor"] == pre]
print("\n".join(l for l in r.stderr.splitlines() if "warning" in l))
check("a narrow output grid is warned about in --json", len(warn) == 1, f"({[w['tensor'] for w in res['range_warnings']]})")
check("and on stderr, naming the tensor", any("warning" in l and pre in l for l in r.stderr.splitlines()))
if warn:
    w = warn[0]
    zp_t = ini[final_q.input[2]] if len(final_q.input) > 2 and final_q.input[2] else None
    zp = int(numpy_helper.to_array(zp_t)) if zp_t is not None else 0
    lo, hi = (-128, 127) if zp_t is None or zp_t.data_type == onnx.TensorProto.INT8 else (0, 255)
    if zp_t is None:
        lo, hi = 0, 255  # QuantizeLinear without a zero point writes uint8
    # The pre-quantization tensor of the recovered file, read through an
    # extra graph output, and counted in NumPy as QuantizeLinear saturates.
    mr = onnx.load(rec_n)
    mr.graph.output.append(helper.make_tensor_value_info(pre, onnx.TensorProto.FLOAT, None))
    probe = path("recovered_narrow_probe.onnx")
    onnx.save(mr, probe)
    run(["eval", probe, "--data", path("val300.npy"), "--scale", SCALE, "--out", path("probe.npz")])
    v = np.load(path("probe.npz"))[pre].astype(np.float32)
    q = np.rint(v / scale) + zp
    outside = (q > hi) | (q < lo)
    print(f"range warning: recoup {w['values_outside']} values on {w['samples_outside']} samples, worst "
          f"{w['worst_value']:.4g} vs end {w['range_end']:.4g}; NumPy {int(outside.sum())} values on "
          f"{int(outside.any(axis=1).sum())} samples")
    check("values outside equal NumPy's count", w["values_outside"] == int(outside.sum()) and w["values"] == v.size)
    check("samples outside equal NumPy's count", w["samples_outside"] == int(outside.any(axis=1).sum()) and
          w["samples"] == v.shape[0])
    ends = [float((hi - zp) * scale), float((lo - zp) * scale)]
    check("the range end is the grid's", min(abs(w["range_end"] - e) for e in ends) <= 1e-6 * (1 + abs(ends[0])),
          f"({w['range_end']:.6g} vs {ends})")
    worst = float(v.flat[np.argmax(np.where(v > 0, v - ends[0], ends[1] - v))])
    check("the furthest value is NumPy's", abs(w["worst_value"] - worst) <= 1e-5 * (1 + abs(worst)),
          f"({w['worst_value']:.6g} vs {worst:.6g})")

# ---- The kept epoch has the lowest validation KL ----------------------------------
res = run.json(["distill", "--teacher", DENSE, "--student", PRUNED, "--data", path("train.npy"), "--epochs", "4",
                "--lr", "0.003", "--json", "--out", path("kl4.onnx")] + COMMON)
kls = [res["compressed"]["kl"]] + [e["kl"] for e in res["epochs"]]
want = int(np.argmin(kls))
print(f"validation KL input then per epoch {['%.4g' % k for k in kls]}, kept {res['best_epoch']}, "
      f"agreement {[round(e['agreement'], 4) for e in res['epochs']]}")
check("without labels the rule is KL", res["best_by"] == "kl")
check("the kept epoch has the lowest validation KL", res["best_epoch"] == want, f"({res['best_epoch']} vs {want})")
check("the recovered row is the kept epoch's", abs(res["recovered"]["kl"] - kls[want]) <= 1e-12)
res = run.json(["distill", "--teacher", DENSE, "--student", PRUNED, "--data", path("train.npy"), "--labels",
                path("train_labels.npy"), "--epochs", "3", "--json", "--out", path("kl3l.onnx")] + COMMON)
sel = [res["compressed"]["selection"]] + [e["selection"] for e in res["epochs"]]
mix = [0.9 * e["kl"] + 0.1 * e["cross_entropy"] for e in [res["compressed"]] + res["epochs"]]
check("with labels the rule is 0.9·KL + 0.1·cross-entropy", res["best_by"] == "kl+cross_entropy" and
      max(abs(a - b) for a, b in zip(sel, mix)) <= 1e-12)
check("the kept epoch has the lowest figure", res["best_epoch"] == int(np.argmin(sel)),
      f"({res['best_epoch']} vs {int(np.argmin(sel))} of {['%.4g' % s for s in sel]})")

# ---- A long history collapses in the HTML report ----------------------------------
report = path("report15")
shutil.rmtree(report, ignore_errors=True)
res = run.json(["distill", "--teacher", DENSE, "--student", PRUNED, "--data", path("small.npy"), "--epochs", "15",
                "--batch", "32", "--json", "--report", report, "--out", path("e15.onnx")] + COMMON)


class EpochRows(HTMLParser):
    """data-epoch rows, split by whether they sit inside a <details>."""

    def __init__(self):
        super().__init__()
        self.depth = 0
        self.shown, self.hidden = [], []

    def handle_starttag(self, tag, attrs):
        if tag == "details":
            self.depth += 1
        a = dict(attrs)
        if tag == "tr" and "data-epoch" in a:
            (self.hidden if self.depth else self.shown).append(int(a["data-epoch"]))

    def handle_endtag(self, tag):
        if tag == "details":
            self.depth -= 1


html = open(os.path.join(report, "report.html"), encoding="utf-8").read()
p = EpochRows()
p.feed(html)
best, n = res["best_epoch"], len(res["epochs"])
print(f"15 epochs, kept {best}: shown {p.shown}, behind the disclosure {p.hidden}")
check("15 epochs recorded", n == 15)
check("shown: input, first, kept and last", p.shown == sorted({0, 1, best, n}))
check("the rest behind a disclosure", sorted(p.shown + p.hidden) == list(range(n + 1)) and len(p.hidden) > 0)
md = open(os.path.join(report, "summary.md"), encoding="utf-8").read()
check("no KL or loss prints as 0.0000", "0.0000" not in html and "0.0000" not in md)
check("the summary shows KL before and after", "→" in md.split("\n")[6] if len(md.split("\n")) > 6 else False)
run.finish()
