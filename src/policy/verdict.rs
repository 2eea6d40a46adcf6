//! What a verdict carries besides the actions: the header edits of `proto/PROTOCOL.md` §4,
//! the reasons a message went unscanned, and verdict ids.
//!
//! Invariants: every header value built here is a single line of printable text (no CR,
//! LF or other control characters), so a relay can add it verbatim; verdict ids from one
//! process are unique and strictly increasing.

use std::sync::OnceLock;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::{SystemTime, UNIX_EPOCH};

/// Name of the header field added to tagged mail.
pub const VERDICT_FIELD: &str = "X-Tamis-Verdict";
/// Name of the header field added to mail accepted without a scan.
pub const UNSCANNED_FIELD: &str = "X-Tamis-Unscanned";

/// One edit the relay applies to a delivered copy (`proto/PROTOCOL.md` §4, edit ops).
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum HeaderEdit {
    /// Op 1: add a header field `name: value`.
    Add {
        /// Field name, without the colon.
        name: String,
        /// Field value, one line.
        value: String,
    },
    /// Op 2: put `value` in front of the Subject field.
    PrefixSubject {
        /// The text to put in front, e.g. `"[junk?] "`.
        value: String,
    },
}

impl HeaderEdit {
    /// The op code on the wire: 1 add, 2 subject prefix.
    pub fn op(&self) -> u8 {
        match self {
            HeaderEdit::Add { .. } => 1,
            HeaderEdit::PrefixSubject { .. } => 2,
        }
    }

    /// The `name` on the wire (`Subject` for a subject prefix).
    pub fn name(&self) -> &str {
        match self {
            HeaderEdit::Add { name, .. } => name,
            HeaderEdit::PrefixSubject { .. } => "Subject",
        }
    }

    /// The `value` on the wire.
    pub fn value(&self) -> &str {
        match self {
            HeaderEdit::Add { value, .. } | HeaderEdit::PrefixSubject { value } => value,
        }
    }
}

/// Why a message was not scanned. A closed set, so it can label a metric and fill the
/// `X-Tamis-Unscanned` field without copying anything from the message or the peer.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum UnscannedReason {
    /// No model is loaded (start-up failed to load one, or it was withdrawn).
    ModelUnavailable,
    /// Extraction, featurization or scoring returned an error.
    ScanFailed,
    /// Scoring did not finish within its time budget.
    ScanTimeout,
    /// The daemon had no capacity left to scan the message.
    Overloaded,
}

impl UnscannedReason {
    /// Every reason, in a fixed order (for pre-registering metric series).
    pub const ALL: [UnscannedReason; 4] = [
        UnscannedReason::ModelUnavailable,
        UnscannedReason::ScanFailed,
        UnscannedReason::ScanTimeout,
        UnscannedReason::Overloaded,
    ];

    /// The reason as it appears in the header field and the metric label.
    pub fn as_str(self) -> &'static str {
        match self {
            UnscannedReason::ModelUnavailable => "model-unavailable",
            UnscannedReason::ScanFailed => "scan-failed",
            UnscannedReason::ScanTimeout => "scan-timeout",
            UnscannedReason::Overloaded => "overloaded",
        }
    }
}

