#!/usr/bin/python3
"""Quantized students on their grids, end to end, checked by reading the
written files with Debian's python3-onnx:

1. integer ranges: students made by `recoup quantize --weight-bits 4` (opset
   13, so 4-bit values in int8 tensors, range [-7, 7] recorded in the file)
   and `--weight-bits 8` (symmetric int8, [-127, 127]; from a pruned copy),
   and a foreign QDQ
   file built here with the onnx package whose int8 weights use narrow
   ranges ([-7, 7] and [-127, 127], no metadata: the range is the one the
   integers use), are distilled with a learning rate large enough to push
   weights outward; every integer of every written tensor must stay inside
   its range (the observed min/max is printed against the range);
2. grids through Identity: a small CNN trained and exported by PyTorch
   (Debian python3-torch 1.13, fake quantization with per-channel scale and
   zero-point buffers; its exporter shares equal buffers through Identity
   nodes) must train, its weights landing on their grids; a grid whose scale
   is computed from the input is refused with a message naming the node, the
   input and why;
3. what zeros mean: under --mask auto a quantized-only student's rounded
   zeros train, a pruned-then-quantized student keeps its pruned zeros, and
   --mask zeros (also as a `recoup batch` manifest key) keeps every zero.

The dense model is the bundled garment classifier (exported by PyTorch 1.13,
opset 13; see models/README.md); data are Fashion-MNIST training images
(Xiao, Rasul and Vollgraf 2017; Debian package dataset-fashion-mnist).

Usage: grids_test.py RECOUP SOURCE_DIR WORK_DIR
"""

import gzip
import json
import os
import shutil
import subprocess
import sys

import numpy as np
import onnx
from onnx import helper, numpy_helper, TensorProto

from e2e import DATA, Run, SCALE, TRAIN_IMAGES, require

RECOUP, SRC, WORK = sys.argv[1:4]
os.makedirs(WORK, exist_ok=True)
DENSE = os.path.join(SRC, "models", "garment_dense.onnx")
TRAIN_LABELS = f"{DATA}/train-labels-idx1-ubyte.gz"
require(DENSE, TRAIN_IMAGES, TRAIN_LABELS)
run = Run(RECOUP)
check = run.check
W = lambda name: os.path.join(WORK, name)

with gzip.open(TRAIN_IMAGES, "rb") as f:
    images = np.frombuffer(f.read(), np.uint8, offset=16).reshape(-1, 1, 28, 28)[:4000]
with gzip.open(TRAIN_LABELS, "rb") as f:
    labels = np.frombuffer(f.read(), np.uint8, offset=8)[:4000]
np.save(W("train.npy"), images)
np.save(W("calib.npy"), images[:1000])

# Adam at 0.002 for three epochs of 3,000 images moves weights by many grid
# steps: measured with the build before ranges were kept, the 4-bit student
# ended with 39 integers at +-8 and the 8-bit one with 60 at -128.
# The checks of what zeros mean (section 3) hold at every step, whatever the
# length of the run: those runs train one epoch (47 steps), enough to move
# integers that may move.
DISTILL = ["--data", W("train.npy"), "--scale", SCALE, "--lr", "0.002", "--val-split", "0.25", "--seed", "1",
           "--threads", "2", "--json"]
INT_TYPES = (TensorProto.INT8, TensorProto.UINT8, TensorProto.INT16, TensorProto.UINT16)


def ints(path):
    """Integer initializers feeding DequantizeLinear, by name (int32 biases apart)."""
    m = onnx.load(path)
    init = {t.name: t for t in m.graph.initializer}
    feeds = {n.input[0] for n in m.graph.node if n.op_type == "DequantizeLinear"}
    return {k: numpy_helper.to_array(t) for k, t in init.items() if k in feeds and t.data_type in INT_TYPES}


def distill(student, out, extra=(), epochs=3):
    return run.json(["distill", "--teacher", DENSE, "--student", student, "--out", out, "--epochs", str(epochs)] +
                    DISTILL + list(extra))


def check_ranges(label, before, after, ranges):
    """Every tensor inside its range; print the observed min/max beside it."""
    changed = sum(int((before[k] != after[k]).sum()) for k in after)
    check(f"{label}: training changed integer weights", changed > 0, f"({changed} integers changed)")
    for k, a in sorted(after.items()):
        lo, hi = ranges[k]
        print(f"     {k:32s} observed [{a.min()}, {a.max()}] against range [{lo}, {hi}]")
        check(f"{label}: '{k}' stays inside [{lo}, {hi}]", lo <= a.min() and a.max() <= hi,
              f"(observed [{a.min()}, {a.max()}], {int(((a < lo) | (a > hi)).sum())} outside)")


