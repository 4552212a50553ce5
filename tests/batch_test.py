#!/usr/bin/python3
"""`recoup batch` over a small zoo, checked against outside references:

- every recovered file passes onnx.checker (Debian python3-onnx) and keeps its
  student's zero positions (read with the onnx package);
- the SHA-256 that the resume state records equals Python's hashlib's
  (FIPS 180-4, as hashlib implements it);
- the HTML report loads in headless Chromium (Debian package chromium): the
  dumped DOM holds the expected SVG charts and series, the page logs no
  console message, and it references nothing outside itself.

Behaviour checked: a broken job (corrupt student file) is reported with its
error while the others finish; a batch killed with SIGKILL mid-training and
rerun with --resume skips finished jobs, resumes the interrupted one from its
checkpoint and ends with files byte-identical to an uninterrupted run's;
SIGTERM checkpoints running jobs and exits 1; shards 1/3..3/3 run every job
exactly once and their merged report equals the unsharded one (timings
aside); manifests with errors are refused whole, naming job and field.

The zoo: a small convolutional classifier with random weights (seeded) as the
dense model, copies pruned by magnitude with numpy, and 1,024 Fashion-MNIST
training images (Xiao, Rasul and Vollgraf 2017; Debian dataset-fashion-mnist)
as samples. No labels: the figures are agreement with the dense model.

Usage: batch_test.py RECOUP WORK_DIR
"""

import glob
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
import onnx
from onnx import TensorProto, helper, numpy_helper

from e2e import checker_verdict, diff_detail, require_data

RECOUP, WORK = sys.argv[1], sys.argv[2]
shutil.rmtree(WORK, ignore_errors=True)
os.makedirs(WORK)
FMNIST = "/usr/share/datasets/fashion-mnist/train-images-idx3-ubyte.gz"
require_data(FMNIST)
CHROMIUM = "/usr/bin/chromium"
# The sanitizer build, several times slower per step, gives the long job 10
# epochs instead of 30 (still far longer than the 4 steps before its first
# checkpoint, where the kill and SIGTERM come) and leaves loading the report
# in Chromium to the release build: Chromium runs none of recoup's code.
SANITIZER = os.environ.get("RECOUP_SANITIZER_BUILD") == "1"
failures = []
passed = 0


def check(name, ok, detail=""):
    global passed
    if ok:
        passed += 1
        print(f"ok   {name} {detail}")
    else:
        failures.append(f"{name} {detail}")
        print(f"FAIL {name} {detail}")
    sys.stdout.flush()


def digest(path):
    with open(path, "rb") as f:
        return hashlib.sha256(f.read()).hexdigest()


# ---- The zoo ---------------------------------------------------------------------

def conv_classifier(rng):
    """x (N,1,28,28) -> Conv 3x3 s2 (8) -> Relu -> Conv 3x3 s2 (16) -> Relu -> Flatten -> Gemm (10)."""
    w1 = (rng.randn(8, 1, 3, 3) * 0.6).astype(np.float32)
    w2 = (rng.randn(16, 8, 3, 3) * 0.25).astype(np.float32)
    w3 = (rng.randn(10, 16 * 7 * 7) * 0.3).astype(np.float32)
    inits = [numpy_helper.from_array(w1, "c1.w"), numpy_helper.from_array(np.zeros(8, np.float32), "c1.b"),
             numpy_helper.from_array(w2, "c2.w"), numpy_helper.from_array(np.zeros(16, np.float32), "c2.b"),
             numpy_helper.from_array(w3, "fc.w"), numpy_helper.from_array(np.zeros(10, np.float32), "fc.b")]
    nodes = [helper.make_node("Conv", ["x", "c1.w", "c1.b"], ["h1"], pads=[1, 1, 1, 1], strides=[2, 2], name="c1"),
             helper.make_node("Relu", ["h1"], ["r1"], name="a1"),
             helper.make_node("Conv", ["r1", "c2.w", "c2.b"], ["h2"], pads=[1, 1, 1, 1], strides=[2, 2], name="c2"),
             helper.make_node("Relu", ["h2"], ["r2"], name="a2"),
             helper.make_node("Flatten", ["r2"], ["f"], name="flat"),
             helper.make_node("Gemm", ["f", "fc.w", "fc.b"], ["logits"], transB=1, name="fc")]
    g = helper.make_graph(nodes, "zoo_cnn", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", 1, 28, 28])],
                          [helper.make_tensor_value_info("logits", TensorProto.FLOAT, ["N", 10])], inits)
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 13)])
    m.ir_version = 8
    onnx.checker.check_model(m)
    return m


