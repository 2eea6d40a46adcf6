//! The daemon-wide budget of bytes held by messages being assembled, so that a burst of
//! large messages on many connections cannot grow memory past the configuration
//! (`limits.max_buffered_bytes`).
//!
//! Each open message may always keep its first [`MESSAGE_FLOOR`] bytes, outside the budget,
//! so a burst of other messages can never leave one with nothing to score. Beyond that it
//! holds a [`Share`]: a message buffer never has more capacity past the floor than its
//! share has paid for, and the share goes back to the budget when it drops — after the
//! verdict, on `DROP`, or when the connection ends, whatever ends it.
//!
//! Invariants: the bytes lent never exceed the limit (a request that would pass it is
//! refused whole); `held` is the sum of the live shares; the gauge `tamis_buffered_bytes`
//! moves with every grant and return. Memory for messages is therefore at most the limit
//! plus one floor per open message.

use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};

use prometheus::IntGauge;

/// Bytes every open message may keep without drawing on the budget: its header section and
/// the start of its body, enough to be scored.
pub const MESSAGE_FLOOR: usize = 64 * 1024;

/// The budget shared by every connection.
#[derive(Debug)]
pub struct Budget {
    limit: u64,
    held: AtomicU64,
    peak: AtomicU64,
    gauge: IntGauge,
}

impl Budget {
    /// A budget of `limit` bytes, reported in `gauge`.
    pub fn new(limit: u64, gauge: IntGauge) -> Arc<Budget> {
        gauge.set(0);
        Arc::new(Budget {
            limit,
            held: AtomicU64::new(0),
            peak: AtomicU64::new(0),
            gauge,
        })
    }

    /// The most bytes the budget lends at once.
    pub fn limit(&self) -> u64 {
        self.limit
    }

    /// Bytes lent now.
    pub fn held(&self) -> u64 {
        self.held.load(Ordering::Acquire)
    }

    /// The most bytes ever lent at once.
    pub fn peak(&self) -> u64 {
        self.peak.load(Ordering::Acquire)
    }

    /// An empty share of this budget.
    pub fn share(self: &Arc<Self>) -> Share {
        Share {
            budget: Arc::clone(self),
            held: 0,
        }
    }

    /// Lends `n` bytes if that keeps the total within the limit.
    fn take(&self, n: u64) -> bool {
        let granted = self
            .held
            .fetch_update(Ordering::AcqRel, Ordering::Acquire, |held| {
                held.checked_add(n).filter(|total| *total <= self.limit)
            });
        match granted {
            Ok(before) => {
                self.peak.fetch_max(before + n, Ordering::AcqRel);
                self.gauge.add(i64::try_from(n).unwrap_or(i64::MAX));
                true
            }
            Err(_) => false,
        }
    }

    fn give_back(&self, n: u64) {
        let _ = self
            .held
            .fetch_update(Ordering::AcqRel, Ordering::Acquire, |held| {
                Some(held.saturating_sub(n))
            });
        self.gauge.sub(i64::try_from(n).unwrap_or(i64::MAX));
    }
}

/// One message's part of the [`Budget`]; returned when dropped.
#[derive(Debug)]
pub struct Share {
    budget: Arc<Budget>,
    held: u64,
}

impl Share {
    /// Bytes this share holds.
    pub fn held(&self) -> u64 {
        self.held
    }

    /// Grows the share to `total` bytes; false, and no change, when the budget cannot lend
    /// the difference. Asking for less than is held changes nothing.
    pub fn grow_to(&mut self, total: u64) -> bool {
        let more = total.saturating_sub(self.held);
        if more == 0 {
            return true;
        }
        if self.budget.take(more) {
            self.held = total;
            true
        } else {
            false
        }
    }
}

impl Drop for Share {
    fn drop(&mut self) {
        if self.held > 0 {
            self.budget.give_back(self.held);
        }
    }
}

/// A message buffer whose capacity past its floor is always paid for by its [`Share`].
#[derive(Debug)]
pub struct Buffer {
    bytes: Vec<u8>,
    share: Share,
    /// The most the buffer may hold (the message's scan cap and its separators).
    most: usize,
    /// Capacity held without the budget ([`MESSAGE_FLOOR`] in the daemon).
    floor: usize,
}

impl Buffer {
    /// An empty buffer of at most `most` bytes, the first `floor` of them free and the rest
    /// paid from `budget`.
    pub fn new(budget: &Arc<Budget>, most: usize, floor: usize) -> Buffer {
        Buffer {
            bytes: Vec::new(),
            share: budget.share(),
            most,
            floor,
        }
    }

    /// What a capacity costs the budget.
    fn cost(&self, capacity: usize) -> u64 {
        capacity.saturating_sub(self.floor) as u64
    }

    /// The bytes so far.
    pub fn bytes(&self) -> &[u8] {
        &self.bytes
    }

    /// Bytes held so far.
    pub fn len(&self) -> usize {
        self.bytes.len()
    }

    /// Whether nothing is held yet.
    pub fn is_empty(&self) -> bool {
        self.bytes.is_empty()
    }

