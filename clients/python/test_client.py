#!/usr/bin/env python3
"""Unit tests of the tamis client codec (and of the client against an
in-process fake server).  Each test names the section of proto/PROTOCOL.md it
checks.  Run: python3 -m unittest test_client  (from this folder)."""

from __future__ import annotations

import math
import os
import socket
import struct
import sys
import threading
import unittest

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import tamis_client as tc  # noqa: E402


def hx(s: str) -> bytes:
    """Hex with spaces/newlines allowed."""
    return bytes.fromhex("".join(s.split()))


class FramingTests(unittest.TestCase):
    """§1 Framing."""

    def test_s1_length_counts_kind_and_payload(self):
        # §1: length counts the kind byte and the payload; SEAL has no payload.
        self.assertEqual(tc.encode_frame(tc.seal_frame()), hx("00000001 07"))

    def test_s1_zero_length_is_malformed(self):
        # §1: "A length of 0 is a protocol error (MALFORMED)."
        with self.assertRaises(tc.FrameError) as cm:
            tc.decode_frame(hx("00000000"))
        self.assertEqual(cm.exception.code, tc.MALFORMED)

    def test_s1_length_above_max_frame_refused_before_payload(self):
        # §1: a frame whose length exceeds the announced maximum is refused
        # before its payload is read -> FRAME_TOO_LARGE (only 5 bytes given).
        with self.assertRaises(tc.FrameError) as cm:
            tc.decode_frame(hx("00010001 06"), max_frame=65536)
        self.assertEqual(cm.exception.code, tc.FRAME_TOO_LARGE)

    def test_s1_length_equal_to_max_frame_is_fine(self):
        # §1/§5: only a length *above* max_frame is refused.
        data = tc.encode_frame(tc.chunk_frame(b"x" * (4096 - 5)))
        self.assertEqual(struct.unpack(">I", data[:4])[0], 4096)
        frame, n = tc.decode_frame(data, max_frame=4096)
        self.assertEqual(n, len(data))

    def test_s1_incomplete(self):
        # §1: a frame is length + kind + (length-1) payload bytes.
        with self.assertRaises(tc.Incomplete):
            tc.decode_frame(hx("000000"))
        with self.assertRaises(tc.Incomplete):
            tc.decode_frame(hx("00000009 09 0000"))

    def test_s1_integers_big_endian(self):
        # §1: all integers big-endian -- PING token u64.
        self.assertEqual(tc.encode_frame(tc.ping_frame(0x0102030405060708)),
                         hx("00000009 09 0102030405060708"))

    def test_s1_str_is_u16_length_utf8(self):
        # §1: str is u16 length + UTF-8 bytes ("é" is 2 bytes).
        self.assertEqual(tc.encode_frame(tc.sender_frame("é@example.org")),
                         hx("00000011 03 000e c3a9") + b"@example.org")

    def test_s1_bytes_is_u32_length_any_content(self):
        # §1: bytes is u32 length + any content.
        self.assertEqual(tc.encode_frame(tc.chunk_frame(b"\x00\xff\r\n")),
                         hx("00000009 06 00000004 00ff0d0a"))

    def test_s1_bytes_left_over_is_malformed(self):
        # §1: bytes left over -> MALFORMED (SEAL with one payload byte).
        with self.assertRaises(tc.FrameError) as cm:
            tc.decode_frame(hx("00000002 07 00"))
        self.assertEqual(cm.exception.code, tc.MALFORMED)

    def test_s1_field_past_end_is_malformed(self):
        # §1: a field running past the end of the frame -> MALFORMED
        # (SENDER str announces 5 bytes, frame holds 2).
        with self.assertRaises(tc.FrameError) as cm:
            tc.decode_frame(hx("00000005 03 0005 6162"))
        self.assertEqual(cm.exception.code, tc.MALFORMED)

    def test_s5_bad_utf8_in_str_is_malformed(self):
        # §5 MALFORMED: "bad UTF-8 in a str".
        with self.assertRaises(tc.FrameError) as cm:
            tc.decode_frame(hx("00000005 03 0002 c328"))
        self.assertEqual(cm.exception.code, tc.MALFORMED)

    def test_s1_f64_is_ieee_binary64(self):
        # §1: f64 is IEEE-754 binary64 (big-endian); 1.5 = 3ff8000000000000.
        self.assertEqual(tc.enc_f64(1.5), hx("3ff8000000000000"))

    def test_s2_unknown_kind(self):
        # §2: "Kinds outside these tables are UNKNOWN_KIND errors" -- 0x0b, 0x40.
        for kind in (0x00, 0x0B, 0x3F, 0x40, 0x46, 0x4B, 0xFF):
            with self.assertRaises(tc.FrameError) as cm:
                tc.decode_frame(bytes([0, 0, 0, 1, kind]))
            self.assertEqual(cm.exception.code, tc.UNKNOWN_KIND, hex(kind))

    def test_s2_other_direction_is_out_of_order(self):
        # §2: "A kind from the other direction's table (a client sending
        # WELCOME, say) is OUT_OF_ORDER."
        with self.assertRaises(tc.FrameError) as cm:
            tc.decode_frame(hx("00000001 07"), direction="s2c")
        self.assertEqual(cm.exception.code, tc.OUT_OF_ORDER)
        with self.assertRaises(tc.FrameError) as cm:
            tc.decode_frame(hx("00000001 43"), direction="c2s")
        self.assertEqual(cm.exception.code, tc.OUT_OF_ORDER)

    def test_s1_undefined_values_are_malformed(self):
        # §1: "an action or edit op not in §4, a FAULT code not in §5, a fatal
        # byte other than 0 or 1" is MALFORMED.
        bad = [hx("00000006 45 0063 00 0000"),                 # FAULT code 99
               hx("00000006 45 0000 00 0000"),                 # FAULT code 0
               hx("00000006 45 0001 02 0000")]                 # fatal = 2
        nan = "7ff8000000000000"
        for action_or_op in ("recipient", "edit"):
            payload = hx("42 0000" + nan + nan)
            if action_or_op == "recipient":
                payload += hx("0001 0001 61 04 0000 0000")    # action 4
            else:
                payload += hx("0000 0001 03 0000 0000 0000")  # edit op 3
            bad.append(struct.pack(">I", len(payload)) + payload)
        for data in bad:
            with self.assertRaises(tc.FrameError, msg=data.hex()) as cm:
                tc.decode_frame(data)
            self.assertEqual(cm.exception.code, tc.MALFORMED, data.hex())
        with self.assertRaises(tc.FrameError):
            tc.encode_frame(tc.Frame(tc.FAULT, {"code": 99, "fatal": 1, "text": ""}))

    def test_decode_frames_sequence(self):
        # §1: frames follow one another on the stream.
        frames = tc.decode_frames(hx("00000001 07 00000001 43 00000001 4a"))
        self.assertEqual([f.kind for f in frames], [tc.SEAL, tc.ENOUGH, tc.SERVER_BYE])


