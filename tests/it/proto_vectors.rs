//! The relay protocol codec and state machine against the conversations in `proto/vectors/`
//! (the normative examples of `proto/PROTOCOL.md`): exact decode, byte-exact re-encode,
//! truncation at every byte, corrupted lengths, and property tests of the untrusted entry point.

use std::path::{Path, PathBuf};

use bytes::BytesMut;
use pretty_assertions::assert_eq;
use proptest::prelude::*;

use tamis::proto::{
    Accepted, Action, Edit, EditOp, FaultCode, Frame, Keep, Limits, Phase, Problem, ProtoError,
    RecipientAction, SessionState, Verdict, encode_frame, encode_frame_within, parse_frame,
};

/// The server's default `max_frame`, which the vectors assume.
const MAX: u32 = 65_536;

/// A `FAULT` code PROTOCOL.md §5 does not define.
const UNDEFINED_CODE: u64 = 99;

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Dir {
    Client,
    Server,
}

#[derive(Debug)]
struct Line {
    dir: Dir,
    bytes: Vec<u8>,
    line_no: usize,
}

fn vector_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("proto/vectors")
}

fn decode_hex(text: &str) -> Vec<u8> {
    let digits: Vec<u8> = text
        .bytes()
        .filter(|b| !b.is_ascii_whitespace())
        .map(|b| match b {
            b'0'..=b'9' => b - b'0',
            b'a'..=b'f' => b - b'a' + 10,
            _ => panic!("not lowercase hex: {text:?}"),
        })
        .collect();
    assert!(
        digits.len().is_multiple_of(2),
        "odd number of hex digits: {text:?}"
    );
    digits.chunks(2).map(|p| p[0] << 4 | p[1]).collect()
}

/// Reads a vector file in the format of `proto/vectors/README.md`.
fn read_vector(name: &str) -> Vec<Line> {
    let path = vector_dir().join(name);
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let mut lines = Vec::new();
    for (i, raw) in text.lines().enumerate() {
        let content = raw.split('#').next().unwrap_or("").trim();
        if content.is_empty() {
            continue;
        }
        let (dir, hex) = if let Some(hex) = content.strip_prefix("C:") {
            (Dir::Client, hex)
        } else if let Some(hex) = content.strip_prefix("S:") {
            (Dir::Server, hex)
        } else {
            panic!("{name}:{}: neither C: nor S: line: {raw:?}", i + 1);
        };
        // Whitespace may only fall between whole bytes.
        for group in hex.split_whitespace() {
            assert!(
                group.len().is_multiple_of(2),
                "{name}:{}: group {group:?} splits a byte",
                i + 1
            );
        }
        lines.push(Line {
            dir,
            bytes: decode_hex(hex),
            line_no: i + 1,
        });
    }
    lines
}

/// What one vector line must decode to.
#[derive(Debug)]
enum Expect {
    Frame(Frame),
    Error(ProtoError),
}

fn s(text: &str) -> String {
    text.to_owned()
}

fn hello(version: u16) -> Frame {
    Frame::Hello {
        version,
        max_frame: 65_536,
        client: format!("relay-test/{version}"),
        secret: None,
    }
}

fn welcome() -> Frame {
    Frame::Welcome {
        version: 1,
        max_frame: 65_536,
        max_message: 10_485_760,
        server: s("tamis/0.1"),
    }
}

fn handshake() -> Vec<Expect> {
    vec![Expect::Frame(hello(1)), Expect::Frame(welcome())]
}

fn sender(a: &str) -> Frame {
    Frame::Sender { address: s(a) }
}

fn rcpt(a: &str) -> Frame {
    Frame::Recipient { address: s(a) }
}

fn field(name: &str, value: &[u8]) -> Frame {
    Frame::Field {
        name: s(name),
        value: value.to_vec(),
    }
}

fn chunk(data: &[u8]) -> Frame {
    Frame::Chunk {
        data: data.to_vec(),
    }
}

fn fault(code: FaultCode, text: &str) -> Frame {
    Frame::Fault {
        code,
        fatal: true,
        text: s(text),
    }
}

fn verdict(
    id: &str,
    margin: f64,
    probability: f64,
    recipients: &[(&str, Action)],
    edits: &[(EditOp, &str, &str)],
    reasons: &[&str],
) -> Frame {
    Frame::Verdict(Verdict {
        verdict_id: s(id),
        margin,
        probability,
        recipients: recipients
            .iter()
            .map(|(a, action)| RecipientAction {
                address: s(a),
                action: *action,
            })
            .collect(),
        edits: edits
            .iter()
            .map(|(op, name, value)| Edit {
                op: *op,
                name: s(name),
                value: s(value),
            })
            .collect(),
        reasons: reasons.iter().map(|r| s(r)).collect(),
    })
}