def inspect_ranges(path):
    j = run.json(["inspect", path, "--json"])
    return {g["tensor"]: g["range"] for g in j["grids"]}, j


# ---- 1a. 4-bit weights by recoup quantize at opset 13 (int8 tensors) --------
q4 = W("garment_w4.onnx")
run(["quantize", DENSE, "--data", W("calib.npy"), "--scale", SCALE, "--weight-bits", "4", "--out", q4])
meta = {p.key: p.value for p in onnx.load(q4).metadata_props}
rec = json.loads(meta.get("recoup.integer_ranges", "{}")).get("tensors", {})
b4 = ints(q4)
check("4-bit: every weight's range is recorded in the file as [-7, 7]",
      set(rec) == set(b4) and all((r["min"], r["max"]) == (-7, 7) for r in rec.values()), f"({len(rec)} tensors)")
ir, _ = inspect_ranges(q4)
check("4-bit: inspect --json reports [-7, 7] from the recorded metadata",
      all((ir[k]["min"], ir[k]["max"], ir[k]["source"]) == (-7, 7, "recorded") for k in b4))
res4 = distill(q4, W("w4_out.onnx"))
check("4-bit: distill improved on validation (so trained values were written)", res4["improved"])
a4 = ints(W("w4_out.onnx"))
check_ranges("4-bit", b4, a4, {k: (-7, 7) for k in a4})
jr = {w["tensor"]: w["range"] for w in res4["weights"] if "range" in w}
check("4-bit: distill --json reports each weight's range", all((jr[k]["min"], jr[k]["max"]) == (-7, 7) for k in a4))

# ---- 1b. 8-bit symmetric weights: [-127, 127], never -128 ---------------------
# Quantized from a 50%-pruned copy: the 8-bit copy of the dense model agrees
# with it on every validation sample, leaving training nothing to improve.
p50 = W("garment_p50.onnx")
run(["prune", DENSE, "--sparsity", "0.5", "--out", p50])
q8 = W("garment_p50_w8.onnx")
run(["quantize", p50, "--data", W("calib.npy"), "--scale", SCALE, "--weight-bits", "8", "--out", q8])
b8 = ints(q8)
res8 = distill(q8, W("w8_out.onnx"))
check("8-bit: distill improved on validation", res8["improved"])
check_ranges("8-bit", b8, ints(W("w8_out.onnx")), {k: (-127, 127) for k in b8})

# ---- 1c. a foreign QDQ file (onnx package): narrow ranges, no metadata,
# zero points shared through Identity nodes as PyTorch's exporter writes them.
dense = onnx.load(DENSE)
init = {t.name: t for t in dense.graph.initializer}
g = dense.graph
layer_weights = [n.input[1] for n in g.node if n.op_type in ("Conv", "Gemm")]
new_init, new_nodes, foreign_range = [], [], {}
shared_zero = {}
for i, wname in enumerate(layer_weights):
    w = numpy_helper.to_array(init[wname]).astype(np.float32)
    qmax = 7 if i == 1 else 127  # the second layer holds 4-bit values in int8
    mx = np.abs(w.reshape(w.shape[0], -1)).max(1)
    s = np.where(mx > 0, mx / qmax, 1).astype(np.float32)
    q = np.clip(np.rint(w / s.reshape(-1, *[1] * (w.ndim - 1))), -qmax, qmax).astype(np.int8)
    qn, sn = f"{wname}_int", f"{wname}_step"
    new_init += [numpy_helper.from_array(q, qn), numpy_helper.from_array(s, sn)]
    c = w.shape[0]
    if c not in shared_zero:  # first layer of this width owns the zero point
        zn = f"zero_{c}"
        new_init.append(numpy_helper.from_array(np.zeros(c, np.int8), zn))
        shared_zero[c] = zn
    else:                     # later ones read it through an Identity
        zn = f"{wname}_zero"
        new_nodes.append(helper.make_node("Identity", [shared_zero[c]], [zn], name=f"{wname}_zero_share"))
    new_nodes.append(helper.make_node("DequantizeLinear", [qn, sn, zn], [f"{wname}_deq"], axis=0,
                                      name=f"{wname}_dequantize"))
    foreign_range[qn] = (-qmax, qmax)