class ClientFrameTests(unittest.TestCase):
    """§2 client -> server frames, hand-built from the table."""

    def roundtrip(self, frame: tc.Frame, expected: bytes) -> None:
        self.assertEqual(tc.encode_frame(frame), expected)
        back, n = tc.decode_frame(expected, direction="c2s")
        self.assertEqual(n, len(expected))
        self.assertEqual(back, frame)

    def test_s2_hello(self):
        # §2 HELLO: version u16, max_frame u32, client str.
        self.roundtrip(tc.hello_frame(1, 65536, "r1"),
                       hx("0000000b 01 0001 00010000 0002 7231"))

    def test_s3_hello_with_secret(self):
        # §3: HELLO may end with ``secret: bytes``; without it the bytes are
        # those of a plain HELLO.
        self.roundtrip(tc.hello_frame(1, 65536, "r1", b"k3y!"),
                       hx("00000013 01 0001 00010000 0002 7231 00000004") + b"k3y!")
        self.roundtrip(tc.hello_frame(1, 65536, "r1"),
                       hx("0000000b 01 0001 00010000 0002 7231"))

    def test_s3_secret_file_drops_one_line_end(self):
        import tempfile
        with tempfile.TemporaryDirectory() as d:
            path = os.path.join(d, "s")
            for content, want in ((b"abc\n", b"abc"), (b"abc\r\n", b"abc"),
                                  (b"abc", b"abc"), (b"abc\n\n", b"abc\n")):
                with open(path, "wb") as fh:
                    fh.write(content)
                self.assertEqual(tc.read_secret_file(path), want)

    def test_s2_peer(self):
        # §2 PEER: address str, port u16, greeting str.
        self.roundtrip(tc.peer_frame("192.0.2.7", 2525, "mx.example.test"),
                       hx("0000001f 02 0009") + b"192.0.2.7" + hx("09dd 000f")
                       + b"mx.example.test")

    def test_s2_sender_null(self):
        # §2 SENDER: empty address for the null sender.
        self.roundtrip(tc.sender_frame(""), hx("00000003 03 0000"))

    def test_s2_recipient(self):
        # §2 RECIPIENT: address str.
        self.roundtrip(tc.recipient_frame("b@example.test"),
                       hx("00000011 04 000e") + b"b@example.test")

    def test_s2_field(self):
        # §2 FIELD: name str (no colon), value bytes (raw, folding and 8-bit kept).
        value = b" caf\xe9\r\n\tmenu"
        self.roundtrip(tc.field_frame("Subject", value),
                       hx("0000001a 05 0007") + b"Subject" + hx("0000000c") + value)

    def test_s2_chunk_empty(self):
        # §2 CHUNK: data bytes (may be empty).
        self.roundtrip(tc.chunk_frame(b""), hx("00000005 06 00000000"))

    def test_s2_empty_frames(self):
        # §2 SEAL, DROP, BYE: empty payloads.
        self.roundtrip(tc.seal_frame(), hx("00000001 07"))
        self.roundtrip(tc.drop_frame(), hx("00000001 08"))
        self.roundtrip(tc.bye_frame(), hx("00000001 0a"))

    def test_s2_ping(self):
        # §2 PING: token u64.
        self.roundtrip(tc.ping_frame(2**64 - 1), hx("00000009 09 ffffffffffffffff"))

    def test_s2_encoder_rejects_out_of_range(self):
        # §1: integers have fixed widths; str length must fit u16.
        with self.assertRaises(tc.FrameError):
            tc.encode_frame(tc.ping_frame(2**64))
        with self.assertRaises(tc.FrameError):
            tc.encode_frame(tc.hello_frame(70000, 65536, "x"))
        with self.assertRaises(tc.FrameError):
            tc.encode_frame(tc.sender_frame("x" * 65536))