/// The documented frames of every vector file, in order.
fn expectations() -> Vec<(&'static str, Vec<Expect>)> {
    use Expect::{Error as E, Frame as F};
    let with_handshake = |rest: Vec<Expect>| {
        let mut all = handshake();
        all.extend(rest);
        all
    };
    vec![
        ("handshake.txt", handshake()),
        (
            "message_tag.txt",
            with_handshake(vec![
                F(Frame::Peer {
                    address: s("192.0.2.10"),
                    port: 52_344,
                    greeting: s("mail.example.org"),
                }),
                F(sender("alice@example.org")),
                F(rcpt("bob@example.net")),
                F(rcpt("carol@example.net")),
                F(field("From", b"Alice <alice@example.org>")),
                F(field("Subject", b"Cheap watches")),
                F(field(
                    "Received",
                    b"from mx.example.org\r\n\tby relay.example.net",
                )),
                F(chunk(b"Buy cheap watches now!\r\n")),
                F(chunk(b"Limited offer.\r\n")),
                F(Frame::Seal),
                F(verdict(
                    "v-0001",
                    1.25,
                    0.875,
                    &[
                        ("bob@example.net", Action::Tag),
                        ("carol@example.net", Action::Tag),
                    ],
                    &[
                        (
                            EditOp::AddField,
                            "X-Tamis-Verdict",
                            "tag; id=v-0001; margin=1.2500",
                        ),
                        (EditOp::PrefixSubject, "Subject", "[junk] "),
                    ],
                    &["cheap watches"],
                )),
            ]),
        ),
        (
            "drop.txt",
            with_handshake(vec![
                F(sender("alice@example.org")),
                F(rcpt("bob@example.net")),
                F(field("Subject", b"Draft")),
                F(chunk(b"Hello\r\n")),
                F(Frame::Drop),
                F(Frame::Ping { token: 7 }),
                F(Frame::Pong { token: 7 }),
                F(Frame::ClientBye),
                F(Frame::ServerBye),
            ]),
        ),
        (
            "ping.txt",
            with_handshake(vec![
                F(Frame::Ping {
                    token: 0x0123_4567_89ab_cdef,
                }),
                F(Frame::Pong {
                    token: 0x0123_4567_89ab_cdef,
                }),
                F(sender("alice@example.org")),
                F(rcpt("bob@example.net")),
                F(Frame::Ping { token: u64::MAX }),
                F(Frame::Pong { token: u64::MAX }),
                F(chunk(b"Lunch at noon?\r\n")),
                F(Frame::Enough),
                F(Frame::Seal),
                F(verdict(
                    "v-0002",
                    -3.5,
                    0.015625,
                    &[("bob@example.net", Action::Accept)],
                    &[],
                    &[],
                )),
            ]),
        ),
        (
            "two_messages.txt",
            with_handshake(vec![
                F(sender("alice@example.org")),
                F(rcpt("bob@example.net")),
                F(field("Subject", b"Minutes")),
                F(chunk(b"See attached.\r\n")),
                F(Frame::Seal),
                F(verdict(
                    "v-0003",
                    -2.5,
                    0.0625,
                    &[("bob@example.net", Action::Accept)],
                    &[],
                    &["looks like ham"],
                )),
                F(sender("")),
                F(rcpt("postmaster@example.net")),
                F(Frame::Seal),
                // The canonical quiet NaN, as Python's struct and Rust's f64::NAN write it.
                F(verdict(
                    "v-0004",
                    f64::from_bits(0x7ff8_0000_0000_0000),
                    f64::from_bits(0x7ff8_0000_0000_0000),
                    &[("postmaster@example.net", Action::Accept)],
                    &[(EditOp::AddField, "X-Tamis-Unscanned", "model unavailable")],
                    &["not scanned"],
                )),
            ]),
        ),
        (
            "bye.txt",
            with_handshake(vec![F(Frame::ClientBye), F(Frame::ServerBye)]),
        ),
        (
            "fault_malformed.txt",
            with_handshake(vec![
                E(ProtoError::Malformed {
                    kind: 0x03,
                    declared: 5,
                    offset: 2,
                    problem: Problem::Short,
                }),
                F(fault(FaultCode::Malformed, "malformed frame")),
            ]),
        ),
        (
            "fault_malformed_zero_length.txt",
            with_handshake(vec![
                E(ProtoError::ZeroLength),
                F(fault(FaultCode::Malformed, "frame length 0")),
            ]),
        ),
        (
            "fault_malformed_left_over.txt",
            with_handshake(vec![
                F(sender("alice@example.org")),
                F(rcpt("bob@example.net")),
                E(ProtoError::Malformed {
                    kind: 0x07,
                    declared: 2,
                    offset: 0,
                    problem: Problem::LeftOver { count: 1 },
                }),
                F(fault(FaultCode::Malformed, "bytes left over")),
            ]),
        ),
        (
            "fault_unknown_kind.txt",
            with_handshake(vec![
                E(ProtoError::UnknownKind(0x3f)),
                F(fault(FaultCode::UnknownKind, "unknown frame kind 0x3f")),
            ]),
        ),
        (
            "fault_out_of_order.txt",
            with_handshake(vec![
                F(chunk(b"Hi\r\n")),
                F(fault(
                    FaultCode::OutOfOrder,
                    "CHUNK not allowed between messages",
                )),
            ]),
        ),
        (
            "fault_frame_too_large.txt",
            with_handshake(vec![
                E(ProtoError::FrameTooLarge {
                    declared: 65_537,
                    limit: MAX,
                }),
                F(fault(
                    FaultCode::FrameTooLarge,
                    "frame length 65537 above 65536",
                )),
            ]),
        ),
        (
            "fault_idle.txt",
            with_handshake(vec![F(fault(FaultCode::Idle, "idle timeout"))]),
        ),
        (
            "fault_version.txt",
            vec![
                F(hello(0)),
                F(fault(
                    FaultCode::Version,
                    "protocol version 0 is not supported",
                )),
            ],
        ),
        (
            "fault_busy.txt",
            vec![
                F(hello(1)),
                F(fault(FaultCode::Busy, "connection limit reached")),
            ],
        ),
        (
            "bad_address.txt",
            with_handshake(vec![
                F(sender("alice@example.org")),
                F(rcpt("bob@example.net")),
                F(rcpt("carol at example.net")),
                F(Frame::Fault {
                    code: FaultCode::BadAddress,
                    fatal: false,
                    text: s("RECIPIENT 2 refused: no @"),
                }),
                F(field("Subject", b"Minutes")),
                F(chunk(b"See attached.\r\n")),
                F(Frame::Seal),
                F(verdict(
                    "v-0005",
                    -2.5,
                    0.0625,
                    &[("bob@example.net", Action::Accept), ("", Action::Accept)],
                    &[],
                    &["looks like ham"],
                )),
            ]),
        ),
        (
            "fault_verdict_too_large.txt",
            vec![
                F(Frame::Hello {
                    version: 1,
                    max_frame: 4096,
                    client: s("relay-test/1"),
                    secret: None,
                }),
                F(welcome()),
                F(sender("alice@example.org")),
                F(rcpt("bob@example.net")),
                F(Frame::Seal),
                F(fault(
                    FaultCode::VerdictTooLarge,
                    "verdict does not fit max_frame 4096",
                )),
            ],
        ),
        (
            "handshake_secret.txt",
            vec![
                F(Frame::Hello {
                    version: 1,
                    max_frame: 65_536,
                    client: s("relay-test/1"),
                    secret: Some(b"5f2b6c0e9d8a7b1c4e3f2a1b0c9d8e7f".to_vec()),
                }),
                F(welcome()),
            ],
        ),
        (
            "fault_denied.txt",
            vec![
                F(hello(1)),
                F(fault(FaultCode::Denied, "HELLO carries no shared secret")),
            ],
        ),
        (
            "fault_shutting_down.txt",
            with_handshake(vec![
                F(sender("alice@example.org")),
                F(fault(FaultCode::ShuttingDown, "shutting down")),
            ]),
        ),
        ("message_quarantine.txt", {
            let message = || {
                vec![
                    F(sender("alice@example.org")),
                    F(rcpt("dan@example.net")),
                    F(field("From", b"Prize Desk <win@promo.example>")),
                    F(field("Subject", b"You have won")),
                    F(field("Message-ID", b"<p-77@promo.example>")),
                    F(chunk(b"Claim your prize today.\r\n")),
                    F(chunk(b"Send your bank details.\r\n")),
                    F(Frame::Seal),
                    F(verdict(
                        "v-0006",
                        2.5,
                        0.9921875,
                        &[("dan@example.net", Action::Quarantine)],
                        &[],
                        &["margin 2.5000"],
                    )),
                ]
            };
            let mut all = with_handshake(message());
            all.extend(message());
            all
        }),
        (
            "message_not_held.txt",
            vec![
                F(hello(1)),
                F(Frame::Welcome {
                    version: 1,
                    max_frame: 65_536,
                    max_message: 64,
                    server: s("tamis/0.1"),
                }),
                F(sender("alice@example.org")),
                F(rcpt("dan@example.net")),
                F(field("Subject", b"You have won a prize")),
                F(chunk(b"Claim your prize today.\r\n")),
                F(chunk(b"Send your bank details.\r\n")),
                F(Frame::Fault {
                    code: FaultCode::MessageTooLarge,
                    fatal: false,
                    text: s("message larger than max_message; the rest is not read"),
                }),
                F(Frame::Seal),
                F(verdict(
                    "v-0007",
                    2.5,
                    0.9921875,
                    &[("dan@example.net", Action::Tag)],
                    &[(
                        EditOp::AddField,
                        "X-Tamis-Verdict",
                        "tag; id=v-0007; margin=2.5000",
                    )],
                    &[
                        "margin 2.5000",
                        "not held: it is larger than max_message; tag instead of quarantine",
                    ],
                )),
            ],
        ),
    ]
}

