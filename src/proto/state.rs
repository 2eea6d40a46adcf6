//! The server's view of the protocol state machine (PROTOCOL.md §3, §4 and §6), kept apart
//! from the parsers: it sees decoded [`Frame`]s only.
//!
//! Invariants: a refused frame leaves the state unchanged (the connection is closing anyway);
//! per-message counters are reset by `SENDER` and after `SEAL` or `DROP`; a non-fatal condition
//! is never an error but part of [`Accepted`], so the caller keeps reading.

use super::address::{self, Role};
use super::error::{FaultCode, Phase, ProtoError};
use super::frame::Frame;
use super::verdict::{VERDICT_RESERVE, recipient_wire_len};

/// The protocol version this crate speaks.
pub const PROTOCOL_VERSION: u16 = 1;

/// The smallest `max_frame` a `HELLO` may announce.
pub const MIN_MAX_FRAME: u32 = 4096;

/// The server's limits of PROTOCOL.md §3.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Limits {
    /// Largest frame `length` the server accepts.
    pub max_frame: u32,
    /// Largest message, counted as the bytes of field names, field values and body chunks.
    pub max_message: u64,
    /// Header fields kept per message.
    pub max_fields: u32,
    /// Recipients kept per message.
    pub max_recipients: u32,
    /// Bytes of one field value kept.
    pub max_field_value: u32,
}

impl Default for Limits {
    /// The defaults of PROTOCOL.md §3.
    fn default() -> Self {
        Limits {
            max_frame: 65_536,
            max_message: 10 * 1024 * 1024,
            max_fields: 1_000,
            max_recipients: 1_000,
            max_field_value: 64 * 1024,
        }
    }
}

/// How much of an accepted frame's content the server keeps.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Keep {
    /// All of it (also the answer for frames without content).
    All,
    /// The first `n` bytes of the field value or chunk data.
    Prefix(usize),
    /// None of it: an extra recipient or field, or content past `max_message`.
    Nothing,
    /// Its place but not its content: a `SENDER` or `RECIPIENT` refused with
    /// `BAD_ADDRESS`. The recipient stays in its position, listed with an empty address.
    Blank,
}

/// What the state machine made of an allowed frame.
#[derive(Debug, Clone, PartialEq, Eq)]
#[must_use]
pub struct Accepted {
    /// What of the frame to keep.
    pub keep: Keep,
    /// Non-fatal `FAULT`s to send, in order. `TOO_MANY` (once for recipients, once for fields)
    /// and `MESSAGE_TOO_LARGE` come at most once per message; `FIELD_TOO_LARGE` once per cut
    /// field; `BAD_ADDRESS` once per refused sender or kept recipient.
    pub notices: Vec<FaultCode>,
}

impl Accepted {
    fn all() -> Self {
        Accepted {
            keep: Keep::All,
            notices: Vec::new(),
        }
    }
}

/// One connection's protocol state, as the server sees it.
#[derive(Debug, Clone)]
pub struct SessionState {
    limits: Limits,
    phase: Phase,
    version: Option<u16>,
    peer_max_frame: Option<u32>,
    recipients: u32,
    /// What the kept recipients take in the `VERDICT`.
    recipient_bytes: u64,
    fields: u32,
    size: u64,
    warned_recipients: bool,
    warned_fields: bool,
    over_size: bool,
}

impl SessionState {
    /// A connection that has not said `HELLO` yet.
    pub fn new(limits: Limits) -> Self {
        SessionState {
            limits,
            phase: Phase::Start,
            version: None,
            peer_max_frame: None,
            recipients: 0,
            recipient_bytes: 0,
            fields: 0,
            size: 0,
            warned_recipients: false,
            warned_fields: false,
            over_size: false,
        }
    }

    /// The limits this state enforces.
    pub fn limits(&self) -> &Limits {
        &self.limits
    }

    /// Where the connection stands.
    pub fn phase(&self) -> Phase {
        self.phase
    }

    /// The version agreed in the handshake, once it is done.
    pub fn version(&self) -> Option<u16> {
        self.version
    }

