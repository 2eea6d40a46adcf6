#!/usr/bin/env python3
"""Replay the normative conversations of proto/vectors/ through the codec.

For every frame line of every conversation file: decode the hex frame with
tamis_client.decode_frame, re-encode it with tamis_client.encode_frame and
check the bytes are identical (and that the frame's kind matches the line's
direction).  The last line printed is ``N passed, M failed``; the exit status
is non-zero when anything failed (or nothing was found).

Usage: python3 replay_vectors.py [VECTORS_DIR] [-v]
"""

from __future__ import annotations

import os
import re
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import tamis_client as tc  # noqa: E402

DEFAULT_DIR = os.path.join(os.path.dirname(os.path.abspath(__file__)),
                           "..", "..", "proto", "vectors")

# A frame line: a direction marker, then the frame in hex (spaces allowed).
_DIRECTIONS = {
    "c": "c2s", "C": "c2s", ">": "c2s", "->": "c2s", "c>": "c2s", "C>": "c2s",
    "client": "c2s", "c2s": "c2s",
    "s": "s2c", "S": "s2c", "<": "s2c", "<-": "s2c", "s>": "s2c", "S>": "s2c",
    "server": "s2c", "s2c": "s2c",
}
_LINE = re.compile(r"^\s*(?P<dir>[A-Za-z0-9<>\-]+?)\s*:?\s+(?P<hex>[0-9A-Fa-f][0-9A-Fa-f\s]*?)\s*(?:#.*)?$")


def parse_line(line: str) -> tuple[str | None, bytes] | None:
    """Return (direction, frame bytes) for a frame line, None for anything
    else (blank lines, comments)."""
    s = line.strip()
    if not s or s.startswith("#"):
        return None
    m = _LINE.match(s)
    if m and m.group("dir") in _DIRECTIONS:
        return _DIRECTIONS[m.group("dir")], bytes.fromhex(re.sub(r"\s+", "", m.group("hex")))
    raise ValueError(f"unrecognised line: {s[:60]!r}")


def conversation_files(folder: str) -> list[str]:
    out = []
    for root, _dirs, files in os.walk(folder):
        for name in files:
            if name.lower().startswith("readme") or name.startswith("."):
                continue
            out.append(os.path.join(root, name))
    return sorted(out)


def check_frame(direction: str | None, data: bytes) -> None:
    frame, used = tc.decode_frame(data, direction=direction)
    if used != len(data):
        raise AssertionError(f"{len(data) - used} byte(s) after the frame")
    again = tc.encode_frame(frame)
    if again != data:
        raise AssertionError(f"re-encoded {again.hex()} != {data.hex()}")


def main(argv: list[str]) -> int:
    verbose = "-v" in argv
    args = [a for a in argv if a != "-v"]
    folder = os.path.normpath(args[0] if args else DEFAULT_DIR)
    passed = failed = 0
    if not os.path.isdir(folder):
        print(f"no vectors folder at {folder}")
        print("0 passed, 1 failed")
        return 1
    for path in conversation_files(folder):
        rel = os.path.relpath(path, folder)
        with open(path, encoding="utf-8") as fh:
            for lineno, line in enumerate(fh, 1):
                try:
                    parsed = parse_line(line)
                    if parsed is None:
                        continue
                    check_frame(*parsed)
                except Exception as exc:  # noqa: BLE001 - report every failure
                    failed += 1
                    print(f"FAIL {rel}:{lineno}: {type(exc).__name__}: {exc}")
                    continue
                passed += 1
                if verbose:
                    print(f"ok   {rel}:{lineno}")
    if passed + failed == 0:
        print(f"no frames found under {folder}")
        failed = 1
    print(f"{passed} passed, {failed} failed")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
