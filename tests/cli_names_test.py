#!/usr/bin/python3
"""What the command line shows about names, shapes and data taken from files.

- inspect shows each graph output's dtype and shape as the file declares
  them, checked against the onnx package's reading of the same file (Debian
  python3-onnx); where the file declares none, the shape recoup computes,
  marked "computed", checked against onnx.shape_inference on the same file.
- A multi-array .npz written by NumPy (Debian python3-numpy, np.savez) feeds
  the array named like the model's input; a single-array .npz feeds its one
  array; an ambiguous one is refused with one line listing the arrays.
- Names with terminal escapes (ESC [31m), line breaks and bytes that are not
  UTF-8 never reach stdout, stderr or a report raw: every byte stream is
  checked with Python's bytes and UTF-8 decoder, and the escaped form
  (\\x1B, \\x0A, \\xFF) is looked for where the name is shown.
- inspect --pairs keeps its columns aligned with long and non-ASCII names;
  an unknown option prints exactly one line; --threads 0 is documented and
  runs; prune --sparsity reports the overall sparsity it reached (checked by
  counting zeros with the onnx package) and says why when it falls far below.

Usage: cli_names_test.py RECOUP_BINARY WORK_DIR
"""

import json
import os
import shutil
import subprocess
import sys

import numpy as np
import onnx
from onnx import mapping, numpy_helper, shape_inference

from cli_models import mlp
from e2e import Run

RECOUP, WORK = os.path.abspath(sys.argv[1]), os.path.abspath(sys.argv[2])
shutil.rmtree(WORK, ignore_errors=True)
os.makedirs(WORK)
T = Run(RECOUP)
check = T.check


def run(args, cwd=WORK):
    return subprocess.run([RECOUP] + args, capture_output=True, timeout=300, cwd=cwd)


def w(*parts):
    return os.path.join(WORK, *parts)


def clean(stream, json_text=False):
    """(ok, why): no C0 control byte except newline (and the tab cJSON
    indents JSON with), no DEL, valid UTF-8 with no C1 control characters."""
    allowed = (0x0A, 0x09) if json_text else (0x0A,)
    bad = sorted({b for b in stream if (b < 0x20 and b not in allowed) or b == 0x7F})
    if bad:
        return False, f"raw control bytes {[hex(b) for b in bad]}"
    try:
        text = stream.decode("utf-8")
    except UnicodeDecodeError as ex:
        return False, f"invalid UTF-8 at byte {ex.start}"
    c1 = [hex(ord(ch)) for ch in text if 0x80 <= ord(ch) <= 0x9F]
    return (not c1), (f"C1 controls {c1}" if c1 else "")


# ---- Item 8: declared output dtype and shape ----------------------------------------------------

def onnx_io(model, which):
    """name -> (dtype name, [dims]) as the onnx package reads the file."""
    res = {}
    for vi in getattr(model.graph, which):
        tt = vi.type.tensor_type
        dt = np.dtype(mapping.TENSOR_TYPE_TO_NP_TYPE[tt.elem_type]).name if tt.elem_type else None
        dims = None
        if tt.HasField("shape"):
            dims = [d.dim_value if d.HasField("dim_value") else (d.dim_param or None) for d in tt.shape.dim]
        res[vi.name] = (dt, dims)
    return res


bundled = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "models", "garment_dense.onnx")
for path in (bundled, mlp(w("declared.onnx"))):
    r = run(["inspect", path, "--json"])
    got = {o["name"]: (o.get("dtype"), o.get("shape"), o.get("source")) for o in json.loads(r.stdout)["outputs"]} \
        if r.returncode == 0 else {}
    want = onnx_io(onnx.load(path), "output")
    ok = r.returncode == 0 and all(got.get(k, (None, None, None))[:2] == (dt, dims) and got[k][2] == "file"
                                   for k, (dt, dims) in want.items())
    check(f"inspect --json outputs of {os.path.basename(path)} equal the onnx package's reading",
          ok, f"recoup {got}, onnx {want}")
    t = run(["inspect", path]).stdout.decode()
    line = next((l for l in t.splitlines() if l.startswith("outputs")), "")
    name, (dt, dims) = next(iter(want.items()))
    text = f"{dt} ({', '.join(str(d) for d in dims)})"
    check(f"inspect table shows {name} as {text}", text in line and "unknown" not in line, line)

