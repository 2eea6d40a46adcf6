#!/usr/bin/env python3
"""Replay the normative conversations of proto/vectors/ through the codec.

Format (proto/vectors/README.md): one frame per line, ``C: <hex>  # comment``
for a frame the client sends, ``S: <hex>  # comment`` for one the server
sends; spaces in the hex are for reading only; ``#`` starts a comment; blank
and comment-only lines carry no frame.

For every frame line:

* decode it with ``tamis_client.decode_frame`` (the receiver's ``max_frame``
  applied: the server's from WELCOME for ``C:`` lines, 65,536 before it; the
  client's from HELLO for ``S:`` lines), re-encode it with
  ``tamis_client.encode_frame`` and require identical bytes;
* if the comment starts with a frame name (``HELLO``, ``SEAL``, ...), require
  the decoded frame to have that name;
* a ``C:`` line the decoder refuses is one of the deliberately broken lines:
  it passes only when the next frame line is ``S:`` FAULT, fatal, with the
  code the decoder gave (MALFORMED, UNKNOWN_KIND, FRAME_TOO_LARGE, ...);
* the §6 state machine is followed for ``C:`` lines: a frame it finds out of
  order passes only when the server answers FAULT OUT_OF_ORDER, and a FAULT
  OUT_OF_ORDER answer must follow a frame it finds out of order.

The last line printed is ``N passed, M failed`` (one count per frame line);
the exit status is non-zero when anything failed or no frame was found.

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
DEFAULT_SERVER_MAX_FRAME = 65536          # §3 default
_LINE = re.compile(r"^(?P<dir>[CS]):\s*(?P<hex>[0-9a-fA-F ]+?)\s*$")


class Line:
    def __init__(self, lineno: int, direction: str, data: bytes, comment: str):
        self.lineno = lineno
        self.direction = direction        # "c2s" or "s2c"
        self.data = data
        self.comment = comment


def parse_file(path: str) -> list[Line]:
    out = []
    with open(path, encoding="utf-8") as fh:
        for lineno, raw in enumerate(fh, 1):
            text, _, comment = raw.partition("#")
            text = text.strip()
            if not text:
                continue
            m = _LINE.match(text)
            if not m:
                raise ValueError(f"{os.path.basename(path)}:{lineno}: not a frame line: {text[:50]!r}")
            hexpart = m.group("hex")
            if any(len(tok) % 2 for tok in hexpart.split()):
                raise ValueError(f"{os.path.basename(path)}:{lineno}: a space splits a byte")
            out.append(Line(lineno, "c2s" if m.group("dir") == "C" else "s2c",
                            bytes.fromhex(hexpart.replace(" ", "")), comment.strip()))
    return out


class StateModel:
    """The server's view of §6, enough to tell which client frames are
    OUT_OF_ORDER."""

    def __init__(self) -> None:
        self.state = "start"

    def allowed(self, kind: int) -> bool:
        st = self.state
        if st == "start":
            return kind == tc.HELLO
        if st == "closed":
            return False
        if kind == tc.PING:
            return True                                  # every state after the handshake
        table = {
            "ready": {tc.PEER, tc.SENDER, tc.BYE},
            "peer": {tc.SENDER},
            "envelope": {tc.RECIPIENT, tc.DROP},
            "open": {tc.RECIPIENT, tc.FIELD, tc.CHUNK, tc.SEAL, tc.DROP},
            "fields": {tc.FIELD, tc.CHUNK, tc.SEAL, tc.DROP},
            "content": {tc.CHUNK, tc.SEAL, tc.DROP},
        }
        return kind in table.get(st, set())

    def advance(self, kind: int) -> None:
        nxt = {tc.HELLO: "ready", tc.PEER: "peer", tc.SENDER: "envelope",
               tc.RECIPIENT: "open", tc.FIELD: "fields", tc.CHUNK: "content",
               tc.SEAL: "ready", tc.DROP: "ready", tc.BYE: "closed"}
        if kind in nxt:
            self.state = nxt[kind]


def _comment_name(comment: str) -> str | None:
    first = re.split(r"[\s:,(]", comment, maxsplit=1)[0] if comment else ""
    return first if first in tc.KIND_NAMES.values() else None


def _next_server_frame(lines: list[Line], i: int) -> tc.Frame | None:
    for ln in lines[i + 1:]:
        if ln.direction == "s2c":
            try:
                return tc.decode_frame(ln.data, direction="s2c")[0]
            except tc.TamisError:
                return None
        return None                       # the next line is another C: line
    return None


def replay_file(path: str) -> list[tuple[int, str | None]]:
    """Return [(lineno, error or None)] for every frame line of ``path``."""
    lines = parse_file(path)
    results: list[tuple[int, str | None]] = []
    server_max = DEFAULT_SERVER_MAX_FRAME
    client_max: int | None = None
    model = StateModel()
    for i, ln in enumerate(lines):
        try:
            receiver_max = server_max if ln.direction == "c2s" else client_max
            answer = _next_server_frame(lines, i) if ln.direction == "c2s" else None
            answer_code = (answer["code"] if answer is not None and answer.kind == tc.FAULT
                           and answer["fatal"] == 1 else None)
            try:
                frame, used = tc.decode_frame(ln.data, max_frame=receiver_max,
                                              direction=ln.direction)
                if used != len(ln.data):
                    raise tc.FrameError(tc.MALFORMED,
                                        f"{len(ln.data) - used} byte(s) after the frame")
            except (tc.FrameError, tc.Incomplete) as exc:
                code = exc.code if isinstance(exc, tc.FrameError) else None
                if ln.direction == "c2s" and code is not None and code == answer_code:
                    results.append((ln.lineno, None))       # refused as the server does
                    model.state = "closed"
                    continue
                raise AssertionError(f"decode failed: {exc}"
                                     + (f" (server answered FAULT {answer_code})"
                                        if answer_code else "")) from None
            again = tc.encode_frame(frame)
            if again != ln.data:
                raise AssertionError(f"re-encoded {again.hex()} != {ln.data.hex()}")
            name = _comment_name(ln.comment)
            if name is not None and name != frame.name:
                raise AssertionError(f"decoded {frame.name}, comment says {name}")
            if ln.direction == "c2s":
                ok = model.allowed(frame.kind)
                if not ok and answer_code != tc.OUT_OF_ORDER:
                    raise AssertionError(f"{frame.name} is out of order in state "
                                         f"{model.state!r} (§6) but the server does not "
                                         "answer FAULT OUT_OF_ORDER")
                if ok and answer_code == tc.OUT_OF_ORDER:
                    raise AssertionError(f"server answers OUT_OF_ORDER to {frame.name} "
                                         f"allowed in state {model.state!r} by §6")
                if ok:
                    model.advance(frame.kind)
                else:
                    model.state = "closed"
                if frame.kind == tc.HELLO:
                    client_max = frame["max_frame"]
            elif frame.kind == tc.WELCOME:
                server_max = frame["max_frame"]
            results.append((ln.lineno, None))
        except AssertionError as exc:
            results.append((ln.lineno, str(exc)))
    return results


def main(argv: list[str]) -> int:
    verbose = "-v" in argv
    args = [a for a in argv if a != "-v"]
    folder = os.path.normpath(args[0] if args else DEFAULT_DIR)
    if not os.path.isdir(folder):
        print(f"no vectors folder at {folder}")
        print("0 passed, 1 failed")
        return 1
    passed = failed = 0
    files = sorted(f for f in os.listdir(folder) if f.endswith(".txt"))
    for name in files:
        path = os.path.join(folder, name)
        try:
            results = replay_file(path)
        except (ValueError, OSError) as exc:
            failed += 1
            print(f"FAIL {name}: {exc}")
            continue
        for lineno, err in results:
            if err is None:
                passed += 1
                if verbose:
                    print(f"ok   {name}:{lineno}")
            else:
                failed += 1
                print(f"FAIL {name}:{lineno}: {err}")
    if passed + failed == 0:
        print(f"no frames found under {folder}")
        failed = 1
    print(f"{passed} passed, {failed} failed")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
