//! The two binary forms a store keeps: a hashed feature vector as a compact blob, and a
//! held message compressed.
//!
//! Vector blob, version 1: one byte `1`, the entry count as an unsigned LEB128 varint, the
//! indices as varints of their gaps (the first index itself, then each index minus the one
//! before, so always ≥ 1 after the first), then the values as little-endian `f32`. Decoding
//! checks every length and that indices strictly increase, so a damaged blob is an error,
//! never a panic or a vector that breaks the sorted-indices invariant.
//!
//! Messages are compressed with zlib (RFC 1950: deflate plus an Adler-32 checksum, so a
//! damaged copy is detected on the way out) through `flate2`'s pure-Rust backend.
//! Decompression stops one byte past the size recorded at hold time, so a damaged or
//! hostile stream cannot expand without bound.

use std::io::{Read, Write};

use flate2::Compression;
use flate2::read::ZlibDecoder;
use flate2::write::ZlibEncoder;

use crate::features::SparseVector;

/// Version byte of the vector blob format.
const VECTOR_FORMAT: u8 = 1;

/// Encodes a sparse vector as a version-1 blob.
pub fn encode_vector(vector: &SparseVector) -> Vec<u8> {
    let n = vector.nnz();
    let mut out = Vec::with_capacity(1 + 5 + n * 6);
    out.push(VECTOR_FORMAT);
    push_varint(&mut out, n as u64);
    let mut previous = 0u32;
    for (i, &index) in vector.indices().iter().enumerate() {
        let gap = if i == 0 { index } else { index - previous };
        push_varint(&mut out, u64::from(gap));
        previous = index;
    }
    for value in vector.values() {
        out.extend_from_slice(&value.to_le_bytes());
    }
    out
}

/// Decodes a blob written by [`encode_vector`]; the error says what is wrong.
pub fn decode_vector(blob: &[u8]) -> Result<SparseVector, String> {
    let (&version, mut rest) = blob
        .split_first()
        .ok_or_else(|| "the feature vector blob is empty".to_string())?;
    if version != VECTOR_FORMAT {
        return Err(format!(
            "the feature vector blob has format {version}, this build reads {VECTOR_FORMAT}"
        ));
    }
    let n = read_varint(&mut rest)?;
    // Each entry takes at least 5 bytes (a 1-byte gap and a 4-byte value): refuse a count
    // the blob cannot hold before allocating for it.
    if n > (rest.len() / 5) as u64 {
        return Err(format!(
            "the feature vector blob claims {n} entries but holds {} bytes",
            rest.len()
        ));
    }
    let n = n as usize;
    let mut indices = Vec::with_capacity(n);
    let mut previous: u64 = 0;
    for i in 0..n {
        let gap = read_varint(&mut rest)?;
        if i > 0 && gap == 0 {
            return Err("the feature vector blob repeats an index".to_string());
        }
        let index = if i == 0 {
            Some(gap)
        } else {
            previous.checked_add(gap)
        };
        let index = index
            .and_then(|i| u32::try_from(i).ok())
            .ok_or_else(|| "the feature vector blob has an index beyond 32 bits".to_string())?;
        indices.push(index);
        previous = u64::from(index);
    }
    if rest.len() != n * 4 {
        return Err(format!(
            "the feature vector blob has {} bytes of values for {n} entries",
            rest.len()
        ));
    }
    let pairs = indices
        .into_iter()
        .zip(rest.chunks_exact(4))
        .map(|(index, bytes)| {
            let mut raw = [0u8; 4];
            raw.copy_from_slice(bytes);
            (index, f32::from_le_bytes(raw))
        })
        .collect();
    Ok(SparseVector::from_pairs(pairs))
}

fn push_varint(out: &mut Vec<u8>, mut value: u64) {
    loop {
        let byte = (value & 0x7f) as u8;
        value >>= 7;
        if value == 0 {
            out.push(byte);
            return;
        }
        out.push(byte | 0x80);
    }
}

fn read_varint(input: &mut &[u8]) -> Result<u64, String> {
    let mut value = 0u64;
    for shift in (0..64).step_by(7) {
        let (&byte, rest) = input
            .split_first()
            .ok_or_else(|| "the feature vector blob ends inside a number".to_string())?;
        *input = rest;
        value |= u64::from(byte & 0x7f) << shift;
        if byte & 0x80 == 0 {
            return Ok(value);
        }
    }
    Err("the feature vector blob has a number longer than 64 bits".to_string())
}