for n in g.node:
    if n.op_type in ("Conv", "Gemm"):
        n.input[1] = f"{n.input[1]}_deq"
keep = [t for t in g.initializer if t.name not in layer_weights]
del g.initializer[:]
g.initializer.extend(keep + new_init)
nodes = new_nodes + list(g.node)
del g.node[:]
g.node.extend(nodes)
foreign = W("foreign_narrow.onnx")
onnx.checker.check_model(dense)
onnx.save(dense, foreign)
identity_shares = sum(1 for n in nodes if n.op_type == "Identity")
check("foreign: zero points shared through Identity nodes", identity_shares > 0, f"({identity_shares} Identity)")
ir, _ = inspect_ranges(foreign)
check("foreign: inspect reports the ranges the integers use (observed)",
      all((ir[k]["min"], ir[k]["max"], ir[k]["source"]) == (*foreign_range[k], "observed") for k in foreign_range),
      "(" + ", ".join(f"{k} [{ir[k]['min']}, {ir[k]['max']}]" for k in sorted(foreign_range)) + ")")
bf = ints(foreign)
resf = distill(foreign, W("foreign_out.onnx"))
check("foreign: distill improved on validation", resf["improved"])
check_ranges("foreign", bf, ints(W("foreign_out.onnx")), foreign_range)

# ---- 2. grids through Identity in a PyTorch export ---------------------------
torch_script = r'''
import sys, numpy as np, torch
images, labels, out_t, out_s = sys.argv[1:5]
torch.set_num_threads(1)  # small batches: a second thread costs more than it gives beside another test
torch.manual_seed(0)
x = torch.tensor(np.load(images), dtype=torch.float32) / 255
y = torch.tensor(np.load(labels), dtype=torch.int64)
class Net(torch.nn.Module):
    def __init__(s, fake_quant=False):
        super().__init__()
        s.c1, s.c2 = torch.nn.Conv2d(1, 8, 3), torch.nn.Conv2d(8, 8, 3)
        s.fc = torch.nn.Linear(8 * 5 * 5, 10)
        s.fake_quant = fake_quant
    def w(s, conv, i):
        if not s.fake_quant:
            return conv.weight
        return torch.fake_quantize_per_channel_affine(conv.weight, getattr(s, f"s{i}"), getattr(s, f"z{i}"), 0, -128, 127)
    def forward(s, x):
        x = torch.max_pool2d(torch.relu(torch.nn.functional.conv2d(x, s.w(s.c1, 1), s.c1.bias)), 2)
        x = torch.max_pool2d(torch.relu(torch.nn.functional.conv2d(x, s.w(s.c2, 2), s.c2.bias)), 2)
        return s.fc(x.flatten(1))
net = Net()
opt = torch.optim.Adam(net.parameters(), 0.01)
for step in range(300):
    i = torch.randint(0, len(x), (64,))
    opt.zero_grad()
    torch.nn.functional.cross_entropy(net(x[i]), y[i]).backward()
    opt.step()
net.eval()
kw = dict(opset_version=13, input_names=["image"], output_names=["logits"],
          dynamic_axes={"image": {0: "n"}, "logits": {0: "n"}})
torch.onnx.export(net, x[:1], out_t, **kw)
net.fake_quant = True
for i, conv in ((1, net.c1), (2, net.c2)):
    # 4-bit values on int8 grids: scale = max|w| / 7 per output channel; the
    # two zero-point buffers are equal, so the exporter shares one through Identity.
    m = conv.weight.detach().abs().flatten(1).max(1).values
    net.register_buffer(f"s{i}", torch.where(m > 0, m / 7, torch.ones_like(m)))
    net.register_buffer(f"z{i}", torch.zeros(8, dtype=torch.int32))
torch.onnx.export(net, x[:1], out_s, **kw)
'''
with open(W("export_fq.py"), "w") as f:
    f.write(torch_script)
np.save(W("labels.npy"), labels)
r = subprocess.run([sys.executable, W("export_fq.py"), W("train.npy"), W("labels.npy"), W("torch_float.onnx"),
                    W("torch_fq.onnx")], capture_output=True, text=True, timeout=900)
if r.returncode != 0:
    raise SystemExit("PyTorch export failed:\n" + r.stderr[-2000:])
fq = onnx.load(W("torch_fq.onnx"))
producers = {o: n for n in fq.graph.node for o in n.output}
via_identity = [(n.name, i) for n in fq.graph.node if n.op_type in ("QuantizeLinear", "DequantizeLinear")
                for i in n.input[1:] if i in producers and producers[i].op_type == "Identity"]
