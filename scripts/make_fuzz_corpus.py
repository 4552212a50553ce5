#!/usr/bin/python3
"""Write the seed corpora for the fuzz targets in tests/fuzz.

Usage: /usr/bin/python3 scripts/make_fuzz_corpus.py [OUT_DIR]
(default tests/fuzz/corpus). Needs Debian's python3-numpy and python3-onnx.

Every seed is small. Seeds named refused_* are files recoup refuses with an
error (tests/test_fuzz_regressions.c checks both kinds). Every seed is small (a few KB at most) and made here from fixed values, so
the files are reproducible: numpy writes the .npy/.npz files (NumPy format
spec versions 1.0, 2.0 and 3.0), the onnx package builds the models and
TensorProto files, IDX files are laid out by hand from the format's
published description (magic 0 0 type rank, big-endian dims, then data).
"""

import gzip
import io
import os
import struct
import sys
import zipfile

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper


def write(path, data):
    os.makedirs(os.path.dirname(path), exist_ok=True)
    with open(path, "wb") as f:
        f.write(data)


def gz(data):
    buf = io.BytesIO()
    with gzip.GzipFile(fileobj=buf, mode="wb", mtime=0) as g:
        g.write(data)
    return buf.getvalue()


# ------------------------------------------------------------------ .npy

def npy_bytes(a, version=None):
    buf = io.BytesIO()
    np.lib.format.write_array(buf, a, version=version, allow_pickle=False)
    return buf.getvalue()


def npy_seeds(out):
    rng = np.random.default_rng(7)
    arrays = {
        "f32_2x3": rng.standard_normal((2, 3)).astype(np.float32),
        "u8_4x1x3x3": rng.integers(0, 255, (4, 1, 3, 3)).astype(np.uint8),
        "i64_5": np.arange(5, dtype=np.int64),
        # Refused by recoup with a clear error (the fuzzer mutates the refusal paths too).
        "refused_big_endian": rng.standard_normal((2, 2)).astype(">f8"),
        "f16_3": np.array([0.5, -1.0, 65504], dtype=np.float16),
        "bool_4": np.array([True, False, True, True]),
        "refused_fortran": np.asfortranarray(rng.integers(-128, 127, (3, 4)).astype(np.int8)),
        "f32_scalar": np.array(3.5, dtype=np.float32),
        "i32_empty": np.zeros((0, 4), dtype=np.int32),
    }
    for name, a in arrays.items():
        write(os.path.join(out, "npy", name + ".npy"), npy_bytes(a))
    a = arrays["f32_2x3"]
    write(os.path.join(out, "npy", "f32_v2.npy"), npy_bytes(a, (2, 0)))
    write(os.path.join(out, "npy", "f32_v3.npy"), npy_bytes(a, (3, 0)))


# ------------------------------------------------------------------ .npz

def npz_seeds(out):
    rng = np.random.default_rng(8)
    x = rng.standard_normal((3, 1, 2, 2)).astype(np.float32)
    y = np.array([0, 2, 1], dtype=np.int64)
    for name, fn in (("stored", np.savez), ("deflated", np.savez_compressed)):
        buf = io.BytesIO()
        fn(buf, x=x, labels=y)
        write(os.path.join(out, "npz", name + ".npz"), buf.getvalue())
    # One member, written through zipfile with zip64 extensions forced.
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_STORED) as z:
        with z.open("only.npy", "w", force_zip64=True) as f:
            f.write(npy_bytes(np.arange(6, dtype=np.uint8).reshape(2, 3)))
    write(os.path.join(out, "npz", "zip64.npz"), buf.getvalue())


# ------------------------------------------------------------------ IDX

IDX_TYPES = {np.dtype(np.uint8): 0x08, np.dtype(np.int8): 0x09, np.dtype(">i2"): 0x0B,
             np.dtype(">i4"): 0x0C, np.dtype(">f4"): 0x0D, np.dtype(">f8"): 0x0E}


def idx_bytes(a):
    head = bytes([0, 0, IDX_TYPES[a.dtype], a.ndim]) + b"".join(struct.pack(">I", d) for d in a.shape)
    return head + a.tobytes()


