#!/usr/bin/python3
"""Portable distillation checkpoints (format in DEVELOPERS.md, "Checkpoints").

Two builds of recoup take part: the normal one and `recoup_padded`, compiled
at -O0 with RECOUP_CKPT_TEST_PAD, which moves every field of the loop's
in-memory state. A run interrupted under one build and resumed under the
other must give a file byte-identical to an uninterrupted run. The format is
read and written independently with NumPy (Debian's python3-numpy): a
checkpoint decoded field by field from the documented format and written
again by numpy.savez_compressed (another zip writer, deflated members, keys
in another order) must resume to the same bytes. Old raw-struct, foreign,
damaged and other-run checkpoints must be refused naming the file and why.

Data: the 10,000 Fashion-MNIST test images (Xiao, Rasul and Vollgraf 2017;
Debian package dataset-fashion-mnist); the demo models in models/.

Usage: checkpoint_test.py RECOUP RECOUP_PADDED SOURCE_DIR WORK_DIR
"""

import gzip
import hashlib
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import time

import numpy as np

from e2e import SCALE, TEST_IMAGES, TRAIN_IMAGES, Run

RECOUP, PADDED, SRC, WORK = sys.argv[1:5]
if not os.path.exists(TEST_IMAGES):
    print(f"skipped: {TEST_IMAGES} missing (Debian package dataset-fashion-mnist)")
    sys.exit(77)
os.makedirs(WORK, exist_ok=True)
DENSE = os.path.join(SRC, "models", "garment_dense.onnx")
PRUNED = os.path.join(SRC, "models", "garment_pruned90.onnx")
# The first 1,600 test images (1,440 train, batch 64: 23 steps per epoch),
# 84 steps: three finished epochs and a half, enough room for a SIGTERM
# after the first (a 3,000-image, 150-step run checked the same at nearly
# twice the time; measured on a loaded machine, the 84-step run takes 8 s
# wall, so the 60 steps after the first epoch leave the SIGTERM seconds).
# The sanitizer build, several times slower, takes the first 640 (9 steps
# per epoch) and 30 steps: the same paths and epochs.
COUNT, STEPS = 1600, 84
if os.environ.get("RECOUP_SANITIZER_BUILD") == "1":
    COUNT, STEPS = 640, 30
with gzip.open(TEST_IMAGES, "rb") as f:
    raw = f.read()
images = np.frombuffer(raw, dtype=np.uint8, offset=16).reshape(-1, 1, 28, 28)  # IDX: 16-byte header
DATA = os.path.join(WORK, f"images{COUNT}.npy")
np.save(DATA, images[:COUNT])
run = Run(RECOUP)
check = run.check


def args(binary, out, extra=()):
    return [binary, "distill", "--teacher", DENSE, "--student", PRUNED, "--data", DATA, "--scale", SCALE,
            "--steps", str(STEPS), "--seed", "7", "--threads", "2", "--checkpoint-every", "5",
            "--out", out] + list(extra)


def digest(path):
    with open(path, "rb") as f:
        return hashlib.sha256(f.read()).hexdigest()


def versus(path):
    """Both sides of a byte comparison: the file's SHA-256 prefix against the reference's."""
    got = digest(path)[:16] if os.path.exists(path) else "missing"
    return f"sha256 {got} vs reference {ref_digest[:16]}"


def clean(*paths):
    for p in paths:
        for q in (p, p + ".ckpt", p + ".ckpt.1"):
            if os.path.exists(q):
                os.remove(q)


def header(path):
    with np.load(path) as z:
        return json.loads(bytes(z["header"]).decode("utf-8"))