fn encode(frame: &Frame) -> Vec<u8> {
    let mut buf = BytesMut::new();
    encode_frame(frame, &mut buf).expect("test frames fit the wire");
    buf.to_vec()
}

#[test]
fn every_vector_file_has_expectations() {
    let mut on_disk: Vec<String> = std::fs::read_dir(vector_dir())
        .expect("vector dir")
        .map(|e| {
            e.expect("dir entry")
                .file_name()
                .to_string_lossy()
                .into_owned()
        })
        .filter(|n| n.ends_with(".txt"))
        .collect();
    on_disk.sort();
    let mut expected: Vec<String> = expectations()
        .iter()
        .map(|(n, _)| (*n).to_owned())
        .collect();
    expected.sort();
    assert_eq!(on_disk, expected);
}

#[test]
fn vector_lines_decode_to_documented_frames_and_reencode_exactly() {
    let mut frames = 0;
    for (name, expects) in expectations() {
        let lines = read_vector(name);
        assert_eq!(lines.len(), expects.len(), "{name}: frame lines");
        for (line, expect) in lines.iter().zip(&expects) {
            let at = format!("{name}:{}", line.line_no);
            let got = parse_frame(&line.bytes, MAX);
            match expect {
                Expect::Frame(frame) => {
                    let (decoded, used) = got
                        .unwrap_or_else(|e| panic!("{at}: {e}"))
                        .unwrap_or_else(|| panic!("{at}: incomplete"));
                    assert_eq!(&decoded, frame, "{at}");
                    assert_eq!(used, line.bytes.len(), "{at}: consumed");
                    assert_eq!(encode(&decoded), line.bytes, "{at}: re-encode");
                    assert_eq!(
                        decoded.is_from_client(),
                        line.dir == Dir::Client,
                        "{at}: direction"
                    );
                    frames += 1;
                }
                Expect::Error(error) => {
                    assert_eq!(
                        line.dir,
                        Dir::Client,
                        "{at}: broken frames come from the client"
                    );
                    assert_eq!(got.as_ref().err(), Some(error), "{at}");
                }
            }
        }
    }
    assert!(frames > 60, "only {frames} frames checked");
}

/// In each `fault_*` conversation the error raised by the codec or the state machine maps to the
/// code of the server's closing `FAULT`.
#[test]
fn fault_vectors_end_with_the_code_of_the_error() {
    for (name, _) in expectations() {
        if !name.starts_with("fault_") {
            continue;
        }
        let lines = read_vector(name);
        let Some(last) = lines.last() else {
            panic!("{name}: empty");
        };
        assert_eq!(last.dir, Dir::Server, "{name}: ends with the server");
        let Ok(Some((Frame::Fault { code, fatal, .. }, _))) = parse_frame(&last.bytes, MAX) else {
            panic!("{name}: last line is not a FAULT");
        };
        assert!(fatal && code.is_fatal(), "{name}: closing FAULT is fatal");
        let mut state = SessionState::new(Limits::default());
        let mut raised = None;
        for line in lines.iter().filter(|l| l.dir == Dir::Client) {
            match parse_frame(&line.bytes, MAX) {
                Ok(Some((frame, _))) => {
                    if let Err(e) = state.accept_client(&frame) {
                        raised = Some(e.code());
                    }
                }
                Ok(None) => panic!("{name}:{}: incomplete", line.line_no),
                Err(e) => raised = Some(e.code()),
            }
        }
        match code {
            // Raised by the server itself (timer, connection limit, signal), not by a frame.
            FaultCode::Idle
            | FaultCode::Busy
            | FaultCode::ShuttingDown
            | FaultCode::VerdictTooLarge
            | FaultCode::Denied => {
                assert_eq!(raised, None, "{name}")
            }
            _ => assert_eq!(raised, Some(code), "{name}"),
        }
    }
}

