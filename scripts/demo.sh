#!/usr/bin/env bash
# The main job on the bundled demo: recover the 90%-pruned garment classifier
# by distilling it from the dense one on Fashion-MNIST's training images (no
# labels used for training), then measure both on the 10,000 test images.
set -euo pipefail
here=$(cd "$(dirname "$0")/.." && pwd)
"$here/scripts/setup.sh"
"$here/scripts/build.sh" "$here/build"
recoup="$here/build/recoup"
data=/usr/share/datasets/fashion-mnist
out="$here/build/demo"
mkdir -p "$out"
"$recoup" distill \
  --teacher "$here/models/garment_dense.onnx" \
  --student "$here/models/garment_pruned90.onnx" \
  --data "$data/train-images-idx3-ubyte.gz" --scale 0.00392156862745098 \
  --epochs 2 --seed 1 \
  --out "$out/garment_recovered.onnx"
echo
echo "Test-set accuracy (10,000 Fashion-MNIST test images, with labels):"
for m in "$here/models/garment_dense.onnx" "$here/models/garment_pruned90.onnx" "$out/garment_recovered.onnx"; do
  printf '%-28s ' "$(basename "$m")"
  "$recoup" eval "$m" --data "$data/t10k-images-idx3-ubyte.gz" --labels "$data/t10k-labels-idx1-ubyte.gz" \
    --scale 0.00392156862745098 --json | sed -n 's/.*"top1_accuracy":[[:space:]]*\([0-9.]*\).*/\1/p'
done
