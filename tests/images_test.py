"""Image folders and lists as --data, checked against Debian's Python imaging
library (python3-pil) and Fashion-MNIST (Debian dataset-fashion-mnist).

Usage: images_test.py RECOUP SOURCE_DIR WORK_DIR [--quick]

1. Decoding, channel conversion, centre crop and normalisation: recoup's
   tensors (read back through an Identity model and `eval --out`) equal PIL's
   Image.open / convert / crop exactly; resizing equals PIL's
   resize(BILINEAR), which antialiases when shrinking, within 1 grey level
   (PIL works in fixed point, recoup in double).
2. Broken images: one clear error naming the file, or skipped and listed in
   --json with --skip-bad.
3. Fashion-MNIST's 10,000 test images written out by PIL as PNG (lossless)
   and JPEG: `eval` from the folder (labels from subfolders) and from a list
   file gives the same accuracy as from the IDX file; PNG exactly, JPEG
   within 1 percentage point (lossy compression changes pixels).
4. The same folder read with 1 and 2 threads gives byte-identical outputs.
--quick (the sanitizer build) skips 3.
"""
import gzip
import json
import os
import shutil
import struct
import subprocess
import sys
import zlib

import numpy as np
import onnx
from onnx import TensorProto, helper
from PIL import Image

from e2e import Run, SCALE, TEST_IMAGES, TEST_LABELS

recoup, src, work = sys.argv[1], sys.argv[2], sys.argv[3]
quick = "--quick" in sys.argv
shutil.rmtree(work, ignore_errors=True)
os.makedirs(work)
run = Run(recoup)


def identity_model(path, c, h, w):
    """A model whose output is its input: eval --out then shows the prepared tensor."""
    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", c, h, w])
    y = helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", c, h, w])
    g = helper.make_graph([helper.make_node("Identity", ["x"], ["y"])], "identity", [x], [y])
    onnx.save(helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)]), path)
    return path


def recoup_tensor(model, data, *extra):
    out = os.path.join(work, "out.npy")
    run(["eval", model, "--data", data, "--out", out] + list(extra))
    return np.load(out)


