//! The relay protocol (`proto/PROTOCOL.md`): the codec that turns bytes into [`Frame`]s and
//! back, and the state machine that says which frame may come when.
//!
//! Layers, in the order bytes meet them:
//!
//! 1. [`frame`] — [`parse_frame`] and [`encode_frame`]; the `VERDICT` payload lives in
//!    [`verdict`].
//! 2. [`state`] — [`SessionState::accept_client`], the server's state machine and limits.
//! 3. [`error`] — [`ProtoError`] and the `FAULT` codes it maps to.
//! 4. [`address`] — the RFC 5321 syntax `SENDER` and `RECIPIENT` are checked against.
//!
//! Invariants: no input makes the codec panic; an incomplete frame is `Ok(None)`, never an
//! error, and the codec never asks for more bytes than the declared length; a declared length
//! is checked against the limit before the payload is awaited; a payload is consumed exactly;
//! `encode_frame` followed by `parse_frame` gives back the same frame and byte count.
//! The codec knows nothing of connection state; the state machine knows nothing of bytes.

pub mod address;
pub mod client;
pub mod error;
pub mod frame;
pub mod state;
pub mod verdict;

pub use error::{EncodeError, FaultCode, Phase, Problem, ProtoError};
pub use frame::{Frame, encode_frame, encode_frame_within, is_known_kind, kind, parse_frame};
pub use state::{Accepted, Keep, Limits, MIN_MAX_FRAME, PROTOCOL_VERSION, SessionState};
pub use verdict::{Action, Edit, EditOp, RecipientAction, VERDICT_RESERVE, Verdict};
