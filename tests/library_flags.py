#!/usr/bin/python3
"""Fail when library code names a command-line option in a string literal.

The library (every .c and .h file under src/ except src/cli/) names a setting
in its own words, the public API's field or concept ("output loss", "targets
for output 'x'", "augmentation item"); the command-line tool puts the option a
value came from in front of the library's message (cli_option_context in
src/cli/cli_util.c). A literal holding "--" followed by a letter, such as
"--augment" or "--output-loss", is what this test refuses. Comments are not
checked: they may say which option feeds a setting.

Usage: library_flags.py SOURCE_DIR
Prints every offending literal as file:line and the literal, and exits 1 when
there is one.
"""
import os
import re
import sys

# Files allowed to name an option, with the reason; kept empty.
EXCEPTIONS = {}

OPTION = re.compile(r"--[A-Za-z]")


def literals(text):
    """Yield (line, literal body) of every string literal outside comments."""
    i, line, n = 0, 1, len(text)
    while i < n:
        c = text[i]
        if text.startswith("/*", i):
            end = text.find("*/", i + 2)
            end = n if end < 0 else end + 2
            line += text.count("\n", i, end)
            i = end
        elif text.startswith("//", i):
            end = text.find("\n", i)
            i = n if end < 0 else end
        elif c == "'":  # a character constant: skip it whole ('"' among them)
            j = i + 1
            while j < n and text[j] != "'":
                j += 2 if text[j] == "\\" else 1
            i = j + 1
        elif c == '"':
            j, start = i + 1, line
            while j < n and text[j] != '"':
                j += 2 if text[j] == "\\" else 1
            yield start, text[i + 1:j]
            i = j + 1
        else:
            line += c == "\n"
            i += 1


def main():
    if len(sys.argv) != 2:
        sys.exit("usage: library_flags.py SOURCE_DIR")
    root = sys.argv[1]
    src = os.path.join(root, "src")
    problems, files, count = [], 0, 0
    for dirpath, dirs, names in os.walk(src):
        dirs.sort()
        if os.path.relpath(dirpath, src).split(os.sep)[0] == "cli":
            continue
        for name in sorted(names):
            if not name.endswith((".c", ".h")):
                continue
            path = os.path.join(dirpath, name)
            rel = os.path.relpath(path, root)
            if rel in EXCEPTIONS:
                continue
            files += 1
            with open(path, encoding="utf-8") as f:
                for lineno, body in literals(f.read()):
                    count += 1
                    if OPTION.search(body):
                        problems.append(f"{rel}:{lineno}: \"{body}\" names a command-line option")
    print(f"checked {count} string literals in {files} library files under src/ (src/cli/ excluded)")
    if files == 0 or count == 0:
        print("FAIL: nothing to check (wrong SOURCE_DIR?)")
        return 1
    for p in problems:
        print(p)
    if problems:
        print(f"FAIL: {len(problems)} literal(s) name a command-line option; say it in the library's words and "
              f"let src/cli/ add the option (cli_option_context)")
        return 1
    print("OK: no library string literal names a command-line option")
    return 0


if __name__ == "__main__":
    sys.exit(main())
