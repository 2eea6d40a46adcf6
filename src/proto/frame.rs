//! Frames of the relay protocol (PROTOCOL.md §1–§2): the [`Frame`] type, its parser and its
//! writer, side by side.
//!
//! The parser reads the 4-byte length first and refuses a zero or oversized length before a
//! single payload byte is needed; it then hands the payload, and only the payload, to a nom
//! sub-parser, so no field can read into the next frame, and it requires that sub-parser to
//! consume the payload exactly.

use bytes::{BufMut, BytesMut};
use nom::combinator::opt;
use nom::error::{ErrorKind, ParseError};
use nom::multi::{length_count, length_data};
use nom::number::complete::{be_f64, be_u8, be_u16, be_u32, be_u64};
use nom::{IResult, Parser};

use super::error::{EncodeError, FaultCode, Problem, ProtoError};
use super::verdict::{Verdict, encode_verdict, parse_verdict};

/// The kind bytes of PROTOCOL.md §2.
pub mod kind {
    /// Client `HELLO`.
    pub const HELLO: u8 = 0x01;
    /// Client `PEER`.
    pub const PEER: u8 = 0x02;
    /// Client `SENDER`.
    pub const SENDER: u8 = 0x03;
    /// Client `RECIPIENT`.
    pub const RECIPIENT: u8 = 0x04;
    /// Client `FIELD`.
    pub const FIELD: u8 = 0x05;
    /// Client `CHUNK`.
    pub const CHUNK: u8 = 0x06;
    /// Client `SEAL`.
    pub const SEAL: u8 = 0x07;
    /// Client `DROP`.
    pub const DROP: u8 = 0x08;
    /// Client `PING`.
    pub const PING: u8 = 0x09;
    /// Client `BYE`.
    pub const CLIENT_BYE: u8 = 0x0a;
    /// Server `WELCOME`.
    pub const WELCOME: u8 = 0x41;
    /// Server `VERDICT`.
    pub const VERDICT: u8 = 0x42;
    /// Server `ENOUGH`.
    pub const ENOUGH: u8 = 0x43;
    /// Server `PONG`.
    pub const PONG: u8 = 0x44;
    /// Server `FAULT`.
    pub const FAULT: u8 = 0x45;
    /// Server `BYE`.
    pub const SERVER_BYE: u8 = 0x4a;
}

/// The bytes before the kind: the big-endian `length`.
pub const LENGTH_PREFIX: usize = 4;

/// One frame, in either direction. Owned, so it outlives the read buffer it came from.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Frame {
    /// `HELLO` (0x01): the client's first frame.
    Hello {
        /// Highest protocol version the client speaks.
        version: u16,
        /// Largest `length` the client accepts.
        max_frame: u32,
        /// Free-form client name.
        client: String,
        /// The shared secret, when the client presents one (an optional trailing `bytes`,
        /// PROTOCOL.md §3).
        secret: Option<Vec<u8>>,
    },
    /// `PEER` (0x02): the SMTP client of the incoming connection.
    Peer {
        /// Its IP address, as text.
        address: String,
        /// Its port.
        port: u16,
        /// Its HELO/EHLO name.
        greeting: String,
    },
    /// `SENDER` (0x03): envelope sender; starts a message.
    Sender {
        /// MAIL FROM without angle brackets; empty for the null sender.
        address: String,
    },
    /// `RECIPIENT` (0x04): one envelope recipient.
    Recipient {
        /// RCPT TO without angle brackets.
        address: String,
    },
    /// `FIELD` (0x05): one header field as received.
    Field {
        /// Name without the colon.
        name: String,
        /// Raw value, folding and 8-bit bytes preserved, no trailing CRLF.
        value: Vec<u8>,
    },
    /// `CHUNK` (0x06): the next piece of the body.
    Chunk {
        /// Body bytes with CRLF line ends.
        data: Vec<u8>,
    },
    /// `SEAL` (0x07): the message is complete.
    Seal,
    /// `DROP` (0x08): abandon the current message.
    Drop,
    /// `PING` (0x09): keep-alive.
    Ping {
        /// Echoed in the `PONG`.
        token: u64,
    },
    /// Client `BYE` (0x0a): orderly close.
    ClientBye,
    /// `WELCOME` (0x41): answer to `HELLO`.
    Welcome {
        /// The version chosen.
        version: u16,
        /// Largest `length` the server accepts.
        max_frame: u32,
        /// Largest message (field names and values plus body) the server scans.
        max_message: u64,
        /// Free-form server name.
        server: String,
    },
    /// `VERDICT` (0x42): the decision for the sealed message.
    Verdict(Verdict),
    /// `ENOUGH` (0x43): the server needs no more body.
    Enough,
    /// `PONG` (0x44): answer to `PING`.
    Pong {
        /// The token of the `PING`.
        token: u64,
    },
    /// `FAULT` (0x45): an error.
    Fault {
        /// What went wrong.
        code: FaultCode,
        /// Whether the server closes after this frame.
        fatal: bool,
        /// Human-readable detail.
        text: String,
    },
    /// Server `BYE` (0x4a): answer to the client's `BYE`, or a close for shutdown.
    ServerBye,
}

