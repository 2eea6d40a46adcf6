#!/usr/bin/env python3
"""Independent client for the tamis relay protocol, version 1.

Written from proto/PROTOCOL.md alone (standard library only, Python 3.11).

Layers:

* Frame codec -- ``encode_frame(frame) -> bytes`` and
  ``decode_frame(buf) -> (frame, consumed)``, usable on their own.  A frame is a
  :class:`Frame` (kind byte + dict of decoded fields).  Helper constructors
  (``hello_frame(...)``, ``chunk_frame(...)``, ...) build client frames.
* :class:`Client` -- a connection to the server: ``hello()``, ``peer()``,
  ``scan()`` (or the step-by-step ``begin()/field()/chunk()/seal()``),
  ``drop()``, ``ping()``, ``bye()``.
* :func:`split_message` -- RFC 5322 message -> header fields + body.
* A small CLI (``python3 tamis_client.py --help``).

Section references (``§n``) point to proto/PROTOCOL.md.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import select
import socket
import struct
import sys
from dataclasses import dataclass, field as dc_field
from typing import Any, Iterable

PROTOCOL_VERSION = 1
CLIENT_NAME = "tamis-py/1.0"
#: §2: HELLO.max_frame must be >= 4096.  We accept large verdicts by default.
DEFAULT_MAX_FRAME = 1 << 20
MIN_MAX_FRAME = 4096
#: §3: the server's default limits (used until WELCOME tells us otherwise).
SERVER_DEFAULT_MAX_FRAME = 65536

# --------------------------------------------------------------------------
# Kinds (§2)
# --------------------------------------------------------------------------

HELLO = 0x01
PEER = 0x02
SENDER = 0x03
RECIPIENT = 0x04
FIELD = 0x05
CHUNK = 0x06
SEAL = 0x07
DROP = 0x08
PING = 0x09
BYE = 0x0A

WELCOME = 0x41
VERDICT = 0x42
ENOUGH = 0x43
PONG = 0x44
FAULT = 0x45
SERVER_BYE = 0x4A

CLIENT_KINDS = {
    HELLO: "HELLO", PEER: "PEER", SENDER: "SENDER", RECIPIENT: "RECIPIENT",
    FIELD: "FIELD", CHUNK: "CHUNK", SEAL: "SEAL", DROP: "DROP", PING: "PING",
    BYE: "BYE",
}
SERVER_KINDS = {
    WELCOME: "WELCOME", VERDICT: "VERDICT", ENOUGH: "ENOUGH", PONG: "PONG",
    FAULT: "FAULT", SERVER_BYE: "BYE",
}
KIND_NAMES = {**CLIENT_KINDS, **SERVER_KINDS}

# Flat payload layouts: list of (field name, type).  VERDICT is special (§4).
_LAYOUTS: dict[int, list[tuple[str, str]]] = {
    HELLO: [("version", "u16"), ("max_frame", "u32"), ("client", "str")],
    PEER: [("address", "str"), ("port", "u16"), ("greeting", "str")],
    SENDER: [("address", "str")],
    RECIPIENT: [("address", "str")],
    FIELD: [("name", "str"), ("value", "bytes")],
    CHUNK: [("data", "bytes")],
    SEAL: [],
    DROP: [],
    PING: [("token", "u64")],
    BYE: [],
    WELCOME: [("version", "u16"), ("max_frame", "u32"), ("max_message", "u64"),
              ("server", "str")],
    ENOUGH: [],
    PONG: [("token", "u64")],
    FAULT: [("code", "u16"), ("fatal", "u8"), ("text", "str")],
    SERVER_BYE: [],
}
#: §3: HELLO may end with an optional ``secret: bytes`` (the shared secret).
_OPTIONAL_TAIL: dict[int, tuple[str, str]] = {HELLO: ("secret", "bytes")}

# --------------------------------------------------------------------------
# FAULT codes (§5)
# --------------------------------------------------------------------------

MALFORMED = 1
UNKNOWN_KIND = 2
OUT_OF_ORDER = 3
FRAME_TOO_LARGE = 4
MESSAGE_TOO_LARGE = 5
TOO_MANY = 6
FIELD_TOO_LARGE = 7
IDLE = 8
VERSION = 9
BUSY = 10
SHUTTING_DOWN = 11
BAD_ADDRESS = 12
VERDICT_TOO_LARGE = 13
DENIED = 14

FAULT_NAMES = {
    MALFORMED: "MALFORMED", UNKNOWN_KIND: "UNKNOWN_KIND",
    OUT_OF_ORDER: "OUT_OF_ORDER", FRAME_TOO_LARGE: "FRAME_TOO_LARGE",
    MESSAGE_TOO_LARGE: "MESSAGE_TOO_LARGE", TOO_MANY: "TOO_MANY",
    FIELD_TOO_LARGE: "FIELD_TOO_LARGE", IDLE: "IDLE", VERSION: "VERSION",
    BUSY: "BUSY", SHUTTING_DOWN: "SHUTTING_DOWN", BAD_ADDRESS: "BAD_ADDRESS",
    VERDICT_TOO_LARGE: "VERDICT_TOO_LARGE", DENIED: "DENIED",
}

# Actions and edit ops (§4)
ACTION_NAMES = {0: "accept", 1: "tag", 2: "quarantine", 3: "defer"}
ACTION_CODES = {v: k for k, v in ACTION_NAMES.items()}
EDIT_ADD_FIELD = 1
EDIT_PREFIX_SUBJECT = 2
EDIT_OP_NAMES = {EDIT_ADD_FIELD: "add", EDIT_PREFIX_SUBJECT: "prefix_subject"}


# --------------------------------------------------------------------------
# Errors
# --------------------------------------------------------------------------

class TamisError(Exception):
    """Base class of every error raised by this module."""


class FrameError(TamisError):
    """A frame that cannot be decoded/encoded.  ``code`` is the §5 code that
    a server would answer with (MALFORMED, UNKNOWN_KIND or FRAME_TOO_LARGE)."""

    def __init__(self, code: int, text: str):
        super().__init__(f"{FAULT_NAMES.get(code, code)}: {text}")
        self.code = code
        self.text = text


class Incomplete(TamisError):
    """decode_frame() needs more bytes than the buffer holds."""

    def __init__(self, needed: int):
        super().__init__(f"need {needed} more byte(s)")
        self.needed = needed


class FatalFault(TamisError):
    """The server sent a FAULT with fatal = 1 and closes the connection (§5).

    ``message_open`` is True when a message was being sent: per §5 the client
    must treat it as not scanned and apply its own failure policy
    (tamis recommends a temporary failure)."""

    def __init__(self, code: int, text: str, message_open: bool):
        name = FAULT_NAMES.get(code, f"code {code}")
        super().__init__(f"fatal FAULT {name} ({code}): {text}"
                         + (" [open message NOT scanned]" if message_open else ""))
        self.code = code
        self.name = name
        self.text = text
        self.message_open = message_open


class ConnectionClosed(TamisError):
    """The server closed (or said BYE) when we still expected an answer."""

    def __init__(self, text: str, message_open: bool = False):
        super().__init__(text + (" [open message NOT scanned]" if message_open else ""))
        self.message_open = message_open


class UsageError(TamisError):
    """The caller used the Client in a way the state machine (§6) forbids."""


# --------------------------------------------------------------------------
# Frame representation and codec (§1, §2, §4)
# --------------------------------------------------------------------------

@dataclass
class Frame:
    kind: int
    fields: dict[str, Any] = dc_field(default_factory=dict)

    @property
    def name(self) -> str:
        return KIND_NAMES.get(self.kind, f"0x{self.kind:02x}")

    def __getitem__(self, key: str) -> Any:
        return self.fields[key]

    def __repr__(self) -> str:
        return f"Frame({self.name}, {self.fields!r})"


class _Reader:
    """Strict payload reader: any read past the end is MALFORMED (§1)."""

    def __init__(self, payload: bytes):
        self.buf = payload
        self.pos = 0

    def take(self, n: int, what: str) -> bytes:
        if self.pos + n > len(self.buf):
            raise FrameError(MALFORMED, f"{what} runs past the end of the frame")
        out = self.buf[self.pos:self.pos + n]
        self.pos += n
        return out

    def u8(self, what: str = "u8") -> int:
        return self.take(1, what)[0]

    def u16(self, what: str = "u16") -> int:
        return struct.unpack(">H", self.take(2, what))[0]

    def u32(self, what: str = "u32") -> int:
        return struct.unpack(">I", self.take(4, what))[0]

    def u64(self, what: str = "u64") -> int:
        return struct.unpack(">Q", self.take(8, what))[0]

    def f64(self, what: str = "f64") -> float:
        return struct.unpack(">d", self.take(8, what))[0]

    def str(self, what: str = "str") -> str:
        raw = self.take(self.u16(what + " length"), what)
        try:
            return raw.decode("utf-8", errors="strict")
        except UnicodeDecodeError as exc:
            raise FrameError(MALFORMED, f"bad UTF-8 in {what}: {exc}") from None

    def bytes(self, what: str = "bytes") -> bytes:
        return self.take(self.u32(what + " length"), what)

    def finish(self) -> None:
        if self.pos != len(self.buf):
            raise FrameError(MALFORMED, f"{len(self.buf) - self.pos} byte(s) left over")


def _need(cond: bool, what: str) -> None:
    if not cond:
        raise FrameError(MALFORMED, what)


def _enc_u(value: int, fmt: str, bits: int, what: str) -> bytes:
    _need(isinstance(value, int) and not isinstance(value, bool)
          and 0 <= value < (1 << bits), f"{what}: not a u{bits}: {value!r}")
    return struct.pack(fmt, value)


def enc_u8(v: int, what: str = "u8") -> bytes:
    return _enc_u(v, ">B", 8, what)


def enc_u16(v: int, what: str = "u16") -> bytes:
    return _enc_u(v, ">H", 16, what)


def enc_u32(v: int, what: str = "u32") -> bytes:
    return _enc_u(v, ">I", 32, what)


def enc_u64(v: int, what: str = "u64") -> bytes:
    return _enc_u(v, ">Q", 64, what)


def enc_f64(v: float, what: str = "f64") -> bytes:
    return struct.pack(">d", float(v))


def enc_str(v: str, what: str = "str") -> bytes:
    _need(isinstance(v, str), f"{what}: not a str")
    raw = v.encode("utf-8", errors="strict")
    _need(len(raw) <= 0xFFFF, f"{what}: {len(raw)} bytes do not fit a u16 length")
    return struct.pack(">H", len(raw)) + raw


def enc_bytes(v: bytes, what: str = "bytes") -> bytes:
    _need(isinstance(v, (bytes, bytearray, memoryview)), f"{what}: not bytes")
    v = bytes(v)
    _need(len(v) <= 0xFFFFFFFF, f"{what}: too long for a u32 length")
    return struct.pack(">I", len(v)) + v


_ENCODERS = {"u8": enc_u8, "u16": enc_u16, "u32": enc_u32, "u64": enc_u64,
             "f64": enc_f64, "str": enc_str, "bytes": enc_bytes}


def _check_values(kind: int, f: dict[str, Any]) -> None:
    """§1: "a value outside the ones this document defines" is MALFORMED:
    an action or edit op not in §4, a FAULT code not in §5, a fatal byte
    other than 0 or 1."""
    if kind == FAULT:
        _need(f["code"] in FAULT_NAMES, f"FAULT code {f['code']} not in §5")
        _need(f["fatal"] in (0, 1), f"FAULT fatal byte {f['fatal']} is not 0 or 1")
    elif kind == VERDICT:
        for _addr, action in f["recipients"]:
            _need(action in ACTION_NAMES, f"action {action} not in §4")
        for op, _name, _value in f["edits"]:
            _need(op in EDIT_OP_NAMES, f"edit op {op} not in §4")


def _encode_verdict(f: dict[str, Any]) -> bytes:
    out = [enc_str(f["verdict_id"], "verdict_id"),
           enc_f64(f["margin"]), enc_f64(f["probability"])]
    recips = list(f.get("recipients", []))
    out.append(enc_u16(len(recips), "recipient count"))
    for address, action in recips:
        out.append(enc_str(address, "recipient address"))
        out.append(enc_u8(action, "action"))
    edits = list(f.get("edits", []))
    out.append(enc_u16(len(edits), "edit count"))
    for op, name, value in edits:
        out += [enc_u8(op, "edit op"), enc_str(name, "edit name"), enc_str(value, "edit value")]
    reasons = list(f.get("reasons", []))
    out.append(enc_u16(len(reasons), "reason count"))
    out += [enc_str(r, "reason") for r in reasons]
    return b"".join(out)


def _decode_verdict(r: _Reader) -> dict[str, Any]:
    f: dict[str, Any] = {"verdict_id": r.str("verdict_id"),
                         "margin": r.f64("margin"),
                         "probability": r.f64("probability")}
    f["recipients"] = [(r.str("recipient address"), r.u8("action"))
                       for _ in range(r.u16("recipient count"))]
    f["edits"] = [(r.u8("edit op"), r.str("edit name"), r.str("edit value"))
                  for _ in range(r.u16("edit count"))]
    f["reasons"] = [r.str("reason") for _ in range(r.u16("reason count"))]
    return f


def encode_payload(kind: int, fields: dict[str, Any]) -> bytes:
    """Encode the payload (without length and kind) of a frame of ``kind``."""
    if kind == VERDICT:
        out = _encode_verdict(fields)
        _check_values(kind, fields)
        return out
    layout = _LAYOUTS.get(kind)
    if layout is None:
        raise FrameError(UNKNOWN_KIND, f"kind 0x{kind:02x} is not in §2")
    tail = _OPTIONAL_TAIL.get(kind)
    names = {n for n, _ in layout} | ({tail[0]} if tail else set())
    extra = set(fields) - names
    _need(not extra, f"{KIND_NAMES[kind]}: unexpected field(s) {sorted(extra)}")
    out = b"".join(_ENCODERS[t](fields[n], f"{KIND_NAMES[kind]}.{n}") for n, t in layout)
    if tail and fields.get(tail[0]) is not None:
        out += _ENCODERS[tail[1]](fields[tail[0]], f"{KIND_NAMES[kind]}.{tail[0]}")
    _check_values(kind, fields)
    return out


def decode_payload(kind: int, payload: bytes) -> dict[str, Any]:
    """Decode a payload of ``kind`` strictly (§1: must be consumed exactly)."""
    r = _Reader(payload)
    if kind == VERDICT:
        fields = _decode_verdict(r)
    else:
        layout = _LAYOUTS.get(kind)
        if layout is None:
            raise FrameError(UNKNOWN_KIND, f"kind 0x{kind:02x} is not in §2")
        fields = {n: getattr(r, t)(f"{KIND_NAMES[kind]}.{n}") for n, t in layout}
        tail = _OPTIONAL_TAIL.get(kind)
        if tail and r.pos < len(r.buf):
            fields[tail[0]] = getattr(r, tail[1])(f"{KIND_NAMES[kind]}.{tail[0]}")
    r.finish()
    _check_values(kind, fields)
    return fields


def encode_frame(frame: Frame | int, fields: dict[str, Any] | None = None) -> bytes:
    """Encode a whole frame: ``u32 length`` + ``kind`` + payload (§1).

    Accepts either a :class:`Frame` or ``(kind, fields)``."""
    if not isinstance(frame, Frame):
        frame = Frame(frame, dict(fields or {}))
    _need(0 <= frame.kind <= 0xFF, f"kind {frame.kind!r} is not a u8")
    payload = encode_payload(frame.kind, frame.fields)
    length = 1 + len(payload)
    _need(length <= 0xFFFFFFFF, "frame too long for a u32 length")
    return struct.pack(">IB", length, frame.kind) + payload


def frame_length(buf: bytes, max_frame: int | None = None) -> int:
    """Return the ``length`` field of the frame at the start of ``buf``
    (validating it) or raise :class:`Incomplete` if fewer than 4 bytes."""
    if len(buf) < 4:
        raise Incomplete(4 - len(buf))
    (length,) = struct.unpack(">I", buf[:4])
    if length == 0:
        raise FrameError(MALFORMED, "length 0")
    if max_frame is not None and length > max_frame:
        raise FrameError(FRAME_TOO_LARGE, f"length {length} > max_frame {max_frame}")
    return length


def decode_frame(buf: bytes, max_frame: int | None = None,
                 direction: str | None = None) -> tuple[Frame, int]:
    """Decode the frame at the start of ``buf``.

    Returns ``(frame, consumed_bytes)``.  Raises :class:`Incomplete` if the
    buffer holds only part of a frame, :class:`FrameError` for a frame that
    breaks §1/§2.  ``max_frame`` (if given) is checked against ``length``
    (kind byte + payload, §1) before the payload is looked at.
    ``direction`` may be ``"c2s"`` or ``"s2c"``: a kind of the other
    direction's table is then OUT_OF_ORDER (§2)."""
    buf = bytes(buf)
    length = frame_length(buf, max_frame)
    if len(buf) < 4 + length:
        raise Incomplete(4 + length - len(buf))
    kind = buf[4]
    if kind not in KIND_NAMES:
        raise FrameError(UNKNOWN_KIND, f"kind 0x{kind:02x}")
    if direction is not None:
        own = {"c2s": CLIENT_KINDS, "s2c": SERVER_KINDS}[direction]
        if kind not in own:
            raise FrameError(OUT_OF_ORDER,
                             f"{KIND_NAMES[kind]} (0x{kind:02x}) comes from the other side")
    fields = decode_payload(kind, buf[5:4 + length])
    return Frame(kind, fields), 4 + length


