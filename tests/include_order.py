#!/usr/bin/python3
"""Fail when a file in src/ includes a layer that is not below its own.

The layers, lowest first (DEVELOPERS.md, "Where things live"):

    core -> ir -> {onnx, data, ops} -> plan -> {train, compress} -> api -> cli

A file may include headers of its own folder and of any layer on a lower
level. Layers that share a level (onnx, data and ops; train and compress) are
not below each other, so they may not include each other either. The public
headers in include/recoup/ may be included from anywhere and may themselves
include only public headers. The command-line tool (src/cli) is a client of
the public API: it may include only recoup/ public headers and its own cli/
headers. Every quoted include must name a file in src/ or include/, except
the headers generated at build time listed in GENERATED.

Usage: include_order.py SOURCE_DIR
Prints every violation as file:line, the include and both layers, and exits 1
when there is one.
"""
import os
import re
import sys

LEVEL = {
    "core": 0,
    "ir": 1,
    "onnx": 2, "data": 2, "ops": 2,
    "plan": 3,
    "train": 4, "compress": 4,
    "api": 5,
    "cli": 6,
}
# protobuf-c code generated from the ONNX standard's onnx.proto into the build
# folder: an external library's interface, not a file of the onnx layer.
GENERATED = {"onnx/onnx.pb-c.h"}
INCLUDE = re.compile(r'^\s*#\s*include\s*"([^"]+)"')


def layer_of(rel):
    """Layer folder of a path relative to src/, or None."""
    head = rel.split("/", 1)[0]
    return head if "/" in rel else None


def check_file(root, path, own, problems):
    """Check one file; own is its layer, or "recoup" for a public header."""
    count = 0
    with open(path, encoding="utf-8") as f:
        for lineno, line in enumerate(f, 1):
            m = INCLUDE.match(line)
            if not m:
                continue
            count += 1
            inc = m.group(1)
            where = f"{os.path.relpath(path, root)}:{lineno}"
            if inc.startswith("recoup/"):
                if not os.path.isfile(os.path.join(root, "include", inc)):
                    problems.append(f"{where}: #include \"{inc}\": no such public header in include/")
                continue
            if own == "recoup":
                problems.append(f"{where}: #include \"{inc}\": a public header may include only "
                                f"recoup/ headers")
                continue
            if inc in GENERATED:
                continue
            if own == "cli" and not inc.startswith("cli/"):
                problems.append(f"{where}: #include \"{inc}\": the command-line tool uses only the "
                                f"public API (include/recoup/) and its own cli/ headers")
                continue
            target = layer_of(inc)
            if target is None or not os.path.isfile(os.path.join(root, "src", inc)):
                problems.append(f"{where}: #include \"{inc}\": not a file of a layer in src/ "
                                f"(write includes as \"<layer>/<file>.h\")")
                continue
            if target not in LEVEL:
                problems.append(f"{where}: #include \"{inc}\": folder src/{target} is not in the "
                                f"layer order (add it to tests/include_order.py and DEVELOPERS.md)")
                continue
            if target != own and LEVEL[target] >= LEVEL[own]:
                how = "the same level as" if LEVEL[target] == LEVEL[own] else "above"
                problems.append(f"{where}: #include \"{inc}\": layer {own} (level {LEVEL[own]}) "
                                f"includes layer {target} (level {LEVEL[target]}), which is {how} it")
    return count


def main():
    if len(sys.argv) != 2:
        sys.exit("usage: include_order.py SOURCE_DIR")
    root = sys.argv[1]
    problems = []
    files = includes = 0
    src = os.path.join(root, "src")
    for dirpath, _, names in sorted(os.walk(src)):
        for name in sorted(names):
            if not name.endswith((".c", ".h")):
                continue
            path = os.path.join(dirpath, name)
            own = layer_of(os.path.relpath(path, src))
            if own not in LEVEL:
                problems.append(f"{os.path.relpath(path, root)}: folder src/{own} is not in the "
                                f"layer order (add it to tests/include_order.py and DEVELOPERS.md)")
                continue
            files += 1
            includes += check_file(root, path, own, problems)
    pub = os.path.join(root, "include", "recoup")
    for name in sorted(os.listdir(pub)):
        if name.endswith(".h"):
            files += 1
            includes += check_file(root, os.path.join(pub, name), "recoup", problems)
    print(f"checked {includes} quoted includes in {files} files against the order "
          f"core -> ir -> {{onnx, data, ops}} -> plan -> {{train, compress}} -> api -> cli")
    if files == 0 or includes == 0:
        print("FAIL: nothing to check (wrong SOURCE_DIR?)")
        return 1
    for p in problems:
        print(p)
    if problems:
        print(f"FAIL: {len(problems)} include(s) against the layer order")
        return 1
    print("OK: every include points to the file's own layer or one below it")
    return 0


if __name__ == "__main__":
    sys.exit(main())
