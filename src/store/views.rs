//! What the status page reads from a store besides the figures: verdict volume over time
//! buckets, the margins of mail people reported, and held mail per domain. Plain data and
//! the small arithmetic on it, shared by every backend.
//!
//! Invariants: a [`Buckets`] window is validated before any query runs (a width of at
//! least one second, at most [`MAX_BUCKETS`] buckets), so a query returns a bounded number
//! of rows whatever the journal holds; [`MarginBins::index`] maps every margin, NaN and
//! infinities included, to a bin without panicking (values outside the range go to the end
//! bins, which the page labels "or less" / "or more").

use serde::Serialize;

use super::figures::ActionCounts;
use super::record::UnixTime;
use crate::policy::Action;

/// Most buckets a volume query returns.
pub const MAX_BUCKETS: u32 = 1000;
/// Most bins a margin histogram has.
pub const MAX_BINS: u32 = 400;

/// A time window cut into equal buckets: `[since, since + width × count)`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct Buckets {
    /// Start of the first bucket.
    pub since: UnixTime,
    /// Width of each bucket in seconds (at least 1).
    pub width: i64,
    /// Number of buckets (1 to [`MAX_BUCKETS`]).
    pub count: u32,
}

impl Buckets {
    /// `count` buckets ending at `until` (exclusive), each `width` seconds wide; the error
    /// says which bound is wrong.
    pub fn ending(until: UnixTime, width: i64, count: u32) -> Result<Buckets, String> {
        if width < 1 {
            return Err(format!(
                "a bucket width of {width} s; give at least 1 second"
            ));
        }
        if count == 0 || count > MAX_BUCKETS {
            return Err(format!("{count} buckets; give 1 to {MAX_BUCKETS} buckets"));
        }
        let span = width
            .checked_mul(i64::from(count))
            .ok_or_else(|| format!("{count} buckets of {width} s overflow the clock"))?;
        Ok(Buckets {
            since: until.saturating_sub(span),
            width,
            count,
        })
    }

    /// End of the last bucket (exclusive).
    pub fn until(&self) -> UnixTime {
        self.since
            .saturating_add(self.width.saturating_mul(i64::from(self.count)))
    }

    /// Checks a window built by hand; the error says what is wrong.
    pub fn check(&self) -> Result<(), String> {
        Buckets::ending(self.until(), self.width, self.count).map(|_| ())
    }
}

/// Messages in one time bucket.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize)]
pub struct VolumeBucket {
    /// Start of the bucket.
    pub start: UnixTime,
    /// Messages by the action taken.
    pub by_action: ActionCounts,
    /// Of those, messages the policy would have held with tag-only off but did not hold.
    pub would_quarantine: u64,
}

impl VolumeBucket {
    /// Adds `n` messages with this action and enforced action.
    pub fn add(&mut self, action: Action, enforced: Action, n: u64) {
        let slot = match action {
            Action::Accept => &mut self.by_action.accept,
            Action::Tag => &mut self.by_action.tag,
            Action::Quarantine => &mut self.by_action.quarantine,
            Action::Defer => &mut self.by_action.defer,
        };
        *slot += n;
        if enforced == Action::Quarantine && action != Action::Quarantine {
            self.would_quarantine += n;
        }
    }
}

/// Equal-width margin bins over `[low, high)`; margins outside go to the end bins.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct MarginBins {
    /// Lower edge of the first bin.
    pub low: f64,
    /// Upper edge of the last bin.
    pub high: f64,
    /// Number of bins (1 to [`MAX_BINS`]).
    pub count: u32,
}

impl MarginBins {
    /// Bins over `[low, high)`; the error says what is wrong.
    pub fn new(low: f64, high: f64, count: u32) -> Result<MarginBins, String> {
        if !(low.is_finite() && high.is_finite() && low < high) {
            return Err(format!(
                "margin bins from {low} to {high}; give finite edges with low < high"
            ));
        }
        if count == 0 || count > MAX_BINS {
            return Err(format!("{count} margin bins; give 1 to {MAX_BINS}"));
        }
        Ok(MarginBins { low, high, count })
    }

    /// Width of one bin.
    pub fn width(&self) -> f64 {
        (self.high - self.low) / f64::from(self.count.max(1))
    }