def pruned_copy(model, fraction):
    """Zero the smallest-magnitude `fraction` of every Conv/Gemm weight."""
    m = onnx.ModelProto()
    m.CopyFrom(model)
    for t in m.graph.initializer:
        if not t.name.endswith(".w"):
            continue
        w = numpy_helper.to_array(t).copy()
        w[np.abs(w) <= np.quantile(np.abs(w), fraction)] = 0
        t.CopyFrom(numpy_helper.from_array(w, t.name))
    return m


def build_zoo(folder):
    os.makedirs(folder)
    rng = np.random.RandomState(3)
    dense = conv_classifier(rng)
    onnx.save(dense, os.path.join(folder, "dense.onnx"))
    os.makedirs(os.path.join(folder, "students"))
    for frac in (50, 70, 80, 90, 95):
        onnx.save(pruned_copy(dense, frac / 100), os.path.join(folder, "students", f"p{frac}.onnx"))
    with open(os.path.join(folder, "students", "p60_corrupt.onnx"), "wb") as f:
        f.write(pruned_copy(dense, 0.6).SerializeToString()[:300] + b"\xff" * 64)
    with gzip.open(FMNIST, "rb") as f:
        raw = f.read(16 + 1024 * 784)
    images = np.frombuffer(raw, np.uint8, offset=16).reshape(1024, 1, 28, 28)
    np.save(os.path.join(folder, "samples.npy"), images)
    jobs = [{"name": "p50", "student": "students/p50.onnx", "out": "recovered/p50.onnx"},
            {"name": "p70", "student": "students/p70.onnx", "out": "recovered/p70.onnx", "temperature": 2},
            # The long job: the one a kill interrupts.
            {"name": "p90", "student": "students/p90.onnx", "out": "recovered/p90.onnx", "epochs": 10 if SANITIZER else 30},
            {"name": "p60-broken", "student": "students/p60_corrupt.onnx", "out": "recovered/p60.onnx"},
            {"name": "p80", "student": "students/p80.onnx", "out": "recovered/p80.onnx", "optimizer": "sgd"},
            {"name": "p95", "student": "students/p95.onnx", "out": "recovered/p95.onnx", "lr": 0.001}]
    manifest = {"title": "Test zoo: pruned copies of one classifier",
                "defaults": {"teacher": "dense.onnx", "data": "samples.npy", "scale": 0.00392156862745098, "mean": 0.286, "std": 0.353,
                             "val_split": 0.25, "epochs": 3, "batch": 32, "seed": 5, "checkpoint_every": 4},
                "jobs": jobs}
    with open(os.path.join(folder, "zoo.json"), "w") as f:
        json.dump(manifest, f, indent=2)
    return manifest


def batch(args, **kw):
    return subprocess.run([RECOUP, "batch"] + args, capture_output=True, text=True, timeout=600, **kw)


TEMPLATE = os.path.join(WORK, "template")
MANIFEST = build_zoo(TEMPLATE)
N_JOBS = len(MANIFEST["jobs"])
GOOD = [j["name"] for j in MANIFEST["jobs"] if "broken" not in j["name"]]


def zoo_copy(name):
    dst = os.path.join(WORK, name)
    shutil.copytree(TEMPLATE, dst)
    return dst


def outputs(folder):
    return {j["name"]: os.path.join(folder, j["out"]) for j in MANIFEST["jobs"]}


def initializers(path):
    return {t.name: numpy_helper.to_array(t) for t in onnx.load(path).graph.initializer}


def records(report_dir):
    with open(os.path.join(report_dir, "report.json")) as f:
        return json.load(f)["jobs"]


TIMINGS = {"seconds", "samples_per_s", "wall_seconds", "reused"}


