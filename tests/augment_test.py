#!/usr/bin/python3
"""distill --augment (src/data/augment.c) against outside references:

- horizontal flips and crops from a zero-padded image, exactly as NumPy
  computes them from the drawn parameters (np.flip, np.pad and slicing);
- the random resized crop's enlargement as the Python imaging library
  (Debian python3-pil) resizes the same box bilinearly, within 1e-5; the
  drawn boxes keep the asked area and aspect-ratio ranges;
- mixup and CutMix weights: Kolmogorov-Smirnov tests against SciPy's
  Beta(alpha, alpha) (Debian python3-scipy), fixed seeds; CutMix's weight is
  the share of the image outside its box (Yun et al. 2019); mixed pixels as
  NumPy computes lambda*x + (1-lambda)*x[partner];
- end to end on Fashion-MNIST (Debian dataset-fashion-mnist): with the dense
  model as both teacher and student, the distillation loss of every step is
  exactly 0 (KL of a distribution to itself), so teacher and student saw the
  same augmented pixels; byte-identical files for a seed and thread count,
  from an IDX file and from a folder of PNG images; --json records the list;
  nonsense is refused with one clear error;
- the lazy teacher-output cache: a short run computes teacher outputs for a
  small share of the training samples only.

Usage: augment_test.py AUGMENT_DUMP RECOUP SOURCE_DIR WORK_DIR
"""

import filecmp
import os
import signal
import subprocess
import sys
import time

import numpy as np
from PIL import Image
from scipy import stats

from e2e import SCALE, TRAIN_IMAGES, Run, read_idx, require_data

DUMP, RECOUP, SRC, WORK = sys.argv[1:5]
os.makedirs(WORK, exist_ok=True)
DENSE = os.path.join(SRC, "models", "garment_dense.onnx")
PRUNED = os.path.join(SRC, "models", "garment_pruned90.onnx")
run = Run(RECOUP)
check = run.check

# ---- Transforms on fixed seeds ---------------------------------------------------
subprocess.run([DUMP, WORK], check=True)


def load(name):
    return np.load(os.path.join(WORK, name + ".npy"))


x = load("in")
N, C, H, W = x.shape


def crop_padded(img, pad, dy, dx):
    """The padded image (zeros), cut back to H x W at (dy, dx): NumPy's np.pad and slicing."""
    p = np.pad(img, ((0, 0), (pad, pad), (pad, pad)))
    return p[:, dy:dy + H, dx:dx + W]


def flip(img, f):
    return np.flip(img, axis=2) if f else img


for tag, pad, flips in (("flip", 0, True), ("crop", 3, False), ("flipcrop", 2, True)):
    out, prm = load("out_" + tag), load("params_" + tag)
    want = np.stack([flip(crop_padded(x[j], pad, prm[j, 1], prm[j, 2]) if pad else x[j], flips and prm[j, 0])
                     for j in range(N)])
    bad = int((out != want).sum())
    check(f"{tag}: equals NumPy's flip/pad/slice of the drawn parameters exactly (reference: NumPy)", bad == 0,
          f"({bad} of {out.size} values differ; flips {prm[:, 0].tolist()}, offsets {prm[:, 1:3].tolist()})")
    if pad:
        ok = bool(((prm[:, 1:3] >= 0) & (prm[:, 1:3] <= 2 * pad)).all())
        check(f"{tag}: offsets within 0..{2 * pad}", ok, f"({prm[:, 1:3].tolist()})")
check("flip: both outcomes drawn over the batch", 0 < load("params_flip")[:, 0].sum() < N,
      f"({load('params_flip')[:, 0].tolist()})")

out, prm = load("out_rrc"), load("params_rrc")
worst = 0.0
for j in range(N):
    ry, rx, rh, rw = (int(v) for v in prm[j, 3:7])
    for c in range(C):
        ref = Image.fromarray(x[j, c], mode="F").resize((W, H), Image.BILINEAR, box=(rx, ry, rx + rw, ry + rh))
        worst = max(worst, float(np.abs(np.asarray(ref) - out[j, c]).max()))