    /// The bin of a margin: below `low` (and NaN) in the first, at or above `high` in the
    /// last.
    pub fn index(&self, margin: f64) -> usize {
        let last = self.count.max(1) as usize - 1;
        let position = (margin - self.low) / self.width();
        if position.is_nan() || position < 0.0 {
            0
        } else if position >= last as f64 {
            last
        } else {
            // 0 ≤ position < last, so the cast neither saturates nor loses the sign.
            position as usize
        }
    }

    /// Lower edge of bin `i`.
    pub fn lower_edge(&self, i: usize) -> f64 {
        self.low + self.width() * i as f64
    }
}

/// Margins of reported messages of one domain, each message counted once under the kind
/// of its latest matched report that applies to the domain (the label the figures use).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MarginHistogram {
    /// The bins.
    pub bins: MarginBins,
    /// Messages labelled junk, per bin.
    pub junk: Vec<u64>,
    /// Messages labelled legitimate (reported not junk, or released), per bin.
    pub legitimate: Vec<u64>,
    /// Labelled messages without a margin (not scanned), left out of the bins.
    pub unscanned: u64,
}

impl MarginHistogram {
    /// An empty histogram over `bins`.
    pub fn empty(bins: MarginBins) -> MarginHistogram {
        let n = bins.count as usize;
        MarginHistogram {
            bins,
            junk: vec![0; n],
            legitimate: vec![0; n],
            unscanned: 0,
        }
    }

    /// Counts one labelled message.
    pub fn add(&mut self, margin: Option<f64>, junk: bool) {
        let Some(margin) = margin.filter(|m| m.is_finite()) else {
            self.unscanned += 1;
            return;
        };
        let i = self.bins.index(margin);
        let side = if junk {
            &mut self.junk
        } else {
            &mut self.legitimate
        };
        if let Some(slot) = side.get_mut(i) {
            *slot += 1;
        }
    }

    /// Messages counted in the bins.
    pub fn total(&self) -> u64 {
        self.junk.iter().sum::<u64>() + self.legitimate.iter().sum::<u64>()
    }
}

/// Held mail of one recipient domain (messages in the held state with the quarantine
/// action for it).
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct DomainHeld {
    /// The recipient domain.
    pub domain: String,
    /// Messages held.
    pub messages: u64,
    /// Their size as received.
    pub bytes: u64,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn buckets_end_where_asked_and_refuse_silly_windows() {
        let b = Buckets::ending(1_000_000, 3600, 24).expect("valid");
        assert_eq!((b.since, b.until()), (1_000_000 - 86_400, 1_000_000));
        assert!(Buckets::ending(0, 0, 24).is_err());
        assert!(Buckets::ending(0, 60, 0).is_err());
        assert!(Buckets::ending(0, 60, MAX_BUCKETS + 1).is_err());
        assert!(Buckets::ending(0, i64::MAX, 2).is_err());
    }

    #[test]
    fn every_margin_finds_a_bin() {
        let bins = MarginBins::new(-2.0, 2.0, 8).expect("valid");
        assert_eq!(bins.index(-100.0), 0);
        assert_eq!(bins.index(f64::NAN), 0);
        assert_eq!(bins.index(f64::NEG_INFINITY), 0);
        assert_eq!(bins.index(-2.0), 0);
        assert_eq!(bins.index(-1.5), 1);
        assert_eq!(bins.index(0.0), 4);
        assert_eq!(bins.index(1.999), 7);
        assert_eq!(bins.index(2.0), 7);
        assert_eq!(bins.index(f64::INFINITY), 7);
        assert!((bins.lower_edge(4) - 0.0).abs() < 1e-12);
        assert!(MarginBins::new(1.0, 1.0, 4).is_err());
        assert!(MarginBins::new(0.0, f64::NAN, 4).is_err());
    }

    #[test]
    fn histogram_counts_each_side_and_sets_unscanned_apart() {
        let mut h = MarginHistogram::empty(MarginBins::new(-1.0, 1.0, 2).expect("valid"));
        h.add(Some(-0.5), false);
        h.add(Some(0.5), true);
        h.add(Some(0.7), true);
        h.add(None, true);
        assert_eq!(h.legitimate, vec![1, 0]);
        assert_eq!(h.junk, vec![0, 2]);
        assert_eq!((h.unscanned, h.total()), (1, 3));
    }
}
