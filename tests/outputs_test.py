#!/usr/bin/python3
"""End to end: students beyond single-output classifiers.

Scenes: garments from Fashion-MNIST (Xiao, Rasul and Vollgraf 2017; Debian
package dataset-fashion-mnist), each item halved to 14x14 and placed on a
32x32 canvas, two per scene. The per-pixel masks come from the items' own
pixels (a fact of the public dataset: the item is what is not background);
the composition into scenes and the grouping of the ten classes into three
(clothing, footwear, bag) are ours, made up for this test.

1. Segmentation: a small encoder-decoder (BatchNormalization kept, exported
   by Debian's python3-torch) trained on the scenes; `recoup prune` takes 80%
   of its weights; `recoup distill --output-loss out=kd:axis=1` recovers it.
   Checked: mean IoU against the ground-truth masks on held-out scenes
   improves (computed here from onnxruntime-web's outputs, npm, tests/ort),
   and onnxruntime-web reproduces recoup's outputs (`recoup eval --out`).
2. Detection-shaped: a two-head network (class scores per 4x4 cell, box
   edges per cell) on the same scenes; a pruned copy recovered with
   scores=kd + boxes=smooth-l1 (+ bounded-l2 with --targets). Checked: both
   heads move toward the teacher (recoup's validation figures) and the box
   error against ground truth on held-out scenes does not grow (within 2%).

Usage: outputs_test.py RECOUP WORK_DIR
"""
import os
import sys

import numpy as np
import torch
import torch.nn as nn
import torch.nn.functional as F

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from e2e import DATA, Run, read_idx, require, run_ort  # noqa: E402

RECOUP, WORK = sys.argv[1:3]
os.makedirs(WORK, exist_ok=True)
run = Run(RECOUP)
GROUP = np.array([1, 1, 1, 1, 1, 2, 1, 2, 3, 2])  # 0 background; ours: clothing, footwear, bag
CANVAS, CELL = 32, 4