def decode_frames(buf: bytes, direction: str | None = None) -> list[Frame]:
    """Decode a buffer that holds whole frames only."""
    out, pos = [], 0
    while pos < len(buf):
        try:
            frame, n = decode_frame(buf[pos:], direction=direction)
        except Incomplete:
            raise FrameError(MALFORMED, "truncated frame at end of buffer") from None
        out.append(frame)
        pos += n
    return out


# Convenience constructors for the client frames (§2).

def hello_frame(version: int = PROTOCOL_VERSION, max_frame: int = DEFAULT_MAX_FRAME,
                client: str = CLIENT_NAME, secret: bytes | None = None) -> Frame:
    fields: dict[str, Any] = {"version": version, "max_frame": max_frame, "client": client}
    if secret is not None:
        fields["secret"] = bytes(secret)      # §3: optional trailing field
    return Frame(HELLO, fields)


def read_secret_file(path: str) -> bytes:
    """§3: the shared secret is the file's content without one trailing
    LF or CRLF."""
    with open(path, "rb") as fh:
        data = fh.read(4096)
    if data.endswith(b"\r\n"):
        return data[:-2]
    return data[:-1] if data.endswith(b"\n") else data


def peer_frame(address: str, port: int, greeting: str) -> Frame:
    return Frame(PEER, {"address": address, "port": port, "greeting": greeting})