def idx_seeds(out):
    rng = np.random.default_rng(9)
    images = rng.integers(0, 255, (3, 4, 4)).astype(np.uint8)
    labels = np.array([1, 0, 9], dtype=np.uint8)
    write(os.path.join(out, "idx", "images_u8.idx"), idx_bytes(images))
    write(os.path.join(out, "idx", "labels_u8.idx"), idx_bytes(labels))
    write(os.path.join(out, "idx", "images_u8.idx.gz"), gz(idx_bytes(images)))
    write(os.path.join(out, "idx", "f32.idx"), idx_bytes(rng.standard_normal((2, 3)).astype(">f4")))
    write(os.path.join(out, "idx", "i32.idx"), idx_bytes(np.arange(-3, 3).astype(">i4")))
    write(os.path.join(out, "idx", "i16.idx.gz"), gz(idx_bytes(np.arange(4).astype(">i2"))))
    write(os.path.join(out, "idx", "f64.idx"), idx_bytes(np.array([1.5, -2.0]).astype(">f8")))
    write(os.path.join(out, "idx", "i8.idx"), idx_bytes(np.array([-1, 2, -3], dtype=np.int8)))


# ------------------------------------------------------------------ TensorProto

def tensorproto_seeds(out):
    rng = np.random.default_rng(10)
    raw = {
        "f32_raw": rng.standard_normal((2, 3)).astype(np.float32),
        "i64_raw": np.array([1, -2, 3], dtype=np.int64),
        "u8_raw": np.arange(8, dtype=np.uint8).reshape(2, 4),
        "f16_raw": np.array([1.0, -0.5], dtype=np.float16),
        "bool_raw": np.array([True, False]),
    }
    for name, a in raw.items():
        write(os.path.join(out, "tensorproto", name + ".pb"),
              numpy_helper.from_array(a, name).SerializeToString())
    typed = [
        helper.make_tensor("f32_typed", TensorProto.FLOAT, [2, 2], [1.0, 2.0, -3.0, 0.25]),
        helper.make_tensor("i32_typed", TensorProto.INT32, [3], [7, -8, 9]),
        helper.make_tensor("i8_typed", TensorProto.INT8, [2], [-128, 127]),
        helper.make_tensor("i64_typed", TensorProto.INT64, [2], [1 << 40, -5]),
        helper.make_tensor("f64_typed", TensorProto.DOUBLE, [1], [2.5]),
        helper.make_tensor("scalar", TensorProto.FLOAT, [], [4.0]),
    ]
    if hasattr(TensorProto, "INT4"):
        typed.append(helper.make_tensor("i4_typed", TensorProto.INT4, [3], [-8, 7, 1]))
    for t in typed:
        write(os.path.join(out, "tensorproto", t.name + ".pb"), t.SerializeToString())


# ------------------------------------------------------------------ ONNX models

def init(name, a):
    return numpy_helper.from_array(np.asarray(a), name)


def model(nodes, inputs, outputs, inits, opset=13, name="seed"):
    g = helper.make_graph(nodes, name, inputs, outputs, inits)
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", opset)], producer_name="recoup-fuzz-seed")
    m.ir_version = 7 if opset <= 15 else 8
    onnx.checker.check_model(m)
    return m.SerializeToString()


def vi(name, shape, dtype=TensorProto.FLOAT):
    return helper.make_tensor_value_info(name, dtype, shape)


