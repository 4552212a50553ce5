"""Image sets decoded per batch by the prefetch ring: memory bounded by the
ring, not the set; results byte-identical to decoding up front.

Usage: prefetch_test.py RECOUP SOURCE_DIR WORK_DIR [MPIRUN]

The pictures are written here by Debian's Python imaging library
(python3-pil) and the models by the onnx package (python3-onnx), both small,
random and seeded (a scenario of our own, no published data).

1. A list of 1,200 RGB JPEGs (59 MB as decoded uint8) and a list of the
   first 300: `distill --image-memory 0` (decoded per batch) peaks at the
   same resident memory for both (the kernel's count for each process,
   os.wait4's ru_maxrss), while decoding up front peaks at least 30 MB
   higher; the per-batch and up-front runs write byte-identical models,
   and `eval` gives equal outputs both ways. The sanitizer build
   (RECOUP_SANITIZER_BUILD=1), where peak memory measures the sanitizer's
   allocator, compares the two ways on the 300-image list only.
2. Progress names the input rate when the step waits for decoding.
3. An unreadable file in the middle of the list: an error naming it, or
   with --skip-bad the file in --json and byte-identical models from two
   runs with the same seed and threads.
4. Under mpirun -np 2 (when given), a folder of PNGs (decoded per batch,
   each rank its own rows) writes the same bytes as the same pixels in an
   .npy under mpirun -np 2, and one process does too.
"""
import json
import os
import shutil
import subprocess
import sys

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper
from PIL import Image

from e2e import Run

recoup, src, work = sys.argv[1], sys.argv[2], sys.argv[3]
mpirun = sys.argv[4] if len(sys.argv) > 4 else ""
shutil.rmtree(work, ignore_errors=True)
os.makedirs(work)
run = Run(recoup)
check = run.check
SIDE = 128


def model(path, seed, channels, side, prune=0.0):
    """x (N, C, S, S) -> Conv 4x4 stride 4 -> Relu -> GlobalAveragePool -> Flatten -> Gemm -> (N, 10)."""
    rng = np.random.default_rng(seed)
    w = rng.normal(0, 0.2, (8, channels, 4, 4)).astype(np.float32)
    if prune:
        w[np.abs(w) < np.quantile(np.abs(w), prune)] = 0
    inits = [numpy_helper.from_array(w, "w"), numpy_helper.from_array(np.zeros(8, np.float32), "wb"),
             numpy_helper.from_array(rng.normal(0, 1, (10, 8)).astype(np.float32), "g"),
             numpy_helper.from_array(np.zeros(10, np.float32), "gb")]
    nodes = [helper.make_node("Conv", ["x", "w", "wb"], ["c"], kernel_shape=[4, 4], strides=[4, 4]),
             helper.make_node("Relu", ["c"], ["r"]), helper.make_node("GlobalAveragePool", ["r"], ["p"]),
             helper.make_node("Flatten", ["p"], ["f"]), helper.make_node("Gemm", ["f", "g", "gb"], ["y"], transB=1)]
    g = helper.make_graph(nodes, "net", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", channels, side, side])],
                          [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 10])], inits)
    onnx.save(helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)]), path)
    return path


