#!/usr/bin/python3
"""Check that the installed librecoup.so exports exactly the public API.

The public API is every function declared with RC_API in include/recoup/*.h.
`nm -D --defined-only` on the installed shared library must list each of
them and nothing else (every internal symbol hidden). Also checks that the
library has a SONAME and that the static library and recoup.pc are installed.

Usage: exported_symbols.py INCLUDE_RECOUP_DIR PREFIX
"""
import glob
import os
import re
import subprocess
import sys

DECL = re.compile(r"RC_API\s+[^;{]*?\b(rc_[a-z0-9_]+)\s*\(", re.S)


def public_names(include_dir):
    names = set()
    for path in sorted(glob.glob(os.path.join(include_dir, "*.h"))):
        with open(path, encoding="utf-8") as f:
            text = re.sub(r"/\*.*?\*/", "", f.read(), flags=re.S)
        names.update(DECL.findall(text))
    return names


def main():
    if len(sys.argv) != 3:
        sys.exit("usage: exported_symbols.py INCLUDE_RECOUP_DIR PREFIX")
    include_dir, prefix = sys.argv[1], sys.argv[2]
    declared = public_names(include_dir)
    libs = sorted(p for p in glob.glob(os.path.join(prefix, "lib*", "**", "librecoup.so.*"), recursive=True)
                  if not os.path.islink(p))
    statics = glob.glob(os.path.join(prefix, "lib*", "**", "librecoup.a"), recursive=True)
    pcs = glob.glob(os.path.join(prefix, "lib*", "**", "recoup.pc"), recursive=True)
    print(f"declared with RC_API in {include_dir}: {len(declared)} functions")
    print(f"installed: shared {libs}, static {statics}, pkg-config {pcs}")
    if len(declared) < 20 or not libs or not statics or not pcs:
        print("FAIL: headers without RC_API declarations, or the shared library, static library or recoup.pc missing")
        return 1
    so = libs[0]
    out = subprocess.run(["nm", "-D", "--defined-only", so], check=True, capture_output=True, text=True).stdout
    exported = set()
    for line in out.splitlines():
        parts = line.split()
        if len(parts) == 3 and parts[1] in "TtDdBbRrWwVvi":
            exported.add(parts[2].split("@")[0])
    dyn = subprocess.run(["readelf", "-d", so], check=True, capture_output=True, text=True).stdout
    soname = re.search(r"Library soname: \[([^\]]+)\]", dyn)
    print(f"{so}: SONAME {soname.group(1) if soname else '(none)'}, {len(exported)} exported symbols")
    extra = sorted(exported - declared)
    missing = sorted(declared - exported)
    ok = True
    if extra:
        print(f"FAIL: {len(extra)} exported symbol(s) not declared with RC_API: {' '.join(extra)}")
        ok = False
    if missing:
        print(f"FAIL: {len(missing)} RC_API function(s) not exported: {' '.join(missing)}")
        ok = False
    if not soname:
        print("FAIL: librecoup.so has no SONAME")
        ok = False
    if ok:
        print(f"OK: exported == declared ({len(exported)} names), SONAME {soname.group(1)}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
