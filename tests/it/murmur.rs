//! MurmurHash3 x86_32 against its published verification values and scikit-learn.

use tamis::features::murmur3_x86_32;

#[test]
fn matches_smhasher_verification_value() {
    // SMHasher's VerificationTest (Appleby): hash keys [0], [0,1], ... [0..254] with seed
    // 256 - len, then hash the concatenated little-endian results with seed 0.
    // Expected value 0xB0F57EE3 for MurmurHash3_x86_32, from memory of SMHasher's main.cpp.
    let key: Vec<u8> = (0..=255u8).collect();
    let mut hashes = Vec::with_capacity(256 * 4);
    for len in 0..256usize {
        let h = murmur3_x86_32(&key[..len], 256 - len as u32);
        hashes.extend_from_slice(&h.to_le_bytes());
    }
    assert_eq!(murmur3_x86_32(&hashes, 0), 0xB0F5_7EE3);
}

#[test]
fn matches_commonly_published_vectors() {
    // Test vectors widely republished with MurmurHash3 ports (from memory).
    let cases: [(&[u8], u32, u32); 7] = [
        (b"", 0, 0),
        (b"", 1, 0x514E_28B7),
        (b"", 0xffff_ffff, 0x81F1_6F39),
        (b"\0\0\0\0", 0, 0x2362_F9DE),
        (b"aaaa", 0x9747_b28c, 0x5A97_808A),
        (b"Hello, world!", 0x9747_b28c, 0x2488_4CBA),
        (
            b"The quick brown fox jumps over the lazy dog",
            0x9747_b28c,
            0x2FA8_26CD,
        ),
    ];
    for (data, seed, expected) in cases {
        assert_eq!(
            murmur3_x86_32(data, seed),
            expected,
            "data {:?} seed {seed:#x}",
            String::from_utf8_lossy(data)
        );
    }
}

#[test]
fn matches_scikit_learn_murmurhash3_32() {
    // Reference: sklearn.utils.murmurhash3_32(key, seed, positive=True), which hashes the
    // UTF-8 bytes of a str with the same x86_32 variant.
    let mut strings = Vec::new();
    let alphabet: Vec<char> = "abcXYZ019 -_é€жあ😀\u{200b}".chars().collect();
    let mut state = 0x2545_f491_u64;
    for i in 0..400usize {
        let mut s = String::new();
        for _ in 0..(i % 37) {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            s.push(alphabet[(state % alphabet.len() as u64) as usize]);
        }
        strings.push(s);
    }
    let seeds = [0u32, 1, 42, 0x7a6d_1501, 0xffff_ffff];
    let input = serde_json::to_vec(&strings).expect("serialize strings");
    let script = r#"
import json, sys
from sklearn.utils import murmurhash3_32
strings = json.load(sys.stdin)
seeds = [int(s) for s in sys.argv[1:]]
print(json.dumps([[murmurhash3_32(s, seed=seed, positive=True) for seed in seeds] for s in strings]))
"#;
    let seed_args: Vec<String> = seeds.iter().map(u32::to_string).collect();
    let seed_refs: Vec<&str> = seed_args.iter().map(String::as_str).collect();
    let out = crate::python::run(script, &seed_refs, &input);
    let expected: Vec<Vec<u32>> = serde_json::from_slice(&out).expect("parse Python output");
    assert_eq!(expected.len(), strings.len());
    for (s, row) in strings.iter().zip(&expected) {
        for (&seed, &want) in seeds.iter().zip(row) {
            assert_eq!(
                murmur3_x86_32(s.as_bytes(), seed),
                want,
                "string {s:?} seed {seed}"
            );
        }
    }
}
