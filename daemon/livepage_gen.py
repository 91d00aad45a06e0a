#!/usr/bin/env python3
"""Generate daemon/livepage.c from daemon/livepage.html.

The page is kept as a readable HTML file; the daemon serves it from a C
string so the binary needs no files at run time.  Run this after editing
the HTML and commit both files (test_status checks they agree):

    python3 daemon/livepage_gen.py
"""
import os
import sys

here = os.path.dirname(os.path.abspath(__file__))
src = os.path.join(here, "livepage.html")
dst = os.path.join(here, "livepage.c")


def c_line(line: bytes) -> str:
    out = []
    prev = ""
    for b in line:
        c = chr(b)
        if c == "\\":
            out.append("\\\\")
        elif c == '"':
            out.append('\\"')
        elif c == "\n":
            out.append("\\n")
        elif c == "\t":
            out.append("\\t")
        elif c == "?" and prev == "?":
            out.append("\\?")  # no trigraphs
        elif 0x20 <= b < 0x7F:
            out.append(c)
        else:
            out.append("\\%03o" % b)
        prev = c
    return '"' + "".join(out) + '"'


def main() -> int:
    with open(src, "rb") as f:
        data = f.read()
    lines = data.splitlines(keepends=True)
    body = "\n".join("    " + c_line(l) for l in lines) or '    ""'
    text = (
        "/*\n"
        " * livepage.c - GENERATED from daemon/livepage.html by\n"
        " * daemon/livepage_gen.py; edit the HTML and rerun the script.\n"
        " */\n"
        '#include "livepage.h"\n\n'
        "const char livepage_html[] =\n" + body + ";\n\n"
        "const size_t livepage_html_len = sizeof livepage_html - 1;\n"
    )
    with open(dst, "w") as f:
        f.write(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
