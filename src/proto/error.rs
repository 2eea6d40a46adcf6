//! Errors of the relay protocol and the `FAULT` codes they map to (PROTOCOL.md §5).
//!
//! [`ProtoError`] is what a peer did wrong; every variant maps to exactly one fatal
//! [`FaultCode`] through [`ProtoError::code`], so the server can answer it without a second
//! table. [`EncodeError`] is kept apart because it is our own value that does not fit the wire,
//! never something a peer sent.

use std::fmt;

/// The `FAULT` codes of PROTOCOL.md §5, with their wire values.
///
/// A code outside this table is refused as `MALFORMED` when a `FAULT` frame is parsed: the
/// protocol has one version and every code is known to both sides.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
#[repr(u16)]
pub enum FaultCode {
    /// A frame that does not parse.
    Malformed = 1,
    /// A frame kind not in PROTOCOL.md §2.
    UnknownKind = 2,
    /// A frame not allowed in the current state.
    OutOfOrder = 3,
    /// A declared length above the announced `max_frame`.
    FrameTooLarge = 4,
    /// The message passed `max_message` (not fatal).
    MessageTooLarge = 5,
    /// More header fields or recipients than allowed (not fatal).
    TooMany = 6,
    /// A field value above the limit (not fatal).
    FieldTooLarge = 7,
    /// No frame within the idle timeout.
    Idle = 8,
    /// Unsupported protocol version.
    Version = 9,
    /// Connection limit reached.
    Busy = 10,
    /// The server is stopping and takes no new message.
    ShuttingDown = 11,
    /// A `SENDER` or `RECIPIENT` that is not an RFC 5321 address (not fatal).
    BadAddress = 12,
    /// The `VERDICT` could not be made to fit the client's `max_frame`.
    VerdictTooLarge = 13,
    /// The client may not connect: its address is not allowed, or its `HELLO` lacks the
    /// shared secret or carries a wrong one.
    Denied = 14,
}

impl FaultCode {
    /// Every code, in wire order; handy for exhaustive tests and strategies.
    pub const ALL: [FaultCode; 14] = [
        FaultCode::Malformed,
        FaultCode::UnknownKind,
        FaultCode::OutOfOrder,
        FaultCode::FrameTooLarge,
        FaultCode::MessageTooLarge,
        FaultCode::TooMany,
        FaultCode::FieldTooLarge,
        FaultCode::Idle,
        FaultCode::Version,
        FaultCode::Busy,
        FaultCode::ShuttingDown,
        FaultCode::BadAddress,
        FaultCode::VerdictTooLarge,
        FaultCode::Denied,
    ];

    /// The wire value.
    pub fn to_u16(self) -> u16 {
        self as u16
    }

    /// The code for a wire value, `None` when the value is not in the table.
    pub fn from_u16(value: u16) -> Option<FaultCode> {
        FaultCode::ALL.into_iter().find(|c| c.to_u16() == value)
    }

    /// Whether the server closes the connection after sending this code.
    pub fn is_fatal(self) -> bool {
        !matches!(
            self,
            FaultCode::MessageTooLarge
                | FaultCode::TooMany
                | FaultCode::FieldTooLarge
                | FaultCode::BadAddress
        )
    }

    /// The name PROTOCOL.md gives the code.
    pub fn name(self) -> &'static str {
        match self {
            FaultCode::Malformed => "MALFORMED",
            FaultCode::UnknownKind => "UNKNOWN_KIND",
            FaultCode::OutOfOrder => "OUT_OF_ORDER",
            FaultCode::FrameTooLarge => "FRAME_TOO_LARGE",
            FaultCode::MessageTooLarge => "MESSAGE_TOO_LARGE",
            FaultCode::TooMany => "TOO_MANY",
            FaultCode::FieldTooLarge => "FIELD_TOO_LARGE",
            FaultCode::Idle => "IDLE",
            FaultCode::Version => "VERSION",
            FaultCode::Busy => "BUSY",
            FaultCode::ShuttingDown => "SHUTTING_DOWN",
            FaultCode::BadAddress => "BAD_ADDRESS",
            FaultCode::VerdictTooLarge => "VERDICT_TOO_LARGE",
            FaultCode::Denied => "DENIED",
        }
    }
}

impl fmt::Display for FaultCode {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{} ({})", self.name(), self.to_u16())
    }
}

/// Why a payload did not parse; carried by [`ProtoError::Malformed`].
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Problem {
    /// A field runs past the end of the frame.
    Short,
    /// The payload has bytes after its last field.
    LeftOver {
        /// How many bytes were left.
        count: usize,
    },
    /// A `str` field is not UTF-8.
    BadUtf8,
    /// A field holds a value the protocol does not define (an action, edit op, fault code or
    /// `fatal` flag).
    BadValue {
        /// Which field.
        field: &'static str,
        /// The value found.
        value: u64,
    },
}