def onnx_seeds(out):
    rng = np.random.default_rng(11)
    f = lambda *s: rng.standard_normal(s).astype(np.float32) * 0.5
    seeds = {}
    # A small CNN: Conv, BatchNormalization, Relu, MaxPool, GlobalAveragePool, Flatten, Gemm, Softmax.
    seeds["cnn_op13"] = model(
        [helper.make_node("Conv", ["x", "w", "b"], ["c"], pads=[1, 1, 1, 1], name="conv"),
         helper.make_node("BatchNormalization", ["c", "g", "be", "mu", "var"], ["n"], name="bn"),
         helper.make_node("Relu", ["n"], ["r"]),
         helper.make_node("MaxPool", ["r"], ["p"], kernel_shape=[2, 2], strides=[2, 2]),
         helper.make_node("GlobalAveragePool", ["p"], ["gap"]),
         helper.make_node("Flatten", ["gap"], ["fl"]),
         helper.make_node("Gemm", ["fl", "fw", "fb"], ["logits"], transB=1),
         helper.make_node("Softmax", ["logits"], ["y"], axis=-1)],
        [vi("x", ["N", 1, 6, 6])], [vi("y", ["N", 3])],
        [init("w", f(2, 1, 3, 3)), init("b", f(2)), init("g", np.ones(2, np.float32)),
         init("be", f(2)), init("mu", f(2)), init("var", np.ones(2, np.float32)),
         init("fw", f(3, 2)), init("fb", f(3))])
    # Shape arithmetic: Shape, Gather, Concat, Reshape, Transpose, MatMul, Add.
    seeds["shape_op17"] = model(
        [helper.make_node("Shape", ["x"], ["s"]),
         helper.make_node("Gather", ["s", "i0"], ["n"], axis=0),
         helper.make_node("Concat", ["n", "m1"], ["tgt"], axis=0),
         helper.make_node("Reshape", ["x", "tgt"], ["flat"]),
         helper.make_node("MatMul", ["flat", "w"], ["mm"]),
         helper.make_node("Add", ["mm", "b"], ["a"]),
         helper.make_node("Transpose", ["a"], ["y"], perm=[1, 0])],
        [vi("x", ["N", 2, 2])], [vi("y", [3, "N"])],
        [init("i0", np.array([0], np.int64)), init("m1", np.array([-1], np.int64)),
         init("w", f(4, 3)), init("b", f(3))], opset=17)
    # QDQ: a quantized weight with per-channel scales, activations fake-quantized.
    wq = rng.integers(-100, 100, (2, 1, 1, 1)).astype(np.int8)
    seeds["qdq_op13"] = model(
        [helper.make_node("QuantizeLinear", ["x", "xs", "xz"], ["xq"]),
         helper.make_node("DequantizeLinear", ["xq", "xs", "xz"], ["xd"]),
         helper.make_node("DequantizeLinear", ["wq", "ws", "wz"], ["wd"], axis=0),
         helper.make_node("Conv", ["xd", "wd"], ["y"])],
        [vi("x", [1, 1, 3, 3])], [vi("y", [1, 2, 3, 3])],
        [init("xs", np.array(0.05, np.float32)), init("xz", np.array(3, np.uint8)),
         init("wq", wq), init("ws", np.array([0.01, 0.02], np.float32)),
         init("wz", np.zeros(2, np.int8))])
    # Reduce, Resize, Pad, Clip, Mul, Sigmoid, Equal, Where.
    seeds["misc_op13"] = model(
        [helper.make_node("Resize", ["x", "", "sc"], ["up"], mode="nearest"),
         helper.make_node("Pad", ["up", "pads"], ["pd"], mode="reflect"),
         helper.make_node("Sigmoid", ["pd"], ["sg"]),
         helper.make_node("Mul", ["pd", "sg"], ["sw"]),
         helper.make_node("Clip", ["sw", "lo", "hi"], ["cl"]),
         helper.make_node("ReduceMean", ["cl"], ["rm"], axes=[2, 3], keepdims=1),
         helper.make_node("Equal", ["rm", "lo"], ["gt"]),
         helper.make_node("Where", ["gt", "rm", "lo"], ["y"])],
        [vi("x", [1, 2, 2, 2])], [vi("y", [1, 2, 1, 1])],
        [init("sc", np.array([1, 1, 2, 2], np.float32)), init("pads", np.array([0, 0, 1, 1, 0, 0, 1, 1], np.int64)),
         init("lo", np.array(0.0, np.float32)), init("hi", np.array(6.0, np.float32))])
    # Norms and pooling: LayerNormalization (opset 17), AveragePool, ConvTranspose.
    seeds["norm_op17"] = model(
        [helper.make_node("ConvTranspose", ["x", "w"], ["ct"], strides=[2, 2]),
         helper.make_node("AveragePool", ["ct"], ["ap"], kernel_shape=[2, 2]),
         helper.make_node("LayerNormalization", ["ap", "g", "b"], ["y"], axis=-1)],
        [vi("x", [1, 2, 2, 2])], [vi("y", [1, 1, 3, 3])],
        [init("w", f(2, 1, 2, 2)), init("g", np.ones(3, np.float32)), init("b", np.zeros(3, np.float32))],
        opset=17)
    # Integer shape chains and views: ConstantOfShape, Expand, Slice, Split,
    # Tile, Cast, then pointwise Erf, Pow, PRelu, Dropout, InstanceNormalization, LogSoftmax.
    seeds["views_op13"] = model(
        [helper.make_node("ConstantOfShape", ["shp"], ["ones"], value=helper.make_tensor("v", TensorProto.FLOAT, [1], [1.0])),
         helper.make_node("Expand", ["x", "shp"], ["ex"]),
         helper.make_node("Mul", ["ex", "ones"], ["m"]),
         helper.make_node("Slice", ["m", "st", "en", "ax"], ["sl"]),
         helper.make_node("Split", ["sl", "parts"], ["s0", "s1"], axis=1),
         helper.make_node("Tile", ["s0", "reps"], ["t"]),
         helper.make_node("Cast", ["t"], ["c"], to=TensorProto.FLOAT),
         helper.make_node("Erf", ["c"], ["er"]),
         helper.make_node("Pow", ["er", "two"], ["pw"]),
         helper.make_node("PRelu", ["pw", "slope"], ["pr"]),
         helper.make_node("Dropout", ["pr"], ["dr"]),
         helper.make_node("InstanceNormalization", ["dr", "isc", "ib"], ["inn"]),
         helper.make_node("LogSoftmax", ["inn"], ["y"], axis=1)],
        [vi("x", [1, 4, 1, 2])], [vi("y", [1, 2, 3, 2])],
        [init("shp", np.array([1, 4, 3, 2], np.int64)), init("st", np.array([0], np.int64)),
         init("en", np.array([3], np.int64)), init("ax", np.array([2], np.int64)),
         init("parts", np.array([2, 2], np.int64)), init("reps", np.array([1, 1, 1, 1], np.int64)),
         init("two", np.array(2.0, np.float32)), init("slope", f(2, 1, 1)),
         init("isc", np.ones(2, np.float32)), init("ib", np.zeros(2, np.float32))])
    for name, data in seeds.items():
        write(os.path.join(out, "onnx", name + ".onnx"), data)