#[test]
fn every_fatal_code_has_a_vector() {
    let mut seen = Vec::new();
    for (_, expects) in expectations() {
        for e in expects {
            if let Expect::Frame(Frame::Fault { code, .. }) = e {
                seen.push(code);
            }
        }
    }
    for code in FaultCode::ALL.into_iter().filter(|c| c.is_fatal()) {
        assert!(seen.contains(&code), "no vector for {code}");
    }
}

#[test]
fn truncating_any_vector_frame_at_any_byte_is_incomplete() {
    for (name, expects) in expectations() {
        for (line, expect) in read_vector(name).iter().zip(&expects) {
            if let Expect::Frame(_) = expect {
                for cut in 0..line.bytes.len() {
                    assert_eq!(
                        parse_frame(&line.bytes[..cut], MAX),
                        Ok(None),
                        "{name}:{} cut at {cut}",
                        line.line_no
                    );
                }
            }
        }
    }
}

#[test]
fn a_stream_of_frames_parses_one_at_a_time() {
    let lines = read_vector("message_tag.txt");
    let stream: Vec<u8> = lines.iter().flat_map(|l| l.bytes.clone()).collect();
    let mut rest = &stream[..];
    let mut count = 0;
    while let Some((frame, used)) = parse_frame(rest, MAX).expect("valid stream") {
        assert_eq!(encode(&frame), rest[..used].to_vec());
        rest = &rest[used..];
        count += 1;
    }
    assert!(rest.is_empty());
    assert_eq!(count, lines.len());
}

/// A CHUNK whose `length` is exactly `n`.
fn chunk_of_length(n: u32) -> Vec<u8> {
    // kind (1) + bytes prefix (4) + data
    let data = vec![b'x'; (n - 5) as usize];
    encode(&chunk(&data))
}

#[test]
fn corrupted_lengths_are_refused_before_the_payload() {
    // Zero: refused after the 4 length bytes alone.
    assert_eq!(parse_frame(&[0, 0, 0, 0], MAX), Err(ProtoError::ZeroLength));
    // Just above the limit, and 4 GiB: refused with no payload present.
    for declared in [MAX + 1, u32::MAX] {
        assert_eq!(
            parse_frame(&declared.to_be_bytes(), MAX),
            Err(ProtoError::FrameTooLarge {
                declared,
                limit: MAX
            })
        );
    }
    // At and just below the limit: accepted, and incomplete until the last byte arrives.
    for declared in [MAX, MAX - 1] {
        let frame = chunk_of_length(declared);
        assert_eq!(frame.len(), declared as usize + 4);
        assert_eq!(parse_frame(&frame[..frame.len() - 1], MAX), Ok(None));
        let (_, used) = parse_frame(&frame, MAX).expect("fits").expect("complete");
        assert_eq!(used, frame.len());
    }
}

#[test]
fn lengths_disagreeing_with_the_payload_are_malformed() {
    let good = encode(&sender("alice@example.org"));
    let declared = u32::from_be_bytes([good[0], good[1], good[2], good[3]]);
    // One byte shorter: the str runs past the end of the frame.
    let mut short = good.clone();
    short[..4].copy_from_slice(&(declared - 1).to_be_bytes());
    assert_eq!(
        parse_frame(&short, MAX),
        Err(ProtoError::Malformed {
            kind: 0x03,
            declared: declared - 1,
            offset: 2,
            problem: Problem::Short
        })
    );
    // One byte longer, with a byte to spare: left over.
    let mut long = good.clone();
    long[..4].copy_from_slice(&(declared + 1).to_be_bytes());
    long.push(0);
    assert_eq!(
        parse_frame(&long, MAX),
        Err(ProtoError::Malformed {
            kind: 0x03,
            declared: declared + 1,
            offset: good.len() - 5,
            problem: Problem::LeftOver { count: 1 }
        })
    );
    // One byte longer without the spare byte: still waiting for it.
    assert_eq!(parse_frame(&long[..long.len() - 1], MAX), Ok(None));
}

#[test]
fn undefined_values_are_malformed() {
    // Action 4 in a VERDICT.
    let mut v = encode(&verdict("v", 0.0, 0.0, &[("a", Action::Defer)], &[], &[]));
    let action_at = v.len() - 5; // then edit count (2) and reason count (2)
    assert_eq!(v[action_at], 3);
    v[action_at] = 4;
    assert!(matches!(
        parse_frame(&v, MAX),
        Err(ProtoError::Malformed {
            problem: Problem::BadValue {
                field: "action",
                value: 4
            },
            ..
        })
    ));
    // fatal = 2 and code 12 in a FAULT.
    let f = encode(&fault(FaultCode::Busy, ""));
    let mut bad_flag = f.clone();
    bad_flag[7] = 2;
    assert!(matches!(
        parse_frame(&bad_flag, MAX),
        Err(ProtoError::Malformed {
            offset: 2,
            problem: Problem::BadValue {
                field: "fatal",
                value: 2
            },
            ..
        })
    ));
    let mut bad_code = f;
    bad_code[6] = UNDEFINED_CODE as u8;
    assert!(matches!(
        parse_frame(&bad_code, MAX),
        Err(ProtoError::Malformed {
            offset: 0,
            problem: Problem::BadValue {
                field: "fault code",
                value: UNDEFINED_CODE
            },
            ..
        })
    ));
    // Invalid UTF-8 in a str.
    let mut utf = encode(&sender("ab"));
    utf[7] = 0xff;
    assert!(matches!(
        parse_frame(&utf, MAX),
        Err(ProtoError::Malformed {
            problem: Problem::BadUtf8,
            ..
        })
    ));
}

#[test]
fn unknown_kinds_are_refused_once_the_kind_byte_is_in() {
    for kind in 0..=u8::MAX {
        let got = parse_frame(&[0, 0, 0, 9, kind], MAX);
        if tamis::proto::is_known_kind(kind) {
            assert_eq!(got, Ok(None), "kind {kind:#04x}");
        } else {
            assert_eq!(got, Err(ProtoError::UnknownKind(kind)));
        }
    }
}

