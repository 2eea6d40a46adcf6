//! The audit sample: which held messages a person reviews, chosen at random but
//! repeatably from a seed.
//!
//! Method: bottom-k sampling. Each candidate gets a key drawn from [`SplitMix64`] seeded
//! with the sample's seed mixed with a hash of the candidate's verdict id, and the `k`
//! smallest keys are the sample. Every set of `k` candidates is equally likely, the choice
//! does not depend on the order the backend returns candidates in, and it is stable: for a
//! given seed a message stays in the sample as long as no newer candidate draws a smaller
//! key, so a reviewer's queue does not reshuffle as mail arrives.

use crate::rng::SplitMix64;

/// The `k` candidates with the smallest keys for `seed`, in key order.
pub fn choose(candidates: &[String], k: usize, seed: u64) -> Vec<&str> {
    let mut keyed: Vec<(u64, &str)> = candidates
        .iter()
        .map(|id| (key(id, seed), id.as_str()))
        .collect();
    keyed.sort_unstable();
    keyed.dedup_by(|a, b| a.1 == b.1);
    keyed.into_iter().take(k).map(|(_, id)| id).collect()
}

/// The sampling key of one verdict id.
fn key(verdict_id: &str, seed: u64) -> u64 {
    // FNV-1a (common practice) spreads the id into 64 bits; SplitMix64 then mixes it with
    // the seed, so different seeds give unrelated orders.
    let mut hash: u64 = 0xcbf2_9ce4_8422_2325;
    for byte in verdict_id.bytes() {
        hash ^= u64::from(byte);
        hash = hash.wrapping_mul(0x0100_0000_01b3);
    }
    SplitMix64::new(seed ^ hash).next_u64()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn ids(n: usize) -> Vec<String> {
        (0..n).map(|i| format!("V{i:015}")).collect()
    }

    #[test]
    fn stable_for_a_seed_and_independent_of_order() {
        let all = ids(200);
        let first = choose(&all, 10, 42);
        let mut reversed = all.clone();
        reversed.reverse();
        assert_eq!(choose(&reversed, 10, 42), first);
        assert_ne!(choose(&all, 10, 43), first);
        assert_eq!(first.len(), 10);
    }

    #[test]
    fn every_candidate_is_equally_likely() {
        // Over many seeds each of 20 candidates should be picked about k/n = 1/4 of the time.
        let all = ids(20);
        let mut hits = [0u32; 20];
        for seed in 0..4000 {
            for id in choose(&all, 5, seed) {
                if let Some(i) = all.iter().position(|x| x == id) {
                    hits[i] += 1;
                }
            }
        }
        // Expected 1000 each; a binomial(4000, 1/4) has sd ≈ 27, so ±150 is > 5 sd.
        assert!(hits.iter().all(|&h| (850..=1150).contains(&h)), "{hits:?}");
    }
}
