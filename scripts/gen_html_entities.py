#!/usr/bin/env python3
"""Writes src/mail/html/entities.rs, the table of HTML named character references.

The table is the WHATWG HTML Living Standard list of named character references as Python
ships it in `html.entities.html5`. Output is deterministic: entries sorted by name bytes, every
character outside printable ASCII written as a `\\u{...}` escape, so regenerating with another
Python version only changes the file when the list itself changed.

Usage (from the repository root):

    python3 scripts/gen_html_entities.py > src/mail/html/entities.rs
"""

import html.entities
import sys


def rust_str(value):
    out = []
    for ch in value:
        code = ord(ch)
        if ch == '"' or ch == "\\":
            out.append("\\" + ch)
        elif 0x20 <= code < 0x7F:
            out.append(ch)
        else:
            out.append("\\u{%X}" % code)
    return '"' + "".join(out) + '"'


def main():
    table = html.entities.html5
    names = sorted(table, key=lambda name: name.encode("ascii"))
    legacy = [name for name in names if not name.endswith(";")]
    w = sys.stdout.write
    w("//! Named character references of the WHATWG HTML Living Standard.\n")
    w("//!\n")
    w("//! GENERATED FILE, do not edit. Regenerate from the repository root with\n")
    w("//! `python3 scripts/gen_html_entities.py > src/mail/html/entities.rs`; the source is\n")
    w("//! Python's `html.entities.html5`, so the table matches what `html.unescape` uses.\n")
    w("\n")
    w("/// Longest name in [`ENTITIES`], counting its `;`.\n")
    w("pub(crate) const MAX_NAME_LEN: usize = %d;\n" % max(map(len, names)))
    w("\n")
    w("/// Longest legacy name, one the standard also accepts without a trailing `;`.\n")
    w("pub(crate) const MAX_LEGACY_LEN: usize = %d;\n" % max(map(len, legacy)))
    w("\n")
    w("/// `(name, replacement)` sorted by name bytes, for binary search. A name is written\n")
    w("/// without its `&`; legacy names appear twice, with and without the `;`.\n")
    w("pub(crate) static ENTITIES: [(&str, &str); %d] = [\n" % len(names))
    for name in names:
        w("    (%s, %s),\n" % (rust_str(name), rust_str(table[name])))
    w("];\n")


if __name__ == "__main__":
    main()
