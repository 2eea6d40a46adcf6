//! MurmurHash3 x86_32 (Austin Appleby's public-domain reference, `MurmurHash3_x86_32`).
//!
//! Feature hashing needs a hash that is fast, well mixed and identical on every platform
//! and release, because a model's weights are indexed by it: this exact function, not a
//! `std` hasher whose output may change between Rust versions.

const C1: u32 = 0xcc9e_2d51;
const C2: u32 = 0x1b87_3593;

/// MurmurHash3 x86_32 of `data` with `seed`.
pub fn murmur3_x86_32(data: &[u8], seed: u32) -> u32 {
    let mut h = seed;
    let mut blocks = data.chunks_exact(4);
    for block in blocks.by_ref() {
        let k = u32::from_le_bytes([block[0], block[1], block[2], block[3]]);
        h ^= mix_k(k);
        h = h.rotate_left(13).wrapping_mul(5).wrapping_add(0xe654_6b64);
    }
    let tail = blocks.remainder();
    let mut k = 0u32;
    for (i, &byte) in tail.iter().enumerate() {
        k |= u32::from(byte) << (8 * i);
    }
    if !tail.is_empty() {
        h ^= mix_k(k);
    }
    // The reference mixes in the length modulo 2^32.
    h ^= data.len() as u32;
    fmix32(h)
}

fn mix_k(k: u32) -> u32 {
    k.wrapping_mul(C1).rotate_left(15).wrapping_mul(C2)
}

fn fmix32(mut h: u32) -> u32 {
    h ^= h >> 16;
    h = h.wrapping_mul(0x85eb_ca6b);
    h ^= h >> 13;
    h = h.wrapping_mul(0xc2b2_ae35);
    h ^= h >> 16;
    h
}