def sender_frame(address: str) -> Frame:
    return Frame(SENDER, {"address": address})


def recipient_frame(address: str) -> Frame:
    return Frame(RECIPIENT, {"address": address})


def field_frame(name: str, value: bytes) -> Frame:
    return Frame(FIELD, {"name": name, "value": bytes(value)})


def chunk_frame(data: bytes) -> Frame:
    return Frame(CHUNK, {"data": bytes(data)})


def seal_frame() -> Frame:
    return Frame(SEAL)


def drop_frame() -> Frame:
    return Frame(DROP)


def ping_frame(token: int) -> Frame:
    return Frame(PING, {"token": token})


def bye_frame() -> Frame:
    return Frame(BYE)


# --------------------------------------------------------------------------
# Verdict (§4)
# --------------------------------------------------------------------------

@dataclass
class Edit:
    op: int            # 1 add a header field, 2 prefix the Subject
    name: str
    value: str

    @property
    def op_name(self) -> str:
        return EDIT_OP_NAMES.get(self.op, f"op{self.op}")


@dataclass
class Verdict:
    verdict_id: str
    margin: float                       # NaN when not scored
    probability: float                  # NaN when uncalibrated / not scored
    #: recipient -> accept|tag|quarantine|defer.  After Client.seal() the keys
    #: are the recipients as we sent them, matched by position (§4: listed in
    #: RECIPIENT order; a refused address is listed empty).
    actions: dict[str, str]
    edits: list[Edit] = dc_field(default_factory=list)
    reasons: list[str] = dc_field(default_factory=list)
    #: (address, action name) in RECIPIENT order, duplicates kept.
    recipients: list[tuple[str, str]] = dc_field(default_factory=list)
    #: non-fatal FAULTs received for this message: (code, name, text).
    faults: list[tuple[int, str, str]] = dc_field(default_factory=list)
    #: True when the server sent ENOUGH (or MESSAGE_TOO_LARGE) and we skipped
    #: the remaining CHUNKs.
    body_cut_short: bool = False
    #: recipients we sent that the VERDICT does not list (ignored after
    #: TOO_MANY, always the last ones sent): §4 says to send the message again
    #: for them, or answer them with a temporary failure.
    unlisted: list[str] = dc_field(default_factory=list)

    @property
    def scored(self) -> bool:
        return not math.isnan(self.margin)

    @property
    def held(self) -> list[str]:
        """Recipients (as sent) whose copy tamis holds: action quarantine.
        §4.5: the server wrote the message to its store before this VERDICT, so
        the relay does not deliver it to them and keeps no copy of its own."""
        return [r for r, a in self.actions.items() if a == "quarantine"]

    @classmethod
    def from_frame(cls, frame: Frame) -> "Verdict":
        f = frame.fields
        recips = [(a, ACTION_NAMES.get(c, f"unknown({c})")) for a, c in f["recipients"]]
        return cls(verdict_id=f["verdict_id"], margin=f["margin"],
                   probability=f["probability"], actions=dict(recips),
                   edits=[Edit(*e) for e in f["edits"]], reasons=list(f["reasons"]),
                   recipients=recips)

    def to_frame(self) -> Frame:
        return Frame(VERDICT, {
            "verdict_id": self.verdict_id, "margin": self.margin,
            "probability": self.probability,
            "recipients": [(a, ACTION_CODES[n]) for a, n in
                           (self.recipients or list(self.actions.items()))],
            "edits": [(e.op, e.name, e.value) for e in self.edits],
            "reasons": list(self.reasons)})


