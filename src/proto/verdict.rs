//! The `VERDICT` payload (PROTOCOL.md §4): types, parser and writer.
//!
//! Actions and edit ops are closed sets: a value outside them is `MALFORMED`, because a client
//! that applied an action it does not know could deliver mail it should have held.

use bytes::BufMut;
use nom::Parser;
use nom::number::complete::be_u8;

use super::error::EncodeError;
use super::frame::{WireResult, Writer, bad_value, parse_f64, parse_list, parse_str};

/// What the relay does with the message for one recipient.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
#[repr(u8)]
pub enum Action {
    /// Deliver unchanged.
    Accept = 0,
    /// Deliver with the edits applied.
    Tag = 1,
    /// Do not deliver; tamis keeps the message.
    Quarantine = 2,
    /// Answer the SMTP client with a temporary failure.
    Defer = 3,
}

impl Action {
    /// Every action, in wire order.
    pub const ALL: [Action; 4] = [
        Action::Accept,
        Action::Tag,
        Action::Quarantine,
        Action::Defer,
    ];

    /// The wire value.
    pub fn to_u8(self) -> u8 {
        self as u8
    }

    /// The action for a wire value, `None` outside the table.
    pub fn from_u8(value: u8) -> Option<Action> {
        Action::ALL.into_iter().find(|a| a.to_u8() == value)
    }

    /// The wire value (the same as [`Action::to_u8`]).
    pub fn code(self) -> u8 {
        self.to_u8()
    }

    /// The action's name in header fields, logs and metric labels: `accept`, `tag`,
    /// `quarantine`, `defer`.
    pub fn as_str(self) -> &'static str {
        match self {
            Action::Accept => "accept",
            Action::Tag => "tag",
            Action::Quarantine => "quarantine",
            Action::Defer => "defer",
        }
    }
}

impl std::fmt::Display for Action {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

/// How an edit changes the message.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
#[repr(u8)]
pub enum EditOp {
    /// Add a header field `name: value`.
    AddField = 1,
    /// Put `value` in front of the Subject field (`name` is `Subject`).
    PrefixSubject = 2,
}

impl EditOp {
    /// Every op, in wire order.
    pub const ALL: [EditOp; 2] = [EditOp::AddField, EditOp::PrefixSubject];

    /// The wire value.
    pub fn to_u8(self) -> u8 {
        self as u8
    }

    /// The op for a wire value, `None` outside the table.
    pub fn from_u8(value: u8) -> Option<EditOp> {
        EditOp::ALL.into_iter().find(|o| o.to_u8() == value)
    }
}

/// The action for one recipient, in `RECIPIENT` order.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RecipientAction {
    /// The recipient address as the client sent it.
    pub address: String,
    /// What to do for it.
    pub action: Action,
}

/// One header edit, applied for every recipient tagged.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Edit {
    /// What the edit does.
    pub op: EditOp,
    /// The field name.
    pub name: String,
    /// The value added or prefixed.
    pub value: String,
}

/// The payload of a `VERDICT` frame.
///
/// Equality compares `margin` and `probability` by bit pattern, so a verdict equals what it
/// decodes to after a round trip even when a score is NaN; two verdicts are equal exactly when
/// they encode to the same bytes.
#[derive(Debug, Clone)]
pub struct Verdict {
    /// Unique id of this decision.
    pub verdict_id: String,
    /// Model margin, positive leaning junk; NaN when not scored.
    pub margin: f64,
    /// Calibrated P(junk); NaN when uncalibrated or not scored.
    pub probability: f64,
    /// One action per recipient.
    pub recipients: Vec<RecipientAction>,
    /// Header edits.
    pub edits: Vec<Edit>,
    /// Short human-readable reasons.
    pub reasons: Vec<String>,
}

impl PartialEq for Verdict {
    fn eq(&self, other: &Self) -> bool {
        self.verdict_id == other.verdict_id
            && self.margin.to_bits() == other.margin.to_bits()
            && self.probability.to_bits() == other.probability.to_bits()
            && self.recipients == other.recipients
            && self.edits == other.edits
            && self.reasons == other.reasons
    }
}

impl Eq for Verdict {}

/// Bytes of the client's `max_frame` a `VERDICT` keeps for everything but its recipients:
/// the kind byte, the id, the scores, the three counts, the edits and the reasons
/// (PROTOCOL.md §4). The recipients get the rest, so a verdict always fits.
pub const VERDICT_RESERVE: u32 = 1024;