/// Compresses a message for the quarantine.
pub fn compress(message: &[u8]) -> Vec<u8> {
    let mut encoder = ZlibEncoder::new(
        Vec::with_capacity(message.len() / 2 + 64),
        Compression::default(),
    );
    // Writing into a `Vec` cannot fail.
    let _ = encoder.write_all(message);
    encoder.finish().unwrap_or_default()
}

/// Decompresses a held message and checks it has exactly `size` bytes.
pub fn decompress(stored: &[u8], size: u64) -> Result<Vec<u8>, String> {
    let capacity = usize::try_from(size).unwrap_or(usize::MAX).min(1 << 30);
    let mut out = Vec::with_capacity(capacity);
    ZlibDecoder::new(stored)
        .take(size.saturating_add(1))
        .read_to_end(&mut out)
        .map_err(|e| format!("the compressed copy is damaged ({e})"))?;
    if out.len() as u64 != size {
        return Err(format!(
            "the compressed copy holds {} bytes, {size} were held",
            out.len()
        ));
    }
    Ok(out)
}

/// The first `max` bytes of a compressed message (all of it when shorter): enough to show
/// its header section without inflating the whole message. Only the bytes read are
/// checked, so a copy damaged further on still shows its start.
pub fn decompress_prefix(stored: &[u8], max: usize) -> Result<Vec<u8>, String> {
    let mut out = Vec::with_capacity(max.min(1 << 20));
    ZlibDecoder::new(stored)
        .take(max as u64)
        .read_to_end(&mut out)
        .map_err(|e| format!("the compressed copy is damaged ({e})"))?;
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_prefix_is_the_start_of_the_message() {
        let message: Vec<u8> = (0..50_000u32).map(|i| (i % 251) as u8).collect();
        let stored = compress(&message);
        assert_eq!(
            decompress_prefix(&stored, 1000),
            Ok(message[..1000].to_vec())
        );
        assert_eq!(decompress_prefix(&stored, 1 << 20), Ok(message.clone()));
        assert!(decompress_prefix(b"not zlib at all", 10).is_err());
    }

    #[test]
    fn vectors_round_trip() {
        let v = SparseVector::from_pairs(vec![(0, 0.5), (7, -1.25), (300, 2.0), (u32::MAX, 1e-3)]);
        let blob = encode_vector(&v);
        assert_eq!(decode_vector(&blob), Ok(v));
        let empty = SparseVector::new();
        assert_eq!(decode_vector(&encode_vector(&empty)), Ok(empty));
    }

    #[test]
    fn damaged_vector_blobs_are_errors() {
        let v = SparseVector::from_pairs(vec![(3, 1.0), (9, 2.0)]);
        let blob = encode_vector(&v);
        for cut in 0..blob.len() {
            assert!(decode_vector(&blob[..cut]).is_err(), "cut at {cut}");
        }
        let mut repeated = blob.clone();
        repeated[2] = 3;
        repeated[3] = 0;
        assert!(decode_vector(&repeated).is_err());
        let mut version = blob.clone();
        version[0] = 9;
        assert!(decode_vector(&version).is_err());
        assert!(decode_vector(&[1, 0xff, 0xff, 0xff, 0xff, 0x0f]).is_err());
        assert!(
            decode_vector(&[
                1, 0x80, 0x80, 0x80, 0x80, 0x80, 0x80, 0x80, 0x80, 0x80, 0x80, 0x01
            ])
            .is_err()
        );
    }

    #[test]
    fn messages_round_trip_and_damage_is_detected() {
        let message = b"Subject: hello\r\n\r\nbody body body body body body\r\n".repeat(50);
        let stored = compress(&message);
        assert!(stored.len() < message.len());
        assert_eq!(
            decompress(&stored, message.len() as u64),
            Ok(message.clone())
        );
        assert!(decompress(&stored, message.len() as u64 - 1).is_err());
        assert!(decompress(&stored, message.len() as u64 + 1).is_err());
        let mut damaged = stored.clone();
        let middle = damaged.len() / 2;
        damaged[middle] ^= 0x55;
        assert!(decompress(&damaged, message.len() as u64).is_err());
    }
}