#[test]
fn encoding_refuses_what_the_wire_cannot_carry() {
    let mut buf = BytesMut::from(&b"keep"[..]);
    let long = sender(&"x".repeat(70_000));
    let err = encode_frame(&long, &mut buf).expect_err("str above u16");
    assert_eq!(err.what, "address");
    assert_eq!(&buf[..], b"keep", "nothing written on error");
    let big = chunk(&[0; 5000]);
    assert!(encode_frame_within(&big, 4096, &mut buf).is_err());
    assert_eq!(&buf[..], b"keep");
    assert!(encode_frame_within(&big, 5005, &mut buf).is_ok());
}

#[test]
fn error_codes_follow_the_fault_table() {
    let cases = [
        (ProtoError::ZeroLength, 1),
        (
            ProtoError::Malformed {
                kind: 1,
                declared: 1,
                offset: 0,
                problem: Problem::Short,
            },
            1,
        ),
        (
            ProtoError::SmallMaxFrame {
                announced: 1,
                min: 4096,
            },
            1,
        ),
        (ProtoError::UnknownKind(0x3f), 2),
        (
            ProtoError::OutOfOrder {
                kind: 6,
                phase: Phase::Ready,
            },
            3,
        ),
        (
            ProtoError::FrameTooLarge {
                declared: 2,
                limit: 1,
            },
            4,
        ),
        (ProtoError::Version(0), 9),
    ];
    for (error, code) in cases {
        assert_eq!(error.code().to_u16(), code, "{error}");
        assert!(error.code().is_fatal());
    }
    for code in FaultCode::ALL {
        assert_eq!(FaultCode::from_u16(code.to_u16()), Some(code));
    }
    assert_eq!(FaultCode::from_u16(0), None);
    assert_eq!(FaultCode::from_u16(UNDEFINED_CODE as u16), None);
    // The table has no gaps: codes run from 1 to its length.
    for (i, code) in FaultCode::ALL.iter().enumerate() {
        assert_eq!(usize::from(code.to_u16()), i + 1);
    }
}

// ---- state machine ----

/// Feeds the client frames of a vector to a fresh state machine; the outcome of each.
fn replay_client(name: &str) -> Vec<Result<Accepted, ProtoError>> {
    let mut state = SessionState::new(Limits::default());
    read_vector(name)
        .iter()
        .filter(|l| l.dir == Dir::Client)
        .filter_map(|l| parse_frame(&l.bytes, MAX).ok().flatten())
        .map(|(frame, _)| state.accept_client(&frame))
        .collect()
}

#[test]
fn state_machine_accepts_the_vector_conversations() {
    for name in [
        "handshake.txt",
        "message_tag.txt",
        "drop.txt",
        "ping.txt",
        "two_messages.txt",
        "bye.txt",
        "fault_idle.txt",
        "fault_busy.txt",
        "fault_shutting_down.txt",
        "handshake_secret.txt",
        "fault_denied.txt",
        "message_quarantine.txt",
    ] {
        for (i, outcome) in replay_client(name).into_iter().enumerate() {
            assert_eq!(
                outcome,
                Ok(Accepted {
                    keep: Keep::All,
                    notices: vec![]
                }),
                "{name}: client frame {i}"
            );
        }
    }
}

#[test]
fn state_machine_reports_the_bad_address_of_its_vector() {
    let outcomes = replay_client("bad_address.txt");
    let notices: Vec<(Keep, Vec<FaultCode>)> = outcomes
        .into_iter()
        .map(|o| o.map(|a| (a.keep, a.notices)).expect("allowed"))
        .collect();
    assert_eq!(notices[3], (Keep::Blank, vec![FaultCode::BadAddress]));
    for (i, n) in notices.iter().enumerate().filter(|(i, _)| *i != 3) {
        assert_eq!(n, &(Keep::All, vec![]), "client frame {i}");
    }
}

#[test]
fn state_machine_reports_the_cut_of_the_not_held_vector() {
    // The server of `message_not_held.txt` announces max_message = 64.
    let mut state = SessionState::new(Limits {
        max_message: 64,
        ..Limits::default()
    });
    let notices: Vec<(Keep, Vec<FaultCode>)> = read_vector("message_not_held.txt")
        .iter()
        .filter(|l| l.dir == Dir::Client)
        .filter_map(|l| parse_frame(&l.bytes, MAX).ok().flatten())
        .map(|(frame, _)| {
            let a = state.accept_client(&frame).expect("allowed");
            (a.keep, a.notices)
        })
        .collect();
    assert_eq!(notices.len(), 7);
    // The second chunk passes 64 bytes (27 + 25 + 25): 12 of its bytes are kept.
    assert_eq!(
        notices[5],
        (Keep::Prefix(12), vec![FaultCode::MessageTooLarge])
    );
    for (i, n) in notices.iter().enumerate().filter(|(i, _)| *i != 5) {
        assert_eq!(n, &(Keep::All, vec![]), "client frame {i}");
    }
}

fn run(frames: &[Frame]) -> Result<SessionState, ProtoError> {
    let mut state = SessionState::new(Limits::default());
    for frame in frames {
        let _ = state.accept_client(frame)?;
    }
    Ok(state)
}

fn out_of_order(kind: u8, phase: Phase) -> ProtoError {
    ProtoError::OutOfOrder { kind, phase }
}