# ------------------------------------------------------------------ images
def image_seeds(out):
    """Small PNG and JPEG files written by Debian's python3-pil: the colour types and
    bit depths libpng expands (gray, RGB, RGBA, palette, 1-bit, 16-bit, interlaced) and
    baseline, progressive and grayscale JPEG; refused_* are cut in half."""
    from PIL import Image
    rng = np.random.default_rng(5)
    rgb = Image.fromarray(rng.integers(0, 256, (12, 10, 3), dtype=np.uint8), "RGB")
    gray = rgb.convert("L")
    seeds = {}

    def save(name, img, **kw):
        buf = io.BytesIO()
        img.save(buf, **kw)
        seeds[name] = buf.getvalue()

    save("rgb.png", rgb, format="PNG")
    save("gray.png", gray, format="PNG")
    save("rgba.png", rgb.convert("RGBA"), format="PNG")
    save("palette.png", rgb.convert("P", palette=Image.Palette.ADAPTIVE, colors=16), format="PNG")
    save("bits1.png", gray.convert("1"), format="PNG")
    save("gray16.png", Image.fromarray((np.asarray(gray, np.uint16) * 257), "I;16"), format="PNG")
    save("rgb.jpg", rgb, format="JPEG", quality=80)
    save("gray.jpg", gray, format="JPEG", quality=80)
    save("progressive.jpg", rgb, format="JPEG", quality=80, progressive=True)
    seeds["refused_truncated.jpg"] = seeds["rgb.jpg"][:len(seeds["rgb.jpg"]) // 2]
    seeds["refused_truncated.png"] = seeds["rgb.png"][:len(seeds["rgb.png"]) // 2]
    for name, data in seeds.items():
        write(os.path.join(out, "image", name), data)


def main():
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    out = sys.argv[1] if len(sys.argv) > 1 else os.path.join(root, "tests", "fuzz", "corpus")
    npy_seeds(out)
    npz_seeds(out)
    idx_seeds(out)
    tensorproto_seeds(out)
    onnx_seeds(out)
    image_seeds(out)
    total = 0
    for d, _, files in os.walk(out):
        for fn in files:
            total += os.path.getsize(os.path.join(d, fn))
    print(f"fuzz corpus written to {out}: {total} bytes")


if __name__ == "__main__":
    main()