impl Frame {
    /// The kind byte of this frame.
    pub fn kind(&self) -> u8 {
        match self {
            Frame::Hello { .. } => kind::HELLO,
            Frame::Peer { .. } => kind::PEER,
            Frame::Sender { .. } => kind::SENDER,
            Frame::Recipient { .. } => kind::RECIPIENT,
            Frame::Field { .. } => kind::FIELD,
            Frame::Chunk { .. } => kind::CHUNK,
            Frame::Seal => kind::SEAL,
            Frame::Drop => kind::DROP,
            Frame::Ping { .. } => kind::PING,
            Frame::ClientBye => kind::CLIENT_BYE,
            Frame::Welcome { .. } => kind::WELCOME,
            Frame::Verdict(_) => kind::VERDICT,
            Frame::Enough => kind::ENOUGH,
            Frame::Pong { .. } => kind::PONG,
            Frame::Fault { .. } => kind::FAULT,
            Frame::ServerBye => kind::SERVER_BYE,
        }
    }

    /// Whether the frame travels client → server (kinds 0x01–0x3f).
    pub fn is_from_client(&self) -> bool {
        self.kind() < 0x40
    }
}

/// Whether `kind` is one of the kinds of PROTOCOL.md §2.
pub fn is_known_kind(kind: u8) -> bool {
    matches!(kind, kind::HELLO..=kind::CLIENT_BYE | kind::WELCOME..=kind::FAULT | kind::SERVER_BYE)
}

/// Parses one frame from the front of `buf`.
///
/// Returns `Ok(None)` while `buf` holds less than a whole frame, and `Ok(Some((frame, n)))`
/// once it does, `n` being the bytes the frame took; the caller advances its buffer by `n`.
/// A zero length, or one above `max_frame`, is refused as soon as the 4 length bytes are in;
/// an unknown kind as soon as the kind byte is in.
pub fn parse_frame(buf: &[u8], max_frame: u32) -> Result<Option<(Frame, usize)>, ProtoError> {
    let Some(prefix) = buf.first_chunk::<LENGTH_PREFIX>() else {
        return Ok(None);
    };
    let declared = u32::from_be_bytes(*prefix);
    if declared == 0 {
        return Err(ProtoError::ZeroLength);
    }
    let too_large = ProtoError::FrameTooLarge {
        declared,
        limit: max_frame,
    };
    if declared > max_frame {
        return Err(too_large);
    }
    // Only a 16-bit target could fail here; refusing is the one answer that cannot wrap.
    let Some(total) = usize::try_from(declared)
        .ok()
        .and_then(|d| d.checked_add(LENGTH_PREFIX))
    else {
        return Err(too_large);
    };
    let Some(&kind) = buf.get(LENGTH_PREFIX) else {
        return Ok(None);
    };
    if !is_known_kind(kind) {
        return Err(ProtoError::UnknownKind(kind));
    }
    let Some(payload) = buf.get(LENGTH_PREFIX + 1..total) else {
        return Ok(None);
    };
    let frame =
        parse_payload(kind, payload).map_err(|(offset, problem)| ProtoError::Malformed {
            kind,
            declared,
            offset,
            problem,
        })?;
    Ok(Some((frame, total)))
}