check("rrc: enlargement of the box equals PIL's bilinear resize within 1e-5 (reference: python3-pil)", worst <= 1e-5,
      f"(worst difference {worst:.3g}; boxes {prm[:, 3:7].tolist()})")
areas = prm[:, 5] * prm[:, 6] / (H * W)
ratios = prm[:, 6] / prm[:, 5]
# Rounding a side to whole pixels moves area and ratio by up to one pixel's worth.
ok = bool(((areas >= 0.2 - 2.5 / min(H, W)) & (areas <= 1)).all() and
          ((ratios >= 0.5 * (1 - 1.0 / min(H, W)) - 0.2) & (ratios <= 2 * (1 + 1.0 / min(H, W)) + 0.3)).all())
check("rrc: boxes keep area 0.2-1 and aspect ratio 0.5-2 (up to whole-pixel rounding)", ok,
      f"(areas {np.round(areas, 3).tolist()}, ratios {np.round(ratios, 3).tolist()})")

# ---- Mixing weights ---------------------------------------------------------------
P_MIN = 0.01  # a correct sampler fails this 1% of the time for an unlucky seed; the seeds are fixed
for tag, alpha in (("mix", 0.4), ("cutmix", 1.0)):
    d = load("draws_" + tag)
    ks = stats.kstest(d[:, 0], stats.beta(alpha, alpha).cdf)
    check(f"{tag}={alpha}: {len(d)} weights follow Beta({alpha}, {alpha}) (Kolmogorov-Smirnov against "
          f"scipy.stats.beta, p >= {P_MIN})", ks.pvalue >= P_MIN, f"(D = {ks.statistic:.4f}, p = {ks.pvalue:.3f})")
d = load("draws_mix")
check("mix: lambda is the drawn weight", bool((d[:, 0] == d[:, 1]).all()), f"(first {d[:3, :2].tolist()})")
d = load("draws_cutmix")
share = 1 - (d[:, 3] - d[:, 2]) * (d[:, 5] - d[:, 4]) / (H * W)
check("cutmix: lambda is the share of the image outside the box (Yun et al. 2019)",
      bool(np.abs(share - d[:, 1]).max() < 1e-12), f"(worst {np.abs(share - d[:, 1]).max():.3g})")
inside = (d[:, 2] >= 0) & (d[:, 3] <= H) & (d[:, 4] >= 0) & (d[:, 5] <= W) & (d[:, 2] <= d[:, 3]) & (d[:, 4] <= d[:, 5])
check("cutmix: boxes inside the image", bool(inside.all()), f"({int((~inside).sum())} outside)")
d = load("draws_both")
both_cdf = lambda v: 0.5 * stats.beta(0.2, 0.2).cdf(v) + 0.5 * stats.beta(2, 2).cdf(v)
ks = stats.kstest(d[:, 0], both_cdf)
check("mix=0.2,cutmix=2: weights follow the even mixture of Beta(0.2, 0.2) and Beta(2, 2) (one of the two per "
      f"batch, p >= {P_MIN})", ks.pvalue >= P_MIN, f"(D = {ks.statistic:.4f}, p = {ks.pvalue:.3f})")

out, part, info = load("out_mixup"), load("partner_mixup"), load("mixinfo_mixup")
lam = info[0]
want = np.float32(lam) * x + np.float32(1 - lam) * x[part]
worst = float(np.abs(out - want).max())
check("mixup: pixels are lambda*x + (1-lambda)*x[partner] (reference: NumPy, float32, within 1e-6)", worst <= 1e-6,
      f"(lambda {lam:.4f}, partners {part.tolist()}, worst {worst:.3g})")
check("mixup: partners are a permutation of the batch", sorted(part.tolist()) == list(range(N)), f"({part.tolist()})")
out, part, info = load("out_cutmix"), load("partner_cutmix"), load("mixinfo_cutmix")
y0, y1, x0, x1 = (int(v) for v in info[1:])
want = x.copy()
want[:, :, y0:y1, x0:x1] = x[part][:, :, y0:y1, x0:x1]
check("cutmix: the box comes from the partner, the rest stays (reference: NumPy slicing)",
      bool((out == want).all()), f"(box rows {y0}:{y1}, columns {x0}:{x1}, partners {part.tolist()})")