def without_timings(recs):
    return [{k: v for k, v in r.items() if k not in TIMINGS} for r in recs]


def wait_for(path, proc, limit=300):
    deadline = time.time() + limit
    while not os.path.exists(path) and proc.poll() is None and time.time() < deadline:
        time.sleep(0.02)
    return os.path.exists(path)


def group_gone(pgid, limit=30):
    deadline = time.time() + limit
    while time.time() < deadline:
        try:
            os.killpg(pgid, 0)
        except ProcessLookupError:
            return True
        time.sleep(0.05)
    return False


# ---- 1. Manifests with errors are refused whole, naming job and field ------------------

def bad_manifest(name, edit, must_name, extra=()):
    folder = os.path.join(WORK, "bad", name)
    shutil.copytree(TEMPLATE, folder)
    m = json.loads(json.dumps(MANIFEST))
    edit(m)
    with open(os.path.join(folder, "zoo.json"), "w") as f:
        json.dump(m, f)
    r = batch([os.path.join(folder, "zoo.json"), "--threads", "1"] + list(extra))
    lines = [l for l in r.stderr.splitlines() if l.strip()]
    ok = (r.returncode == 1 and len(lines) == 1 and all(s in r.stderr for s in must_name)
          and not os.path.exists(os.path.join(folder, "recovered")))
    check(f"manifest refused: {name}", ok, f"({r.returncode}: {r.stderr.strip()[:200]})")


bad_manifest("unknown key", lambda m: m["jobs"][1].update({"epoch": 2}), ["'p70'", "'epoch'", "unknown"])
bad_manifest("dash in key", lambda m: m["defaults"].update({"val-split": 0.2}), ["defaults", "'val-split'", "'_'"])
bad_manifest("missing student", lambda m: m["jobs"][2].pop("student"), ["'p90'", "'student'", "missing"])
bad_manifest("wrong type", lambda m: m["jobs"][4].update({"epochs": "two"}), ["'p80'", "'epochs'", "integer"])
bad_manifest("out of range", lambda m: m["jobs"][0].update({"temperature": 0}), ["'p50'", "'temperature'"])
bad_manifest("bad loss term", lambda m: m["jobs"][0].update({"loss": {"kd": 1, "hinted": 2}}), ["'p50'", "'loss'"])
bad_manifest("duplicate name", lambda m: m["jobs"][3].update({"name": "p50"}), ["jobs[3]", "'name'", "p50"])
bad_manifest("duplicate output", lambda m: m["jobs"][5].update({"out": "recovered/p50.onnx"}),
             ["'p95'", "'out'", "p50"])
bad_manifest("output is an input", lambda m: m["jobs"][1].update({"out": "students/p90.onnx"}),
             ["'p70'", "'out'", "'p90'"])
bad_manifest("absolute path", lambda m: m["jobs"][0].update({"student": os.path.join(TEMPLATE, "students/p50.onnx")}),
             ["'p50'", "'student'", "--allow-outside"])
bad_manifest("path escapes", lambda m: m["defaults"].update({"teacher": "../template/dense.onnx"}),
             ["defaults", "'teacher'", "leaves"])
bad_manifest("batch-owned option", lambda m: m["defaults"].update({"threads": 4}), ["'threads'"])
r = batch([os.path.join(TEMPLATE, "zoo.json"), "--shard", "4/3"])
check("--shard 4/3 is a usage error", r.returncode == 2, r.stderr.strip()[:120])

# ---- 2. Reference run: the broken job fails, the others finish ---------------------------

ref = zoo_copy("reference")
ref_report = os.path.join(ref, "report")
t0 = time.time()
r = batch([os.path.join(ref, "zoo.json"), "--report", ref_report, "--threads", "1"])
print(f"reference batch: {time.time() - t0:.1f} s")
check("batch with a broken job exits 1", r.returncode == 1, r.stderr[-300:])
recs = {x["name"]: x for x in records(ref_report)}
broken = recs["p60-broken"]
check("broken job reported with its error", broken["status"] == "failed" and "p60_corrupt.onnx" in broken["error"],
      broken.get("error", ""))
