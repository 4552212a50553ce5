#!/usr/bin/python3
"""Run the onnx package's checker (onnx.checker.check_model, full check with
shape inference) on each file; exit non-zero with the checker's message on the
first failure. Use Debian's /usr/bin/python3 (python3-onnx).

Usage: /usr/bin/python3 scripts/check_onnx.py FILE.onnx [FILE.onnx ...]
"""

import sys

import onnx


def check(path):
    try:
        # A path (not a loaded model) lets the checker handle models over 2 GB
        # and external data relative to the file's folder.
        onnx.checker.check_model(path, full_check=True)
    except Exception as err:  # the checker raises several exception types
        msg = " ".join(str(err).split())
        return f"{path}: {type(err).__name__}: {msg}"
    return None


def main(argv):
    if len(argv) < 2 or argv[1] in ("-h", "--help"):
        print(__doc__.strip().splitlines()[-1], file=sys.stderr)
        return 2
    for path in argv[1:]:
        err = check(path)
        if err:
            print(err, file=sys.stderr)
            return 1
        print(f"{path}: ok (onnx {onnx.__version__} checker)")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