check("PyTorch export: a grid input arrives through an Identity node", len(via_identity) > 0, f"({via_identity[:2]})")
res = run.json(["distill", "--teacher", W("torch_float.onnx"), "--student", W("torch_fq.onnx"), "--out",
                W("torch_fq_out.onnx"), "--epochs", "3"] + DISTILL)
check("PyTorch export: distill trains it", res["improved"])
out = onnx.load(W("torch_fq_out.onnx"))
oi = {t.name: numpy_helper.to_array(t) for t in out.graph.initializer}
fi = {t.name: numpy_helper.to_array(t) for t in fq.graph.initializer}
const = dict(fi)
for n in fq.graph.node:  # resolve the Identity chains with the onnx package's graph
    if n.op_type == "Identity" and n.input[0] in const:
        const[n.output[0]] = const[n.input[0]]
for n in fq.graph.node:
    if n.op_type != "QuantizeLinear" or n.input[0] not in oi:
        continue
    w, s, z = oi[n.input[0]], const[n.input[1]], const[n.input[2]]
    k = (w / s.reshape(-1, *[1] * (w.ndim - 1))).astype(np.float64) + z.reshape(-1, *[1] * (w.ndim - 1))
    on_grid = np.abs(k - np.rint(k)).max()
    check(f"PyTorch export: '{n.input[0]}' trained and on its grid",
          not np.array_equal(w, fi[n.input[0]]) and on_grid < 1e-3, f"(max distance to grid {on_grid:.2g} steps)")
    check(f"PyTorch export: '{n.input[0]}' stays in the [-7, 7] its integers used",
          -7 <= np.rint(k).min() and np.rint(k).max() <= 7, f"(observed [{np.rint(k).min():.0f}, {np.rint(k).max():.0f}])")

# A scale computed from the input at run time cannot be trained on.
dyn = onnx.load(W("torch_fq.onnx"))
dq = next(n for n in dyn.graph.node if n.op_type == "DequantizeLinear")
dyn.graph.node.insert(0, helper.make_node("ReduceMax", ["image"], ["image_peak"], keepdims=0, name="peak_of_input"))
dq.input[1] = "image_peak"
for n in dyn.graph.node:
    if n.op_type == "QuantizeLinear" and n.output[0] == dq.input[0]:
        n.input[1] = "image_peak"
        del n.attribute[:]
        dq_axis = [a for a in dq.attribute if a.name != "axis"]
        del dq.attribute[:]
        dq.attribute.extend(dq_axis)
        n.input[2], dq.input[2] = "", ""
onnx.save(dyn, W("dynamic_scale.onnx"))
r = subprocess.run([RECOUP, "distill", "--teacher", W("torch_float.onnx"), "--student", W("dynamic_scale.onnx"),
                    "--out", W("dynamic_out.onnx"), "--epochs", "1"] + DISTILL, capture_output=True, text=True,
                   timeout=600)
msg = r.stderr.strip()
print("     message:", msg)
check("non-constant scale: refused with one message naming node, input and why",
      r.returncode == 1 and "is not a constant" in msg and "scale (input 1)" in msg and "peak_of_input" in msg
      and "ReduceMax" in msg and "graph input 'image'" in msg and not os.path.exists(W("dynamic_out.onnx")))

# ---- 3. what zeros mean ---------------------------------------------------------
zeros4 = {k: a == 0 for k, a in b4.items()}  # recoup's weight grids have zero point 0
kept = {k: int((a4[k][z] == 0).sum()) for k, z in zeros4.items()}
freed = sum(int(z.sum()) - kept[k] for k, z in zeros4.items())
rules4 = {w["tensor"]: w for w in res4["weights"]}
check("auto, quantized-only: rounded zeros are trainable (rule: rounding)",
      all(rules4[k]["mask"]["zeros"] == "trainable" and rules4[k]["frozen"] == 0 for k in b4),
      "(" + ", ".join(f"{k}: {rules4[k]['mask']['at_zero']} at zero, {rules4[k]['mask']['beside_zero']} beside"
                      for k in sorted(b4)) + ")")
check("auto, quantized-only: some rounded zeros moved during training", freed > 0,
      f"({freed} of {sum(int(z.sum()) for z in zeros4.values())} zeros changed)")
ij = run.json(["inspect", q4, "--json"])
check("inspect --json shows the auto choice per weight",
      ij["mask_mode"] == "auto" and all(w["mask"]["zeros"] == "trainable" for w in ij["weights"] if w["name"] in b4))