# --------------------------------------------------------------------------
# RFC 5322 message splitting
# --------------------------------------------------------------------------

def to_crlf(data: bytes) -> bytes:
    """Turn bare LF (and bare CR) line ends into CRLF."""
    return data.replace(b"\r\n", b"\n").replace(b"\r", b"\n").replace(b"\n", b"\r\n")


def split_message(raw: bytes, crlf: bool = True) -> tuple[list[tuple[str, bytes]], bytes]:
    """Split a message into ``([(name, raw_value), ...], body)``.

    * ``name`` is the field name without the colon (trailing blanks before
      the colon removed);
    * ``raw_value`` is what follows the colon and the blanks (SP/HTAB) right
      after it, verbatim -- folding (CRLF + WSP), inner and trailing blanks
      and 8-bit bytes kept -- without the final CRLF (the vectors show
      ``From: Alice <...>`` sent as value ``Alice <...>``);
    * ``body`` is everything after the empty line that ends the header.

    With ``crlf=True`` (default) bare LF line ends are first turned into
    CRLF, since §2 wants the body "as on the wire".  A leading mbox
    ``From `` line is skipped.  A header line that is neither a field nor a
    continuation ends the header: it and what follows are sent as body.
    Field names that are not valid UTF-8 are skipped (a ``str`` must be UTF-8).
    """
    if crlf:
        raw = to_crlf(raw)
    if raw.startswith(b"From "):
        nl = raw.find(b"\n")
        raw = b"" if nl < 0 else raw[nl + 1:]
    fields: list[tuple[bytes, bytes]] = []
    pos = 0
    n = len(raw)
    body = b""
    while pos < n:
        end = raw.find(b"\n", pos)
        line_end = n if end < 0 else end + 1
        line = raw[pos:line_end]
        bare = line.rstrip(b"\r\n")
        if bare == b"":                          # empty line: header ends
            body = raw[line_end:]
            break
        if bare[:1] in (b" ", b"\t") and fields:  # continuation (folding)
            name, value = fields[-1]
            fields[-1] = (name, value + line)
            pos = line_end
            continue
        colon = bare.find(b":")
        name = bare[:colon].rstrip(b" \t") if colon > 0 else b""
        if colon <= 0 or not name or any(c <= 32 or c > 126 for c in name):
            body = raw[pos:]                      # not a field: treat as body
            break
        fields.append((name, line[colon + 1:]))
        pos = line_end
    out = []
    for name, value in fields:
        value = value[:-2] if value.endswith(b"\r\n") else value.rstrip(b"\n")
        value = value.lstrip(b" \t")
        try:
            out.append((name.decode("utf-8"), value))
        except UnicodeDecodeError:
            continue
    return out, body


