//! A small seeded pseudo-random generator for the demo corpus.
//!
//! SplitMix64 (Steele, Lea & Flood, 2014): one 64-bit state word, a fixed increment and a
//! finalising mix. It is not suitable for anything secret; it is here because the corpus must
//! be byte-identical for a given seed on every platform and every release of the toolchain,
//! which rules out generators whose output may change with a dependency upgrade.

/// A deterministic stream of pseudo-random numbers.
#[derive(Debug, Clone)]
pub(crate) struct Rng {
    inner: crate::rng::SplitMix64,
}

impl Rng {
    /// A generator whose whole output is fixed by `seed`.
    pub(crate) fn new(seed: u64) -> Self {
        Rng {
            inner: crate::rng::SplitMix64::new(seed),
        }
    }

    /// A generator for item `index` of the stream seeded with `seed`.
    ///
    /// Each message draws from its own stream so that message `i` is the same whatever the
    /// requested count: a corpus of 100 is a prefix of a corpus of 10 000.
    pub(crate) fn for_item(seed: u64, index: u64) -> Self {
        let mut outer = Rng::new(seed ^ index.wrapping_mul(0xd1b5_4a32_d192_ed03));
        Rng::new(outer.next_u64())
    }

    /// The next 64 uniformly distributed bits.
    pub(crate) fn next_u64(&mut self) -> u64 {
        self.inner.next_u64()
    }

    /// A number in `0..n`; zero when `n` is zero so callers need no special case.
    pub(crate) fn below(&mut self, n: usize) -> usize {
        if n == 0 {
            return 0;
        }
        // Lemire's multiply-shift: the bias is below 2^-32 for the small ranges used here,
        // far under anything the demo data could reveal.
        let wide = u128::from(self.next_u64()) * (n as u128);
        (wide >> 64) as usize
    }

    /// A number in `lo..=hi` (or `lo` when the range is empty).
    pub(crate) fn range(&mut self, lo: usize, hi: usize) -> usize {
        if hi <= lo {
            return lo;
        }
        lo + self.below(hi - lo + 1)
    }

    /// True with probability `per_mille / 1000`.
    pub(crate) fn chance(&mut self, per_mille: u32) -> bool {
        self.below(1000) < per_mille as usize
    }

    /// One element of a slice, or `None` when it is empty.
    pub(crate) fn pick<'a, T>(&mut self, items: &'a [T]) -> Option<&'a T> {
        items.get(self.below(items.len()))
    }

    /// One string of a pool; the empty string for an empty pool.
    pub(crate) fn pick_str<'a>(&mut self, items: &[&'a str]) -> &'a str {
        self.pick(items).copied().unwrap_or("")
    }

    /// An index chosen with probability proportional to its weight.
    pub(crate) fn weighted(&mut self, weights: &[u32]) -> usize {
        let total: u64 = weights.iter().map(|w| u64::from(*w)).sum();
        if total == 0 {
            return 0;
        }
        let mut draw = self.next_u64() % total;
        for (i, w) in weights.iter().enumerate() {
            let w = u64::from(*w);
            if draw < w {
                return i;
            }
            draw -= w;
        }
        weights.len().saturating_sub(1)
    }

    /// `n` distinct indices from `0..len` in random order (all of them if `n >= len`).
    pub(crate) fn sample_indices(&mut self, len: usize, n: usize) -> Vec<usize> {
        let mut all: Vec<usize> = (0..len).collect();
        // Partial Fisher–Yates: only the first `n` positions need to be settled.
        let take = n.min(len);
        for i in 0..take {
            let j = i + self.below(len - i);
            all.swap(i, j);
        }
        all.truncate(take);
        all
    }

    /// `len` bytes of noise, for attachment payloads.
    pub(crate) fn bytes(&mut self, len: usize) -> Vec<u8> {
        let mut out = Vec::with_capacity(len + 8);
        while out.len() < len {
            out.extend_from_slice(&self.next_u64().to_le_bytes());
        }
        out.truncate(len);
        out
    }

    /// A lowercase hexadecimal token of `len` digits, for ids.
    pub(crate) fn hex(&mut self, len: usize) -> String {
        const DIGITS: &[u8; 16] = b"0123456789abcdef";
        (0..len)
            .map(|_| char::from(DIGITS.get(self.below(16)).copied().unwrap_or(b'0')))
            .collect()
    }

    /// An alphanumeric token of `len` characters, for ids that mail systems write.
    pub(crate) fn alnum(&mut self, len: usize) -> String {
        const DIGITS: &[u8] = b"0123456789ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz";
        (0..len)
            .map(|_| {
                char::from(
                    DIGITS
                        .get(self.below(DIGITS.len()))
                        .copied()
                        .unwrap_or(b'x'),
                )
            })
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn same_seed_same_stream() {
        let mut a = Rng::new(42);
        let mut b = Rng::new(42);
        for _ in 0..100 {
            assert_eq!(a.next_u64(), b.next_u64());
        }
    }

    #[test]
    fn below_stays_in_range() {
        let mut r = Rng::new(1);
        for n in 1..50 {
            for _ in 0..50 {
                assert!(r.below(n) < n);
            }
        }
        assert_eq!(r.below(0), 0);
    }

    #[test]
    fn weighted_respects_zero_weights() {
        let mut r = Rng::new(3);
        for _ in 0..200 {
            assert_eq!(r.weighted(&[0, 5, 0]), 1);
        }
    }
}