    /// The client's `max_frame`, once it is known: the server must not send longer frames.
    pub fn peer_max_frame(&self) -> Option<u32> {
        self.peer_max_frame
    }

    /// Whether a message is open (between `SENDER` and `SEAL` or `DROP`).
    pub fn message_open(&self) -> bool {
        matches!(
            self.phase,
            Phase::Envelope | Phase::Recipients | Phase::Fields | Phase::Content
        )
    }

    /// Recipients kept in the open message.
    pub fn recipients(&self) -> u32 {
        self.recipients
    }

    /// Header fields kept in the open message.
    pub fn fields(&self) -> u32 {
        self.fields
    }

    /// Bytes counted against `max_message` in the open message.
    pub fn message_size(&self) -> u64 {
        self.size
    }

    /// Stops taking content for the open message, as if it had passed `max_message`: the
    /// server could not keep more of it (its memory budget is spent). Returns true when
    /// this is news, so the caller sends the one `MESSAGE_TOO_LARGE` of the message.
    pub fn stop_content(&mut self) -> bool {
        if !self.message_open() || self.over_size {
            return false;
        }
        self.over_size = true;
        true
    }

    /// The `WELCOME` answering the accepted `HELLO`; `None` before the handshake.
    pub fn welcome(&self, server: &str) -> Option<Frame> {
        self.version.map(|version| Frame::Welcome {
            version,
            max_frame: self.limits.max_frame,
            max_message: self.limits.max_message,
            server: server.to_owned(),
        })
    }

    /// Checks a frame from the client against the state machine and the limits, and moves on.
    ///
    /// Errors are fatal (`OUT_OF_ORDER`, `VERSION`, `MALFORMED` for a small `max_frame`);
    /// limits passed are reported in [`Accepted`].
    pub fn accept_client(&mut self, frame: &Frame) -> Result<Accepted, ProtoError> {
        let out_of_order = ProtoError::OutOfOrder {
            kind: frame.kind(),
            phase: self.phase,
        };
        let phase = self.phase;
        match frame {
            Frame::Hello {
                version, max_frame, ..
            } if phase == Phase::Start => {
                if *version == 0 {
                    return Err(ProtoError::Version(*version));
                }
                if *max_frame < MIN_MAX_FRAME {
                    return Err(ProtoError::SmallMaxFrame {
                        announced: *max_frame,
                        min: MIN_MAX_FRAME,
                    });
                }
                self.version = Some((*version).min(PROTOCOL_VERSION));
                self.peer_max_frame = Some(*max_frame);
                self.phase = Phase::Ready;
                Ok(Accepted::all())
            }
            Frame::Ping { .. } if !matches!(phase, Phase::Start | Phase::Closed) => {
                Ok(Accepted::all())
            }
            Frame::Peer { .. } if phase == Phase::Ready => {
                self.phase = Phase::Peer;
                Ok(Accepted::all())
            }
            Frame::Sender { address } if matches!(phase, Phase::Ready | Phase::Peer) => {
                self.reset_message();
                self.phase = Phase::Envelope;
                Ok(match address::check(address, Role::Sender) {
                    Ok(()) => Accepted::all(),
                    Err(_) => Accepted {
                        keep: Keep::Blank,
                        notices: vec![FaultCode::BadAddress],
                    },
                })
            }
            Frame::Recipient { address }
                if matches!(phase, Phase::Envelope | Phase::Recipients) =>
            {
                self.phase = Phase::Recipients;
                Ok(self.count_recipient(address))
            }
            Frame::Field { name, value } if matches!(phase, Phase::Recipients | Phase::Fields) => {
                self.phase = Phase::Fields;
                Ok(self.count_field(name.len(), value.len()))
            }
            Frame::Chunk { data }
                if matches!(phase, Phase::Recipients | Phase::Fields | Phase::Content) =>
            {
                self.phase = Phase::Content;
                let mut notices = Vec::new();
                let keep = self.take_budget(0, data.len(), &mut notices);
                Ok(Accepted { keep, notices })
            }
            Frame::Seal if matches!(phase, Phase::Recipients | Phase::Fields | Phase::Content) => {
                self.end_message();
                Ok(Accepted::all())
            }
            Frame::Drop if self.message_open() => {
                self.end_message();
                Ok(Accepted::all())
            }
            Frame::ClientBye if phase == Phase::Ready => {
                self.phase = Phase::Closed;
                Ok(Accepted::all())
            }
            // Server-to-client kinds from the client land here too: they are known kinds sent
            // in the wrong direction.
            _ => Err(out_of_order),
        }
    }