impl fmt::Display for Problem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Problem::Short => f.write_str("a field runs past the end of the frame"),
            Problem::LeftOver { count } => write!(f, "{count} bytes left over after the payload"),
            Problem::BadUtf8 => f.write_str("a str field is not valid UTF-8"),
            Problem::BadValue { field, value } => write!(f, "{field} has undefined value {value}"),
        }
    }
}

/// Where in the protocol a connection stands; carried by [`ProtoError::OutOfOrder`] so a log
/// line says what was expected.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Phase {
    /// Before `HELLO`.
    Start,
    /// Handshake done, no message open.
    Ready,
    /// `PEER` seen, `SENDER` expected.
    Peer,
    /// `SENDER` seen, no recipient yet.
    Envelope,
    /// At least one recipient, no field or chunk yet.
    Recipients,
    /// At least one header field, no chunk yet.
    Fields,
    /// At least one body chunk.
    Content,
    /// The client said `BYE`.
    Closed,
}

impl fmt::Display for Phase {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            Phase::Start => "before HELLO",
            Phase::Ready => "between messages",
            Phase::Peer => "after PEER",
            Phase::Envelope => "after SENDER",
            Phase::Recipients => "after RECIPIENT",
            Phase::Fields => "after FIELD",
            Phase::Content => "after CHUNK",
            Phase::Closed => "after BYE",
        })
    }
}

/// A protocol violation by the peer. Each variant is fatal and maps to one [`FaultCode`].
///
/// "Not enough bytes yet" is not here: [`crate::proto::parse_frame`] answers `Ok(None)` then.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum ProtoError {
    /// A length prefix of 0, which cannot even hold the kind byte.
    #[error("frame length is 0; it must count at least the kind byte")]
    ZeroLength,
    /// A length prefix above the receiver's `max_frame`, refused before its payload is read.
    #[error("frame length {declared} exceeds the announced maximum of {limit}")]
    FrameTooLarge {
        /// The declared `length`.
        declared: u32,
        /// The receiver's `max_frame`.
        limit: u32,
    },
    /// A kind byte outside PROTOCOL.md §2.
    #[error("unknown frame kind {0:#04x}")]
    UnknownKind(u8),
    /// A payload that does not parse.
    #[error(
        "malformed frame of kind {kind:#04x} (length {declared}) at payload offset {offset}: {problem}"
    )]
    Malformed {
        /// The frame kind.
        kind: u8,
        /// The declared `length` of the frame.
        declared: u32,
        /// Offset in the payload (after the kind byte) where parsing stopped.
        offset: usize,
        /// What was wrong there.
        problem: Problem,
    },
    /// `HELLO` announcing a `max_frame` below the protocol's minimum.
    #[error("HELLO announces max_frame {announced}, below the minimum of {min}")]
    SmallMaxFrame {
        /// The announced value.
        announced: u32,
        /// The protocol's minimum.
        min: u32,
    },
    /// A frame not allowed in the current state (PROTOCOL.md §6).
    #[error("frame of kind {kind:#04x} not allowed {phase}")]
    OutOfOrder {
        /// The frame kind.
        kind: u8,
        /// Where the connection stood.
        phase: Phase,
    },
    /// `HELLO` with a protocol version the server does not speak.
    #[error("protocol version {0} is not supported")]
    Version(u16),
}

impl ProtoError {
    /// The `FAULT` code the server sends for this error (always a fatal one).
    pub fn code(&self) -> FaultCode {
        match self {
            ProtoError::ZeroLength
            | ProtoError::Malformed { .. }
            | ProtoError::SmallMaxFrame { .. } => FaultCode::Malformed,
            ProtoError::FrameTooLarge { .. } => FaultCode::FrameTooLarge,
            ProtoError::UnknownKind(_) => FaultCode::UnknownKind,
            ProtoError::OutOfOrder { .. } => FaultCode::OutOfOrder,
            ProtoError::Version(_) => FaultCode::Version,
        }
    }
}

/// A frame of ours that the wire format cannot carry. Nothing is written when this is returned.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error(
    "cannot encode frame of kind {kind:#04x}: {what} is {len}, above the wire maximum of {limit}"
)]
pub struct EncodeError {
    /// The frame kind.
    pub kind: u8,
    /// Which field or count overflowed.
    pub what: &'static str,
    /// Its size.
    pub len: u64,
    /// The most its wire prefix can express.
    pub limit: u64,
}