impl std::fmt::Display for UnscannedReason {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

/// The margin with four decimals, as in the verdict field. `-0.0000` is written `0.0000`
/// so a sign never appears on a value that rounds to zero.
pub fn format_margin(margin: f64) -> String {
    if !margin.is_finite() {
        return "nan".to_string();
    }
    let text = format!("{margin:.4}");
    match text.strip_prefix('-') {
        Some(rest) if rest.bytes().all(|b| b == b'0' || b == b'.') => rest.to_string(),
        _ => text,
    }
}

/// Crockford's base32 alphabet: digits then capitals without I, L, O, U. Its symbols are
/// in ASCII order, so ids compare as text the way their numbers compare.
const BASE32: &[u8; 32] = b"0123456789ABCDEFGHJKMNPQRSTVWXYZ";

/// Bits of the per-process sequence below the millisecond clock in a stamp.
const SEQ_BITS: u32 = 20;

/// Last stamp handed out: milliseconds since the Unix epoch in the high 44 bits (enough
/// until the year 2527), a sequence number in the low 20.
static LAST_STAMP: AtomicU64 = AtomicU64::new(0);

/// A new verdict id: 16 characters of Crockford base32 (80 bits).
///
/// Layout, most significant first: 44 bits of milliseconds since the Unix epoch, a 20-bit
/// sequence, and a 16-bit tag fixed for the process. Each new stamp is the larger of
/// "now, sequence 0" and "last stamp + 1", taken atomically, so ids from one process are
/// unique and strictly increasing even when more than a million are made in a millisecond
/// (the stamp then runs slightly ahead of the clock) or the clock steps back. Ids sort by
/// time across processes to the millisecond. The process tag separates processes that
/// start in the same millisecond; it is mixed from the start-up time in nanoseconds and
/// the process id — not a secret and not random, which an id does not need.
pub fn verdict_id() -> String {
    let now = now_millis() << SEQ_BITS;
    let step = |last: u64| Some(now.max(last.wrapping_add(1)));
    // `step` never returns `None`, so both arms carry the previous stamp.
    let previous = match LAST_STAMP.fetch_update(Ordering::AcqRel, Ordering::Acquire, step) {
        Ok(prev) | Err(prev) => prev,
    };
    let stamp = now.max(previous.wrapping_add(1));
    encode_verdict_id(stamp, process_tag())
}

/// Encodes a stamp (44-bit milliseconds and 20-bit sequence) and a process tag as 16
/// base32 characters.
pub fn encode_verdict_id(stamp: u64, tag: u16) -> String {
    let value: u128 = (u128::from(stamp) << 16) | u128::from(tag);
    (0..16)
        .rev()
        .map(|i| {
            let index = ((value >> (i * 5)) & 0x1f) as usize;
            char::from(BASE32.get(index).copied().unwrap_or(b'0'))
        })
        .collect()
}

fn now_millis() -> u64 {
    let millis = SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map(|d| d.as_millis())
        .unwrap_or(0);
    u64::try_from(millis).unwrap_or(u64::MAX) & ((1u64 << 44) - 1)
}

fn process_tag() -> u16 {
    static TAG: OnceLock<u16> = OnceLock::new();
    *TAG.get_or_init(|| {
        let nanos = SystemTime::now()
            .duration_since(UNIX_EPOCH)
            .map(|d| d.as_nanos() as u64)
            .unwrap_or(0);
        let mixed = splitmix64(nanos ^ (u64::from(std::process::id()) << 32));
        (mixed >> 48) as u16
    })
}

/// The SplitMix64 finaliser (Steele, Lea & Flood 2014): spreads nearby inputs apart.
fn splitmix64(mut z: u64) -> u64 {
    z = z.wrapping_add(0x9e37_79b9_7f4a_7c15);
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ids_are_short_unique_and_increasing() {
        let ids: Vec<String> = (0..10_000).map(|_| verdict_id()).collect();
        for id in &ids {
            assert_eq!(id.len(), 16);
            assert!(id.bytes().all(|b| BASE32.contains(&b)), "{id}");
        }
        for pair in ids.windows(2) {
            assert!(pair[0] < pair[1], "{} then {}", pair[0], pair[1]);
        }
    }

    #[test]
    fn ids_are_unique_across_threads() {
        let handles: Vec<_> = (0..4)
            .map(|_| std::thread::spawn(|| (0..5_000).map(|_| verdict_id()).collect::<Vec<_>>()))
            .collect();
        let mut all = std::collections::BTreeSet::new();
        for h in handles {
            for id in h.join().unwrap_or_default() {
                assert!(all.insert(id));
            }
        }
        assert_eq!(all.len(), 20_000);
    }

    #[test]
    fn encoding_orders_like_the_numbers() {
        let a = encode_verdict_id(5 << SEQ_BITS, 0xffff);
        let b = encode_verdict_id((5 << SEQ_BITS) + 1, 0);
        let c = encode_verdict_id(6 << SEQ_BITS, 0);
        assert!(a < b && b < c);
        assert_eq!(encode_verdict_id(0, 0), "0000000000000000");
        assert_eq!(encode_verdict_id(u64::MAX, u16::MAX), "ZZZZZZZZZZZZZZZZ");
    }

    #[test]
    fn margins_have_four_decimals_and_no_negative_zero() {
        assert_eq!(format_margin(1.23456), "1.2346");
        assert_eq!(format_margin(-0.5), "-0.5000");
        assert_eq!(format_margin(-0.00001), "0.0000");
        assert_eq!(format_margin(-0.0), "0.0000");
        assert_eq!(format_margin(2.0), "2.0000");
    }
}