#[test]
fn state_machine_refuses_out_of_order_frames() {
    let h = hello(1);
    let a = || sender("a@example.org");
    let r = || rcpt("b@example.net");
    let cases: Vec<(&str, Vec<Frame>, ProtoError)> = vec![
        (
            "SENDER before HELLO",
            vec![a()],
            out_of_order(0x03, Phase::Start),
        ),
        (
            "PING before HELLO",
            vec![Frame::Ping { token: 1 }],
            out_of_order(0x09, Phase::Start),
        ),
        (
            "two HELLOs",
            vec![h.clone(), h.clone()],
            out_of_order(0x01, Phase::Ready),
        ),
        (
            "body before envelope",
            vec![h.clone(), chunk(b"x")],
            out_of_order(0x06, Phase::Ready),
        ),
        (
            "body before recipient",
            vec![h.clone(), a(), chunk(b"x")],
            out_of_order(0x06, Phase::Envelope),
        ),
        (
            "SEAL without recipient",
            vec![h.clone(), a(), Frame::Seal],
            out_of_order(0x07, Phase::Envelope),
        ),
        (
            "two SEALs",
            vec![h.clone(), a(), r(), Frame::Seal, Frame::Seal],
            out_of_order(0x07, Phase::Ready),
        ),
        (
            "FIELD after CHUNK",
            vec![h.clone(), a(), r(), chunk(b"x"), field("A", b"b")],
            out_of_order(0x05, Phase::Content),
        ),
        (
            "RECIPIENT after FIELD",
            vec![h.clone(), a(), r(), field("A", b"b"), r()],
            out_of_order(0x04, Phase::Fields),
        ),
        (
            "two SENDERs",
            vec![h.clone(), a(), r(), a()],
            out_of_order(0x03, Phase::Recipients),
        ),
        (
            "two PEERs",
            vec![
                h.clone(),
                Frame::Peer {
                    address: s("::1"),
                    port: 25,
                    greeting: s("x"),
                },
                Frame::Peer {
                    address: s("::1"),
                    port: 25,
                    greeting: s("x"),
                },
            ],
            out_of_order(0x02, Phase::Peer),
        ),
        (
            "DROP with no message",
            vec![h.clone(), Frame::Drop],
            out_of_order(0x08, Phase::Ready),
        ),
        (
            "BYE inside a message",
            vec![h.clone(), a(), Frame::ClientBye],
            out_of_order(0x0a, Phase::Envelope),
        ),
        (
            "anything after BYE",
            vec![h.clone(), Frame::ClientBye, Frame::Ping { token: 0 }],
            out_of_order(0x09, Phase::Closed),
        ),
        (
            "server frame from the client",
            vec![h.clone(), welcome()],
            out_of_order(0x41, Phase::Ready),
        ),
        ("version 0", vec![hello(0)], ProtoError::Version(0)),
        (
            "max_frame below 4096",
            vec![Frame::Hello {
                version: 1,
                max_frame: 4095,
                client: s("c"),
                secret: None,
            }],
            ProtoError::SmallMaxFrame {
                announced: 4095,
                min: 4096,
            },
        ),
    ];
    for (what, frames, error) in cases {
        assert_eq!(run(&frames).err(), Some(error), "{what}");
    }
}

#[test]
fn state_machine_allows_drop_right_after_sender_and_negotiates_the_version() {
    let state = run(&[
        Frame::Hello {
            version: 7,
            max_frame: 4096,
            client: s("c"),
            secret: None,
        },
        sender("a"),
        Frame::Drop,
        sender("a"),
        rcpt("b"),
        Frame::Seal,
    ])
    .expect("allowed");
    assert_eq!(state.version(), Some(1));
    assert_eq!(state.peer_max_frame(), Some(4096));
    assert_eq!(state.phase(), Phase::Ready);
    assert!(matches!(
        state.welcome("t"),
        Some(Frame::Welcome {
            version: 1,
            max_frame: 65_536,
            ..
        })
    ));
}

fn small_limits() -> Limits {
    Limits {
        max_frame: 65_536,
        max_message: 20,
        max_fields: 2,
        max_recipients: 2,
        max_field_value: 8,
    }
}

fn accepted(keep: Keep, notices: &[FaultCode]) -> Result<Accepted, ProtoError> {
    Ok(Accepted {
        keep,
        notices: notices.to_vec(),
    })
}

#[test]
fn limits_are_reported_once_and_never_fatal() {
    let mut st = SessionState::new(small_limits());
    let mut go = |f: Frame| st.accept_client(&f);
    assert_eq!(go(hello(1)), accepted(Keep::All, &[]));
    assert_eq!(go(sender("a@example.net")), accepted(Keep::All, &[]));
    assert_eq!(go(rcpt("r1@example.org")), accepted(Keep::All, &[]));
    assert_eq!(go(rcpt("r2@example.org")), accepted(Keep::All, &[]));
    assert_eq!(
        go(rcpt("r3@example.org")),
        accepted(Keep::Nothing, &[FaultCode::TooMany])
    );
    assert_eq!(go(rcpt("r4@example.org")), accepted(Keep::Nothing, &[]));
    // "Ab" + 10 bytes cut to 8: 10 bytes counted.
    assert_eq!(
        go(field("Ab", b"0123456789")),
        accepted(Keep::Prefix(8), &[FaultCode::FieldTooLarge])
    );
    assert_eq!(go(field("C", b"d")), accepted(Keep::All, &[])); // 12
    assert_eq!(
        go(field("E", b"f")),
        accepted(Keep::Nothing, &[FaultCode::TooMany])
    );
    assert_eq!(go(chunk(b"12345")), accepted(Keep::All, &[])); // 17
    assert_eq!(
        go(chunk(b"12345")),
        accepted(Keep::Prefix(3), &[FaultCode::MessageTooLarge])
    ); // 20
    assert_eq!(go(chunk(b"1")), accepted(Keep::Nothing, &[]));
    assert_eq!(go(Frame::Seal), accepted(Keep::All, &[]));
    // A new message starts with fresh counters and fresh warnings.
    assert_eq!(go(sender("a@example.net")), accepted(Keep::All, &[]));
    for r in ["r1@example.org", "r2@example.org"] {
        assert_eq!(go(rcpt(r)), accepted(Keep::All, &[]));
    }
    assert_eq!(
        go(rcpt("r3@example.org")),
        accepted(Keep::Nothing, &[FaultCode::TooMany])
    );
    assert_eq!(
        go(chunk(&[0; 21])),
        accepted(Keep::Prefix(20), &[FaultCode::MessageTooLarge])
    );
    assert_eq!(go(Frame::Drop), accepted(Keep::All, &[]));
}

#[test]
fn a_field_can_be_cut_and_pass_the_message_limit_at_once() {
    let mut st = SessionState::new(small_limits());
    for f in [
        hello(1),
        sender("a@example.net"),
        rcpt("b@example.org"),
        field("Name-Of-Fifteen", b""),
    ] {
        let _ = st.accept_client(&f).expect("allowed");
    }
    assert_eq!(st.message_size(), 15);
    assert_eq!(
        st.accept_client(&field("Xy", b"0123456789")),
        accepted(
            Keep::Prefix(3),
            &[FaultCode::FieldTooLarge, FaultCode::MessageTooLarge]
        )
    );
    assert_eq!(st.message_size(), 20);
}

