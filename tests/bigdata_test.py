"""Training data larger than memory: a uint8 .npy over 2 GB is memory-mapped
and converted per batch, so `distill` runs with peak resident memory under
1 GB.

Usage: bigdata_test.py RECOUP SOURCE_DIR WORK_DIR

Also: `distill --cache-mb 1` on Fashion-MNIST (Debian dataset-fashion-mnist)
spills the teacher-output cache (60,000 x 10 floats, 2.3 MB) to a mapped
file, leaves no file behind, and writes the same bytes as the run that keeps
the cache in memory.

The file is made here, sparsely (a header written with NumPy's own
numpy.lib.format helpers, the NumPy format specification; random pixels in a
few regions; the rest a hole that reads as zeros), and removed at the end.
Peak resident memory is the kernel's count for the child process
(getrusage RUSAGE_CHILDREN ru_maxrss, which includes resident pages of file
mappings), so a reader that kept the mapped pages, or made a float32 copy
(over 8 GB), fails the check.
"""
import json
import os
import resource
import shutil
import subprocess
import sys

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

recoup, src, work = sys.argv[1], sys.argv[2], sys.argv[3]
shutil.rmtree(work, ignore_errors=True)
os.makedirs(work)
failed = []


def check(name, ok, detail):
    print(("ok   " if ok else "FAIL ") + name + " " + detail, flush=True)
    if not ok:
        failed.append(name)


def tiny_model(path, seed):
    """x (N, 3, 512, 512) -> GlobalAveragePool -> Flatten -> Gemm -> (N, 4)."""
    rng = np.random.default_rng(seed)
    w = numpy_helper.from_array(rng.normal(0, 1, (4, 3)).astype(np.float32), "w")
    b = numpy_helper.from_array(rng.normal(0, 0.1, 4).astype(np.float32), "b")
    nodes = [helper.make_node("GlobalAveragePool", ["x"], ["p"]), helper.make_node("Flatten", ["p"], ["f"]),
             helper.make_node("Gemm", ["f", "w", "b"], ["y"], transB=1)]
    g = helper.make_graph(nodes, "tiny", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 3, 512, 512])],
                          [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["N", 4])], [w, b])
    onnx.save(helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)]), path)


N, SHAPE = 2800, (3, 512, 512)
data = os.path.join(work, "big.npy")
try:
    tiny_model(os.path.join(work, "teacher.onnx"), 1)
    tiny_model(os.path.join(work, "student.onnx"), 2)
    per = int(np.prod(SHAPE))
    with open(data, "wb") as f:
        header = {"descr": "|u1", "fortran_order": False, "shape": (N,) + SHAPE}
        np.lib.format.write_array_header_1_0(f, header)
        start = f.tell()
        rng = np.random.default_rng(3)
        for s in range(0, N, 100):  # every 100th sample random, the rest zeros (a hole)
            f.seek(start + s * per)
            f.write(rng.integers(0, 256, per, dtype=np.uint8).tobytes())
        f.truncate(start + N * per)
    size = os.path.getsize(data)
    back = np.load(data, mmap_mode="r")
    check("the test file is a valid .npy over 2 GB (numpy.load reads its header)",
          size > 2 * 2**30 and back.shape == (N,) + SHAPE and back.dtype == np.uint8,
          f"{size / 2**30:.2f} GiB, shape {back.shape}")
    del back

    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    out = os.path.join(work, "out.onnx")
    r = subprocess.run([recoup, "distill", "--teacher", os.path.join(work, "teacher.onnx"), "--student",
                        os.path.join(work, "student.onnx"), "--data", data, "--scale", "0.00392156862745098",
                        "--steps", "300", "--batch", "8", "--threads", "2", "--out", out, "--json"],
                       capture_output=True, text=True, timeout=1200)
    peak_kb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    if r.returncode != 0:
        check("distill on the 2 GB .npy", False, r.stderr[-2000:])
    else:
        js = json.loads(r.stdout)
        check("distill ran 300 steps on the 2 GB .npy", js["steps"] == 300 and js["train_samples"] + js["val_samples"] == N,
              f"steps {js['steps']}, samples {js['train_samples']} + {js['val_samples']}")
        check("peak resident memory of the distill process under 1 GB (getrusage ru_maxrss)",
              peak_kb > before and peak_kb < 1024 * 1024,
              f"peak {peak_kb / 1024:.0f} MB for a {size / 2**20:.0f} MB uint8 file "
              f"(a float32 copy would be {4 * size / 2**20:.0f} MB)")

    os.remove(data)
    sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
    from e2e import SCALE, TRAIN_IMAGES
    outs, modes = [], []
    for extra in ([], ["--cache-mb", "1"]):
        cache_dir = os.path.join(work, f"cache{len(outs)}")
        os.makedirs(cache_dir)
        out = os.path.join(cache_dir, "rec.onnx")
        r = subprocess.run([recoup, "distill", "--teacher", os.path.join(src, "models", "garment_dense.onnx"),
                            "--student", os.path.join(src, "models", "garment_pruned90.onnx"), "--data", TRAIN_IMAGES,
                            "--scale", SCALE, "--steps", "30", "--threads", "2", "--out", out, "--json"] + extra,
                           capture_output=True, text=True, timeout=1200)
        if r.returncode != 0:
            raise SystemExit(r.stderr)
        modes.append((json.loads(r.stdout)["teacher_cache"], sorted(os.listdir(cache_dir))))
        outs.append(open(out, "rb").read())
    check("--cache-mb 1 spills the teacher cache to a file, leaves nothing behind, same output bytes",
          modes[0][0] == "memory" and modes[1][0] == "file" and modes[1][1] == ["rec.onnx"] and outs[0] == outs[1],
          f"default {modes[0]}, --cache-mb 1 {modes[1]}, outputs equal: {outs[0] == outs[1]}")
finally:
    shutil.rmtree(work, ignore_errors=True)

print(f"{4 - len(failed)} passed, {len(failed)} failed")
sys.exit(1 if failed else 0)