# --------------------------------------------------------------------------
# Connection
# --------------------------------------------------------------------------

def _open_socket(addr: str, timeout: float | None) -> socket.socket:
    if addr.startswith("unix:"):
        s = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        s.settimeout(timeout)
        s.connect(addr[5:])
        return s
    host, sep, port = addr.rpartition(":")
    if not sep or not port.isdigit():
        raise ValueError(f"address must be unix:/path or host:port, got {addr!r}")
    if host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    s = socket.create_connection((host, int(port)), timeout=timeout)
    s.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    return s


class Client:
    """One connection to a tamis server.

    Typical use::

        with Client("unix:/run/tamis.sock") as c:
            c.hello()
            v = c.scan("alice@example.org", ["bob@example.test"], raw_bytes)
            print(v.actions)

    States follow §6: ``ready`` (after WELCOME), ``envelope`` (after
    SENDER, no recipient yet), ``open`` (after the first RECIPIENT),
    ``content`` (after the first CHUNK), ``closed``.
    """

    def __init__(self, addr: str, *, timeout: float | None = 60.0,
                 max_frame: int = DEFAULT_MAX_FRAME, client_name: str = CLIENT_NAME,
                 sock: socket.socket | None = None, secret: bytes | None = None):
        if max_frame < MIN_MAX_FRAME:
            raise ValueError(f"max_frame must be >= {MIN_MAX_FRAME} (§2)")
        self.addr = addr
        self.max_frame = max_frame
        self.client_name = client_name
        #: §3: the shared secret sent in HELLO (None: none is sent)
        self.secret = secret
        self.sock = sock if sock is not None else _open_socket(addr, timeout)
        if sock is not None:
            self.sock.settimeout(timeout)
        self._rbuf = bytearray()
        self.state = "start"
        self.server_version: int | None = None
        self.server_max_frame = SERVER_DEFAULT_MAX_FRAME
        self.server_max_message: int | None = None
        self.server_name: str | None = None
        self._peer_sent = False
        self._enough = False
        self._faults: list[tuple[int, str, str]] = []
        self._next_token = int.from_bytes(os.urandom(4), "big") << 16
        #: every frame received, for debugging (kept short)
        self.trace: list[Frame] = []

    # -- context manager -------------------------------------------------

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def close(self) -> None:
        if self.state != "closed":
            self.state = "closed"
            try:
                self.sock.close()
            except OSError:
                pass

    @property
    def message_open(self) -> bool:
        return self.state in ("envelope", "open", "content")

    # -- low level I/O ----------------------------------------------------

    def send(self, frame: Frame) -> None:
        """Encode and send one frame, refusing frames above the server's
        max_frame (§3)."""
        data = encode_frame(frame)
        if len(data) - 4 > self.server_max_frame:
            raise FrameError(FRAME_TOO_LARGE,
                             f"{frame.name} of length {len(data) - 4} exceeds the "
                             f"server's max_frame {self.server_max_frame}")
        if self.state == "closed":
            raise ConnectionClosed("connection is closed")
        try:
            self.sock.sendall(data)
        except (BrokenPipeError, ConnectionResetError) as exc:
            # The server may have sent a fatal FAULT before closing: surface it.
            was_open = self.message_open or frame.kind in (SENDER, RECIPIENT)
            self._drain_after_failure(was_open)
            raise ConnectionClosed(f"send failed: {exc}", was_open) from exc

    def _drain_after_failure(self, was_open: bool) -> None:
        try:
            self.sock.settimeout(1.0)
            while True:
                fr = self._read_frame(block=True)
                if fr is None:
                    break
                if fr.kind == FAULT and fr["fatal"]:
                    self.close()
                    raise FatalFault(fr["code"], fr["text"], was_open)
        except (OSError, TamisError) as exc:
            if isinstance(exc, FatalFault):
                raise
        self.close()

    def _read_frame(self, block: bool = True) -> Frame | None:
        """Read one frame.  With block=False returns None when no whole frame
        is available right now.  Returns None at end of stream (block=True)."""
        while True:
            try:
                length = frame_length(bytes(self._rbuf[:4]), self.max_frame)
                if len(self._rbuf) >= 4 + length:
                    frame, n = decode_frame(bytes(self._rbuf[:4 + length]),
                                            direction="s2c")
                    del self._rbuf[:n]
                    self.trace.append(frame)
                    del self.trace[:-64]
                    return frame
            except Incomplete:
                pass
            except FrameError:
                # A client cannot send FAULT (0x45 is a server kind): we
                # simply close on a broken server frame.
                self.close()
                raise
            if not block:
                r, _, _ = select.select([self.sock], [], [], 0)
                if not r:
                    return None
            try:
                data = self.sock.recv(65536)
            except (ConnectionResetError, BrokenPipeError):
                data = b""
            if not data:
                if self._rbuf:
                    self.close()
                    raise ConnectionClosed("stream ended inside a frame",
                                           self.message_open)
                return None
            self._rbuf += data

    def _expect(self, *kinds: int) -> Frame:
        """Read frames until one of ``kinds``; handle everything else that may
        legitimately arrive in between (ENOUGH, non-fatal FAULT, PONG)."""
        while True:
            fr = self._read_frame(block=True)
            if fr is None:
                was_open = self.message_open
                self.close()
                raise ConnectionClosed("server closed the connection", was_open)
            if fr.kind in kinds:
                return fr
            self._handle_unsolicited(fr)

    def _handle_unsolicited(self, fr: Frame) -> None:
        if fr.kind == FAULT:
            code, text = fr["code"], fr["text"]
            if fr["fatal"]:
                was_open = self.message_open
                self.close()
                raise FatalFault(code, text, was_open)
            self._faults.append((code, FAULT_NAMES.get(code, str(code)), text))
            if code == MESSAGE_TOO_LARGE:
                self._enough = True     # the server no longer reads the body
        elif fr.kind == ENOUGH:
            if self.message_open:
                self._enough = True
            # else: a late ENOUGH for a message already sealed/dropped: ignore
        elif fr.kind == PONG:
            pass                        # answer to a PING we no longer wait for
        elif fr.kind == SERVER_BYE:
            was_open = self.message_open
            self.close()
            raise ConnectionClosed("server said BYE (shutting down)", was_open)
        else:
            was_open = self.message_open
            self.close()
            raise ConnectionClosed(f"unexpected {fr.name} from server", was_open)

    def _poll(self) -> None:
        """Handle every frame already waiting, without blocking."""
        while True:
            fr = self._read_frame(block=False)
            if fr is None:
                return
            self._handle_unsolicited(fr)

    def _require(self, *states: str, what: str) -> None:
        if self.state not in states:
            raise UsageError(f"{what} not allowed in state {self.state!r} (§6)")

    # -- protocol operations ------------------------------------------------

    def hello(self, version: int = PROTOCOL_VERSION) -> Frame:
        """Send HELLO and wait for WELCOME (§3).  Returns the WELCOME frame."""
        self._require("start", what="HELLO")
        self.send(hello_frame(version, self.max_frame, self.client_name, self.secret))
        fr = self._expect(WELCOME)
        self.server_version = fr["version"]
        self.server_max_frame = fr["max_frame"]
        self.server_max_message = fr["max_message"]
        self.server_name = fr["server"]
        if self.server_version != min(version, PROTOCOL_VERSION):
            self.close()
            raise TamisError(f"server chose version {self.server_version}, "
                             f"expected {min(version, PROTOCOL_VERSION)}")
        self.state = "ready"
        return fr

    def peer(self, address: str, port: int, greeting: str) -> None:
        """Send PEER for the next message (optional, once, before SENDER)."""
        self._require("ready", what="PEER")
        if self._peer_sent:
            raise UsageError("PEER already sent for this message (§2: once per message)")
        self.send(peer_frame(address, port, greeting))
        self._peer_sent = True

    def begin(self, sender: str, recipients: Iterable[str]) -> None:
        """Send SENDER and the RECIPIENTs: opens a message."""
        self._require("ready", what="SENDER")
        recipients = list(recipients)
        if not recipients:
            raise UsageError("a message needs at least one recipient (§4)")
        self._poll()
        self._enough = False
        self._faults = []
        self._recipients = recipients
        self.send(sender_frame(sender))
        self.state = "envelope"
        for r in recipients:
            self.send(recipient_frame(r))
            self.state = "open"

    def field(self, name: str, value: bytes) -> None:
        """Send one header FIELD (only before the first CHUNK, §6)."""
        self._require("open", what="FIELD")
        # Keep the frame within the server's max_frame: a value that cannot
        # fit is cut (the server would cut it anyway, §5 FIELD_TOO_LARGE).
        room = self.server_max_frame - (1 + 2 + len(name.encode("utf-8")) + 4)
        if len(value) > room:
            value = value[:max(room, 0)]
        self.send(field_frame(name, value))

    @property
    def max_chunk(self) -> int:
        """The largest CHUNK data that fits the server's max_frame (which
        bounds kind byte + payload, §1)."""
        return self.server_max_frame - (1 + 4)

    def chunk(self, data: bytes) -> bool:
        """Send a piece of the body.  Returns False (and sends nothing) once
        the server said ENOUGH or MESSAGE_TOO_LARGE."""
        self._require("open", "content", what="CHUNK")
        self._poll()
        if self._enough:
            return False
        step = self.max_chunk
        for i in range(0, max(len(data), 1), step):
            if i and (self._poll() or self._enough):
                return False
            self.send(chunk_frame(data[i:i + step]))
            self.state = "content"
        return True

    def seal(self) -> Verdict:
        """Send SEAL and wait for the VERDICT (§4)."""
        self._require("open", "content", what="SEAL")
        self.send(seal_frame())
        fr = self._expect(VERDICT)
        v = Verdict.from_frame(fr)
        v.faults = list(self._faults)
        v.body_cut_short = self._enough
        # §4: the VERDICT lists the kept recipients in RECIPIENT order, a prefix
        # of those sent; a refused address (BAD_ADDRESS) is listed empty.  So
        # recipients are matched by position, not by address.
        sent = list(getattr(self, "_recipients", []))
        v.actions = {}
        for i, (address, action) in enumerate(v.recipients):
            v.actions[sent[i] if i < len(sent) else address] = action
        v.unlisted = sent[len(v.recipients):]
        self._end_message()
        return v

    def _end_message(self) -> None:
        self.state = "ready"
        self._peer_sent = False
        self._enough = False

    def scan(self, sender: str, recipients: Iterable[str], raw_message: bytes,
             chunk_size: int = 16384, crlf: bool = True) -> Verdict:
        """Send one message and return its :class:`Verdict`.

        Raises :class:`FatalFault` / :class:`ConnectionClosed` (with
        ``message_open=True``) when the message could not be scanned: the
        caller must then apply its own failure policy (§5)."""
        if chunk_size < 1:
            raise ValueError("chunk_size must be positive")
        fields, body = split_message(raw_message, crlf=crlf)
        self.begin(sender, recipients)
        for name, value in fields:
            self.field(name, value)
        step = min(chunk_size, self.max_chunk)
        for i in range(0, len(body), step):
            if not self.chunk(body[i:i + step]):
                break                       # ENOUGH: skip the rest (§2)
        return self.seal()

    def drop(self, token: int | None = None) -> None:
        """Abandon the open message (§2 DROP).

        Nothing answers DROP, but the server may already have sent ENOUGH or
        a non-fatal FAULT for the dropped message.  To keep those from being
        taken for the next message, drop() follows DROP with a PING (token
        ``token``, or a fresh one) and reads up to its PONG (frames on a
        stream stay in order)."""
        self._require("envelope", "open", "content", what="DROP")
        self.send(drop_frame())
        self._end_message()
        self.ping(token)
        self._faults = []
        self._enough = False

    def ping(self, token: int | None = None) -> int:
        """Send PING and wait for the PONG with the same token (§2)."""
        if self.state in ("start", "closed"):
            raise UsageError("PING only after WELCOME (§2)")
        if token is None:
            self._next_token = (self._next_token + 1) & 0xFFFFFFFFFFFFFFFF
            token = self._next_token
        self.send(ping_frame(token))
        while True:
            fr = self._expect(PONG)
            if fr["token"] == token:
                return token

    def bye(self) -> None:
        """Orderly close (§2 BYE): drops an open message first, then waits for
        the server's BYE."""
        if self.state == "closed":
            return
        if self.message_open:
            self.drop()
        try:
            if self.state != "start":
                self.send(bye_frame())
                while True:
                    fr = self._read_frame(block=True)
                    if fr is None or fr.kind == SERVER_BYE:
                        break
                    if fr.kind == FAULT and fr["fatal"]:
                        break
        finally:
            self.close()