/// RFC 5321 §4.1.2 syntax (checked in detail by the unit tests of `proto::address`): a bad
/// address is reported once and keeps its place; one past the recipient limit is only extra.
#[test]
fn envelope_addresses_are_checked_and_bad_ones_keep_their_place() {
    let mut st = SessionState::new(small_limits());
    let mut go = |f: Frame| st.accept_client(&f);
    assert_eq!(go(hello(1)), accepted(Keep::All, &[]));
    assert_eq!(go(sender("")), accepted(Keep::All, &[]), "the null sender");
    assert_eq!(go(Frame::Drop), accepted(Keep::All, &[]));
    assert_eq!(
        go(sender("no at sign")),
        accepted(Keep::Blank, &[FaultCode::BadAddress])
    );
    assert_eq!(go(rcpt("PostMaster")), accepted(Keep::All, &[]));
    let long = format!("{}@example.org", "a".repeat(3999));
    assert_eq!(
        go(rcpt(&long)),
        accepted(Keep::Blank, &[FaultCode::BadAddress])
    );
    assert_eq!(
        go(rcpt("x@example.org\n")),
        accepted(Keep::Nothing, &[FaultCode::TooMany]),
        "past the limit of 2, the address is not even looked at"
    );
    assert_eq!(st.recipients(), 2);
    assert!(!FaultCode::BadAddress.is_fatal());
}

fn hello_with(max_frame: u32) -> Frame {
    Frame::Hello {
        version: 1,
        max_frame,
        client: s("c"),
        secret: None,
    }
}

/// The recipients of a verdict take at most `max_frame - VERDICT_RESERVE` bytes: with the
/// longest addresses RFC 5321 allows (254 octets) and a client at the 4096 floor, 11 fit.
#[test]
fn recipients_are_kept_while_the_verdict_has_room() {
    let mut st = SessionState::new(Limits::default());
    let _ = st.accept_client(&hello_with(4096)).expect("hello");
    let _ = st.accept_client(&sender("a@example.net")).expect("sender");
    let longest = format!("{}@{}.test", "a".repeat(64), "b".repeat(184));
    assert_eq!(longest.len(), 254);
    let mut kept = 0;
    for i in 0..20 {
        let got = st.accept_client(&rcpt(&longest)).expect("allowed");
        match got.keep {
            Keep::All => kept += 1,
            Keep::Nothing => {
                assert_eq!(
                    got.notices,
                    if i == kept {
                        vec![FaultCode::TooMany]
                    } else {
                        vec![]
                    }
                );
            }
            other => panic!("{other:?}"),
        }
    }
    assert_eq!(st.verdict_recipient_room(), 4096 - 1024);
    assert_eq!(kept, (4096 - 1024) / (3 + 254));
    // Once one recipient was extra, a shorter one after it is extra too: the kept ones
    // are always a prefix of those sent.
    let short = st.accept_client(&rcpt("b@example.org")).expect("allowed");
    assert_eq!(short.keep, Keep::Nothing);
}

/// The reserve holds the largest edits the policy can produce (the longest margin an f64
/// prints, the longest subject prefix the configuration accepts) beside a full recipient
/// list; reasons are cut to fit, never edits or recipients.
#[test]
fn a_verdict_with_full_recipients_and_the_largest_edits_fits() {
    use tamis::config::{HeaderConfig, MAX_SUBJECT_PREFIX};
    use tamis::policy::{Action as PolicyAction, HeaderEdit, Policy};
    for max_frame in [4096u32, 5000, 65_536] {
        let room = u64::from(max_frame - tamis::proto::VERDICT_RESERVE);
        let address = "r@example.org";
        let count = room / (3 + address.len() as u64);
        let cfg = HeaderConfig {
            verdict_field: true,
            subject_prefix: Some("x".repeat(MAX_SUBJECT_PREFIX)),
        };
        let id = tamis::policy::verdict_id();
        let edits = Policy::default()
            .header_edits(&cfg, &id, PolicyAction::Tag, -f64::MAX)
            .into_iter()
            .map(|e| match e {
                HeaderEdit::Add { name, value } => Edit {
                    op: EditOp::AddField,
                    name,
                    value,
                },
                HeaderEdit::PrefixSubject { value } => Edit {
                    op: EditOp::PrefixSubject,
                    name: s("Subject"),
                    value,
                },
            })
            .collect::<Vec<_>>();
        assert_eq!(edits.len(), 2);
        let mut v = Verdict {
            verdict_id: id,
            margin: -f64::MAX,
            probability: 0.5,
            recipients: (0..count)
                .map(|_| RecipientAction {
                    address: s(address),
                    action: Action::Tag,
                })
                .collect(),
            edits: edits.clone(),
            reasons: vec!["é".repeat(400), "a long reason".repeat(100)],
        };
        v.fit_within(max_frame).expect("fits");
        assert_eq!(
            v.frame_length(),
            encode(&Frame::Verdict(v.clone())).len() as u64 - 4
        );
        assert!(v.frame_length() <= u64::from(max_frame));
        assert_eq!(v.edits, edits);
        assert_eq!(v.recipients.len() as u64, count);
        let mut out = BytesMut::new();
        encode_frame_within(&Frame::Verdict(v), max_frame, &mut out).expect("within");
    }
}

#[test]
fn a_verdict_that_cannot_fit_says_so() {
    let mut v = match verdict("v", 0.0, 0.0, &[], &[], &["why"]) {
        Frame::Verdict(v) => v,
        _ => unreachable!(),
    };
    v.recipients = vec![
        RecipientAction {
            address: "r".repeat(5000),
            action: Action::Accept
        };
        1
    ];
    let without_reason = v.frame_length() - 5;
    assert_eq!(v.fit_within(4096), Err(without_reason));
    assert!(v.reasons.is_empty(), "reasons go first");
    // Cutting stops at a character boundary.
    let mut w = match verdict("v", 0.0, 0.0, &[], &[], &["ééé"]) {
        Frame::Verdict(v) => v,
        _ => unreachable!(),
    };
    let limit = (w.frame_length() - 1) as u32;
    w.fit_within(limit).expect("fits");
    assert_eq!(w.reasons, vec![s("éé")]);
}