class ServerFrameTests(unittest.TestCase):
    """§2 server -> client frames and §4 VERDICT."""

    def test_s2_welcome(self):
        # §2 WELCOME: version u16, max_frame u32, max_message u64, server str.
        data = hx("00000016 41 0001 00010000 0000000000a00000 0005") + b"tamis"
        f, _ = tc.decode_frame(data, direction="s2c")
        self.assertEqual(f.fields, {"version": 1, "max_frame": 65536,
                                    "max_message": 10 * 1024 * 1024, "server": "tamis"})
        self.assertEqual(tc.encode_frame(f), data)

    def test_s2_enough_pong_bye(self):
        # §2 ENOUGH (empty), PONG (u64), BYE 0x4a (empty).
        self.assertEqual(tc.decode_frame(hx("00000001 43"))[0].kind, tc.ENOUGH)
        self.assertEqual(tc.decode_frame(hx("00000009 44 000000000000002a"))[0]["token"], 42)
        self.assertEqual(tc.decode_frame(hx("00000001 4a"))[0].name, "BYE")

    def test_s5_fault(self):
        # §2/§5 FAULT: code u16, fatal u8, text str.  Code 5 is non-fatal.
        data = hx("0000000a 45 0005 00 0004") + b"big!"
        f, _ = tc.decode_frame(data)
        self.assertEqual((f["code"], f["fatal"], f["text"]), (5, 0, "big!"))
        self.assertEqual(tc.FAULT_NAMES[f["code"]], "MESSAGE_TOO_LARGE")
        self.assertEqual(tc.encode_frame(f), data)

    def verdict_bytes(self) -> bytes:
        return (hx("42 0002") + b"v7"
                + hx("4004000000000000")                  # margin 2.5
                + hx("3fe8000000000000")                  # probability 0.75
                + hx("0002")                              # 2 recipients
                + hx("000e") + b"a@example.test" + hx("01")
                + hx("000e") + b"b@example.test" + hx("02")
                + hx("0002")                              # 2 edits
                + hx("01 000f") + b"X-Tamis-Verdict" + hx("0015") + b"tag; id=v7; margin=2"
                + b"."
                + hx("02 0007") + b"Subject" + hx("0007") + b"[junk] "
                + hx("0001 0003") + b"url")               # 1 reason

    def test_s4_verdict_decode(self):
        # §4: VERDICT layout, actions 0..3, edit ops 1 and 2.
        payload = self.verdict_bytes()
        data = struct.pack(">I", len(payload)) + payload
        f, n = tc.decode_frame(data, direction="s2c")
        self.assertEqual(n, len(data))
        v = tc.Verdict.from_frame(f)
        self.assertEqual(v.verdict_id, "v7")
        self.assertEqual((v.margin, v.probability), (2.5, 0.75))
        self.assertEqual(v.actions, {"a@example.test": "tag", "b@example.test": "quarantine"})
        self.assertEqual([(e.op_name, e.name) for e in v.edits],
                         [("add", "X-Tamis-Verdict"), ("prefix_subject", "Subject")])
        self.assertEqual(v.reasons, ["url"])
        self.assertEqual(tc.encode_frame(f), data)
        self.assertEqual(tc.encode_frame(v.to_frame()), data)

    def test_s4_verdict_nan_not_scored(self):
        # §4: margin/probability NaN when not scored; action 0 accept, 3 defer.
        nan = struct.pack(">d", math.nan)
        payload = (hx("42 0001") + b"u" + nan + nan + hx("0002")
                   + hx("0001") + b"a" + hx("00") + hx("0001") + b"b" + hx("03")
                   + hx("0000 0000"))
        data = struct.pack(">I", len(payload)) + payload
        v = tc.Verdict.from_frame(tc.decode_frame(data)[0])
        self.assertTrue(math.isnan(v.margin) and math.isnan(v.probability))
        self.assertFalse(v.scored)
        self.assertEqual(v.actions, {"a": "accept", "b": "defer"})
        self.assertEqual(tc.encode_frame(tc.decode_frame(data)[0]), data)

    def test_s4_verdict_truncated_is_malformed(self):
        # §1: a field running past the end -> MALFORMED (reasons count missing).
        payload = self.verdict_bytes()[:-7]
        data = struct.pack(">I", len(payload)) + payload
        with self.assertRaises(tc.FrameError) as cm:
            tc.decode_frame(data)
        self.assertEqual(cm.exception.code, tc.MALFORMED)