for kind in ("dtype", "none"):
    path = mlp(w(f"undeclared_{kind}.onnx"), out_type=kind)
    inferred = onnx_io(shape_inference.infer_shapes(onnx.load(path)), "output")["logits"]
    r = run(["inspect", path, "--json"])
    o = json.loads(r.stdout)["outputs"][0] if r.returncode == 0 else {}
    check(f"inspect computes an undeclared output shape ({kind} declared) as onnx.shape_inference does",
          o.get("source") == "computed" and (o.get("dtype"), o.get("shape")) == inferred,
          f"recoup {o}, onnx.shape_inference {inferred}")
    line = next((l for l in run(["inspect", path]).stdout.decode().splitlines() if l.startswith("outputs")), "")
    check(f"inspect table marks the {kind}-only output as computed", "float32 (N, 4) (computed)" in line, line)

# ---- Item 10: .npz inputs ----------------------------------------------------------------------

model = mlp(w("clf.onnx"))
x = np.random.RandomState(1).randn(40, 6).astype(np.float32)
np.save(w("x.npy"), x)
np.savez(w("multi.npz"), labels=np.arange(10) % 4, x=x)    # NumPy stores members "labels.npy", "x.npy"
np.savez(w("single.npz"), samples=x)
np.savez(w("ambiguous.npz"), a=x, b=x[:10])


def eval_out(data, out):
    r = run(["eval", model, "--data", data, "--out", out, "--json"])
    return r, (np.load(out) if r.returncode == 0 else None)


_, ref = eval_out(w("x.npy"), w("ref.npy"))
r, got = eval_out(w("multi.npz"), w("multi_out.npy"))
check("multi-array .npz feeds the array named like the input ('x', not the first, 'labels')",
      got is not None and got.shape == ref.shape and np.array_equal(got, ref),
      f"outputs {None if got is None else got.shape} vs {ref.shape} from x.npy")
r, got = eval_out(w("single.npz"), w("single_out.npy"))
check("single-array .npz feeds its one array whatever its name", got is not None and np.array_equal(got, ref))
r = run(["eval", model, "--data", w("ambiguous.npz")])
err = r.stderr.decode(errors="replace").strip().splitlines()
check("ambiguous .npz refused with one line listing its arrays",
      r.returncode == 1 and len(err) == 1 and "'a'" in err[0] and "'b'" in err[0] and "'x'" in err[0], str(err))

lab = np.arange(40) % 4
np.savez(w("labels_multi.npz"), other=np.zeros(41, np.int64), labels=lab)  # "other" first: 41 would not fit
np.savez(w("labels_ambiguous.npz"), a=lab, b=lab)
acc = {}
for f in ("labels_multi.npz", "x_labels.npy"):
    if f.endswith(".npy"):
        np.save(w(f), lab)
    r = run(["eval", model, "--data", w("x.npy"), "--labels", w(f), "--json"])
    acc[f] = json.loads(r.stdout)["top1_accuracy"] if r.returncode == 0 else None
check("labels .npz with several arrays uses the one named 'labels'",
      acc["labels_multi.npz"] is not None and acc["labels_multi.npz"] == acc["x_labels.npy"], str(acc))
r = run(["eval", model, "--data", w("x.npy"), "--labels", w("labels_ambiguous.npz")])
check("ambiguous labels .npz refused", r.returncode == 1 and b"'a', 'b'" in r.stderr, repr(r.stderr[:200]))

# ---- Item 12: hostile names --------------------------------------------------------------------

# NumPy writes member names as given: a control sequence and a line break.
np.savez(w("hostile.npz"), **{"a\x1b[31mred\nline": x, "b\rback": x})
r = run(["eval", model, "--data", w("hostile.npz")])
ok, why = clean(r.stdout + r.stderr)
check("ambiguous .npz with hostile array names: message escaped", r.returncode == 1 and ok and
      b"\\x1B[31mred\\x0Aline" in r.stderr and b"b\\x0Dback" in r.stderr, why + " " + repr(r.stderr[:300]))

# Protobuf strings must be UTF-8 in Python, so the hostile bytes are written
# over same-length placeholders in the serialised file.
EVIL = {b"QQ_ESC_QQ": b"\x1b[31mred\x1b", b"QQ_NL_QQQ": b"nl\nbreak\r", b"QQ_BAD_QQ": b"bad\xff\xfe\xc0\x80ZZ"}
for k, v in EVIL.items():
    assert len(k) == len(v)


