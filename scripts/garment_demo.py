"""Shared pieces of the garment-sorting demo: the Fashion-MNIST reader, the
network, evaluation, ONNX export and loading ONNX weights back into torch.

Run with Debian's /usr/bin/python3 (python3-torch, python3-onnx, python3-numpy).
Data: Fashion-MNIST (Xiao, Rasul, Vollgraf 2017), Debian package
dataset-fashion-mnist, gzipped IDX files in /usr/share/datasets/fashion-mnist.
"""

import gzip
import os
import struct

import numpy as np
import torch
import torch.nn as nn

DATA_DIR = os.environ.get("RECOUP_FASHION_MNIST", "/usr/share/datasets/fashion-mnist")
CLASSES = ["t-shirt/top", "trouser", "pullover", "dress", "coat",
           "sandal", "shirt", "sneaker", "bag", "ankle boot"]
OPSET = 13
INPUT_NAME = "image"
OUTPUT_NAME = "logits"


def _read_idx(path, expect_magic):
    """IDX file (the format Fashion-MNIST is published in): big-endian magic,
    dimension sizes, then unsigned bytes."""
    with gzip.open(path, "rb") as f:
        raw = f.read()
    if len(raw) < 4:
        raise SystemExit(f"{path}: too short for an IDX header")
    magic = struct.unpack(">I", raw[:4])[0]
    if magic != expect_magic:
        raise SystemExit(f"{path}: IDX magic {magic:#x}, expected {expect_magic:#x}")
    ndim = magic & 0xFF
    dims = struct.unpack(">" + "I" * ndim, raw[4:4 + 4 * ndim])
    data = np.frombuffer(raw, dtype=np.uint8, offset=4 + 4 * ndim)
    if data.size != int(np.prod(dims)):
        raise SystemExit(f"{path}: {data.size} bytes of data, header says {dims}")
    return data.reshape(dims)


def load_split(split):
    """Images as float32 (N,1,28,28) scaled x/255 into [0,1], labels int64 (N,)."""
    prefix = "train" if split == "train" else "t10k"
    images = _read_idx(os.path.join(DATA_DIR, f"{prefix}-images-idx3-ubyte.gz"), 0x00000803)
    labels = _read_idx(os.path.join(DATA_DIR, f"{prefix}-labels-idx1-ubyte.gz"), 0x00000801)
    x = images.astype(np.float32)[:, None, :, :] / 255.0
    return x, labels.astype(np.int64)


class GarmentNet(nn.Module):
    """Three conv blocks (conv, batch norm, ReLU, max pool) and two dense
    layers: about 61k parameters, sized for a microcontroller-class device."""

    def __init__(self):
        super().__init__()
        self.conv1 = nn.Conv2d(1, 16, 3, padding=1)
        self.bn1 = nn.BatchNorm2d(16)
        self.conv2 = nn.Conv2d(16, 32, 3, padding=1)
        self.bn2 = nn.BatchNorm2d(32)
        self.conv3 = nn.Conv2d(32, 64, 3, padding=1)
        self.bn3 = nn.BatchNorm2d(64)
        self.pool = nn.MaxPool2d(2)
        self.relu = nn.ReLU()
        self.fc1 = nn.Linear(64 * 3 * 3, 64)
        self.fc2 = nn.Linear(64, 10)

    def forward(self, x):
        x = self.pool(self.relu(self.bn1(self.conv1(x))))  # (N,16,14,14)
        x = self.pool(self.relu(self.bn2(self.conv2(x))))  # (N,32,7,7)
        x = self.pool(self.relu(self.bn3(self.conv3(x))))  # (N,64,3,3)
        x = torch.flatten(x, 1)
        x = self.relu(self.fc1(x))
        return self.fc2(x)


@torch.no_grad()
def logits_of(model, x, batch=1000):
    model.eval()
    outs = [model(torch.from_numpy(x[i:i + batch])) for i in range(0, len(x), batch)]
    return torch.cat(outs).numpy()


def accuracy(model, x, y):
    return float((logits_of(model, x).argmax(1) == y).mean())


def export_onnx(model, path):
    """Opset 13, BatchNormalization kept as nodes (no folding into Conv) so
    that its parameters can be trained later; initializer names equal the
    state_dict names; dynamic batch dimension."""
    model.eval()
    dummy = torch.zeros(1, 1, 28, 28)
    tmp = path + ".tmp"
    torch.onnx.export(model, dummy, tmp, opset_version=OPSET,
                      training=torch.onnx.TrainingMode.PRESERVE,
                      do_constant_folding=False,
                      input_names=[INPUT_NAME], output_names=[OUTPUT_NAME],
                      dynamic_axes={INPUT_NAME: {0: "batch"}, OUTPUT_NAME: {0: "batch"}})
    os.replace(tmp, path)


def check_exported(path):
    """The checker passes and BatchNormalization survived the export."""
    import onnx
    m = onnx.load(path)
    onnx.checker.check_model(m)
    ops = [n.op_type for n in m.graph.node]
    if ops.count("BatchNormalization") != 3:
        raise SystemExit(f"{path}: expected 3 BatchNormalization nodes, graph has {ops}")
    return m


def model_from_onnx(path):
    """GarmentNet with every parameter and BN statistic taken from the ONNX
    file's initializers (names equal state_dict names, see export_onnx)."""
    import onnx
    from onnx import numpy_helper
    m = onnx.load(path)
    inits = {t.name: numpy_helper.to_array(t) for t in m.graph.initializer}
    net = GarmentNet()
    state = net.state_dict()
    for name, ref in state.items():
        if name.endswith("num_batches_tracked"):
            continue
        if name not in inits:
            raise SystemExit(f"{path}: initializer {name!r} missing")
        arr = inits[name]
        if tuple(arr.shape) != tuple(ref.shape):
            raise SystemExit(f"{path}: initializer {name!r} has shape {arr.shape}, expected {tuple(ref.shape)}")
        state[name] = torch.from_numpy(arr.copy())
    net.load_state_dict(state)
    net.eval()
    return net