check("the others succeeded", all(recs[n]["status"] == "ok" for n in GOOD), str({n: recs[n]["status"] for n in GOOD}))
ref_out = outputs(ref)
for n in GOOD:
    check(f"{n}: recovered file passes onnx.checker", *checker_verdict(onnx.load(ref_out[n]), full_check=True))
    before = initializers(os.path.join(ref, [j for j in MANIFEST["jobs"] if j["name"] == n][0]["student"]))
    after = initializers(ref_out[n])
    moved = [k for k in before if k.endswith(".w") and not np.array_equal(before[k] == 0, after[k] == 0)]
    check(f"{n}: zero positions kept", not moved, f"(tensors whose zeros moved: {moved})")
check("recovery improved agreement on every good job",
      all(recs[n]["recovered"]["agreement"] >= recs[n]["compressed"]["agreement"] for n in GOOD),
      str({n: (recs[n]["compressed"]["agreement"], recs[n]["recovered"]["agreement"]) for n in GOOD}))
with open(os.path.join(ref_report, "state.json")) as f:
    state = json.load(f)["jobs"]
check("state SHA-256 equals hashlib's", sorted(state) == sorted(GOOD)
      and all(state[n]["sha256"] == digest(ref_out[n]) for n in GOOD),
      f"(jobs {sorted(state)}; differing: {[n for n in GOOD if n in state and state[n]['sha256'] != digest(ref_out[n])]})")
csv_lines = open(os.path.join(ref_report, "summary.csv")).read().splitlines()
check("CSV summary: header and one row per job", len(csv_lines) == N_JOBS + 1 and csv_lines[0].startswith("name,"),
      f"({len(csv_lines)} lines for {N_JOBS} jobs, header {csv_lines[0][:40] if csv_lines else ''!r})")
md = open(os.path.join(ref_report, "summary.md")).read()
md_missing = [j["name"] for j in MANIFEST["jobs"] if f"| {j['name']} |" not in md]
check("Markdown summary names every job and carries the caution", not md_missing and "held-out data" in md,
      f"(jobs missing {md_missing}, caution present {'held-out data' in md})")
ref_digests = {n: digest(ref_out[n]) for n in GOOD}

# ---- 3. SIGKILL mid-training, then --resume ---------------------------------------------

killed = zoo_copy("killed")
kill_report = os.path.join(killed, "report")
args = [RECOUP, "batch", os.path.join(killed, "zoo.json"), "--report", kill_report, "--threads", "1"]
p = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
kill_out = outputs(killed)
caught = wait_for(kill_out["p90"] + ".ckpt", p)
os.killpg(p.pid, signal.SIGKILL)
p.wait()
gone = group_gone(p.pid)
check("batch and its jobs killed while p90 trains", caught and gone and not os.path.exists(kill_out["p90"]),
      f"(checkpoint seen {caught}, process group gone {gone}, p90 output exists {os.path.exists(kill_out['p90'])})")
finished = {n: os.stat(kill_out[n]).st_mtime_ns for n in ("p50", "p70") if os.path.exists(kill_out[n])}
check("jobs before p90 had finished", sorted(finished) == ["p50", "p70"], str(sorted(finished)))
r = subprocess.run(args + ["--resume"], capture_output=True, text=True, timeout=600)
check("resumed batch finishes (status 1 for the broken job only)", r.returncode == 1
      and {x["name"]: x["status"] for x in records(kill_report)} == {x: recs[x]["status"] for x in recs}, r.stderr[-300:])
check("finished jobs skipped", all(f"skipped {n}" in r.stderr for n in finished)
      and all(os.stat(kill_out[n]).st_mtime_ns == t for n, t in finished.items()),
      f"(said skipped: {[n for n in finished if f'skipped {n}' in r.stderr]}, "
      f"rewritten: {[n for n, t in finished.items() if os.stat(kill_out[n]).st_mtime_ns != t]})")
log = open(os.path.join(kill_report, "logs", "p90.log")).read()
check("the interrupted job resumed from its checkpoint", "resuming from" in log and not os.path.exists(kill_out["p90"] + ".ckpt"),
      f"(log says resuming {'resuming from' in log}, checkpoint left {os.path.exists(kill_out['p90'] + '.ckpt')})")