def hostile(path, **kw):
    tmp = mlp(path + ".tmp", **kw)
    data = open(tmp, "rb").read()
    for k, v in EVIL.items():
        data = data.replace(k, v)
    os.remove(tmp)
    with open(path, "wb") as f:
        f.write(data)
    return path


evil_names = dict(x="in_QQ_ESC_QQ", h0="h_QQ_NL_QQQ", fc0="node_QQ_BAD_QQ", logits="out_QQ_BAD_QQ")
ev = hostile(w("evil.onnx"), names=evil_names, sizes=(6, 8, 4))
ev_student = hostile(w("evil_student.onnx"), names=evil_names, sizes=(6, 8, 4))
np.save(w("x_wrong.npy"), np.zeros((40, 7), np.float32))
# A model whose hostile node runs an op recoup does not know.
m = onnx.load(mlp(w("unknown_op.tmp"), names={"fc0": "node_QQ_BAD_QQ"}))
m.graph.node[1].op_type = "QQ_ESC_QQ"
onnx.save(m, w("unknown_op.tmp"))
data = open(w("unknown_op.tmp"), "rb").read()
for k, v in EVIL.items():
    data = data.replace(k, v)
open(w("unknown_op.onnx"), "wb").write(data)

cases = [
    ("inspect table", ["inspect", ev], 0, [b"in_\\x1B[31mred\\x1B", b"out_bad\\xFF\\xFE\\xC0\\x80ZZ"]),
    ("inspect --json", ["inspect", ev, "--json"], 0, [b"in_\\\\x1B[31mred"]),
    ("inspect --pairs", ["inspect", "--pairs", ev, ev_student], 0, [b"h_nl\\x0Abreak\\x0D"]),
    ("inspect --pairs, unknown --pair name", ["inspect", "--pairs", ev, ev_student, "--pair", "h_\x1b]0;x\x07=y"], 1,
     [b"\\x1B]0;x\\x07"]),
    ("inspect of an unknown op on a hostile node", ["inspect", w("unknown_op.onnx")], 1, [b"\\x1B[31mred\\x1B"]),
    ("eval with data of the wrong shape", ["eval", ev, "--data", w("x_wrong.npy")], 1, [b"in_\\x1B[31mred\\x1B"]),
    ("eval table", ["eval", ev, "--data", w("x.npy"), "--ref", ev_student], 0, []),
    ("distill with data of the wrong shape", ["distill", "--teacher", ev, "--student", ev_student, "--data",
                                             w("x_wrong.npy"), "--out", w("d.onnx")], 1, [b"in_\\x1B[31mred\\x1B"]),
    ("distill with an unknown --pair", ["distill", "--teacher", ev, "--student", ev_student, "--data", w("x.npy"),
                                        "--pair", "nope\x1b[2J=nope", "--loss", "kd=1,hint=1", "--steps", "2", "--out", w("d.onnx")], 1,
     [b"\\x1B[2J"]),
    ("distill tables and report", ["distill", "--teacher", ev, "--student", ev_student, "--data", w("x.npy"),
                                   "--steps", "2", "--out", w("d.onnx"), "--report", w("rep")], 0,
     [b"h_nl\\x0Abreak\\x0D"]),
    ("distill --json", ["distill", "--teacher", ev, "--student", ev_student, "--data", w("x.npy"), "--steps", "2",
                        "--out", w("d2.onnx"), "--json"], 0, []),
]
for name, args, code, shown in cases:
    r = run(args)
    ok, why = clean(r.stdout, "--json" in args)
    if ok:
        ok, why = clean(r.stderr)
    missing = [s for s in shown if s not in r.stdout + r.stderr]
    lines = [l for l in r.stderr.splitlines() if l.strip()]
    good = r.returncode == code and ok and not missing and (code == 0 or len(lines) == 1)
    if good and "--json" in args:
        try:
            json.loads(r.stdout.decode("utf-8"))
        except ValueError as ex:
            good, why = False, f"stdout is not JSON: {ex}"
    check(f"hostile names, {name}: escaped", good,
          f"status {r.returncode} (want {code}); {why}; missing {missing}; stderr {r.stderr[:200]!r}")
for f in ("report.html", "summary.csv", "summary.md", "report.json"):
    p = w("rep", f)
    data = open(p, "rb").read() if os.path.exists(p) else b"\x00"
    ok, why = clean(data.replace(b"\r\n", b"\n"), f.endswith(".json"))  # CSV rows end in CRLF (RFC 4180)
    check(f"hostile names, report {f}: no raw control bytes, valid UTF-8", ok, why)