class SplitMessageTests(unittest.TestCase):
    """§2 FIELD / CHUNK: what the client sends for a message."""

    def test_s2_fields_raw_with_folding(self):
        raw = (b"From: a@example.org\r\nSubject: one\r\n two\r\n"
               b"X-8bit: caf\xe9\r\n\r\nbody line\r\n")
        fields, body = tc.split_message(raw)
        self.assertEqual(fields, [("From", b"a@example.org"),
                                  ("Subject", b"one\r\n two"),
                                  ("X-8bit", b"caf\xe9")])
        self.assertEqual(body, b"body line\r\n")

    def test_s2_lf_becomes_crlf(self):
        # §2 CHUNK: "CRLF line ends as on the wire".
        fields, body = tc.split_message(b"To: b@example.test\n\tc@example.test\n\nx\ny\n")
        self.assertEqual(fields, [("To", b"b@example.test\r\n\tc@example.test")])
        self.assertEqual(body, b"x\r\ny\r\n")

    def test_no_body(self):
        self.assertEqual(tc.split_message(b"A: 1\r\n"), ([("A", b"1")], b""))

    def test_s2_only_blanks_after_colon_removed(self):
        # §2 FIELD + vectors/message_tag.txt: "From: Alice <...>" is sent as
        # value "Alice <...>"; trailing blanks and folding stay.
        fields, _ = tc.split_message(b"X-A:\t two  \r\nX-B:x\r\n\r\n")
        self.assertEqual(fields, [("X-A", b"two  "), ("X-B", b"x")])


class FakeServer:
    """A scripted server on one end of a socketpair."""

    def __init__(self, script):
        self.client_sock, self.server_sock = socket.socketpair()
        self.received: list[tc.Frame] = []
        self.script = script
        self.error: BaseException | None = None
        self.thread = threading.Thread(target=self.run, daemon=True)
        self.thread.start()

    def read(self) -> tc.Frame | None:
        buf = b""
        while True:
            try:
                frame, n = tc.decode_frame(buf, direction="c2s")
                assert n == len(buf)
                self.received.append(frame)
                return frame
            except tc.Incomplete as inc:
                data = self.server_sock.recv(inc.needed)
                if not data:
                    return None
                buf += data

    def write(self, kind, **fields):
        self.server_sock.sendall(tc.encode_frame(tc.Frame(kind, fields)))

    def run(self):
        try:
            self.script(self)
        except BaseException as exc:  # noqa: BLE001
            self.error = exc
        finally:
            self.server_sock.close()

    def welcome(self, max_frame=65536):
        f = self.read()
        assert f.kind == tc.HELLO, f
        self.write(tc.WELCOME, version=1, max_frame=max_frame,
                   max_message=10 << 20, server="fake")


def verdict_fields(recips, action=1):
    return dict(verdict_id="id-1", margin=1.25, probability=math.nan,
                recipients=[(r, action) for r in recips], edits=[], reasons=["r"])


