#!/usr/bin/python3
"""Damaged model files through recoup's library and command line.

Usage: /usr/bin/python3 tests/test_corrupt.py RECOUP_BIN CORRUPT_LOAD_BIN WORK_DIR

For the demo models in models/ (when present) and a few reference models
exported by PyTorch ($RECOUP_BINARY_DIR/reference, the reference_models
fixture), makes damaged copies:
  - the file truncated at every 1/32 of its length;
  - random byte changes with a fixed seed (100 copies, 1 to 8 bytes each);
  - edits made with the onnx package (Debian python3-onnx): a huge dimension
    and a negative dimension (on an initializer and on the graph input), a
    cycle in the graph, a missing initializer, a value produced twice, an
    unknown op and an unsupported default-domain opset.
The two demo models share one architecture (garment_pruned90 is
garment_dense with zeros), so only the first gets the truncations and byte
changes; both get the onnx-made edits.

Every truncated and byte-changed copy goes through the library in one
process per model (tests/corrupt_load.c: what `recoup inspect` and `recoup
eval` do with a model): before, a process per copy spent most of the time
linking recoup's libraries. The command line runs every onnx-made edit and
a fixed subset of the byte-level copies (every 8th truncation, every 10th
byte change), `recoup inspect` and `recoup eval` on each. The rule
(recoup's contract, README "Commands"): accepted, or refused with a message
naming the damaged file (or the samples file a still-valid model cannot
take); on the command line, exit status 0, or 1 with exactly one
"recoup: error:" line naming that file; never a signal, another status, or
a sanitizer report. The onnx-made edits (but a huge declared input
dimension, which ONNX allows) are invalid models and must be refused. The
damaged files are written to WORK_DIR; the originals are checked unchanged
at the end.

RECOUP_CORRUPT_LIGHT=1 (the sanitizer build, where every run is several
times slower) damages two reference models instead of four, truncates at
every 1/12 instead of 1/32 and makes 24 byte-change copies instead of 100
(the command line: every 4th truncation and every 6th byte change).
(The libFuzzer targets search the same readers far more widely; this test
keeps whole models, the planner and the command line in the loop.)
"""

import concurrent.futures
import copy
import hashlib
import os
import random
import subprocess
import sys

import numpy as np
import onnx

REFERENCE_CASES = ("resnet8_op13_bn", "kws_cnn1d_op17_bn", "mobilenet_v2_op17_fused", "vit_tiny_op13_fused")
REFERENCE_CASES_LIGHT = 2
# garment_pruned90 is garment_dense with 90% of its weights zero: damaging
# its bytes again repeats the same reader paths; it gets the onnx edits only.
SAME_ARCHITECTURE_AS_ANOTHER = ("garment_pruned90",)
SANITIZER_MARKS = ("AddressSanitizer", "LeakSanitizer", "UndefinedBehaviorSanitizer", "runtime error:")


def sha256(path):
    with open(path, "rb") as f:
        return hashlib.sha256(f.read()).hexdigest()


def input_shape(model):
    """Shape of the first graph input that is not an initializer, symbolic dims as 2."""
    inits = {t.name for t in model.graph.initializer}
    for i in model.graph.input:
        if i.name in inits:
            continue
        dims = [d.dim_value if d.HasField("dim_value") and d.dim_value > 0 else 2
                for d in i.type.tensor_type.shape.dim]
        return i.name, dims
    raise ValueError("model has no graph input")


def structural_variants(model):
    """(name, ModelProto, must_fail) triples. A huge declared input dimension
    is still a valid model (inspect shows it; eval refuses the samples)."""
    out = []
    g = model.graph
    inits = list(g.initializer)
    big = next((t for t in inits if len(t.dims) >= 1 and t.data_type == onnx.TensorProto.FLOAT), None)
    if big is not None:
        for label, value in (("huge_dim_initializer", 1 << 40), ("negative_dim_initializer", -3)):
            m = copy.deepcopy(model)
            t = next(t for t in m.graph.initializer if t.name == big.name)
            t.dims[0] = value
            out.append((label, m, True))
        m = copy.deepcopy(model)
        m.graph.initializer.remove(next(t for t in m.graph.initializer if t.name == big.name))
        # The missing tensor must not be a graph input either (IR < 4 lists initializers there).
        for i in list(m.graph.input):
            if i.name == big.name:
                m.graph.input.remove(i)
        out.append(("missing_initializer", m, True))
    name, _ = input_shape(model)
    for label, value in (("huge_dim_input", 1 << 40), ("negative_dim_input", -5)):
        m = copy.deepcopy(model)
        i = next(i for i in m.graph.input if i.name == name)
        d = i.type.tensor_type.shape.dim[-1]
        d.Clear()
        d.dim_value = value
        out.append((label, m, value < 0))
    readers = [k for k, n in enumerate(g.node) if len(n.input) > 0 and n.input[0]]
    if len(g.node) >= 2 and readers:
        # The first node that reads something reads the last node's output: a cycle.
        m = copy.deepcopy(model)
        m.graph.node[readers[0]].input[0] = m.graph.node[len(m.graph.node) - 1].output[0]
        out.append(("cycle", m, True))
        m = copy.deepcopy(model)
        m.graph.node[1].output[0] = m.graph.node[0].output[0]
        out.append(("value_produced_twice", m, True))
    m = copy.deepcopy(model)
    m.graph.node[0].op_type = "NoSuchOpAnywhere"
    out.append(("unknown_op", m, True))
    m = copy.deepcopy(model)
    for o in m.opset_import:
        if o.domain in ("", "ai.onnx"):
            o.version = 99
    out.append(("opset_99", m, True))
    return out