# --------------------------------------------------------------------------
# CLI
# --------------------------------------------------------------------------

def _fmt_float(x: float) -> str:
    return "nan" if math.isnan(x) else f"{x:.4f}"


def _json_float(x: float) -> float | None:
    return None if math.isnan(x) or math.isinf(x) else x


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(
        description="Send messages to a tamis server and print the verdicts.")
    ap.add_argument("--connect", required=True, metavar="ADDR",
                    help="unix:/path/to/socket or host:port")
    ap.add_argument("--from", dest="sender", required=True, metavar="S",
                    help="envelope sender ('' for the null sender)")
    ap.add_argument("--rcpt", action="append", required=True, metavar="R",
                    help="envelope recipient (repeatable)")
    ap.add_argument("--format", choices=("text", "json"), default="text")
    ap.add_argument("--peer", metavar="IP:PORT:HELO",
                    help="send PEER before every message")
    ap.add_argument("--chunk-size", type=int, default=16384)
    ap.add_argument("--timeout", type=float, default=60.0)
    ap.add_argument("--secret-file", metavar="PATH",
                    help="file holding the shared secret to present in HELLO (§3)")
    ap.add_argument("files", nargs="+", metavar="FILE")
    args = ap.parse_args(argv)

    peer = None
    if args.peer:
        ip, _, rest = args.peer.rpartition(":")     # IP:PORT:HELO, IP may hold ':'
        ip, _, port = ip.rpartition(":")
        peer = (ip.strip("[]"), int(port), rest)

    secret = read_secret_file(args.secret_file) if args.secret_file else None
    status = 0
    client: Client | None = None
    for path in args.files:
        try:
            with open(path, "rb") as fh:
                raw = fh.read()
            if client is None or client.state == "closed":
                client = Client(args.connect, timeout=args.timeout, secret=secret)
                client.hello()
            if peer:
                client.peer(*peer)
            v = client.scan(args.sender, args.rcpt, raw, chunk_size=args.chunk_size)
        except (OSError, TamisError) as exc:
            status = 1
            if client is not None and isinstance(exc, UsageError):
                client.close()
            if args.format == "json":
                print(json.dumps({"file": path, "error": str(exc)}))
            else:
                print(f"{path}\terror\t{exc}")
            sys.stdout.flush()
            continue
        if args.format == "json":
            print(json.dumps({"file": path, "id": v.verdict_id, "actions": v.actions,
                              "margin": _json_float(v.margin)}))
        else:
            acts = " ".join(f"{r}={a}" for r, a in v.actions.items())
            print(f"{path}\t{v.verdict_id}\tmargin={_fmt_float(v.margin)}\t{acts}")
        sys.stdout.flush()
    if client is not None:
        try:
            client.bye()
        except (OSError, TamisError):
            pass
    return status


if __name__ == "__main__":
    sys.exit(main())