class ClientTests(unittest.TestCase):
    """§3, §4, §5, §6 behaviour of Client against a fake server."""

    def test_s3_s4_scan_with_enough(self):
        # §2 ENOUGH: the client skips further CHUNKs and sends SEAL.
        def script(s):
            s.welcome()
            while True:
                f = s.read()
                if f.kind == tc.CHUNK:
                    s.write(tc.ENOUGH)
                    break
            import time
            time.sleep(0.2)          # let the client see ENOUGH
            while s.read().kind != tc.SEAL:
                pass
            s.write(tc.VERDICT, **verdict_fields(["b@example.test"]))
            assert s.read().kind == tc.BYE
            s.write(tc.SERVER_BYE)

        srv = FakeServer(script)
        c = tc.Client("test", sock=srv.client_sock, timeout=5)
        c.hello()
        msg = b"Subject: hi\r\n\r\n" + b"x" * 100000
        v = c.scan("a@example.org", ["b@example.test"], msg, chunk_size=1000)
        c.bye()
        srv.thread.join(5)
        self.assertIsNone(srv.error)
        self.assertEqual(v.actions, {"b@example.test": "tag"})
        self.assertTrue(v.body_cut_short)
        kinds = [f.kind for f in srv.received]
        self.assertLess(kinds.count(tc.CHUNK), 100)
        self.assertEqual(kinds[:4], [tc.HELLO, tc.SENDER, tc.RECIPIENT, tc.FIELD])
        self.assertEqual(srv.received[3].fields, {"name": "Subject", "value": b"hi"})

    def test_s5_non_fatal_fault_then_verdict(self):
        # §5: TOO_MANY is non-fatal; the VERDICT still follows SEAL.
        def script(s):
            s.welcome()
            s.read()                                  # SENDER
            s.write(tc.FAULT, code=tc.TOO_MANY, fatal=0, text="too many")
            while s.read().kind != tc.SEAL:
                pass
            s.write(tc.VERDICT, **verdict_fields(["b@example.test"], 0))

        srv = FakeServer(script)
        c = tc.Client("test", sock=srv.client_sock, timeout=5)
        c.hello()
        v = c.scan("a@example.org", ["b@example.test"], b"A: b\r\n\r\nbody\r\n")
        self.assertEqual(v.actions, {"b@example.test": "accept"})
        self.assertEqual([f[0] for f in v.faults], [tc.TOO_MANY])

    def test_s4_2_unlisted_recipients_are_the_last_ones_sent(self):
        # §4.2: past the limits the server keeps a prefix of the recipients
        # (TOO_MANY); the rest must be sent again or deferred by the caller.
        def script(s):
            s.welcome()
            s.read()                                  # SENDER
            for _ in range(3):
                s.read()                              # RECIPIENT x3
            s.write(tc.FAULT, code=tc.TOO_MANY, fatal=0, text="too many")
            while s.read().kind != tc.SEAL:
                pass
            s.write(tc.VERDICT, **verdict_fields(["a@example.test", ""], 2))

        srv = FakeServer(script)
        c = tc.Client("test", sock=srv.client_sock, timeout=5)
        c.hello()
        v = c.scan("s@example.org", ["a@example.test", "b c@example.test", "d@example.test"],
                   b"A: b\r\n\r\nbody\r\n")
        self.assertEqual(v.actions, {"a@example.test": "quarantine",
                                     "b c@example.test": "quarantine"})
        self.assertEqual(v.unlisted, ["d@example.test"])

    def test_s5_fatal_fault_raises(self):
        # §5: fatal FAULT -> open message not scanned; client raises.
        def script(s):
            s.welcome()
            s.read()
            s.write(tc.FAULT, code=tc.SHUTTING_DOWN, fatal=1, text="stopping")

        srv = FakeServer(script)
        c = tc.Client("test", sock=srv.client_sock, timeout=5)
        c.hello()
        with self.assertRaises((tc.FatalFault, tc.ConnectionClosed)) as cm:
            c.scan("a@example.org", ["b@example.test"], b"A: b\r\n\r\nbody\r\n")
        self.assertTrue(cm.exception.message_open)
        if isinstance(cm.exception, tc.FatalFault):
            self.assertEqual(cm.exception.name, "SHUTTING_DOWN")

    def test_s3_version_fault_on_hello(self):
        # §3: version 0 -> FAULT VERSION (fatal).
        def script(s):
            s.read()
            s.write(tc.FAULT, code=tc.VERSION, fatal=1, text="version 0")

        srv = FakeServer(script)
        c = tc.Client("test", sock=srv.client_sock, timeout=5)
        with self.assertRaises(tc.FatalFault) as cm:
            c.hello(version=0)
        self.assertEqual(cm.exception.code, tc.VERSION)

    def test_s2_ping_pong_and_drop(self):
        # §2 PING/PONG with the same token; DROP gets no answer.
        def script(s):
            s.welcome()
            f = s.read()
            s.write(tc.PONG, token=f["token"])
            for _ in range(3):                        # SENDER RECIPIENT DROP
                s.read()
            s.write(tc.ENOUGH)                        # stale, for the dropped message
            f = s.read()
            s.write(tc.PONG, token=f["token"])
            assert s.read().kind == tc.BYE
            s.write(tc.SERVER_BYE)

        srv = FakeServer(script)
        c = tc.Client("test", sock=srv.client_sock, timeout=5)
        c.hello()
        self.assertEqual(c.ping(77), 77)
        c.begin("a@example.org", ["b@example.test"])
        c.drop()
        self.assertFalse(c._enough)
        c.bye()
        srv.thread.join(5)
        self.assertIsNone(srv.error)
        self.assertEqual([f.kind for f in srv.received],
                         [tc.HELLO, tc.PING, tc.SENDER, tc.RECIPIENT, tc.DROP,
                          tc.PING, tc.BYE])

    def test_s6_client_refuses_out_of_order(self):
        # §6: FIELD before any RECIPIENT is not allowed (checked locally).
        a, b = socket.socketpair()
        c = tc.Client("test", sock=a)
        c.state = "ready"
        with self.assertRaises(tc.UsageError):
            c.field("A", b"b")
        with self.assertRaises(tc.UsageError):
            c.begin("a@example.org", [])
        a.close()
        b.close()