/// What one recipient takes in a `VERDICT`: the `str` length, the address and the action.
pub fn recipient_wire_len(listed_address_len: usize) -> u64 {
    3 + listed_address_len as u64
}

impl Verdict {
    /// The frame `length` this verdict encodes to (kind byte and payload, PROTOCOL.md §1).
    pub fn frame_length(&self) -> u64 {
        let str_len = |s: &str| 2 + s.len() as u64;
        let recipients: u64 = self
            .recipients
            .iter()
            .map(|r| recipient_wire_len(r.address.len()))
            .sum();
        let edits: u64 = self
            .edits
            .iter()
            .map(|e| 1 + str_len(&e.name) + str_len(&e.value))
            .sum();
        let reasons: u64 = self.reasons.iter().map(|r| str_len(r)).sum();
        1 + str_len(&self.verdict_id) + 8 + 8 + 2 + recipients + 2 + edits + 2 + reasons
    }

    /// Cuts the reasons, last first, until the verdict fits `max_frame`: a reason is shortened
    /// (at a character boundary) when that is enough, left out otherwise. The id, scores,
    /// recipients and edits are never touched. Returns the length still needed when even
    /// without reasons the verdict does not fit.
    pub fn fit_within(&mut self, max_frame: u32) -> Result<(), u64> {
        let limit = u64::from(max_frame);
        loop {
            let length = self.frame_length();
            if length <= limit {
                return Ok(());
            }
            let excess = usize::try_from(length - limit).unwrap_or(usize::MAX);
            let Some(last) = self.reasons.last_mut() else {
                return Err(length);
            };
            if last.len() > excess {
                let mut keep = last.len() - excess;
                while !last.is_char_boundary(keep) {
                    keep -= 1;
                }
                last.truncate(keep);
            } else {
                self.reasons.pop();
            }
        }
    }
}

/// Parses a `VERDICT` payload; the caller checks it was consumed exactly.
pub(super) fn parse_verdict(input: &[u8]) -> WireResult<'_, Verdict> {
    (
        parse_str,
        parse_f64,
        parse_f64,
        parse_list(parse_recipient),
        parse_list(parse_edit),
        parse_list(parse_str),
    )
        .map(
            |(verdict_id, margin, probability, recipients, edits, reasons)| Verdict {
                verdict_id,
                margin,
                probability,
                recipients,
                edits,
                reasons,
            },
        )
        .parse_complete(input)
}

fn parse_recipient(input: &[u8]) -> WireResult<'_, RecipientAction> {
    let (at, address) = parse_str(input)?;
    let (rest, value) = be_u8(at)?;
    let action = Action::from_u8(value).ok_or_else(|| bad_value(at, "action", value.into()))?;
    Ok((rest, RecipientAction { address, action }))
}

fn parse_edit(input: &[u8]) -> WireResult<'_, Edit> {
    let (after_op, value) = be_u8(input)?;
    let op = EditOp::from_u8(value).ok_or_else(|| bad_value(input, "edit op", value.into()))?;
    let (rest, (name, value)) = (parse_str, parse_str).parse_complete(after_op)?;
    Ok((rest, Edit { op, name, value }))
}

/// Writes a `VERDICT` payload.
pub(super) fn encode_verdict(verdict: &Verdict, w: &mut Writer<'_>) -> Result<(), EncodeError> {
    w.str("verdict_id", &verdict.verdict_id)?;
    w.dst.put_f64(verdict.margin);
    w.dst.put_f64(verdict.probability);
    let count = w.prefix_u16("recipient count", verdict.recipients.len())?;
    w.dst.put_u16(count);
    for r in &verdict.recipients {
        w.str("recipient address", &r.address)?;
        w.dst.put_u8(r.action.to_u8());
    }
    let count = w.prefix_u16("edit count", verdict.edits.len())?;
    w.dst.put_u16(count);
    for e in &verdict.edits {
        w.dst.put_u8(e.op.to_u8());
        w.str("edit name", &e.name)?;
        w.str("edit value", &e.value)?;
    }
    let count = w.prefix_u16("reason count", verdict.reasons.len())?;
    w.dst.put_u16(count);
    for reason in &verdict.reasons {
        w.str("reason", reason)?;
    }
    Ok(())
}