/// Parses the payload of a frame of a known `kind`; on failure, the payload offset and why.
fn parse_payload(kind: u8, payload: &[u8]) -> Result<Frame, (usize, Problem)> {
    let result = match kind {
        kind::HELLO => (be_u16, be_u32, parse_str, opt(parse_bytes))
            .map(|(version, max_frame, client, secret)| Frame::Hello {
                version,
                max_frame,
                client,
                secret,
            })
            .parse_complete(payload),
        kind::PEER => (parse_str, be_u16, parse_str)
            .map(|(address, port, greeting)| Frame::Peer {
                address,
                port,
                greeting,
            })
            .parse_complete(payload),
        kind::SENDER => parse_str
            .map(|address| Frame::Sender { address })
            .parse_complete(payload),
        kind::RECIPIENT => parse_str
            .map(|address| Frame::Recipient { address })
            .parse_complete(payload),
        kind::FIELD => (parse_str, parse_bytes)
            .map(|(name, value)| Frame::Field { name, value })
            .parse_complete(payload),
        kind::CHUNK => parse_bytes
            .map(|data| Frame::Chunk { data })
            .parse_complete(payload),
        kind::SEAL => Ok((payload, Frame::Seal)),
        kind::DROP => Ok((payload, Frame::Drop)),
        kind::PING => be_u64
            .map(|token| Frame::Ping { token })
            .parse_complete(payload),
        kind::CLIENT_BYE => Ok((payload, Frame::ClientBye)),
        kind::WELCOME => (be_u16, be_u32, be_u64, parse_str)
            .map(|(version, max_frame, max_message, server)| Frame::Welcome {
                version,
                max_frame,
                max_message,
                server,
            })
            .parse_complete(payload),
        kind::VERDICT => parse_verdict.map(Frame::Verdict).parse_complete(payload),
        kind::ENOUGH => Ok((payload, Frame::Enough)),
        kind::PONG => be_u64
            .map(|token| Frame::Pong { token })
            .parse_complete(payload),
        kind::FAULT => (parse_fault_code, parse_flag("fatal"), parse_str)
            .map(|(code, fatal, text)| Frame::Fault { code, fatal, text })
            .parse_complete(payload),
        kind::SERVER_BYE => Ok((payload, Frame::ServerBye)),
        // parse_frame checked the kind; this arm keeps the function total without a panic.
        _ => Err(nom::Err::Error(WireError::new(payload, Problem::Short))),
    };
    match result {
        Ok(([], frame)) => Ok(frame),
        Ok((rest, _)) => Err((
            offset_in(payload, rest),
            Problem::LeftOver { count: rest.len() },
        )),
        Err(nom::Err::Error(e) | nom::Err::Failure(e)) => {
            Err((offset_in(payload, e.rest), e.problem))
        }
        // Complete-mode parsers on a bounded slice do not ask for more; should one, the frame
        // is still short.
        Err(nom::Err::Incomplete(_)) => Err((payload.len(), Problem::Short)),
    }
}

/// Offset of `rest` inside `whole`, `rest` being a tail of it.
fn offset_in(whole: &[u8], rest: &[u8]) -> usize {
    whole.len().saturating_sub(rest.len())
}

/// The nom error of the payload parsers: where parsing stopped and why.
#[derive(Debug)]
pub(super) struct WireError<'a> {
    rest: &'a [u8],
    problem: Problem,
}

impl<'a> WireError<'a> {
    pub(super) fn new(rest: &'a [u8], problem: Problem) -> Self {
        WireError { rest, problem }
    }
}

impl<'a> ParseError<&'a [u8]> for WireError<'a> {
    fn from_error_kind(input: &'a [u8], _kind: ErrorKind) -> Self {
        // On a bounded payload the only way a primitive fails is by running out of bytes.
        WireError::new(input, Problem::Short)
    }

    fn append(_input: &'a [u8], _kind: ErrorKind, other: Self) -> Self {
        other
    }
}

/// Result of a payload parser.
pub(super) type WireResult<'a, T> = IResult<&'a [u8], T, WireError<'a>>;

/// `str`: `u16` length and that many bytes of UTF-8.
pub(super) fn parse_str(input: &[u8]) -> WireResult<'_, String> {
    let (rest, raw) = length_data(be_u16).parse_complete(input)?;
    match std::str::from_utf8(raw) {
        Ok(text) => Ok((rest, text.to_owned())),
        Err(_) => Err(nom::Err::Error(WireError::new(input, Problem::BadUtf8))),
    }
}

/// `bytes`: `u32` length and that many bytes.
fn parse_bytes(input: &[u8]) -> WireResult<'_, Vec<u8>> {
    length_data(be_u32)
        .map(<[u8]>::to_vec)
        .parse_complete(input)
}

/// `f64`: IEEE-754 binary64, big-endian; every bit pattern (NaN payloads too) is kept.
pub(super) fn parse_f64(input: &[u8]) -> WireResult<'_, f64> {
    be_f64(input)
}

/// A `u16` count followed by that many items.
pub(super) fn parse_list<'a, T>(
    item: impl Parser<&'a [u8], Output = T, Error = WireError<'a>>,
) -> impl Parser<&'a [u8], Output = Vec<T>, Error = WireError<'a>> {
    length_count(be_u16, item)
}

/// A `u8` that must be 0 or 1.
fn parse_flag<'a>(field: &'static str) -> impl Fn(&'a [u8]) -> WireResult<'a, bool> {
    move |input| {
        let (rest, value) = be_u8(input)?;
        match value {
            0 => Ok((rest, false)),
            1 => Ok((rest, true)),
            other => Err(bad_value(input, field, other.into())),
        }
    }
}

/// A `u16` fault code from the table of PROTOCOL.md §5.
fn parse_fault_code(input: &[u8]) -> WireResult<'_, FaultCode> {
    let (rest, value) = be_u16(input)?;
    match FaultCode::from_u16(value) {
        Some(code) => Ok((rest, code)),
        None => Err(bad_value(input, "fault code", value.into())),
    }
}