def interrupted(binary, out):
    """Run until a checkpoint holds a finished epoch, copy it aside, then
    SIGTERM. Returns (copy, status, final checkpoint)."""
    clean(out)
    ckpt, copy = out + ".ckpt", out + ".epoch.ckpt"
    p = subprocess.Popen(args(binary, out), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    deadline = time.time() + 600
    copied = False
    while p.poll() is None and time.time() < deadline and not copied:
        try:
            if header(ckpt)["history"]:
                shutil.copyfile(ckpt, copy)
                copied = header(copy)["history"] != []
        except (OSError, ValueError, KeyError):
            pass  # not written yet
        time.sleep(0.02)
    p.send_signal(signal.SIGTERM)
    _, err = p.communicate(timeout=600)
    return (copy if copied else None), p.returncode, err


def resume(binary, ckpt, out, extra=()):
    for q in (out, out + ".ckpt", out + ".ckpt.1"):
        if os.path.exists(q) and q != ckpt:
            os.remove(q)
    return subprocess.run(args(binary, out, ["--resume", ckpt] + list(extra)), capture_output=True, text=True,
                          timeout=1200)


# 1. The uninterrupted run of the normal build is the reference.
ref = os.path.join(WORK, "ref.onnx")
clean(ref)
r = subprocess.run(args(RECOUP, ref), capture_output=True, text=True, timeout=1200)
check("uninterrupted run finishes", r.returncode == 0, f"(status {r.returncode})")
ref_digest = digest(ref)
r = subprocess.run(args(PADDED, os.path.join(WORK, "ref_padded.onnx")), capture_output=True, text=True, timeout=1200)
check("the padded -O0 build gives the same bytes uninterrupted",
      r.returncode == 0 and digest(os.path.join(WORK, "ref_padded.onnx")) == ref_digest,
      f"({versus(os.path.join(WORK, 'ref_padded.onnx'))})")

# 2. What the normal build writes: the documented fields, dtypes and arrays.
out_a = os.path.join(WORK, "a.onnx")
copy_a, status, err = interrupted(RECOUP, out_a)
check("SIGTERM: exit status 1 and a checkpoint after a finished epoch", status == 1 and copy_a is not None,
      f"(status {status}, checkpoint copied: {copy_a is not None})")
h = header(copy_a)
with np.load(copy_a) as z:
    members = {k: (z[k].dtype.str, z[k].shape) for k in z.files}
documented = {"format", "version", "fingerprint", "position", "data_order", "learning_rate", "rollbacks", "stopped",
              "best", "history", "trace", "snapshots", "arrays"}
check("header: format recoup-checkpoint, version 5, the documented keys",
      h["format"] == "recoup-checkpoint" and h["version"] == 5 and set(h) == documented,
      f"(format {h['format']}, version {h['version']}, keys {sorted(set(h) ^ documented)} differ)")
check("header: a 16-hex-digit fingerprint and the data order's seed", re.fullmatch(r"[0-9a-f]{16}", h["fingerprint"])
      is not None and h["data_order"] == {"generator": "pcg32", "seed": "7", "stream": h["position"]["epoch"]},
      f"({h['fingerprint']}, {h['data_order']})")
listed = {a["name"]: (a["dtype"], tuple(a["shape"])) for a in h["arrays"]}
check("every listed array is stored little-endian float32 with its listed shape, plus the uint8 header",
      members == dict(listed, header=("|u1", members["header"][1])) and all(d == "<f4" for d, _ in listed.values()),
      f"(stored {members}, listed {listed})")
check("history of finished epochs and a loss trace in the header",
      len(h["history"]) >= 1 and len(h["trace"]["step"]) == len(h["trace"]["loss"]) >= 1,
      f"({len(h['history'])} epochs, {len(h['trace']['step'])} trace points)")
ck, ck1 = out_a + ".ckpt", out_a + ".ckpt.1"
check("the previous checkpoint is kept as OUT.ckpt.1, one step-interval older",
      os.path.exists(ck1) and header(ck1)["position"]["step"] < header(ck)["position"]["step"],
      f"(steps {header(ck1)['position']['step'] if os.path.exists(ck1) else None}, {header(ck)['position']['step']})")

# 3. Across builds, both ways.
r = resume(PADDED, copy_a, os.path.join(WORK, "b.onnx"))
check("written by the normal build, resumed by the padded -O0 build: byte-identical",
      r.returncode == 0 and digest(os.path.join(WORK, "b.onnx")) == ref_digest,
      f"(status {r.returncode}, {versus(os.path.join(WORK, 'b.onnx'))})")
out_c = os.path.join(WORK, "c.onnx")
copy_c, status, _ = interrupted(PADDED, out_c)
r = resume(RECOUP, copy_c, out_c)
check("written by the padded build, resumed by the normal build: byte-identical",
      copy_c is not None and r.returncode == 0 and digest(out_c) == ref_digest,
      f"(status {r.returncode}, {versus(out_c)})")
r = resume(RECOUP, out_a + ".ckpt", out_a)
check("the checkpoint written on SIGTERM resumes to the same bytes",
      r.returncode == 0 and digest(out_a) == ref_digest and not os.path.exists(out_a + ".ckpt"),
      f"(status {r.returncode}, {versus(out_a)}, checkpoint removed: {not os.path.exists(out_a + '.ckpt')})")


# 4. Written by NumPy from the documented format, field by field.
def metrics(m):
    return {"n": int(m["n"]), "has_labels": bool(m["has_labels"]), "has_ref": bool(m["has_ref"]),
            "top1": m["top1"], "top5": m["top5"], "agreement": m["agreement"], "kl": m["kl"], "ce": m["ce"],
            "outputs": bool(m["outputs"]), "miou_ref": m["miou_ref"], "miou_labels": m["miou_labels"],
            "value_mad": m["value_mad"]}


def rewrite(src, dst, change=None):
    h = header(src)
    with np.load(src) as z:
        arrays = {a["name"]: np.asarray(z[a["name"]], dtype="<f4") for a in h["arrays"]}
    pos, lr, tr = h["position"], h["learning_rate"], h["trace"]
    doc = {
        "version": 5,
        "format": "recoup-checkpoint",
        "fingerprint": h["fingerprint"],
        "position": {"step": pos["step"], "epoch": pos["epoch"], "batch": pos["batch"],
                     "epoch_steps": pos["epoch_steps"], "epoch_loss_sum": pos["epoch_loss_sum"]},
        "data_order": {"generator": "pcg32", "seed": h["data_order"]["seed"], "stream": pos["epoch"]},
        "learning_rate": {"scale": lr["scale"], "optimizer_steps": lr["optimizer_steps"]},
        "rollbacks": h["rollbacks"],
        "stopped": h["stopped"],
        "best": {"epoch": h["best"]["epoch"], "metrics": metrics(h["best"]["metrics"])},
        "history": [{"loss": e["loss"], "metrics": metrics(e["metrics"])} for e in h["history"]],
        "trace": {"step": list(tr["step"]), "loss": list(tr["loss"]), "window_steps": tr["window_steps"],
                  "window_loss": tr["window_loss"]},
        "snapshots": [{"saved": s["saved"], "optimizer_steps": s["optimizer_steps"]} for s in h["snapshots"]],
        "arrays": [{"name": n, "dtype": "<f4", "shape": [int(a.shape[0])]} for n, a in arrays.items()],
    }
    if change:
        change(doc, arrays)
    text = json.dumps(doc, indent=2).encode("utf-8")
    members = dict(reversed(list(arrays.items())))
    members["header"] = np.frombuffer(text, dtype=np.uint8)
    with open(dst, "wb") as f:
        np.savez_compressed(f, **members)


by_numpy = os.path.join(WORK, "numpy.ckpt")
rewrite(copy_a, by_numpy)
r = resume(RECOUP, by_numpy, os.path.join(WORK, "d.onnx"))
check("written by NumPy from the documented fields (deflated, reordered): resumes byte-identical",
      r.returncode == 0 and digest(os.path.join(WORK, "d.onnx")) == ref_digest,
      f"(status {r.returncode}, {versus(os.path.join(WORK, 'd.onnx'))})")


# 5. Refusals: status 1, the file named, the reason given, no output written.
def refused(name, path, reason, extra=()):
    out = os.path.join(WORK, "never.onnx")
    r = resume(RECOUP, path, out, extra)
    ok = r.returncode == 1 and os.path.basename(path) in r.stderr and reason in r.stderr and not os.path.exists(out)
    check(name, ok, f"(status {r.returncode}: {r.stderr.strip()[-240:]})")


def variant(name, change):
    path = os.path.join(WORK, name + ".ckpt")
    rewrite(copy_a, path, change)
    return path


old = os.path.join(WORK, "raw_v2.ckpt")
with open(old, "wb") as f:
    f.write(b"recoup-ckpt-v2\n\0" + bytes(range(256)) * 8)
refused("a raw-struct checkpoint of an earlier recoup is refused", old, "raw format of an earlier recoup")
foreign = os.path.join(WORK, "foreign.ckpt")
with open(foreign, "wb") as f:
    np.savez(f, weights=np.zeros(4, dtype=np.float32))
refused("an .npz without our header is refused", foreign, "without a recoup checkpoint header")
text = os.path.join(WORK, "text.ckpt")
with open(text, "w") as f:
    f.write("step 10\n")
refused("a file that is no archive is refused", text, "not an .npz archive")
refused("a newer format version is refused", variant("v99", lambda d, a: d.update(version=99)),
        "format version 99; this recoup reads version 5")
refused("another format's header is refused", variant("other", lambda d, a: d.update(format="weights")),
        "not a recoup checkpoint")
refused("a checkpoint of another run (fingerprint) is refused",
        variant("fp", lambda d, a: d.update(fingerprint="0123456789abcdef")), "checkpoint of a different run")
refused("a checkpoint of another seed is refused", copy_a, "checkpoint of a different run", ["--seed", "8"])
refused("a header without a documented field is refused", variant("norb", lambda d, a: d.pop("rollbacks")),
        "lacks 'rollbacks'")
refused("an array of another dtype is refused",
        variant("f64", lambda d, a: a.update({"param.value": a["param.value"].astype("<f8")})),
        "checkpoint array 'param.value' is float64")
refused("a missing array is refused", variant("lost", lambda d, a: a.pop("snapshot0.value")), "holds 7 arrays")
damaged = os.path.join(WORK, "damaged.ckpt")
data = bytearray(open(copy_a, "rb").read())
at = data.find(b"param.moment1.npy") + 200  # inside the first member's stored data after its header
data[at] ^= 0x40
with open(damaged, "wb") as f:
    f.write(bytes(data))
refused("a checkpoint with one flipped bit in an array is refused (CRC-32)", damaged, "param.moment1")


# 6. Training data above 8 MiB is fingerprinted by its size and a sample of
#    its bytes (so a run's start does not read a large file whole): the same
#    file resumes, one with a changed byte inside the sampled first MiB or
#    with a row fewer is another run. 12,000 Fashion-MNIST training images as
#    uint8 (9.4 MB); --val-data keeps every row in training.
with gzip.open(TRAIN_IMAGES, "rb") as f:
    train_raw = f.read(16 + 12000 * 784)
big = np.frombuffer(train_raw, dtype=np.uint8, offset=16).reshape(-1, 1, 28, 28)
BIG = os.path.join(WORK, "big.npy")
np.save(BIG, big)
changed = big.copy()
changed[100, 0, 14, 14] ^= 0x01  # row 100 starts 78,400 bytes in: inside the first MiB
np.save(os.path.join(WORK, "big_changed.npy"), changed)
np.save(os.path.join(WORK, "big_shorter.npy"), big[:-1])


BIG_STEPS = 16 if os.environ.get("RECOUP_SANITIZER_BUILD") == "1" else 24  # SIGTERM comes after step 2


def big_args(data, out, extra=()):
    return [RECOUP, "distill", "--teacher", DENSE, "--student", PRUNED, "--data", data, "--val-data", DATA,
            "--scale", SCALE, "--steps", str(BIG_STEPS), "--seed", "7", "--threads", "2", "--checkpoint-every", "2",
            "--out", out] + list(extra)


big_out = os.path.join(WORK, "big.onnx")
clean(big_out)
p = subprocess.Popen(big_args(BIG, big_out), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
deadline = time.time() + 600
while not os.path.exists(big_out + ".ckpt") and p.poll() is None and time.time() < deadline:
    time.sleep(0.02)
p.send_signal(signal.SIGTERM)
p.communicate(timeout=600)
big_ckpt = os.path.join(WORK, "big_saved.ckpt")
have = os.path.exists(big_out + ".ckpt")
if have:
    shutil.copyfile(big_out + ".ckpt", big_ckpt)
check("a 9.4 MB training file: a checkpoint is written", have and not os.path.exists(big_out),
      f"(status {p.returncode}, checkpoint {have})")
for name, data in (("a changed byte in its first MiB", "big_changed.npy"), ("a row fewer", "big_shorter.npy")):
    never = os.path.join(WORK, "never_big.onnx")
    r = subprocess.run(big_args(os.path.join(WORK, data), never, ["--resume", big_ckpt]), capture_output=True,
                       text=True, timeout=600)
    check(f"the 9.4 MB training file with {name}: refused as another run",
          r.returncode == 1 and "checkpoint of a different run" in r.stderr and not os.path.exists(never),
          f"(status {r.returncode}: {r.stderr.strip()[-200:]})")
r = subprocess.run(big_args(BIG, big_out, ["--resume", big_ckpt]), capture_output=True, text=True, timeout=600)
check("the same 9.4 MB training file resumes", r.returncode == 0 and os.path.exists(big_out),
      f"(status {r.returncode}: {r.stderr.strip()[-200:]})")

run.finish()
