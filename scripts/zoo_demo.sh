#!/usr/bin/env bash
# A small zoo from the bundled garment classifier, recovered by one
# `recoup batch` run: five compressed variants of the dense model (the bundled
# 90%-pruned copy, 80% global magnitude pruning, 2:4 semi-structured pruning,
# half the channels removed, 4-bit weights with 8-bit activations), each
# distilled from the dense model on Fashion-MNIST's training images (with
# their labels) and validated on the 10,000 labelled test images. Writes the
# batch report to build/zoo/report (report.html, summary.md, ...).
#
# Usage: scripts/zoo_demo.sh [--steps N] [--screenshot FILE.png]
#   --screenshot  also render the top of report.html in headless Chromium to
#                 FILE.png (docs/zoo-report.png in README is made this way)
set -euo pipefail
here=$(cd "$(dirname "$0")/.." && pwd)
steps=400
shot=
while [ $# -gt 0 ]; do
  case "$1" in
    --steps) steps=$2; shift 2 ;;
    --screenshot) shot=$(realpath -m "$2"); shift 2 ;;
    -h|--help) sed -n '2,13p' "$0"; exit 0 ;;
    *) echo "zoo_demo.sh: unknown option '$1' (see --help)" >&2; exit 2 ;;
  esac
done

[ -x "$here/build/recoup" ] || "$here/scripts/build.sh" "$here/build"
recoup="$here/build/recoup"
data=/usr/share/datasets/fashion-mnist
scale=0.00392156862745098
zoo="$here/build/zoo"
rm -rf "$zoo"
mkdir -p "$zoo/students"
cp "$here/models/garment_dense.onnx" "$zoo/garment_dense.onnx"
dense="$zoo/garment_dense.onnx"

echo "Making the compressed variants ..."
cp "$here/models/garment_pruned90.onnx" "$zoo/students/pruned90.onnx"
"$recoup" prune "$dense" --sparsity 0.8 --out "$zoo/students/pruned80.onnx" >/dev/null
"$recoup" prune "$dense" --pattern 2:4 --out "$zoo/students/sparse24.onnx" >/dev/null
"$recoup" prune "$dense" --channels 0.5 --out "$zoo/students/channels50.onnx" >/dev/null
"$recoup" quantize "$dense" --data "$data/train-images-idx3-ubyte.gz" --scale "$scale" \
  --weight-bits 4 --out "$zoo/students/w4a8.onnx" >/dev/null

cat >"$zoo/zoo.json" <<EOF
{
  "title": "Garment classifiers: five compressed variants recovered on CPU",
  "defaults": {"teacher": "garment_dense.onnx", "data": "$data/train-images-idx3-ubyte.gz",
               "labels": "$data/train-labels-idx1-ubyte.gz",
               "val_data": "$data/t10k-images-idx3-ubyte.gz", "val_labels": "$data/t10k-labels-idx1-ubyte.gz",
               "scale": $scale, "steps": $steps, "seed": 1},
  "jobs": [
    {"name": "pruned90", "student": "students/pruned90.onnx", "out": "recovered/pruned90.onnx"},
    {"name": "pruned80", "student": "students/pruned80.onnx", "out": "recovered/pruned80.onnx"},
    {"name": "sparse-2of4", "student": "students/sparse24.onnx", "out": "recovered/sparse24.onnx"},
    {"name": "channels50", "student": "students/channels50.onnx", "out": "recovered/channels50.onnx"},
    {"name": "int4-weights", "student": "students/w4a8.onnx", "out": "recovered/w4a8.onnx"}
  ]
}
EOF

echo "Recovering the zoo ($steps steps per job) ..."
status=0
"$recoup" batch "$zoo/zoo.json" --jobs 2 --allow-outside --report "$zoo/report" || status=$?
echo
cat "$zoo/report/summary.md"
echo
echo "Report: $zoo/report/report.html"
if [ -n "$shot" ]; then
  # A tall window so the whole page is in one picture; no network is needed.
  chromium --headless --no-sandbox --disable-gpu --hide-scrollbars --window-size=1100,1500 \
    --screenshot="$shot" "file://$zoo/report/report.html" >/dev/null 2>&1
  # Fewer colours make a much smaller file; skipped where Pillow is missing.
  /usr/bin/python3 -c 'import sys; from PIL import Image
im = Image.open(sys.argv[1]).convert("RGB").quantize(colors=96, dither=Image.Dither.NONE)
im.save(sys.argv[1], optimize=True)' "$shot" 2>/dev/null || true
  echo "Screenshot: $shot"
fi
exit $status