/// The error for a field holding a value the protocol does not define.
pub(super) fn bad_value<'a>(
    at: &'a [u8],
    field: &'static str,
    value: u64,
) -> nom::Err<WireError<'a>> {
    nom::Err::Error(WireError::new(at, Problem::BadValue { field, value }))
}

/// Writes `frame` at the end of `dst`. Nothing is written when it returns an error.
pub fn encode_frame(frame: &Frame, dst: &mut BytesMut) -> Result<(), EncodeError> {
    encode_frame_within(frame, u32::MAX, dst)
}

/// Writes `frame` at the end of `dst`, refusing it when its `length` would exceed the peer's
/// `max_frame`. Nothing is written when it returns an error.
pub fn encode_frame_within(
    frame: &Frame,
    max_frame: u32,
    dst: &mut BytesMut,
) -> Result<(), EncodeError> {
    let start = dst.len();
    let result = encode_unchecked(frame, max_frame, dst);
    if result.is_err() {
        dst.truncate(start);
    }
    result
}

/// The body of [`encode_frame_within`]; may leave a partial frame behind on error.
fn encode_unchecked(frame: &Frame, max_frame: u32, dst: &mut BytesMut) -> Result<(), EncodeError> {
    let start = dst.len();
    let kind = frame.kind();
    dst.put_u32(0); // patched below, once the payload length is known
    dst.put_u8(kind);
    let mut w = Writer { dst, kind };
    match frame {
        Frame::Hello {
            version,
            max_frame,
            client,
            secret,
        } => {
            w.dst.put_u16(*version);
            w.dst.put_u32(*max_frame);
            w.str("client", client)?;
            if let Some(secret) = secret {
                w.bytes("secret", secret)?;
            }
        }
        Frame::Peer {
            address,
            port,
            greeting,
        } => {
            w.str("address", address)?;
            w.dst.put_u16(*port);
            w.str("greeting", greeting)?;
        }
        Frame::Sender { address } | Frame::Recipient { address } => w.str("address", address)?,
        Frame::Field { name, value } => {
            w.str("name", name)?;
            w.bytes("value", value)?;
        }
        Frame::Chunk { data } => w.bytes("data", data)?,
        Frame::Ping { token } | Frame::Pong { token } => w.dst.put_u64(*token),
        Frame::Welcome {
            version,
            max_frame,
            max_message,
            server,
        } => {
            w.dst.put_u16(*version);
            w.dst.put_u32(*max_frame);
            w.dst.put_u64(*max_message);
            w.str("server", server)?;
        }
        Frame::Verdict(verdict) => encode_verdict(verdict, &mut w)?,
        Frame::Fault { code, fatal, text } => {
            w.dst.put_u16(code.to_u16());
            w.dst.put_u8(u8::from(*fatal));
            w.str("text", text)?;
        }
        Frame::Seal | Frame::Drop | Frame::ClientBye | Frame::Enough | Frame::ServerBye => {}
    }
    let length = dst.len() - start - LENGTH_PREFIX;
    let length = u32::try_from(length)
        .ok()
        .filter(|l| *l <= max_frame)
        .ok_or(EncodeError {
            kind,
            what: "frame length",
            len: length as u64,
            limit: max_frame.into(),
        })?;
    if let Some(prefix) = dst.get_mut(start..start + LENGTH_PREFIX) {
        prefix.copy_from_slice(&length.to_be_bytes());
    }
    Ok(())
}

/// Writes the typed fields of one frame, checking every length prefix fits.
pub(super) struct Writer<'b> {
    pub(super) dst: &'b mut BytesMut,
    kind: u8,
}

impl Writer<'_> {
    /// `str`: refused above 65,535 bytes rather than cut, since a cut could split a character.
    pub(super) fn str(&mut self, what: &'static str, text: &str) -> Result<(), EncodeError> {
        let len = self.prefix_u16(what, text.len())?;
        self.dst.put_u16(len);
        self.dst.put_slice(text.as_bytes());
        Ok(())
    }

    /// `bytes`: refused above `u32::MAX` bytes.
    fn bytes(&mut self, what: &'static str, data: &[u8]) -> Result<(), EncodeError> {
        let len = u32::try_from(data.len()).map_err(|_| EncodeError {
            kind: self.kind,
            what,
            len: data.len() as u64,
            limit: u32::MAX.into(),
        })?;
        self.dst.put_u32(len);
        self.dst.put_slice(data);
        Ok(())
    }

    /// A `u16` count or length, refused when it does not fit.
    pub(super) fn prefix_u16(&self, what: &'static str, len: usize) -> Result<u16, EncodeError> {
        u16::try_from(len).map_err(|_| EncodeError {
            kind: self.kind,
            what,
            len: len as u64,
            limit: u16::MAX.into(),
        })
    }
}
