#!/usr/bin/python3
"""Feature-level distillation of a narrower student on Fashion-MNIST (Xiao,
Rasul and Vollgraf 2017; Debian package dataset-fashion-mnist).

`recoup prune --channels 0.5` removes half the output channels of the bundled
dense model's layers (the student is then narrower than the teacher, so the
feature terms need projectors). At the same budget (steps, seed, threads),
kd alone and kd plus hint must each recover at least MARGIN of test accuracy
over the channel-pruned copy on the 10,000 test images; the recovered files
pass onnx.checker (Debian python3-onnx), keep the student's shapes, and
export no projector. Both accuracies are printed.

Measured on our run (300 steps, seed 5, 2 threads): channel-pruned 0.2818,
kd 0.8519, kd=1,hint=0.3 0.8519 (different weights, the same count of
correct images); with the logits also in the hint pairs, as an earlier
version paired them, kd=1,hint=1 gave 0.8359. At this short budget the hint
does not beat kd alone on this pair, so the test does not claim it does.

Usage: features_test.py RECOUP SOURCE_DIR WORK_DIR
"""

import json
import os
import sys

import onnx

from e2e import Run, SCALE, TRAIN_IMAGES, require

RECOUP, SRC, WORK = sys.argv[1:4]
os.makedirs(WORK, exist_ok=True)
DENSE = os.path.join(SRC, "models", "garment_dense.onnx")
STEPS = "300"
MARGIN = 0.4  # recovery over the channel-pruned copy, for each loss
run = Run(RECOUP)
check, test_accuracy = run.check, run.test_accuracy
require(DENSE, TRAIN_IMAGES)


narrow = os.path.join(WORK, "garment_channels50.onnx")
run(["prune", DENSE, "--channels", "0.5", "--out", narrow])
pairs = run(["inspect", "--pairs", DENSE, narrow, "--json"]).stdout
n_proj = sum(1 for p in json.loads(pairs) if p["projector"])
check("pairing finds narrower layers", n_proj > 0, f"({n_proj} pairs need a projector)")

accs = {}
for name, loss in (("kd", "kd"), ("kd+hint", "kd=1,hint=0.3")):
    out = os.path.join(WORK, f"recovered_{name.replace('+', '_')}.onnx")
    run(["distill", "--teacher", DENSE, "--student", narrow, "--data", TRAIN_IMAGES,
         "--scale", SCALE, "--steps", STEPS, "--seed", "5", "--threads", "2", "--loss", loss, "--out", out])
    accs[name] = test_accuracy(out)
    m_in, m_out = onnx.load(narrow), onnx.load(out)
    onnx.checker.check_model(m_out)
    check(f"{name}: same graph and initializer shapes as the student",
          [n.SerializeToString() for n in m_in.graph.node] == [n.SerializeToString() for n in m_out.graph.node]
          and [(t.name, list(t.dims)) for t in m_in.graph.initializer] ==
          [(t.name, list(t.dims)) for t in m_out.graph.initializer])
acc_narrow = test_accuracy(narrow)
print(f"test accuracy: channel-pruned {acc_narrow:.4f}, kd {accs['kd']:.4f}, kd+hint {accs['kd+hint']:.4f} "
      f"({STEPS} steps each)")
for name in accs:
    check(f"{name} recovers the channel-pruned student", accs[name] - acc_narrow >= MARGIN,
          f"({accs[name]:.4f} - {acc_narrow:.4f} >= {MARGIN})")
run.finish()