    fn reset_message(&mut self) {
        self.recipients = 0;
        self.recipient_bytes = 0;
        self.fields = 0;
        self.size = 0;
        self.warned_recipients = false;
        self.warned_fields = false;
        self.over_size = false;
    }

    fn end_message(&mut self) {
        self.reset_message();
        self.phase = Phase::Ready;
    }

    /// The bytes of a `VERDICT` its recipients may take: the client's `max_frame` less what
    /// the rest of the verdict is allowed (PROTOCOL.md §4).
    pub fn verdict_recipient_room(&self) -> u64 {
        let max_frame = self.peer_max_frame.unwrap_or(MIN_MAX_FRAME);
        u64::from(max_frame.saturating_sub(VERDICT_RESERVE))
    }

    /// Keeps recipients in order while both the count and the verdict room allow; the first
    /// one that does not fit and every one after it are extra.
    fn count_recipient(&mut self, address: &str) -> Accepted {
        let valid = address::check(address, Role::Recipient).is_ok();
        let cost = recipient_wire_len(if valid { address.len() } else { 0 });
        let fits = self.recipients < self.limits.max_recipients
            && self.recipient_bytes.saturating_add(cost) <= self.verdict_recipient_room();
        if fits && !self.warned_recipients {
            self.recipients += 1;
            self.recipient_bytes += cost;
            return if valid {
                Accepted::all()
            } else {
                Accepted {
                    keep: Keep::Blank,
                    notices: vec![FaultCode::BadAddress],
                }
            };
        }
        let notices = if self.warned_recipients {
            Vec::new()
        } else {
            self.warned_recipients = true;
            vec![FaultCode::TooMany]
        };
        Accepted {
            keep: Keep::Nothing,
            notices,
        }
    }

    fn count_field(&mut self, name_len: usize, value_len: usize) -> Accepted {
        let mut notices = Vec::new();
        if self.fields >= self.limits.max_fields {
            if !self.warned_fields {
                self.warned_fields = true;
                notices.push(FaultCode::TooMany);
            }
            return Accepted {
                keep: Keep::Nothing,
                notices,
            };
        }
        self.fields += 1;
        let cap = usize::try_from(self.limits.max_field_value).unwrap_or(usize::MAX);
        let cut = value_len.min(cap);
        if cut < value_len {
            notices.push(FaultCode::FieldTooLarge);
        }
        let keep = match self.take_budget(name_len, cut, &mut notices) {
            Keep::All if cut < value_len => Keep::Prefix(cut),
            other => other,
        };
        Accepted { keep, notices }
    }

    /// Counts `overhead` plus up to `len` content bytes against `max_message`; says how much
    /// of the content fits.
    fn take_budget(&mut self, overhead: usize, len: usize, notices: &mut Vec<FaultCode>) -> Keep {
        if self.over_size {
            return Keep::Nothing;
        }
        let remaining = self.limits.max_message.saturating_sub(self.size);
        let overhead = u64::try_from(overhead).unwrap_or(u64::MAX);
        let len64 = u64::try_from(len).unwrap_or(u64::MAX);
        if overhead.saturating_add(len64) <= remaining {
            self.size += overhead + len64;
            return Keep::All;
        }
        self.over_size = true;
        notices.push(FaultCode::MessageTooLarge);
        let room = remaining.saturating_sub(overhead);
        if overhead > remaining || room == 0 {
            self.size = self.limits.max_message;
            return Keep::Nothing;
        }
        self.size = self.limits.max_message;
        Keep::Prefix(usize::try_from(room).unwrap_or(len))
    }
}