def smooth_noise(rng, h, w, c):
    """Random pictures with some structure, so resizing has edges and gradients to get wrong."""
    base = rng.integers(0, 256, size=(h // 4 + 2, w // 4 + 2, c)).astype(np.float64)
    big = np.kron(base, np.ones((4, 4, 1)))[:h, :w]
    return np.clip(big + rng.normal(0, 20, size=(h, w, c)), 0, 255).astype(np.uint8)


def pil_chw(img, mode):
    a = np.asarray(img.convert(mode), dtype=np.float32)
    return a[None] if a.ndim == 2 else a.transpose(2, 0, 1)


def centre_crop(img, h, w):
    top, left = (img.height - h) // 2, (img.width - w) // 2
    return img.crop((left, top, left + w, top + h))


# ---- 1. against PIL -----------------------------------------------------
rng = np.random.default_rng(12)
pics = os.path.join(work, "pics")
os.makedirs(pics)
sources = []  # (file name, PIL image as saved)
for i, (h, w, mode) in enumerate([(30, 40, "RGB"), (40, 30, "L"), (33, 35, "RGBA"), (36, 31, "P"),
                                  (28, 44, "RGB"), (31, 29, "L")]):
    px = smooth_noise(rng, h, w, 4 if mode == "RGBA" else (1 if mode == "L" else 3))
    img = Image.fromarray(px[:, :, 0] if mode == "L" else px, "RGBA" if mode == "RGBA" else
                          ("L" if mode == "L" else "RGB"))
    if mode == "P":
        img = img.convert("P", palette=Image.Palette.ADAPTIVE, colors=64)
    for ext in ("png", "jpg"):
        if ext == "jpg" and mode in ("RGBA", "P"):
            continue
        name = f"p{i}.{ext}"
        img.save(os.path.join(pics, name), quality=90) if ext == "jpg" else img.save(os.path.join(pics, name))
        sources.append(name)
lst = os.path.join(work, "pics.txt")
with open(lst, "w") as f:
    f.write("".join(f"pics/{n}\n" for n in sources))
opened = [Image.open(os.path.join(pics, n)) for n in sources]

H, W = 24, 20
for c, mode in ((3, "RGB"), (1, "L")):
    model = identity_model(os.path.join(work, f"id{c}.onnx"), c, H, W)
    got = recoup_tensor(model, lst)
    want = np.stack([pil_chw(centre_crop(im.convert(mode), H, W), mode) for im in opened])
    diff = np.abs(got - want).max()
    run.check(f"decode+convert to {mode}+centre crop {H}x{W} equals PIL exactly ({len(sources)} PNG/JPEG files)",
              got.shape == want.shape and diff == 0, f"shape {got.shape} vs {want.shape}, max |diff| {diff}")

    for s in (24, 48):
        got = recoup_tensor(model, lst, "--resize", str(s))
        ref = []
        for im in opened:
            im = im.convert(mode)
            w, h = im.size
            size = (s, h * s // w) if w <= h else (w * s // h, s)  # shorter side to s, longer floor(long*s/short)
            ref.append(pil_chw(centre_crop(im.resize(size, Image.BILINEAR), H, W), mode))
        want = np.stack(ref)
        diff = np.abs(got - want).max()
        # Tolerance: PIL rounds its horizontal pass to 8 bits in 22-bit fixed point, recoup in double, so a
        # pixel can differ by one level per pass; 2 levels at most, and 0.05 on average.
        mean = np.abs(got - want).mean()
        run.check(f"{mode} --resize {s} ({'shrink, antialiased' if s < 30 else 'enlarge'}) then crop: within 2 "
                  f"levels of PIL resize(BILINEAR)", got.shape == want.shape and diff <= 2 and mean < 0.05,
                  f"max |diff| {diff}, mean {np.abs(got - want).mean():.4f}")

model3 = os.path.join(work, "id3.onnx")
got = recoup_tensor(model3, lst, "--scale", "0.00392156862745098", "--mean", "0.485,0.456,0.406",
                    "--std", "0.229,0.224,0.225")
raw = np.stack([pil_chw(centre_crop(im.convert("RGB"), H, W), "RGB") for im in opened])
want = ((raw * np.float32(1 / 255) - np.array([0.485, 0.456, 0.406], np.float32)[:, None, None])
        / np.array([0.229, 0.224, 0.225], np.float32)[:, None, None])
diff = np.abs(got - want).max()
run.check("per-channel --scale/--mean/--std on images equals NumPy float32 within 1e-5", diff <= 1e-5,
          f"max |diff| {diff:.2e}")

# ---- 2. broken images ---------------------------------------------------
bad = os.path.join(work, "bad")
os.makedirs(bad)
good_png = open(os.path.join(pics, "p0.png"), "rb").read()
good_jpg = open(os.path.join(pics, "p0.jpg"), "rb").read()


def png_chunk(kind, payload, crc=None):
    crc = zlib.crc32(kind + payload) if crc is None else crc
    return struct.pack(">I", len(payload)) + kind + payload + struct.pack(">I", crc & 0xFFFFFFFF)


def bad_crc_png(data):
    """The first IDAT chunk's CRC flipped (PNG specification, section 5.3: CRC over type and data)."""
    at = data.index(b"IDAT") - 4
    n = struct.unpack(">I", data[at:at + 4])[0]
    end = at + 8 + n
    return data[:end] + bytes([data[end] ^ 0xFF]) + data[end + 1:]


huge = (b"\x89PNG\r\n\x1a\n" + png_chunk(b"IHDR", struct.pack(">IIBBBBB", 60000, 60000, 8, 2, 0, 0, 0))
        + png_chunk(b"IDAT", zlib.compress(b"\0" * 100)) + png_chunk(b"IEND", b""))
broken = {"truncated.jpg": good_jpg[:len(good_jpg) // 2], "bad_crc.png": bad_crc_png(good_png),
          "text.jpg": b"this is not a picture\n", "empty.png": b"", "huge.png": huge,
          "truncated.png": good_png[:len(good_png) // 2]}
for name, data in broken.items():
    one = os.path.join(work, f"one_{name}")
    os.makedirs(one)
    with open(os.path.join(one, name), "wb") as f:
        f.write(data)
    with open(os.path.join(one, "fine.png"), "wb") as f:
        f.write(good_png)
    r = subprocess.run([recoup, "eval", model3, "--data", one], capture_output=True, text=True)
    lines = [ln for ln in r.stderr.splitlines() if "error" in ln]
    run.check(f"{name}: one clear error naming the file, exit 1", r.returncode == 1 and len(lines) == 1
              and name in lines[0], (lines[0] if lines else r.stderr.strip()[-200:]))
    r = subprocess.run([recoup, "eval", model3, "--data", one, "--skip-bad", "--json"], capture_output=True,
                       text=True)
    ok = r.returncode == 0
    js = json.loads(r.stdout) if ok else {}
    skipped = [os.path.basename(s["path"]) for s in js.get("images", {}).get("skipped", [])]
    run.check(f"{name}: --skip-bad skips it, lists it in --json and evaluates the rest", ok and skipped == [name]
              and js.get("samples") == 1, f"exit {r.returncode}, skipped {skipped}, samples {js.get('samples')}")

# ---- 3. Fashion-MNIST as PNG and JPEG folders ----------------------------
def idx(path):
    with gzip.open(path) as f:
        data = f.read()
    ndim = data[3]
    dims = struct.unpack(">" + "I" * ndim, data[4:4 + 4 * ndim])
    return np.frombuffer(data, np.uint8, offset=4 + 4 * ndim).reshape(dims)


model = os.path.join(src, "models", "garment_dense.onnx")
if not quick:
    images, labels = idx(TEST_IMAGES), idx(TEST_LABELS)
    ref = run.json(["eval", model, "--data", TEST_IMAGES, "--labels", TEST_LABELS, "--scale", SCALE, "--json"])
    for ext, tol in (("png", 0.0), ("jpg", 0.01)):
        folder = os.path.join(work, f"fmnist_{ext}")
        lines = []
        for i, (im, lab) in enumerate(zip(images, labels)):
            os.makedirs(os.path.join(folder, str(lab)), exist_ok=True)
            rel = f"{lab}/{i:05d}.{ext}"
            Image.fromarray(im, "L").save(os.path.join(folder, rel), **({"quality": 95} if ext == "jpg" else {}))
            lines.append(f"{rel} {lab}\n")
        with open(os.path.join(folder, "list.txt"), "w") as f:
            f.write("".join(lines))
        got = run.json(["eval", model, "--data", folder, "--labels", "folders", "--scale", SCALE, "--json"])
        diff = abs(got["top1_accuracy"] - ref["top1_accuracy"])
        run.check(f"Fashion-MNIST test set as {ext.upper()} folder (labels folders): accuracy "
                  f"{'equals' if tol == 0 else 'within 1 point of'} the IDX file's",
                  diff <= tol and got["samples"] == 10000 and got["images"]["classes"] == [str(k) for k in range(10)],
                  f"folder {100 * got['top1_accuracy']:.2f}% vs IDX {100 * ref['top1_accuracy']:.2f}%")
        got_list = run.json(["eval", model, "--data", os.path.join(folder, "list.txt"), "--labels", "list",
                             "--scale", SCALE, "--json"])
        run.check(f"{ext.upper()} list file with labels gives the folder's accuracy",
                  got_list["top1_accuracy"] == got["top1_accuracy"],
                  f"list {100 * got_list['top1_accuracy']:.2f}% vs folder {100 * got['top1_accuracy']:.2f}%")
    det_data = os.path.join(work, "fmnist_jpg")
else:
    det_data = pics

# ---- 4. determinism over thread counts ----------------------------------
def output_bytes(m, threads, *extra):
    out = os.path.join(work, "det.npy")
    run(["eval", m, "--data", det_data, "--threads", threads, "--out", out] + list(extra))
    return open(out, "rb").read()


m28 = identity_model(os.path.join(work, "id1_28.onnx"), 1, 28, 28)
one, two = output_bytes(m28 if not quick else model3, "1"), output_bytes(m28 if not quick else model3, "2")
run.check("decoded tensors from an image folder are byte-identical with 1 and 2 decoding threads", one == two,
          f"{len(one)} bytes each")
if not quick:
    a, b = output_bytes(model, "2", "--scale", SCALE), output_bytes(model, "2", "--scale", SCALE)
    run.check("model outputs from an image folder are byte-identical for the same thread count", a == b,
              f"{len(a)} bytes each")
    pruned = os.path.join(src, "models", "garment_pruned90.onnx")
    written = []
    for k in range(2):
        out = os.path.join(work, f"distilled{k}.onnx")
        js = run.json(["distill", "--teacher", model, "--student", pruned, "--data", os.path.join(work, "fmnist_png"),
                       "--labels", "folders", "--scale", SCALE, "--steps", "40", "--batch", "32", "--seed", "7",
                       "--threads", "2", "--out", out, "--json"])
        written.append(open(out, "rb").read())
    run.check("distill from a PNG folder (labels folders): same seed and threads give a byte-identical model",
              written[0] == written[1] and js["images"]["classes"] == [str(k) for k in range(10)],
              f"{len(written[0])} bytes each, classes {js['images'].get('classes')}")

run.finish()