check("every output byte-identical to the uninterrupted run's",
      all(digest(kill_out[n]) == ref_digests[n] for n in GOOD),
      f"(differing: {[n for n in GOOD if digest(kill_out[n]) != ref_digests[n]]})")
resumed = {x["name"]: x for x in records(kill_report)}
check("the resumed job's history and loss trace equal the uninterrupted run's (checkpoints carry them)",
      resumed["p90"]["epochs"] == recs["p90"]["epochs"] and resumed["p90"]["loss_trace"] == recs["p90"]["loss_trace"]
      and len(recs["p90"]["loss_trace"]) >= 10,
      f"(epochs {resumed['p90']['epochs']} vs {recs['p90']['epochs']}, loss trace of {len(resumed['p90']['loss_trace'])} "
      f"vs {len(recs['p90']['loss_trace'])} points, equal {resumed['p90']['loss_trace'] == recs['p90']['loss_trace']})")

# ---- 4. SIGTERM: jobs checkpoint, the batch exits 1 with a summary -----------------------

termed = zoo_copy("termed")
term_report = os.path.join(termed, "report")
args = [RECOUP, "batch", os.path.join(termed, "zoo.json"), "--report", term_report, "--threads", "1"]
p = subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)
term_out = outputs(termed)
wait_for(term_out["p90"] + ".ckpt", p)
p.send_signal(signal.SIGTERM)
out, err = p.communicate(timeout=300)
st = {x["name"]: x["status"] for x in records(term_report)}
check("SIGTERM: exit 1, p90 interrupted with a checkpoint, later jobs not run",
      p.returncode == 1 and st["p90"] == "interrupted" and os.path.exists(term_out["p90"] + ".ckpt")
      and st["p95"] == "not run" and "p90" in out, f"({p.returncode}, {st})")
r = subprocess.run(args + ["--resume"], capture_output=True, text=True, timeout=600)
check("after SIGTERM, --resume gives the same bytes", all(digest(term_out[n]) == ref_digests[n] for n in GOOD),
      f"(differing: {[n for n in GOOD if digest(term_out[n]) != ref_digests[n]]})")

# ---- 5. Shards 1/3..3/3, two jobs at once each, and the merged report ---------------------

sharded = zoo_copy("sharded")
procs = [subprocess.Popen([RECOUP, "batch", os.path.join(sharded, "zoo.json"), "--shard", f"{k}/3", "--jobs", "2",
                           "--threads", "2", "--report", os.path.join(sharded, f"shard{k}")],
                          stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True) for k in (1, 2, 3)]
for q in procs:
    q.communicate(timeout=600)
ran = [x["name"] for k in (1, 2, 3) for x in records(os.path.join(sharded, f"shard{k}")) if x["status"] != "not run"]
check("shards run every job exactly once", sorted(ran) == sorted(j["name"] for j in MANIFEST["jobs"]), str(ran))
shard_of = {x["name"]: (k, x["index"]) for k in (1, 2, 3) for x in records(os.path.join(sharded, f"shard{k}"))}
check("shard k holds the jobs with index mod 3 = k-1", all(i % 3 == k - 1 for k, i in shard_of.values()),
      f"(job: (shard, index) {shard_of})")
merged = os.path.join(sharded, "merged")
r = batch(["--merge-reports"] + [os.path.join(sharded, f"shard{k}") for k in (1, 2, 3)] + ["--report", merged])
check("merge exits 1 (one job failed)", r.returncode == 1, r.stderr[-200:])
check("merged report equals the unsharded one (timings aside)",
      without_timings(records(merged)) == without_timings(records(ref_report)),
      diff_detail(without_timings(records(merged)), without_timings(records(ref_report))))
sh_out = outputs(sharded)
check("sharded outputs byte-identical (1 thread per job either way)",
      all(digest(sh_out[n]) == ref_digests[n] for n in GOOD),
      f"(differing: {[n for n in GOOD if digest(sh_out[n]) != ref_digests[n]]})")

# ---- 6. The HTML report in headless Chromium ------------------------------------------------