# ---- End to end -------------------------------------------------------------------
require_data(TRAIN_IMAGES)
images = read_idx(TRAIN_IMAGES)[:3000].reshape(-1, 1, 28, 28)
labels_all = read_idx(TRAIN_IMAGES.replace("images-idx3", "labels-idx1"))[:3000].astype(np.int64)
small = os.path.join(WORK, "small.npy")
small_labels = os.path.join(WORK, "small_labels.npy")
np.save(small, images)
np.save(small_labels, labels_all)
base = ["distill", "--scale", SCALE, "--threads", "2", "--seed", "4", "--json"]

# The dense model as teacher and student: identical models on identical
# pixels give identical outputs, so KL(teacher || student) is 0 at every step
# and no weight moves. Any step where the teacher saw other pixels than the
# student would show a positive loss.
same = run.json(base + ["--teacher", DENSE, "--student", DENSE, "--data", small, "--steps", "12",
                        "--augment", "rrc=0.3-1,crop=3,flip,mix=0.3,cutmix=1", "--report",
                        os.path.join(WORK, "report"), "--out", os.path.join(WORK, "same.onnx")])
losses = [p[1] for p in same["loss_trace"]]
check("same model as teacher and student: every step's kd loss is exactly 0 (teacher and student see the same "
      "augmented pixels; KL of a distribution to itself is 0)", len(losses) == 12 and max(losses) == 0.0,
      f"(losses {losses})")
check("--json records the list in canonical form and that the teacher-output cache is off",
      same["augment"] == "rrc=0.3-1:0.75-1.33333,crop=3,flip,mix=0.3,cutmix=1"
      and same["teacher_cache"] == "off (augmentation)",
      f"(augment {same['augment']!r}, teacher_cache {same['teacher_cache']!r})")

with open(os.path.join(WORK, "report", "report.html"), encoding="utf-8") as f:
    html = f.read()
check("report.html names the list", f"Augmentation: {same['augment']}" in html,
      f"(looked for {same['augment']!r} in {len(html)} characters)")

# Same seed and threads: byte-identical files (labels mixed with the weights).
outs = []
for k in range(2):
    o = os.path.join(WORK, f"det{k}.onnx")
    run(base + ["--teacher", DENSE, "--student", PRUNED, "--data", small, "--labels", small_labels, "--steps", "30",
                "--augment", "flip,crop=2,mix=0.5", "--augment", "cutmix=1", "--out", o])
    outs.append(o)
check("same seed and threads with augmentation and labels: byte-identical files", filecmp.cmp(*outs, shallow=False),
      f"({outs[0]} against {outs[1]})")
folder = os.path.join(WORK, "pngs")
os.makedirs(folder, exist_ok=True)
for i in range(400):
    Image.fromarray(images[i, 0]).save(os.path.join(folder, f"{i:04d}.png"))
outs = []
for k in range(2):
    o = os.path.join(WORK, f"folder{k}.onnx")
    run(base + ["--teacher", DENSE, "--student", PRUNED, "--data", folder, "--steps", "20", "--batch", "32",
                "--augment", "rrc,flip,mix=0.2", "--out", o])
    outs.append(o)
check("same seed and threads from a folder of PNG images with augmentation: byte-identical files",
      filecmp.cmp(*outs, shallow=False), f"({outs[0]} against {outs[1]})")

# Killed once a checkpoint exists, then resumed: the transforms are drawn
# from (seed, step, position), so the resumed run ends on the same bytes.
# The sanitizer build, several times slower per step, runs 60 steps with a
# checkpoint every 10: the same paths, and the kill (after the second
# checkpoint) still comes well before the end.
resume_steps, resume_every = (60, 10) if os.environ.get("RECOUP_SANITIZER_BUILD") == "1" else (160, 20)
resume_args = base + ["--teacher", DENSE, "--student", PRUNED, "--data", small, "--labels", small_labels,
                      "--steps", str(resume_steps), "--batch", "32", "--checkpoint-every", str(resume_every),
                      "--augment", "crop=2,flip,mix=0.4,cutmix=1"]