def compose(images, labels, n, seed):
    """n scenes of two items; masks per pixel; per-cell class and box edges."""
    rng = np.random.default_rng(seed)
    x = np.zeros((n, 1, CANVAS, CANVAS), np.float32)
    mask = np.zeros((n, CANVAS, CANVAS), np.int64)
    g = CANVAS // CELL
    cell_cls = np.zeros((n, g, g), np.int64)
    box = np.full((n, 4, g, g), np.nan, np.float32)
    for i in range(n):
        for _ in range(2):
            j = rng.integers(len(images))
            item = images[j].reshape(14, 2, 14, 2).mean(axis=(1, 3)) / 255.0
            r, c = rng.integers(0, CANVAS - 14, size=2)
            on = item > 0.1
            region = x[i, 0, r:r + 14, c:c + 14]
            region[on] = item[on]
            mask[i, r:r + 14, c:c + 14][on] = GROUP[labels[j]]
            ys, xs = np.nonzero(on)
            if not len(ys):
                continue
            y0, y1, x0, x1 = r + ys.min(), r + ys.max() + 1, c + xs.min(), c + xs.max() + 1
            for cy in range(y0 // CELL, (y1 - 1) // CELL + 1):
                for cx in range(x0 // CELL, (x1 - 1) // CELL + 1):
                    py, px = (cy + 0.5) * CELL, (cx + 0.5) * CELL
                    cell_cls[i, cy, cx] = GROUP[labels[j]]
                    box[i, :, cy, cx] = np.array([px - x0, py - y0, x1 - px, y1 - py]) / CELL
    return x, mask, cell_cls, box


def block(cin, cout, stride=1):
    return [nn.Conv2d(cin, cout, 3, stride, 1), nn.BatchNorm2d(cout), nn.ReLU()]


class SegNet(nn.Module):
    def __init__(self):
        super().__init__()
        self.enc = nn.Sequential(*block(1, 16), *block(16, 32, 2), *block(32, 32))
        self.up = nn.Sequential(nn.ConvTranspose2d(32, 16, 2, 2), nn.BatchNorm2d(16), nn.ReLU())
        self.head = nn.Conv2d(16, 4, 1)

    def forward(self, x):
        return self.head(self.up(self.enc(x)))


class DetNet(nn.Module):
    def __init__(self):
        super().__init__()
        self.body = nn.Sequential(*block(1, 16), *block(16, 32, 2), *block(32, 32, 2), *block(32, 32))
        self.scores = nn.Conv2d(32, 4, 1)
        self.boxes = nn.Conv2d(32, 4, 1)

    def forward(self, x):
        f = self.body(x)
        return self.scores(f), self.boxes(f)


def train(model, loss_fn, x, epochs, seed):
    torch.manual_seed(seed)
    opt = torch.optim.Adam(model.parameters(), lr=3e-3)
    xt = torch.from_numpy(x)
    for _ in range(epochs):
        perm = torch.randperm(len(xt))
        for k in range(0, len(xt), 64):
            idx = perm[k:k + 64]
            opt.zero_grad()
            loss_fn(model(xt[idx]), idx).backward()
            opt.step()
    model.eval()


def export(model, path, names):
    x = torch.zeros(1, 1, CANVAS, CANVAS)
    dyn = {"input": {0: "batch"}}
    dyn.update({n: {0: "batch"} for n in names})
    torch.onnx.export(model, x, path, opset_version=13, input_names=["input"], output_names=list(names),
                      training=torch.onnx.TrainingMode.PRESERVE, do_constant_folding=False, dynamic_axes=dyn)


def miou(pred, truth, k=4):
    ious = []
    for c in range(k):
        inter = np.sum((pred == c) & (truth == c))
        union = np.sum((pred == c) | (truth == c))
        if union:
            ious.append(inter / union)
    return float(np.mean(ious))


def segmentation(images, labels):
    x, mask, _, _ = compose(images, labels, 1200, 1)
    vx, vmask, _, _ = compose(images, labels, 300, 2)
    model = SegNet()
    mt = torch.from_numpy(mask)
    train(model, lambda out, idx: F.cross_entropy(out, mt[idx]), x, 3, 1)
    teacher, student, out = (os.path.join(WORK, f) for f in ("seg.onnx", "seg_pruned.onnx", "seg_recovered.onnx"))
    export(model, teacher, ["out"])
    for name, arr in (("scenes", x), ("val_scenes", vx), ("masks", mask.astype(np.uint8)),
                      ("val_masks", vmask.astype(np.uint8))):
        np.save(os.path.join(WORK, name + ".npy"), arr)
    run(["prune", teacher, "--out", student, "--sparsity", "0.8"])
    res = run.json(["distill", "--teacher", teacher, "--student", student, "--out", out,
                    "--data", os.path.join(WORK, "scenes.npy"), "--labels", os.path.join(WORK, "masks.npy"),
                    "--val-data", os.path.join(WORK, "val_scenes.npy"),
                    "--val-labels", os.path.join(WORK, "val_masks.npy"),
                    "--output-loss", "out=kd:axis=1", "--steps", "300", "--batch", "32", "--lr", "2e-3",
                    "--json"])
    vin = os.path.join(WORK, "val_scenes.npy")
    got = {}
    for tag, path in (("teacher", teacher), ("pruned", student), ("recovered", out)):
        logits = run_ort(path, vin, os.path.join(WORK, "ort_" + tag))
        got[tag] = miou(logits.argmax(axis=1), vmask)
        print(f"mIoU vs ground truth on 300 held-out scenes ({tag}, onnxruntime-web): {got[tag]:.4f}")
    run.check("segmentation: mIoU against the masks improves", got["recovered"] > got["pruned"] + 0.02,
              f"pruned {got['pruned']:.4f}, recovered {got['recovered']:.4f} (teacher {got['teacher']:.4f})")
    rep = res["recovered"]["miou_labels"]
    run.check("segmentation: recoup's validation mIoU equals the one from onnxruntime-web outputs",
              abs(rep - got["recovered"]) < 2e-3, f"recoup {rep:.4f}, onnxruntime-web {got['recovered']:.4f}")
    npz = os.path.join(WORK, "seg_recoup_out.npz")
    run(["eval", out, "--data", vin, "--out", npz])
    mine = np.load(npz)["out"]
    ort = np.load(os.path.join(WORK, "ort_recovered", "0.npy"))
    diff = float(np.abs(mine - ort).max())
    run.check("segmentation: onnxruntime-web reproduces recoup's outputs", diff < 1e-4,
              f"max |recoup - onnxruntime-web| = {diff:.3g} over {mine.size} values")


def refusals():
    """Bad input: one clear error each (exit status 1 or 2, one line naming the culprit)."""
    import subprocess
    teacher, student = os.path.join(WORK, "det.onnx"), os.path.join(WORK, "det_pruned.onnx")
    data = os.path.join(WORK, "det_scenes.npy")
    wrong = os.path.join(WORK, "wrong_targets.npy")
    np.save(wrong, np.zeros((1200, 4, 7, 8), np.float32))
    base = ["distill", "--teacher", teacher, "--student", student, "--data", data, "--steps", "1",
            "--out", os.path.join(WORK, "never.onnx")]
    # Each message starts with the option the culprit came from (the CLI adds
    # it in front of the library's words), then names the culprit.
    cases = (("an output that does not exist", ["--output-loss", "nope=kd"],
              ("--output-loss: output loss term on 'nope'", "has no such output")),
             ("an axis out of range", ["--output-loss", "scores=kd:axis=4"],
              ("--output-loss: output 'scores'", "axis 4")),
             ("a key the term does not take", ["--output-loss", "scores=kd:beta=1"],
              ("--output-loss: output loss 'scores=kd:beta=1': kd takes no key 'beta'",)),
             ("targets of the wrong shape", ["--output-loss", "boxes=bounded-l2:axis=1", "--targets",
                                             "boxes=" + wrong], ("--targets: ", "(1200, 4, 8, 8)")),
             ("targets for an output without a term taking them",
              ["--output-loss", "scores=kd", "--targets", "scores=" + wrong],
              ("--targets: targets for output 'scores': no output loss term on it takes targets",)),
             ("bounded-l2 without targets", ["--output-loss", "boxes=bounded-l2"],
              ("--targets: output 'boxes': bounded-l2 needs targets of the training samples",)))
    for what, extra, needles in cases:
        r = subprocess.run([RECOUP] + base + extra, capture_output=True, text=True)
        one = r.stderr.strip().count("\n") == 0
        run.check(f"refused: {what}", r.returncode in (1, 2) and all(n in r.stderr for n in needles) and one
                  and not os.path.exists(os.path.join(WORK, "never.onnx")),
                  f"(exit {r.returncode}, wanted {needles!r}, stderr {r.stderr.strip()!r})")


def box_error(boxes, truth):
    on = ~np.isnan(truth)
    return float(np.abs(boxes[on] - truth[on]).mean())


def detection(images, labels):
    x, _, cls, box = compose(images, labels, 1200, 3)
    vx, _, vcls, vbox = compose(images, labels, 300, 4)
    model = DetNet()
    ct, bt = torch.from_numpy(cls), torch.from_numpy(box)

    def loss(out, idx):
        s, b = out
        t = bt[idx]
        on = ~torch.isnan(t)
        return F.cross_entropy(s, ct[idx]) + F.smooth_l1_loss(b[on], t[on])
    train(model, loss, x, 3, 2)
    teacher, student, out = (os.path.join(WORK, f) for f in ("det.onnx", "det_pruned.onnx", "det_recovered.onnx"))
    export(model, teacher, ["scores", "boxes"])
    for name, arr in (("det_scenes", x), ("det_val_scenes", vx), ("det_boxes", box), ("det_val_boxes", vbox)):
        np.save(os.path.join(WORK, name + ".npy"), arr)
    run(["prune", teacher, "--out", student, "--sparsity", "0.8"])
    res = run.json(["distill", "--teacher", teacher, "--student", student, "--out", out,
                    "--data", os.path.join(WORK, "det_scenes.npy"),
                    "--val-data", os.path.join(WORK, "det_val_scenes.npy"),
                    "--output-loss", "scores=kd:axis=1", "--output-loss", "boxes=smooth-l1",
                    "--output-loss", "boxes=bounded-l2:axis=1:weight=0.5",
                    "--targets", "boxes=" + os.path.join(WORK, "det_boxes.npy"),
                    "--val-targets", "boxes=" + os.path.join(WORK, "det_val_boxes.npy"),
                    "--steps", "300", "--batch", "32", "--lr", "2e-3", "--json"])
    b, a = res["compressed"], res["recovered"]
    run.check("detection: class scores move toward the teacher", a["agreement"] > b["agreement"],
              f"per-cell agreement {b['agreement']:.4f} -> {a['agreement']:.4f}")
    run.check("detection: boxes move toward the teacher", a["value_mad"] < b["value_mad"],
              f"mean |student - teacher| {b['value_mad']:.4f} -> {a['value_mad']:.4f}")
    vin = os.path.join(WORK, "det_val_scenes.npy")
    err = {}
    for tag, path in (("teacher", teacher), ("pruned", student), ("recovered", out)):
        odir = os.path.join(WORK, "ort_det_" + tag)
        run_ort(path, vin, odir)
        err[tag] = box_error(np.load(os.path.join(odir, "1.npy")), vbox)
        print(f"box error vs ground truth, held-out scenes ({tag}, onnxruntime-web): {err[tag]:.4f} cells")
    run.check("detection: box error against ground truth does not grow", err["recovered"] <= err["pruned"] * 1.02,
              f"pruned {err['pruned']:.4f}, recovered {err['recovered']:.4f} (teacher {err['teacher']:.4f})")


def main():
    require(f"{DATA}/train-images-idx3-ubyte.gz")
    images = read_idx(f"{DATA}/train-images-idx3-ubyte.gz")[:20000]
    labels = read_idx(f"{DATA}/train-labels-idx1-ubyte.gz")[:20000]
    # One thread: ctest runs this beside another test on two cores, and
    # PyTorch's two-thread pool on these small batches cost seven times the
    # CPU time of one thread (measured: one epoch of SegNet, 32 s against 5 s).
    torch.set_num_threads(1)
    segmentation(images, labels)
    detection(images, labels)
    refusals()
    run.finish()


if __name__ == "__main__":
    main()