# --------------------------------------------------------------------------
# The client against the normative conversations of proto/vectors/
# --------------------------------------------------------------------------

VECTORS = os.path.join(os.path.dirname(os.path.abspath(__file__)),
                       "..", "..", "proto", "vectors")


class VectorServer:
    """Plays the S: lines of a vector file and checks that the client sends
    exactly the C: lines, in order (proto/vectors/README.md format)."""

    def __init__(self, name: str):
        self.lines = []
        with open(os.path.join(VECTORS, name), encoding="utf-8") as fh:
            for raw in fh:
                text = raw.split("#", 1)[0].strip()
                if text:
                    side, hexpart = text.split(":", 1)
                    self.lines.append((side, bytes.fromhex(hexpart.replace(" ", ""))))
        self.client_sock, self.server_sock = socket.socketpair()
        self.error: str | None = None
        self.thread = threading.Thread(target=self.run, daemon=True)
        self.thread.start()

    def recv_exact(self, n: int) -> bytes:
        buf = b""
        while len(buf) < n:
            d = self.server_sock.recv(n - len(buf))
            if not d:
                break
            buf += d
        return buf

    def run(self):
        try:
            for i, (side, data) in enumerate(self.lines):
                if side == "S":
                    self.server_sock.sendall(data)
                    continue
                head = self.recv_exact(4)
                got = head + self.recv_exact(struct.unpack(">I", head)[0]) if len(head) == 4 else head
                if got != data:
                    self.error = f"frame {i}: client sent {got.hex()} expected {data.hex()}"
                    return
        except OSError as exc:
            self.error = f"server: {exc}"
        finally:
            self.server_sock.close()

    def client(self, **kw) -> tc.Client:
        kw.setdefault("max_frame", 65536)
        kw.setdefault("client_name", "relay-test/1")
        return tc.Client("vector", sock=self.client_sock, timeout=5, **kw)

    def finish(self, test: unittest.TestCase):
        self.thread.join(5)
        test.assertIsNone(self.error)