    /// Makes room for up to `want` more bytes and says how many fit: all of them unless the
    /// buffer's own limit or the budget stops it. Capacity grows by doubling, as a `Vec`
    /// would, when the budget allows; otherwise by exactly what is needed.
    pub fn room_for(&mut self, want: usize) -> usize {
        let len = self.bytes.len();
        let want = want.min(self.most.saturating_sub(len));
        let needed = len + want;
        let capacity = self.bytes.capacity();
        if needed <= capacity {
            return want;
        }
        let doubled = capacity.saturating_mul(2).max(needed).min(self.most);
        let left = self
            .share
            .budget
            .limit
            .saturating_sub(self.share.budget.held());
        let paid_up_to = capacity.max(self.floor).min(self.most);
        let last = paid_up_to.saturating_add(usize::try_from(left).unwrap_or(usize::MAX));
        let target = if self.share.grow_to(self.cost(doubled)) {
            doubled
        } else if self.share.grow_to(self.cost(needed)) {
            needed
        } else if last > capacity && last < needed && self.share.grow_to(self.cost(last)) {
            // The last of the budget: part of what was asked for.
            last
        } else if paid_up_to > capacity {
            // The rest of the floor.
            paid_up_to
        } else {
            return capacity.saturating_sub(len);
        };
        self.bytes.reserve_exact(target - len);
        // An allocator may round up; the share pays for what is really held.
        let real = self.cost(self.bytes.capacity());
        if real > self.share.held() && !self.share.grow_to(real) {
            self.bytes.shrink_to(target);
        }
        want.min(target - len)
    }

    /// Appends what [`Buffer::room_for`] made room for; anything beyond is dropped.
    pub fn extend(&mut self, data: &[u8]) {
        let room = self.bytes.capacity() - self.bytes.len();
        let data = data.get(..room).unwrap_or(data);
        self.bytes.extend_from_slice(data);
    }

    /// Appends bytes one at a time from an iterator, within the room made.
    pub fn extend_iter(&mut self, data: impl IntoIterator<Item = u8>) {
        let room = self.bytes.capacity() - self.bytes.len();
        self.bytes.extend(data.into_iter().take(room));
    }

    /// The bytes, leaving the buffer empty; the share stays until the buffer drops, so the
    /// budget counts the bytes for as long as the caller scores them.
    pub fn take_bytes(&mut self) -> Vec<u8> {
        std::mem::take(&mut self.bytes)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn budget(limit: u64) -> Arc<Budget> {
        let gauge = IntGauge::new("test_buffered_bytes", "test").expect("a valid name");
        Budget::new(limit, gauge)
    }

    #[test]
    fn shares_are_refused_past_the_limit_and_given_back_on_drop() {
        let b = budget(100);
        let mut a = b.share();
        let mut c = b.share();
        assert!(a.grow_to(60));
        assert!(!c.grow_to(41), "60 + 41 > 100");
        assert_eq!(c.held(), 0, "a refused request changes nothing");
        assert!(c.grow_to(40));
        assert_eq!(b.held(), 100);
        assert!(a.grow_to(10), "shrinking is not asked for");
        drop(a);
        assert_eq!(b.held(), 40);
        drop(c);
        assert_eq!(b.held(), 0);
        assert_eq!(b.peak(), 100);
        assert_eq!(b.gauge.get(), 0);
    }

    #[test]
    fn a_buffer_never_holds_more_than_its_share_paid_for() {
        let b = budget(1000);
        let mut other = b.share();
        assert!(other.grow_to(700));
        let mut buf = Buffer::new(&b, 10_000, 0);
        let mut written = 0;
        for _ in 0..100 {
            let n = buf.room_for(64);
            buf.extend(&[b'x'; 64][..n]);
            written += n;
            assert!(buf.bytes.capacity() as u64 <= buf.share.held());
            assert!(b.held() <= b.limit());
            if n < 64 {
                break;
            }
        }
        assert_eq!(written, 300, "all the budget left, and no more");
        drop(other);
        assert_eq!(
            buf.room_for(64),
            64,
            "room again once another share is returned"
        );
        let bytes = buf.take_bytes();
        assert_eq!(bytes.len(), 300);
        assert!(b.held() > 0, "held while the bytes are scored");
        drop(buf);
        assert_eq!(b.held(), 0);
    }

    #[test]
    fn the_floor_is_kept_whatever_the_budget() {
        let b = budget(100);
        let mut hog = b.share();
        assert!(hog.grow_to(100));
        let mut buf = Buffer::new(&b, 10_000, 500);
        let mut written = 0;
        while written < 1000 {
            let n = buf.room_for(64);
            if n == 0 {
                break;
            }
            buf.extend(&[b'y'; 64][..n]);
            written += n;
        }
        assert_eq!(written, 500, "the floor, not more");
        assert_eq!(b.held(), 100, "nothing drawn from the spent budget");
        drop(hog);
        assert_eq!(buf.room_for(64), 64);
        assert!(b.held() > 0 && b.held() <= 100);
    }

    #[test]
    fn a_buffer_stops_at_its_own_limit() {
        let b = budget(1 << 20);
        let mut buf = Buffer::new(&b, 100, 0);
        assert_eq!(buf.room_for(150), 100);
        buf.extend(&[0; 150]);
        assert_eq!(buf.len(), 100);
        assert_eq!(buf.room_for(1), 0);
    }
}