html = open(w("rep", "report.html"), "rb").read() if os.path.exists(w("rep", "report.html")) else b""
check("report.html has no raw '<' from a name", b"<script" not in html.lower())

# ---- Item 14 -----------------------------------------------------------------------------------

long_names = {"h0": "a_rather_long_hidden_tensor_name_that_is_wider_than_any_column_" + "x" * 20}
t = mlp(w("long_t.onnx"), names=dict(long_names, logits="lógits_é"), sizes=(6, 8, 8, 4))
s = mlp(w("long_s.onnx"), names=dict(long_names, logits="lógits_é"), sizes=(6, 8, 8, 4))
r = run(["inspect", "--pairs", t, s])
rows = r.stdout.decode().splitlines()
rows = [l for l in rows if l.strip()]
head = rows[0] if rows else ""
cols = [head.find("shape"), head.find("student tensor"), head.find("matched"), head.find("projector")]
aligned = r.returncode == 0 and len(rows) >= 3 and all(
    all(l[c - 2:c] == "  " and l[c] != " " for c in cols) for l in rows[1:])
check("inspect --pairs columns aligned with long and non-ASCII names", aligned, "\n" + "\n".join(rows))

for cmd in ("inspect", "eval", "distill", "batch", "prune", "quantize"):
    r = run([cmd, "--no-such-option", "x"])
    lines = [l for l in r.stderr.decode().splitlines() if l.strip()]
    check(f"{cmd}: an unknown option gives exactly one line", r.returncode == 2 and len(lines) == 1 and
          "--no-such-option" in lines[0], str(lines))
r = run(["eval", model, "--data"])
lines = [l for l in r.stderr.decode().splitlines() if l.strip()]
check("eval: a missing option value gives exactly one line naming it",
      r.returncode == 2 and len(lines) == 1 and "--data" in lines[0], str(lines))

for cmd in ("eval", "distill", "quantize", "batch"):
    h = run([cmd, "--help"]).stdout.decode()
    check(f"{cmd} --help says what --threads 0 means", "0 (the default) uses every" in h)
r0 = run(["eval", model, "--data", w("x.npy"), "--threads", "0", "--out", w("t0.npy")])
r1 = run(["eval", model, "--data", w("x.npy"), "--threads", "1", "--out", w("t1.npy")])
check("eval --threads 0 runs and gives the --threads 1 outputs (within 1e-6)",
      r0.returncode == 0 and r1.returncode == 0 and np.allclose(np.load(w("t0.npy")), np.load(w("t1.npy")),
                                                                  rtol=1e-6, atol=1e-6))
r = run(["eval", model, "--data", w("x.npy"), "--threads", "-1"])
check("eval --threads -1 is refused", r.returncode == 2)

# First and last layers hold most weights: 64x100 and 10x64 around a 16x64.
big = mlp(w("edges.onnx"), sizes=(100, 64, 16, 10))
for extra in ([], ["--include-first-last"]):
    out = w("edges_pruned%s.onnx" % ("_all" if extra else ""))
    r = run(["prune", big, "--sparsity", "0.9", "--out", out, "--json"] + extra)
    res = json.loads(r.stdout) if r.returncode == 0 else {}
    ws = [numpy_helper.to_array(i) for i in onnx.load(out).graph.initializer if i.name.startswith("w")] \
        if os.path.exists(out) else []
    zeros, total = sum(int((a == 0).sum()) for a in ws), sum(a.size for a in ws)
    got = res.get("totals", {}).get("overall_sparsity")
    noted = any("overall sparsity" in n for n in res.get("notes", []))
    check(f"prune --sparsity 0.9 {' '.join(extra)}: overall sparsity equals the onnx package's zero count",
          got is not None and total and abs(got - zeros / total) < 1e-9, f"recoup {got}, onnx {zeros}/{total}")
    check(f"prune --sparsity 0.9 {' '.join(extra)}: note {'absent' if extra else 'present'} "
          f"(overall {zeros / max(total, 1):.3f})", noted == (not extra), str(res.get("notes")))
r = run(["prune", big, "--sparsity", "0.9", "--out", w("edges_t.onnx")])
check("prune table prints the overall sparsity and the note", b"overall sparsity" in r.stdout and
      b"note" in r.stdout and b"--include-first-last" in r.stdout)

T.finish()