def picture(rng, side):
    """Smooth random colours: a coarse grid of values, enlarged."""
    coarse = rng.integers(0, 256, (side // 8, side // 8, 3), dtype=np.uint8)
    return np.kron(coarse, np.ones((8, 8, 1), np.uint8))


def distill(teacher, student, data, out, extra=(), launcher=()):
    """Run distill; returns (exit status, stdout, stderr, peak resident KB of the process)."""
    args = list(launcher) + [recoup, "distill", "--teacher", teacher, "--student", student, "--data", data,
                             "--scale", "0.00392156862745098", "--steps", "60", "--batch", "16", "--seed", "4",
                             "--threads", "2", "--json", "--out", out] + list(extra)
    with open(os.path.join(work, "stdout"), "w+") as so, open(os.path.join(work, "stderr"), "w+") as se:
        env = dict(os.environ, OMPI_ALLOW_RUN_AS_ROOT="1", OMPI_ALLOW_RUN_AS_ROOT_CONFIRM="1")
        if launcher and "ASAN_OPTIONS" in env:
            env["ASAN_OPTIONS"] += ":detect_leaks=0"  # Open MPI's own allocations at finalize
        p = subprocess.Popen(args, stdout=so, stderr=se, env=env)
        _, status, usage = os.wait4(p.pid, 0)
        so.seek(0)
        se.seek(0)
        return os.waitstatus_to_exitcode(status), so.read(), se.read(), usage.ru_maxrss


def read(path):
    with open(path, "rb") as f:
        return f.read()


teacher = model(os.path.join(work, "teacher.onnx"), 1, 3, SIDE)
student = model(os.path.join(work, "student.onnx"), 1, 3, SIDE, prune=0.5)

# ---- 1. memory bounded by the ring; equal to decoding up front ------------
rng = np.random.default_rng(7)
os.makedirs(os.path.join(work, "jpg"))
names = []
for i in range(1200):
    name = f"jpg/{i:05d}.jpg"
    Image.fromarray(picture(rng, SIDE), "RGB").save(os.path.join(work, name), quality=90)
    names.append(name)
for lst, n in (("big.txt", 1200), ("small.txt", 300)):
    with open(os.path.join(work, lst), "w") as f:
        f.write("".join(s + "\n" for s in names[:n]))
big, small = os.path.join(work, "big.txt"), os.path.join(work, "small.txt")
pixels_mb = 1200 * 3 * SIDE * SIDE / 2**20

# Under the sanitizers peak memory is not checked (below), so the per-batch
# and up-front runs compare on the 300-image list there and the extra run
# that only serves the memory bound is left out: the same code paths, a
# quarter of the decoding.
SANITIZER = os.environ.get("RECOUP_SANITIZER_BUILD") == "1"
cases = ((("stream_big", big, ["--image-memory", "0"]), ("upfront_big", big, []),
          ("stream_small", small, ["--image-memory", "0"])) if not SANITIZER else
         (("stream_big", small, ["--image-memory", "0"]), ("upfront_big", small, [])))
runs = {}
for key, data, extra in cases:
    out = os.path.join(work, key + ".onnx")
    code, so, se, peak = distill(teacher, student, data, out, extra)
    if code != 0:
        sys.exit(f"distill {key} failed ({code}):\n{se[-3000:]}")
    runs[key] = (read(out), peak, json.loads(so), se)
    print(f"{key}: peak {peak / 1024:.1f} MB", flush=True)

js = runs["stream_big"][2]
check(f"the {300 if SANITIZER else 1200:,}-image list is decoded per batch with --image-memory 0, up front by default",
      js["images"]["decoded"] == "per batch" and runs["upfront_big"][2]["images"]["decoded"] == "up front",
      f"{js['images']['decoded']} / {runs['upfront_big'][2]['images']['decoded']}")
if SANITIZER:
    # AddressSanitizer keeps freed blocks in its quarantine, so a process that
    # frees every decoded batch still grows with the images it has read: peak
    # RSS measures the sanitizer's allocator there. The release build checks it.
    print("memory bounds not checked under the sanitizers (the release build checks them)")
else:
    grow = (runs["stream_big"][1] - runs["stream_small"][1]) / 1024
    held = (runs["upfront_big"][1] - runs["stream_big"][1]) / 1024
    check("per batch: 4x the images, peak resident memory within 8 MB (ru_maxrss)", grow < 8,
          f"1,200 images {runs['stream_big'][1] / 1024:.1f} MB, 300 images {runs['stream_small'][1] / 1024:.1f} MB "
          f"({grow:+.1f} MB; the decoded pixels are {pixels_mb:.0f} MB)")
    check("decoding up front holds the pixels: at least 30 MB more than per batch", held >= 30,
          f"up front {runs['upfront_big'][1] / 1024:.1f} MB, per batch {runs['stream_big'][1] / 1024:.1f} MB "
          f"({held:+.1f} MB)")
check("per batch and up front write byte-identical models (same seed and threads)",
      runs["stream_big"][0] == runs["upfront_big"][0], f"{len(runs['stream_big'][0])} bytes each")

evals = []
for extra in (["--image-memory", "0"], []):
    out = os.path.join(work, f"eval{len(evals)}.npy")
    r = subprocess.run([recoup, "eval", teacher, "--data", small if SANITIZER else big, "--scale", "0.00392156862745098", "--threads", "2",
                        "--out", out] + extra, capture_output=True, text=True)
    evals.append(np.load(out) if r.returncode == 0 else r.stderr)
check("eval: outputs from the set decoded per batch equal those decoded up front",
      isinstance(evals[0], np.ndarray) and isinstance(evals[1], np.ndarray) and np.array_equal(evals[0], evals[1]),
      f"{evals[0].shape if isinstance(evals[0], np.ndarray) else evals[0][-300:]}")

# ---- 2. progress names the input rate -------------------------------------
# Large pictures shrunk to the input (--resize) with one worker: decoding,
# not the small step, sets the pace.
os.makedirs(os.path.join(work, "large"))
with open(os.path.join(work, "large.txt"), "w") as f:
    for i in range(200):
        Image.fromarray(picture(rng, 3 * SIDE), "RGB").save(os.path.join(work, f"large/{i:05d}.jpg"), quality=90)
        f.write(f"large/{i:05d}.jpg\n")
code, so, se, _ = distill(teacher, student, os.path.join(work, "large.txt"), os.path.join(work, "large.onnx"),
                          ["--image-memory", "0", "--resize", str(SIDE), "--threads", "1", "--steps", "30"])
line = [s for s in se.splitlines() if "step 30/30" in s]
check("the last progress line names the rate of reading input when the step waited for it",
      code == 0 and bool(line) and "input-bound:" in line[0], line[0] if line else f"exit {code}: {se[-500:]}")

# ---- 3. an unreadable file in the middle -------------------------------------
bad_name = "jpg/00150.jpg"
with open(os.path.join(work, bad_name), "r+b") as f:
    f.truncate(200)  # a JPEG cut short
code, so, se, _ = distill(teacher, student, small, os.path.join(work, "bad.onnx"), ["--image-memory", "0"])
check("a truncated JPEG met mid-run: exit 1 and an error naming it", code == 1 and "00150.jpg" in se,
      f"exit {code}: {se.strip().splitlines()[-1] if se.strip() else ''}")
outs = []
for k in range(2):
    out = os.path.join(work, f"skip{k}.onnx")
    code, so, se, _ = distill(teacher, student, small, out, ["--image-memory", "0", "--skip-bad"])
    skipped = [os.path.basename(s["path"]) for s in json.loads(so)["images"]["skipped"]] if code == 0 else []
    outs.append(read(out) if code == 0 else b"")
check("--skip-bad: listed in --json, and two runs write byte-identical models",
      skipped == ["00150.jpg"] and outs[0] == outs[1] and outs[0] != b"", f"skipped {skipped}, {len(outs[0])} bytes")

# ---- 4. MPI ranks read their own rows ----------------------------------------
gray_t = model(os.path.join(work, "gray_teacher.onnx"), 2, 1, 32)
gray_s = model(os.path.join(work, "gray_student.onnx"), 2, 1, 32, prune=0.5)
os.makedirs(os.path.join(work, "png"))
gray = rng.integers(0, 256, (400, 1, 32, 32), dtype=np.uint8)
for i, g in enumerate(gray):
    Image.fromarray(g[0], "L").save(os.path.join(work, f"png/{i:05d}.png"))
np.save(os.path.join(work, "gray.npy"), gray)
one = {}
for key, data in (("folder", os.path.join(work, "png")), ("npy", os.path.join(work, "gray.npy"))):
    out = os.path.join(work, f"one_{key}.onnx")
    code, so, se, _ = distill(gray_t, gray_s, data, out)
    one[key] = read(out) if code == 0 else se[-2000:]
check("one process: a PNG folder and an .npy of the same pixels write byte-identical models",
      one["folder"] == one["npy"], f"{len(one['folder'])} bytes")
if mpirun:
    two = {}
    for key, data in (("folder", os.path.join(work, "png")), ("npy", os.path.join(work, "gray.npy"))):
        out = os.path.join(work, f"two_{key}.onnx")
        code, so, se, _ = distill(gray_t, gray_s, data, out, ["--threads", "1"],
                                  launcher=[mpirun, "-np", "2", "--oversubscribe"])
        two[key] = read(out) if code == 0 else se[-2000:].encode()
        if key == "folder" and code == 0:
            check("under mpirun the folder is decoded per batch", "decoded per batch" in se,
                  [s for s in se.splitlines() if s.startswith("images:")][-1])
    check("mpirun -np 2: the PNG folder (each rank decoding its rows) and the .npy write byte-identical models",
          two["folder"] == two["npy"], f"{len(two['folder'])} bytes")
else:
    print("skip MPI part: no mpirun given")

run.finish()