def byte_variants(data, parts, count, rng):
    for k in range(parts):
        yield f"truncated_{k:02d}_of_{parts}", data[: len(data) * k // parts]
    for k in range(count):
        b = bytearray(data)
        for _ in range(rng.randint(1, 8)):
            pos = rng.randrange(len(b))
            b[pos] ^= rng.randint(1, 255)
        yield f"bytes_changed_{k:03d}", bytes(b)


# One thread and the passive wait policy already set: recoup then does not
# start itself again to set it (src/cli/main.c), which would double each
# run's start-up; every other command-line test covers that restart.
RUN_ENV = dict(os.environ, OMP_NUM_THREADS="1", OMP_WAIT_POLICY="PASSIVE")


def judge_refusal(what, message, path, data, must_fail):
    """A problem description for one result (accepted: message None), or None."""
    if message is None:
        return f"{what}: accepted an invalid model" if must_fail else None
    # The file at fault: the damaged model, or the samples it cannot take.
    if os.path.basename(path) not in message and os.path.basename(data) not in message:
        return f"{what}: the error does not name the file: {message}"
    return None


def check_run(recoup, args, path, data, must_fail):
    """Returns a problem description, or None when the run kept the contract."""
    cmd = " ".join(["recoup"] + args)
    try:
        r = subprocess.run([recoup] + args, capture_output=True, text=True, errors="replace", timeout=300,
                           env=RUN_ENV)
    except subprocess.TimeoutExpired:
        return f"{cmd}: still running after 300 s"
    except OSError as err:
        return f"{cmd}: cannot run recoup: {err}"
    if r.returncode < 0:
        return f"{cmd}: killed by signal {-r.returncode}\n{r.stderr[-2000:]}"
    if any(mark in r.stderr for mark in SANITIZER_MARKS):
        return f"{cmd}: sanitizer report\n{r.stderr[-4000:]}"
    if r.returncode not in (0, 1):
        return f"{cmd}: exit status {r.returncode}\n{r.stderr[-2000:]}"
    if r.returncode == 0:
        return judge_refusal(cmd, None, path, data, must_fail)
    errors = [ln for ln in r.stderr.splitlines() if ln.startswith("recoup: error:")]
    if len(errors) != 1:
        return f"{cmd}: {len(errors)} error lines, want 1\n{r.stderr[-2000:]}"
    return judge_refusal(cmd, errors[0], path, data, must_fail)


def check_in_process(loader, jobs, list_path):
    """Runs jobs [(path, data, must_fail)] through corrupt_load in one
    process. Returns (runs, problems)."""
    with open(list_path, "w") as f:
        for path, data, _ in jobs:
            f.write(f"{path}\t{data}\n")
    what = f"corrupt_load {list_path}"
    try:
        r = subprocess.run([loader, list_path], capture_output=True, text=True, errors="replace", timeout=600,
                           env=RUN_ENV)
    except subprocess.TimeoutExpired:
        return 0, [f"{what}: still running after 600 s"]
    except OSError as err:
        return 0, [f"{what}: cannot run corrupt_load: {err}"]
    results, current = {}, None
    for ln in r.stdout.splitlines():
        if ln.startswith("file "):
            current = ln[5:]
        elif ln.startswith("result ") and current is not None:
            status, _, message = ln[7:].partition(" ")
            results[current] = message if status == "1" else None
            current = None
    problems = []
    if r.returncode != 0 or any(mark in r.stderr for mark in SANITIZER_MARKS):
        at = f" while on {current}" if current else ""
        how = f"killed by signal {-r.returncode}" if r.returncode < 0 else f"exit status {r.returncode}"
        problems.append(f"{what}: {how}{at}\n{r.stderr[-4000:]}")
    for path, data, must_fail in jobs:
        if path not in results:
            if not problems:
                problems.append(f"{what}: no result for {path}")
            continue
        p = judge_refusal(f"library on {path}", results[path], path, data, must_fail)
        if p:
            problems.append(p)
    return len(results), problems


def models_to_damage(source_dir, binary_dir, n_reference):
    found = []
    mdir = os.path.join(source_dir, "models")
    if os.path.isdir(mdir):
        found += [os.path.join(mdir, f) for f in sorted(os.listdir(mdir)) if f.endswith(".onnx")]
    missing = []
    for case in REFERENCE_CASES[:n_reference]:
        p = os.path.join(binary_dir, "reference", case, "model.onnx")
        (found if os.path.exists(p) else missing).append(p)
    return found, missing


def main():
    recoup, loader, work = sys.argv[1], sys.argv[2], sys.argv[3]
    source_dir = os.environ.get("RECOUP_SOURCE_DIR", os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    binary_dir = os.environ.get("RECOUP_BINARY_DIR", ".")
    light = os.environ.get("RECOUP_CORRUPT_LIGHT") == "1"
    parts, count = (12, 24) if light else (32, 100)
    # The command-line subset of the byte-level copies: every cli_parts-th
    # truncation, every cli_count-th byte change.
    cli_parts, cli_count = (4, 6) if light else (8, 10)
    os.makedirs(work, exist_ok=True)
    models, missing = models_to_damage(source_dir, binary_dir,
                                       REFERENCE_CASES_LIGHT if light else len(REFERENCE_CASES))
    if missing:
        print("missing reference models (the reference_models fixture did not run):", *missing, sep="\n  ")
        return 1
    before = {p: sha256(p) for p in models}
    problems = []
    rng = random.Random(20240611)
    cli_jobs, library_jobs = [], []  # library_jobs: one list per model
    for src in models:
        model = onnx.load(src)
        tag = os.path.basename(os.path.dirname(src)) if src.endswith("model.onnx") else os.path.splitext(os.path.basename(src))[0]
        folder = os.path.join(work, tag)
        os.makedirs(folder, exist_ok=True)
        _, shape = input_shape(model)
        data = os.path.join(folder, "samples.npy")
        np.save(data, np.random.default_rng(5).standard_normal(shape).astype(np.float32))
        with open(src, "rb") as f:
            raw = f.read()
        if tag not in SAME_ARCHITECTURE_AS_ANOTHER:
            mine = []
            for k, (name, blob) in enumerate(byte_variants(raw, parts, count, rng)):
                path = os.path.join(folder, name + ".onnx")
                with open(path, "wb") as f:
                    f.write(blob)
                mine.append((path, data, False))
                if (k % cli_parts == 0) if k < parts else ((k - parts) % cli_count == 0):
                    cli_jobs.append((path, data, False))
            library_jobs.append((os.path.join(folder, "list.txt"), mine))
        for name, m, must_fail in structural_variants(model):
            path = os.path.join(folder, name + ".onnx")
            with open(path, "wb") as f:
                f.write(m.SerializeToString())
            cli_jobs.append((path, data, must_fail))

    def run_cli(job):
        path, data, must_fail = job
        out = []
        for args in (["inspect", path], ["eval", path, "--data", data, "--batch", "2"]):
            out.append(check_run(recoup, args, path, data, must_fail))
        return len(out), [p for p in out if p]

    def run_library(item):
        list_path, jobs = item
        return check_in_process(loader, jobs, list_path)

    library_runs = cli_runs = 0
    with concurrent.futures.ThreadPoolExecutor(max_workers=2) as pool:
        for runs, found in pool.map(run_library, library_jobs):
            library_runs += runs
            problems += found
        for runs, found in pool.map(run_cli, cli_jobs):
            cli_runs += runs
            problems += found
    for p, h in before.items():
        if sha256(p) != h:
            problems.append(f"{p}: the original changed")
    for p in problems[:20]:
        print("PROBLEM:", p)
    n_library = sum(len(j) for _, j in library_jobs)
    print(f"{len(models)} models; library: {n_library} damaged copies, {library_runs} handled; "
          f"command line: {len(cli_jobs)} copies, {cli_runs} runs; {len(problems)} problems")
    if library_runs != n_library or cli_runs != 2 * len(cli_jobs):
        print("not every copy was run")
        return 1
    return 1 if problems else 0


if __name__ == "__main__":
    sys.exit(main())