// ---- properties ----

fn any_str() -> impl Strategy<Value = String> {
    prop_oneof![".{0,12}", "[a-z@.]{0,40}"]
}

fn any_bytes() -> impl Strategy<Value = Vec<u8>> {
    proptest::collection::vec(any::<u8>(), 0..64)
}

fn any_f64() -> impl Strategy<Value = f64> {
    // Raw bits so NaN payloads, infinities and negative zero all appear.
    prop_oneof![any::<f64>(), any::<u64>().prop_map(f64::from_bits)]
}

fn any_action() -> impl Strategy<Value = Action> {
    proptest::sample::select(Action::ALL.to_vec())
}

fn any_verdict() -> impl Strategy<Value = Verdict> {
    (
        any_str(),
        any_f64(),
        any_f64(),
        proptest::collection::vec(
            (any_str(), any_action())
                .prop_map(|(address, action)| RecipientAction { address, action }),
            0..4,
        ),
        proptest::collection::vec(
            (
                proptest::sample::select(EditOp::ALL.to_vec()),
                any_str(),
                any_str(),
            )
                .prop_map(|(op, name, value)| Edit { op, name, value }),
            0..4,
        ),
        proptest::collection::vec(any_str(), 0..4),
    )
        .prop_map(
            |(verdict_id, margin, probability, recipients, edits, reasons)| Verdict {
                verdict_id,
                margin,
                probability,
                recipients,
                edits,
                reasons,
            },
        )
}

fn any_frame() -> impl Strategy<Value = Frame> {
    prop_oneof![
        (
            any::<u16>(),
            any::<u32>(),
            any_str(),
            proptest::option::of(any_bytes())
        )
            .prop_map(|(version, max_frame, client, secret)| Frame::Hello {
                version,
                max_frame,
                client,
                secret,
            }),
        (any_str(), any::<u16>(), any_str()).prop_map(|(address, port, greeting)| Frame::Peer {
            address,
            port,
            greeting
        }),
        any_str().prop_map(|address| Frame::Sender { address }),
        any_str().prop_map(|address| Frame::Recipient { address }),
        (any_str(), any_bytes()).prop_map(|(name, value)| Frame::Field { name, value }),
        any_bytes().prop_map(|data| Frame::Chunk { data }),
        Just(Frame::Seal),
        Just(Frame::Drop),
        any::<u64>().prop_map(|token| Frame::Ping { token }),
        Just(Frame::ClientBye),
        (any::<u16>(), any::<u32>(), any::<u64>(), any_str()).prop_map(
            |(version, max_frame, max_message, server)| Frame::Welcome {
                version,
                max_frame,
                max_message,
                server
            }
        ),
        any_verdict().prop_map(Frame::Verdict),
        Just(Frame::Enough),
        any::<u64>().prop_map(|token| Frame::Pong { token }),
        (
            proptest::sample::select(FaultCode::ALL.to_vec()),
            any::<bool>(),
            any_str()
        )
            .prop_map(|(code, fatal, text)| Frame::Fault { code, fatal, text }),
        Just(Frame::ServerBye),
    ]
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(2000))]

    #[test]
    fn arbitrary_bytes_never_panic_the_parser(
        bytes in proptest::collection::vec(any::<u8>(), 0..128),
        max in prop_oneof![Just(MAX), Just(u32::MAX), 0u32..64],
    ) {
        if let Ok(Some((_, used))) = parse_frame(&bytes, max) {
            prop_assert!(used >= 5 && used <= bytes.len());
        }
    }

    /// Arbitrary payloads behind a valid header for every known kind reach the sub-parsers.
    #[test]
    fn arbitrary_payloads_never_panic_the_parser(
        kind in proptest::sample::select(vec![1u8, 2, 3, 4, 5, 6, 7, 8, 9, 10, 0x41, 0x42, 0x43, 0x44, 0x45, 0x4a]),
        payload in proptest::collection::vec(any::<u8>(), 0..96),
    ) {
        let mut bytes = ((payload.len() + 1) as u32).to_be_bytes().to_vec();
        bytes.push(kind);
        bytes.extend_from_slice(&payload);
        match parse_frame(&bytes, MAX) {
            Ok(Some((frame, used))) => {
                prop_assert_eq!(used, bytes.len());
                prop_assert_eq!(encode(&frame), bytes);
            }
            Ok(None) => prop_assert!(false, "a whole frame is never incomplete"),
            Err(e) => prop_assert_eq!(e.code(), FaultCode::Malformed),
        }
    }

    #[test]
    fn encode_then_parse_round_trips(frame in any_frame(), tail in any_bytes()) {
        let bytes = encode(&frame);
        let mut stream = bytes.clone();
        stream.extend_from_slice(&tail);
        let parsed = parse_frame(&stream, u32::MAX);
        prop_assert_eq!(parsed, Ok(Some((frame, bytes.len()))));
        for cut in 0..bytes.len() {
            prop_assert_eq!(parse_frame(&bytes[..cut], u32::MAX), Ok(None));
        }
    }

    #[test]
    /// Refused frames leave the state as it was, so the walk goes on past them and reaches
    /// deep states; the limits hold throughout.
    fn state_machine_keeps_its_limits(frames in proptest::collection::vec(any_frame(), 0..48)) {
        let limits = small_limits();
        let mut state = SessionState::new(limits);
        let _ = state.accept_client(&hello(1));
        for frame in &frames {
            let before = (state.phase(), state.recipients(), state.fields(), state.message_size());
            if state.accept_client(frame).is_err() {
                let after = (state.phase(), state.recipients(), state.fields(), state.message_size());
                prop_assert_eq!(before, after);
            }
            prop_assert!(state.message_size() <= limits.max_message);
            prop_assert!(state.recipients() <= limits.max_recipients);
            prop_assert!(state.fields() <= limits.max_fields);
        }
    }
}