html_path = os.path.join(ref_report, "report.html")
html = open(html_path).read()
fetches = [u for u in re.findall(r'https?://[^"\s]+', html) if u != "http://www.w3.org/2000/svg"]
links = re.findall(r'(?:src|href)\s*=', html)
check("HTML has no script and fetches nothing", "<script" not in html.lower() and not links and "url(" not in html
      and not fetches, f"(script {'<script' in html.lower()}, src/href {links}, url( {'url(' in html}, addresses {fetches})")
check("HTML carries the caution", "held-out data" in html, f"({len(html)} characters of HTML)")
if SANITIZER:
    print("Chromium's checks of the page run in the release build")
elif not os.access(CHROMIUM, os.X_OK):
    check("chromium installed (scripts/setup.sh installs Debian's chromium)", False, f"({CHROMIUM} is not executable)")
else:
    def chromium(extra):
        prof = os.path.join(WORK, f"chromium-profile-{len(extra)}")
        shutil.rmtree(prof, ignore_errors=True)
        cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
               "--disable-component-update", "--disable-sync", "--no-first-run", f"--user-data-dir={prof}",
               "--enable-logging=stderr", "--v=0"] + extra + ["file://" + html_path]
        return subprocess.run(cmd, capture_output=True, text=True, timeout=120)

    d = chromium(["--dump-dom"])
    dom = d.stdout
    console = [l for l in d.stderr.splitlines() if "CONSOLE" in l]
    check("Chromium loads the page without console messages", d.returncode == 0 and "</html>" in dom and not console,
          "; ".join(console)[:300])
    histories = re.findall(r'<svg[^>]*data-chart="history".*?</svg>', dom, re.S)
    series_ok = all(sorted(set(re.findall(r'data-series="([a-z]+)"', h))) == ["loss", "validation"] for h in histories)
    check("one history chart per finished job, two series each", len(histories) == len(GOOD) and series_ok,
          f"({len(histories)} charts)")
    loss_points = [len(re.search(r'data-series="loss"[^>]*points="([^"]*)"', h).group(1).split()) for h in histories]
    check("each loss curve has a point per trace entry", loss_points ==
          [len(recs[n]["loss_trace"]) for n in GOOD], str(loss_points))
    zoo = re.findall(r'<svg[^>]*data-chart="zoo".*?</svg>', dom, re.S)
    counts = {s: len(re.findall(rf'<(rect|path)[^>]*data-series="{s}"', zoo[0] if zoo else ""))
              for s in ("compressed", "recovered", "dense")}
    check("zoo chart: compressed and recovered bars and a dense mark per job", len(zoo) == 1
          and counts == {"compressed": len(GOOD), "recovered": len(GOOD), "dense": len(GOOD)}, str(counts))
    shot = os.path.join(WORK, "report.png")
    chromium([f"--screenshot={shot}", "--window-size=1200,1600", "--hide-scrollbars"])
    check("screenshot taken", os.path.exists(shot) and os.path.getsize(shot) > 10000, shot)

# ---- 7. recoup distill --report: the same report for one run -----------------------------------

single = os.path.join(WORK, "single")
r = subprocess.run([RECOUP, "distill", "--teacher", os.path.join(ref, "dense.onnx"), "--student",
                    os.path.join(ref, "students", "p70.onnx"), "--data", os.path.join(ref, "samples.npy"),
                    "--scale", "0.00392156862745098", "--epochs", "2", "--threads", "1",
                    "--out", os.path.join(WORK, "single_p70.onnx"), "--report", single],
                   capture_output=True, text=True, timeout=600)
srecs = records(single) if os.path.exists(os.path.join(single, "report.json")) else []
shtml = open(os.path.join(single, "report.html")).read() if os.path.exists(os.path.join(single, "report.html")) else ""
check("distill --report writes one record and its charts", r.returncode == 0 and len(srecs) == 1
      and srecs[0]["status"] == "ok" and len(srecs[0]["epochs"]) == 2 and shtml.count('data-chart="history"') == 1
      and os.path.exists(os.path.join(single, "summary.csv")), r.stderr[-200:])

print(f"{passed} passed, {len(failures)} failed")
sys.exit(1 if failures else 0)