whole = os.path.join(WORK, "whole.onnx")
run(resume_args + ["--out", whole])
cut = os.path.join(WORK, "cut.onnx")
ckpt = cut + ".ckpt"
for q in (cut, ckpt, ckpt + ".1"):
    if os.path.exists(q):
        os.remove(q)
p = subprocess.Popen([RECOUP] + resume_args + ["--out", cut], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
while p.poll() is None and not os.path.exists(ckpt + ".1"):
    time.sleep(0.02)
p.send_signal(signal.SIGKILL)
p.wait()
killed_mid_run = os.path.exists(ckpt) and not os.path.exists(cut)
r = subprocess.run([RECOUP] + resume_args + ["--out", cut, "--resume", ckpt], capture_output=True, text=True)
check("SIGKILL after a checkpoint, then --resume with augmentation: byte-identical to the uninterrupted run",
      killed_mid_run and r.returncode == 0 and filecmp.cmp(whole, cut, shallow=False),
      f"(killed mid-run: {killed_mid_run}, resume status {r.returncode}, {r.stderr.strip()[-200:]!r})")

# Refusals: one clear line, the right exit status.
def refused(args, status, needle, what):
    r = subprocess.run([RECOUP] + args, capture_output=True, text=True)
    err = r.stderr.strip()
    check(what, r.returncode == status and needle in err and len(err.splitlines()) == 1,
          f"(exit {r.returncode}, stderr {err!r})")


common = ["distill", "--teacher", DENSE, "--student", PRUNED, "--data", small, "--scale", SCALE, "--steps", "2",
          "--out", os.path.join(WORK, "never.onnx")]
refused(common + ["--augment", "crop=28"], 1, "padding must be smaller than the 28 x 28 image",
        "crop padding as large as the image: refused, naming the input")
# Usage errors start with the option (the CLI's words) in front of the library's own.
refused(common + ["--augment", "flip,spin"], 2, "--augment: unknown augmentation transform 'spin'",
        "an unknown transform: usage error")
refused(common + ["--augment", "mix=0"], 2, "--augment: augmentation item 'mix=0'",
        "a non-positive Beta parameter: usage error")
refused(common + ["--augment", "rrc=0.5-0.2"], 2, "--augment: augmentation item 'rrc=0.5-0.2'",
        "an empty area range: usage error")
targets = os.path.join(WORK, "targets.npy")
np.save(targets, np.zeros((len(images), 10), np.float32))
refused(common + ["--augment", "flip", "--output-loss", "logits=bounded-l2", "--targets", f"logits={targets}"], 1,
        "does not move dense labels or regression targets", "per-output losses with --targets: refused")
per_output = run.json(common[:-2] + ["--json", "--augment", "flip,mix=0.3", "--output-loss", "logits=kd",
                                     "--out", os.path.join(WORK, "per_output.onnx")])
check("per-output losses against the teacher alone: accepted with augmentation",
      per_output["augment"] == "flip,mix=0.3" and per_output["steps"] == 2,
      f"(augment {per_output['augment']!r}, steps {per_output['steps']})")

# The lazy teacher-output cache: 5 steps of 64 compute outputs for the samples
# drawn and the rows left free in those passes, not for all 2,700.
lazy = run.json(base + ["--teacher", DENSE, "--student", PRUNED, "--data", small, "--steps", "5",
                        "--out", os.path.join(WORK, "lazy.onnx")])
n_cached, n_train = lazy["teacher_cached_samples"], lazy["train_samples"]
check("lazy teacher cache: a 5-step run computes teacher outputs for at least the 320 drawn samples and far fewer "
      "than all", 320 <= n_cached <= n_train // 2, f"({n_cached} of {n_train} training samples)")
run.finish()
