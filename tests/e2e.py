"""Shared pieces of the end-to-end tests that drive the `recoup` binary on
Fashion-MNIST (Xiao, Rasul and Vollgraf 2017; Debian package
dataset-fashion-mnist): running commands, measuring test accuracy, and
counting checks into the closing "N passed, M failed" line."""

import json
import os
import shutil
import subprocess
import sys

DATA = "/usr/share/datasets/fashion-mnist"
SCALE = "0.00392156862745098"  # 1/255: the bundled models take pixels in [0, 1]
TRAIN_IMAGES = f"{DATA}/train-images-idx3-ubyte.gz"
TEST_IMAGES = f"{DATA}/t10k-images-idx3-ubyte.gz"
TEST_LABELS = f"{DATA}/t10k-labels-idx1-ubyte.gz"


class Run:
    def __init__(self, recoup):
        self.recoup = recoup
        self.passed = 0
        self.failed = []

    def __call__(self, args, timeout=1800):
        r = subprocess.run([self.recoup] + args, capture_output=True, text=True, timeout=timeout)
        if r.returncode != 0:
            raise SystemExit(f"recoup {' '.join(args)} failed ({r.returncode}):\n{r.stderr}")
        return r

    def json(self, args):
        return json.loads(self(args).stdout)

    def test_accuracy(self, model):
        """Top-1 accuracy on the 10,000 test images, measured by recoup eval."""
        return self.json(["eval", model, "--data", TEST_IMAGES, "--labels", TEST_LABELS, "--scale", SCALE,
                          "--json"])["top1_accuracy"]

    def check(self, name, ok, detail=""):
        print(("ok   " if ok else "FAIL ") + name + (" " + detail if detail else ""), flush=True)
        if ok:
            self.passed += 1
        else:
            self.failed.append(name)

    def checker_accepts(self, label, model):
        """onnx.checker (Debian python3-onnx) with full shape inference on a loaded model."""
        ok, said = checker_verdict(model, full_check=True)
        self.check(f"{label}: onnx.checker accepts the file", ok, said)

    def finish(self):
        print(f"{self.passed} passed, {len(self.failed)} failed")
        sys.exit(1 if self.failed else 0)


def diff_detail(a, b):
    """Where two lists (or dicts, by key) first differ, short enough for a check's message."""
    if isinstance(a, dict) and isinstance(b, dict):
        keys = sorted(set(a) | set(b), key=str)
        for k in keys:
            if a.get(k) != b.get(k):
                return f"(key {k!r}: {str(a.get(k))[:120]} vs {str(b.get(k))[:120]})"
        return f"({len(keys)} keys, all equal)"
    a, b = list(a), list(b)
    for i, (x, y) in enumerate(zip(a, b)):
        if x != y:
            return f"(item {i} of {len(a)} vs {len(b)}: {str(x)[:120]} vs {str(y)[:120]})"
    return f"({len(a)} vs {len(b)} items" + (", all equal)" if len(a) == len(b) else ")")


def checker_verdict(model, full_check=False):
    """The onnx package's checker on a loaded model: (accepted, what it said)."""
    import onnx
    try:
        onnx.checker.check_model(model, full_check=full_check)
        return True, "(onnx.checker: no complaint)"
    except Exception as err:  # the checker raises several error types
        return False, "(onnx.checker: " + str(err).splitlines()[0] + ")"


SKIP_STATUS = 77  # ctest's SKIP_RETURN_CODE on the tests that read Debian's data sets


def require_data(*paths):
    """Data sets installed from Debian: when one is absent the test is skipped, not failed."""
    absent = [p for p in paths if not os.path.exists(p)]
    if absent:
        print(f"skipped: {', '.join(absent)} absent (Debian package dataset-fashion-mnist)", flush=True)
        sys.exit(SKIP_STATUS)


def read_idx(path):
    """An IDX file (plain or gzip), the format Fashion-MNIST ships in, as a NumPy array."""
    import gzip
    import numpy as np
    with (gzip.open if path.endswith(".gz") else open)(path, "rb") as f:
        data = f.read()
    dims = data[3]
    shape = [int.from_bytes(data[4 + 4 * i:8 + 4 * i], "big") for i in range(dims)]
    return np.frombuffer(data, np.uint8, offset=4 + 4 * dims).reshape(shape)


def require(*paths):
    for p in paths:
        if not os.path.exists(p):
            raise SystemExit(f"missing {p}: run scripts/setup.sh (models come from the scripts in scripts/)")


def run_ort(model, inp, outdir):
    """Outputs of `model` on the .npy `inp` from onnxruntime-web (npm, tests/ort/run.mjs), with graph
    optimisation disabled so a QDQ graph runs as written; output 0 as an array."""
    import numpy as np
    here = os.path.dirname(os.path.abspath(__file__))
    node = os.environ.get("RECOUP_NODE") or shutil.which("node")
    if not node or not os.path.isdir(os.path.join(here, "ort", "node_modules", "onnxruntime-web")):
        raise SystemExit("FAIL: node or onnxruntime-web (tests/ort) is missing: run scripts/setup.sh")
    os.makedirs(outdir, exist_ok=True)
    p = subprocess.run([node, os.path.join(here, "ort", "run.mjs"), model, outdir, inp, "--opt", "disabled"],
                       capture_output=True, text=True)
    if p.returncode != 0:
        raise SystemExit(f"FAIL: onnxruntime-web on {model}: {p.stderr.strip()}")
    return np.load(os.path.join(outdir, "0.npy"))