pq4 = W("garment_p50_w4.onnx")
run(["quantize", p50, "--data", W("calib.npy"), "--scale", SCALE, "--weight-bits", "4", "--out", pq4])
pmeta = {p.key: p.value for p in onnx.load(pq4).metadata_props}
pruned_names = set(json.loads(pmeta.get("recoup.pruned", "{}")).get("tensors", []))
check("prune records its pruned weights, and quantize carries the record", len(pruned_names) > 0,
      f"({sorted(pruned_names)})")
float_zero = {t.name: numpy_helper.to_array(t) == 0 for t in onnx.load(p50).graph.initializer
              if t.name in pruned_names}
src = {k: r["from"] for k, r in json.loads(pmeta["recoup.integer_ranges"])["tensors"].items()}
bp = ints(pq4)
resp = distill(pq4, W("p50_w4_out.onnx"), epochs=1)
ap = ints(W("p50_w4_out.onnx"))
rulesp = {w["tensor"]: w for w in resp["weights"]}
checked = [k for k in bp if src.get(k) in float_zero]
check("pruned then quantized: pruned tensors found by their recorded source", len(checked) > 0, f"({checked})")
for k in sorted(bp):
    if src.get(k) not in float_zero:
        continue
    z = float_zero[src[k]]
    lost = int((ap[k][z] != 0).sum())
    check(f"auto, pruned then quantized: '{k}' keeps its {int(z.sum())} pruned zeros",
          lost == 0 and rulesp[k]["mask"]["zeros"] == "pruned" and rulesp[k]["mask"]["rule"] == "recorded",
          f"({lost} lost; rule {rulesp[k]['mask']['rule']})")

# Without the record, the zero point's excess over its neighbours decides.
bare = onnx.load(pq4)
keep_meta = [p for p in bare.metadata_props if p.key != "recoup.pruned"]
del bare.metadata_props[:]
bare.metadata_props.extend(keep_meta)
onnx.save(bare, W("garment_p50_w4_unrecorded.onnx"))
bj = {w["name"]: w["mask"] for w in run.json(["inspect", W("garment_p50_w4_unrecorded.onnx"), "--json"])["weights"]
      if w["mask"]}
check("auto without the record: pruned tensors found by the zero point's excess",
      all(bj[k]["zeros"] == "pruned" and bj[k]["rule"] == "excess" for k in checked),
      "(" + ", ".join(f"{k}: {bj[k]['at_zero']} at zero, {bj[k]['beside_zero']} beside" for k in checked) + ")")

resz = distill(q4, W("w4_zeros_out.onnx"), ["--mask", "zeros"], epochs=1)
az = ints(W("w4_zeros_out.onnx"))
lost = sum(int((az[k][z] != 0).sum()) for k, z in zeros4.items())
check("--mask zeros keeps every zero", lost == 0 and all(w["frozen"] == w["mask"]["at_zero"] for w in resz["weights"]),
      f"({lost} of {sum(int(z.sum()) for z in zeros4.values())} zeros lost)")

manifest = {"defaults": {"teacher": os.path.basename(DENSE), "data": "train.npy", "scale": float(SCALE),
                         "epochs": 1, "lr": 0.002, "val_split": 0.25, "seed": 1, "mask": "zeros"},
            "jobs": [{"name": "w4", "student": "garment_w4.onnx", "out": "batch_w4_out.onnx"}]}
shutil.copyfile(DENSE, W(os.path.basename(DENSE)))  # manifest paths stay inside its folder
with open(W("zoo.json"), "w") as f:
    json.dump(manifest, f)
run(["batch", W("zoo.json"), "--threads", "2"])
ab = ints(W("batch_w4_out.onnx"))
lost = sum(int((ab[k][z] != 0).sum()) for k, z in zeros4.items())
changed = sum(int((ab[k] != b4[k]).sum()) for k in b4)
check("batch manifest key \"mask\": \"zeros\" keeps every zero", lost == 0 and changed > 0,
      f"({lost} zeros lost, {changed} integers changed)")
manifest["defaults"]["mask"] = "sometimes"
with open(W("zoo_bad.json"), "w") as f:
    json.dump(manifest, f)
r = subprocess.run([RECOUP, "batch", W("zoo_bad.json")], capture_output=True, text=True, timeout=120)
check("batch refuses an unknown mask mode", r.returncode != 0 and "mask" in r.stderr, f"({r.stderr.strip()[:120]})")

run.finish()