@unittest.skipUnless(os.path.isdir(VECTORS), "proto/vectors/ not present")
class VectorConversationTests(unittest.TestCase):
    """The client, driven through its API, must send exactly the C: bytes of
    each producible conversation and understand the S: bytes."""

    def test_vec_handshake(self):
        # vectors/handshake.txt, §3.
        srv = VectorServer("handshake.txt")
        c = srv.client()
        c.hello()
        self.assertEqual((c.server_version, c.server_max_frame, c.server_max_message,
                          c.server_name), (1, 65536, 10485760, "tamis/0.1"))
        srv.finish(self)
        c.close()

    def test_vec_message_tag(self):
        # vectors/message_tag.txt: PEER, 2 recipients, folded field, 2 chunks, §4.
        srv = VectorServer("message_tag.txt")
        c = srv.client()
        c.hello()
        c.peer("192.0.2.10", 52344, "mail.example.org")
        msg = (b"From: Alice <alice@example.org>\n"
               b"Subject: Cheap watches\n"
               b"Received: from mx.example.org\n\tby relay.example.net\n"
               b"\n"
               b"Buy cheap watches now!\nLimited offer.\n")
        v = c.scan("alice@example.org", ["bob@example.net", "carol@example.net"], msg,
                   chunk_size=24)
        srv.finish(self)
        self.assertEqual(v.verdict_id, "v-0001")
        self.assertEqual((v.margin, v.probability), (1.25, 0.875))
        self.assertEqual(v.actions, {"bob@example.net": "tag", "carol@example.net": "tag"})
        self.assertEqual([(e.op, e.name, e.value) for e in v.edits],
                         [(1, "X-Tamis-Verdict", "tag; id=v-0001; margin=1.2500"),
                          (2, "Subject", "[junk] ")])
        self.assertEqual(v.reasons, ["cheap watches"])
        self.assertEqual(v.unlisted, [])
        c.close()

    def test_vec_ping_and_enough(self):
        # vectors/ping.txt: PING between and inside messages, ENOUGH (§2, §6).
        srv = VectorServer("ping.txt")
        c = srv.client()
        c.hello()
        self.assertEqual(c.ping(0x0123456789ABCDEF), 0x0123456789ABCDEF)
        c.begin("alice@example.org", ["bob@example.net"])
        c.ping(0xFFFFFFFFFFFFFFFF)
        c.chunk(b"Lunch at noon?\r\n")
        v = c.seal()
        srv.finish(self)
        self.assertEqual(v.actions, {"bob@example.net": "accept"})
        self.assertEqual((v.margin, v.probability), (-3.5, 0.015625))
        self.assertTrue(v.body_cut_short)
        c.close()

    def test_vec_drop(self):
        # vectors/drop.txt: DROP after a chunk; PING 7 / PONG 7; BYE (§2).
        srv = VectorServer("drop.txt")
        c = srv.client()
        c.hello()
        c.begin("alice@example.org", ["bob@example.net"])
        c.field("Subject", b"Draft")
        c.chunk(b"Hello\r\n")
        c.drop(token=7)
        c.bye()
        srv.finish(self)

    def test_vec_two_messages(self):
        # vectors/two_messages.txt: null sender, no header/body, NaN scores (§4).
        srv = VectorServer("two_messages.txt")
        c = srv.client()
        c.hello()
        v1 = c.scan("alice@example.org", ["bob@example.net"],
                    b"Subject: Minutes\r\n\r\nSee attached.\r\n")
        v2 = c.scan("", ["postmaster@example.net"], b"")
        srv.finish(self)
        self.assertEqual((v1.verdict_id, v1.reasons), ("v-0003", ["looks like ham"]))
        self.assertTrue(math.isnan(v2.margin) and math.isnan(v2.probability))
        self.assertFalse(v2.scored)
        self.assertEqual(v2.actions, {"postmaster@example.net": "accept"})
        self.assertEqual([(e.op_name, e.name, e.value) for e in v2.edits],
                         [("add", "X-Tamis-Unscanned", "model unavailable")])
        c.close()

    def test_vec_bye(self):
        # vectors/bye.txt: BYE 0x0a answered by BYE 0x4a.
        srv = VectorServer("bye.txt")
        c = srv.client()
        c.hello()
        c.bye()
        srv.finish(self)
        self.assertEqual(c.state, "closed")

    def fatal(self, name, code, action, **kw):
        srv = VectorServer(name)
        c = srv.client(**kw)
        with self.assertRaises(tc.FatalFault) as cm:
            action(c)
        self.assertEqual(cm.exception.code, code)
        self.assertEqual(c.state, "closed")
        srv.finish(self)
        return cm.exception

    def test_vec_fault_version(self):
        # vectors/fault_version.txt: HELLO version 0 -> FAULT VERSION (§3).
        self.fatal("fault_version.txt", tc.VERSION, lambda c: c.hello(version=0),
                   client_name="relay-test/0")

    def test_vec_handshake_secret(self):
        # vectors/handshake_secret.txt: HELLO carries the shared secret (§3).
        srv = VectorServer("handshake_secret.txt")
        c = srv.client(secret=b"5f2b6c0e9d8a7b1c4e3f2a1b0c9d8e7f")
        c.hello()
        srv.finish(self)
        c.close()

    def test_vec_fault_denied(self):
        # vectors/fault_denied.txt: no secret where one is required (§3).
        self.fatal("fault_denied.txt", tc.DENIED, lambda c: c.hello())

    def test_vec_fault_busy(self):
        # vectors/fault_busy.txt: FAULT BUSY instead of WELCOME (§3).
        self.fatal("fault_busy.txt", tc.BUSY, lambda c: c.hello())

    def test_vec_fault_idle(self):
        # vectors/fault_idle.txt: FAULT IDLE after silence (§7).
        def act(c):
            c.hello()
            c._expect(tc.PONG)       # wait for the server's next frame
        self.fatal("fault_idle.txt", tc.IDLE, act)

    def test_vec_bad_address(self):
        # vectors/bad_address.txt: a refused RECIPIENT is listed empty, in its
        # place (§4.1); the client maps the verdict to what it sent by position.
        srv = VectorServer("bad_address.txt")
        c = srv.client()
        c.hello()
        v = c.scan("alice@example.org", ["bob@example.net", "carol at example.net"],
                   b"Subject: Minutes\r\n\r\nSee attached.\r\n")
        srv.finish(self)
        self.assertEqual(v.recipients, [("bob@example.net", "accept"), ("", "accept")])
        self.assertEqual(v.actions, {"bob@example.net": "accept",
                                     "carol at example.net": "accept"})
        self.assertEqual([f[1] for f in v.faults], ["BAD_ADDRESS"])
        self.assertEqual(v.unlisted, [])
        c.close()

    def test_vec_fault_verdict_too_large(self):
        # vectors/fault_verdict_too_large.txt: a fatal FAULT instead of the
        # VERDICT (§4.2): the open message is not scanned (§5).
        srv = VectorServer("fault_verdict_too_large.txt")
        c = srv.client(max_frame=4096)
        c.hello()
        with self.assertRaises(tc.FatalFault) as cm:
            c.scan("alice@example.org", ["bob@example.net"], b"")
        self.assertEqual(cm.exception.code, tc.VERDICT_TOO_LARGE)
        self.assertTrue(cm.exception.message_open)
        srv.finish(self)

    def test_vec_message_quarantine(self):
        # vectors/message_quarantine.txt, §4.5: no ENOUGH while a recipient may
        # be quarantined, so every chunk is sent; the message sent again after a
        # lost verdict gets the first verdict id.
        srv = VectorServer("message_quarantine.txt")
        c = srv.client()
        c.hello()
        msg = (b"From: Prize Desk <win@promo.example>\r\n"
               b"Subject: You have won\r\n"
               b"Message-ID: <p-77@promo.example>\r\n"
               b"\r\n"
               b"Claim your prize today.\r\nSend your bank details.\r\n")
        v1 = c.scan("alice@example.org", ["dan@example.net"], msg, chunk_size=25)
        v2 = c.scan("alice@example.org", ["dan@example.net"], msg, chunk_size=25)
        srv.finish(self)
        self.assertEqual(v1.actions, {"dan@example.net": "quarantine"})
        self.assertEqual(v1.held, ["dan@example.net"])
        self.assertEqual(v1.edits, [])
        self.assertFalse(v1.body_cut_short)
        self.assertEqual(v2.verdict_id, v1.verdict_id)
        self.assertEqual(v2.held, ["dan@example.net"])
        c.close()

    def test_vec_message_not_held(self):
        # vectors/message_not_held.txt, §4.5: a message past max_message is not
        # kept whole, so it is tagged instead of quarantined, and says why.
        srv = VectorServer("message_not_held.txt")
        c = srv.client()
        c.hello()
        self.assertEqual(c.server_max_message, 64)
        v = c.scan("alice@example.org", ["dan@example.net"],
                   b"Subject: You have won a prize\r\n\r\n"
                   b"Claim your prize today.\r\nSend your bank details.\r\n",
                   chunk_size=25)
        srv.finish(self)
        self.assertEqual([f[1] for f in v.faults], ["MESSAGE_TOO_LARGE"])
        self.assertEqual(v.actions, {"dan@example.net": "tag"})
        self.assertEqual(v.held, [])
        self.assertTrue(any(r.startswith("not held: ") for r in v.reasons), v.reasons)
        c.close()

    def test_vec_fault_shutting_down(self):
        # vectors/fault_shutting_down.txt: SENDER refused (§8); the open
        # message is reported as not scanned (§5).
        def act(c):
            c.hello()
            c.scan("alice@example.org", ["bob@example.net"], b"A: b\r\n\r\nbody\r\n")
        srv = VectorServer("fault_shutting_down.txt")
        c = srv.client()
        with self.assertRaises((tc.FatalFault, tc.ConnectionClosed)) as cm:
            act(c)
        self.assertTrue(cm.exception.message_open)
        self.assertEqual(getattr(cm.exception, "code", tc.SHUTTING_DOWN), tc.SHUTTING_DOWN)
        srv.finish(self)


if __name__ == "__main__":
    unittest.main()
