//! The model file: a small binary container, specified in `proto/MODEL_FORMAT.md`.
//!
//! ```text
//! offset  size  field
//! 0       8     magic "TAMISMDL"
//! 8       2     format version (u16 LE) = 1
//! 10      2     reserved, 0
//! 12      4     header length H (u32 LE), at most 1 MiB
//! 16      H     header: UTF-8 JSON {feature_spec, calibration, thresholds, summary}
//! 16+H    4     weight count N (u32 LE) = 2^hash_bits
//! 20+H    4N    weights, f32 LE
//! 20+H+4N 8     bias, f64 LE
//! 28+H+4N 4     CRC-32 (IEEE) of every preceding byte, u32 LE
//! ```
//!
//! Weights are raw little-endian floats, so loading a 2^22-weight model is a copy, not a
//! parse. A model's size follows from its header, so [`load_model`] reads the header first
//! and refuses a file larger than it declares (or declaring more weights than any supported
//! feature spec has) before reading the weights; it refuses anything but a regular file,
//! never blocks on a FIFO, and gives up on a stalled file system after
//! [`crate::fsio::READ_TIMEOUT`]. Files are written through [`crate::fsio`], so a daemon
//! reloading the path reads the old model or the new one, never half of one. Every way a
//! file can be wrong — foreign, truncated, corrupted, from a newer
//! format, or made with a feature spec this binary cannot reproduce — is its own error.

use std::io::Read;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use super::{Calibration, LinearModel, ModelError, Thresholds, TrainingSummary};
use crate::features::FeatureSpec;
use crate::features::spec::HASH_BITS_RANGE;
use crate::fsio::{self, FsioError};

/// First bytes of every model file.
pub const MAGIC: &[u8; 8] = b"TAMISMDL";
/// The format version this binary writes and reads.
pub const FORMAT_VERSION: u16 = 1;
/// Largest accepted header.
pub const MAX_HEADER_BYTES: usize = 1 << 20;
/// Most weights a model can have: `2^hash_bits` for the largest supported `hash_bits`.
pub const MAX_WEIGHTS: u64 = 1 << *HASH_BITS_RANGE.end();

/// Why a model file was refused.
#[derive(Debug, thiserror::Error)]
pub enum ModelFileError {
    /// The file cannot be read or written, or is not a regular file, or reading it stalled.
    #[error(transparent)]
    File(#[from] FsioError),
    /// The file does not start with the model magic.
    #[error("{path}: not a tamis model file (it does not start with the TAMISMDL signature)")]
    Foreign {
        /// The file.
        path: PathBuf,
    },
    /// The file was written by a newer (or unknown) format version.
    #[error(
        "{path}: model format version {found} is not supported (this binary reads version {FORMAT_VERSION}); use the tamis release that wrote it or retrain"
    )]
    Version {
        /// The file.
        path: PathBuf,
        /// Version found.
        found: u16,
    },
    /// The file ends before a field it declares.
    #[error(
        "{path}: truncated: {field} needs bytes up to offset {needed} but the file has {len} bytes"
    )]
    Truncated {
        /// The file.
        path: PathBuf,
        /// The field that is cut short.
        field: &'static str,
        /// Bytes required.
        needed: usize,
        /// Bytes present.
        len: usize,
    },
    /// The checksum does not match: the file was damaged after it was written.
    #[error("{path}: corrupted: checksum {found:#010x} does not match contents {computed:#010x}")]
    Checksum {
        /// The file.
        path: PathBuf,
        /// Stored checksum.
        found: u32,
        /// Checksum of the contents.
        computed: u32,
    },
    /// The header is not the JSON this format defines.
    #[error("{path}: damaged header: {reason}")]
    Header {
        /// The file.
        path: PathBuf,
        /// What is wrong.
        reason: String,
    },
    /// The parts are individually valid but do not fit together, or the feature spec is not
    /// reproducible by this binary.
    #[error("{path}: incompatible model: {source}")]
    Incompatible {
        /// The file.
        path: PathBuf,
        /// Why.
        source: ModelError,
    },
}

#[derive(Serialize, Deserialize)]
struct Header {
    feature_spec: FeatureSpec,
    calibration: Option<Calibration>,
    thresholds: Option<Thresholds>,
    summary: TrainingSummary,
}

/// Serializes `model` into the file format.
pub fn encode_model(model: &LinearModel) -> Vec<u8> {
    let header = Header {
        feature_spec: model.spec().clone(),
        calibration: model.calibration(),
        thresholds: model.thresholds(),
        summary: model.summary().clone(),
    };
    // Serializing plain structs of numbers and strings to JSON cannot fail.
    let header = serde_json::to_vec(&header).unwrap_or_default();
    let weights = model.weights();
    let mut out = Vec::with_capacity(32 + header.len() + 4 * weights.len());
    out.extend_from_slice(MAGIC);
    out.extend_from_slice(&FORMAT_VERSION.to_le_bytes());
    out.extend_from_slice(&0u16.to_le_bytes());
    out.extend_from_slice(&(header.len() as u32).to_le_bytes());
    out.extend_from_slice(&header);
    out.extend_from_slice(&(weights.len() as u32).to_le_bytes());
    for w in weights {
        out.extend_from_slice(&w.to_le_bytes());
    }
    out.extend_from_slice(&model.bias().to_le_bytes());
    let crc = crc32fast::hash(&out);
    out.extend_from_slice(&crc.to_le_bytes());
    out
}

/// Writes `model` to `path` through [`crate::fsio::write_bytes`]: a new temporary file
/// beside it, fsynced, then renamed over it. A `path` that is a link, folder, FIFO or device
/// is refused.
pub fn save_model(model: &LinearModel, path: &Path) -> Result<(), ModelFileError> {
    Ok(fsio::write_bytes(path, &encode_model(model))?)
}

/// Reads and checks the model at `path`; see the module comment for the bounds.
pub fn load_model(path: &Path) -> Result<LinearModel, ModelFileError> {
    let owned = path.to_path_buf();
    let bytes = fsio::with_deadline(path, fsio::READ_TIMEOUT, move || read_model_bytes(&owned))?;
    decode_model(&bytes, path)
}

/// Reads the bytes of a model file, never more than its header declares. A file too short
/// or foreign to declare anything is returned as read, for [`decode_model`] to name.
fn read_model_bytes(path: &Path) -> Result<Vec<u8>, ModelFileError> {
    let (mut file, size) = fsio::open_regular(path)?;
    let mut bytes = Vec::new();
    let mut read_up_to = |bytes: &mut Vec<u8>, total: u64| -> Result<(), ModelFileError> {
        let more = total.saturating_sub(bytes.len() as u64);
        (&mut file)
            .take(more)
            .read_to_end(bytes)
            .map_err(|e| FsioError::io(path, "read it", e))?;
        Ok(())
    };
    read_up_to(&mut bytes, 16)?;
    let Some(fixed) = bytes.get(..16) else {
        return Ok(bytes);
    };
    let version = u16::from_le_bytes([fixed[8], fixed[9]]);
    let header_len = u32::from_le_bytes([fixed[12], fixed[13], fixed[14], fixed[15]]) as u64;
    if !fixed.starts_with(MAGIC)
        || version != FORMAT_VERSION
        || header_len > MAX_HEADER_BYTES as u64
    {
        return Ok(bytes);
    }
    let count_end = 16 + header_len + 4;
    read_up_to(&mut bytes, count_end)?;
    let Some(count) = bytes.get(count_end as usize - 4..count_end as usize) else {
        return Ok(bytes);
    };
    let count = u64::from(u32::from_le_bytes([count[0], count[1], count[2], count[3]]));
    if count > MAX_WEIGHTS {
        return Err(ModelFileError::Header {
            path: path.to_path_buf(),
            reason: format!(
                "it declares {count} weights, more than the {MAX_WEIGHTS} (2^{}) of the largest supported feature space",
                HASH_BITS_RANGE.end()
            ),
        });
    }
    // Weights, then the f64 bias and the u32 checksum.
    let declared = count_end + 4 * count + 12;
    if size > declared {
        return Err(ModelFileError::Header {
            path: path.to_path_buf(),
            reason: format!(
                "the file has {size} bytes, larger than its header declares ({declared} bytes); it was not read further"
            ),
        });
    }
    bytes.reserve(size.saturating_sub(bytes.len() as u64) as usize);
    // One byte more than declared, so a file that grew since the size check is noticed.
    read_up_to(&mut bytes, declared + 1)?;
    Ok(bytes)
}

/// Decodes a model from `bytes`; `path` names the source in errors.
pub fn decode_model(bytes: &[u8], path: &Path) -> Result<LinearModel, ModelFileError> {
    let p = || path.to_path_buf();
    let len = bytes.len();
    let need = |field: &'static str, needed: usize| -> Result<(), ModelFileError> {
        if needed > len {
            Err(ModelFileError::Truncated {
                path: p(),
                field,
                needed,
                len,
            })
        } else {
            Ok(())
        }
    };
    if !bytes.starts_with(MAGIC) {
        // A prefix of the magic is a truncated model; anything else is someone else's file.
        return if len < MAGIC.len() && MAGIC.starts_with(bytes) {
            Err(ModelFileError::Truncated {
                path: p(),
                field: "signature",
                needed: MAGIC.len(),
                len,
            })
        } else {
            Err(ModelFileError::Foreign { path: p() })
        };
    }
    need("version", 16)?;
    let version = u16::from_le_bytes([bytes[8], bytes[9]]);
    if version != FORMAT_VERSION {
        return Err(ModelFileError::Version {
            path: p(),
            found: version,
        });
    }
    let header_len = u32::from_le_bytes([bytes[12], bytes[13], bytes[14], bytes[15]]) as usize;
    if header_len > MAX_HEADER_BYTES {
        return Err(ModelFileError::Header {
            path: p(),
            reason: format!("declared header length {header_len} exceeds {MAX_HEADER_BYTES}"),
        });
    }
    let header_end = 16 + header_len;
    need("header", header_end + 4)?;
    let count = u32::from_le_bytes([
        bytes[header_end],
        bytes[header_end + 1],
        bytes[header_end + 2],
        bytes[header_end + 3],
    ]) as usize;
    let weights_start = header_end + 4;
    let weights_end = weights_start.saturating_add(count.saturating_mul(4));
    need("weights", weights_end)?;
    need("bias", weights_end + 8)?;
    need("checksum", weights_end + 12)?;
    let body_end = weights_end + 8;
    if len > body_end + 4 {
        return Err(ModelFileError::Header {
            path: p(),
            reason: format!("{} unexpected bytes after the checksum", len - body_end - 4),
        });
    }
    let stored = u32::from_le_bytes([
        bytes[body_end],
        bytes[body_end + 1],
        bytes[body_end + 2],
        bytes[body_end + 3],
    ]);
    let computed = crc32fast::hash(&bytes[..body_end]);
    if stored != computed {
        return Err(ModelFileError::Checksum {
            path: p(),
            found: stored,
            computed,
        });
    }
    let header: Header =
        serde_json::from_slice(&bytes[16..header_end]).map_err(|e| ModelFileError::Header {
            path: p(),
            reason: e.to_string(),
        })?;
    let weights: Vec<f32> = bytes[weights_start..weights_end]
        .chunks_exact(4)
        .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
        .collect();
    let mut bias_bytes = [0u8; 8];
    bias_bytes.copy_from_slice(&bytes[weights_end..body_end]);
    let bias = f64::from_le_bytes(bias_bytes);
    LinearModel::new(
        header.feature_spec,
        weights,
        bias,
        header.calibration,
        header.thresholds,
        header.summary,
    )
    .map_err(|source| ModelFileError::Incompatible { path: p(), source })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn model() -> LinearModel {
        let spec = FeatureSpec {
            hash_bits: 10,
            ..FeatureSpec::default()
        };
        let weights = (0..1024).map(|i| (i as f32 - 512.0) / 100.0).collect();
        LinearModel::new(
            spec,
            weights,
            -0.25,
            Some(Calibration { a: -2.0, b: 0.1 }),
            Some(Thresholds {
                tag: 0.2,
                quarantine: 0.9,
            }),
            TrainingSummary {
                n_spam: 3,
                n_ham: 9,
                ..TrainingSummary::default()
            },
        )
        .expect("valid model")
    }

    fn decode(bytes: &[u8]) -> Result<LinearModel, ModelFileError> {
        decode_model(bytes, Path::new("m.tamis"))
    }

    #[test]
    fn round_trip_is_exact() {
        let m = model();
        assert_eq!(decode(&encode_model(&m)).expect("decodes"), m);
    }

    #[test]
    fn saved_models_load_back_and_every_file_truncation_is_named() {
        let dir = tempfile::tempdir().expect("temp dir");
        let path = dir.path().join("m.tamis");
        let m = model();
        save_model(&m, &path).expect("saved");
        assert_eq!(load_model(&path).expect("loads"), m);
        let bytes = encode_model(&m);
        for cut in [0, 5, 15, 16, 40, bytes.len() - 13, bytes.len() - 1] {
            std::fs::write(&path, &bytes[..cut]).expect("write");
            match load_model(&path) {
                Err(ModelFileError::Truncated { len, .. }) => assert_eq!(len, cut),
                other => panic!("cut at {cut}: {other:?}"),
            }
        }
    }

    #[test]
    fn a_file_longer_than_its_header_declares_is_refused_unread() {
        let dir = tempfile::tempdir().expect("temp dir");
        let path = dir.path().join("m.tamis");
        save_model(&model(), &path).expect("saved");
        // A terabyte on paper, a few blocks on disk: reading it would never finish.
        std::fs::OpenOptions::new()
            .write(true)
            .open(&path)
            .and_then(|f| f.set_len(1 << 40))
            .expect("sparse extend");
        match load_model(&path) {
            Err(ModelFileError::Header { reason, .. }) => {
                assert!(
                    reason.contains("larger than its header declares"),
                    "{reason}"
                )
            }
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn a_header_declaring_more_weights_than_any_spec_is_refused() {
        let dir = tempfile::tempdir().expect("temp dir");
        let path = dir.path().join("m.tamis");
        let mut bytes = encode_model(&model());
        let header_len = u32::from_le_bytes([bytes[12], bytes[13], bytes[14], bytes[15]]) as usize;
        bytes[16 + header_len..20 + header_len].copy_from_slice(&u32::MAX.to_le_bytes());
        std::fs::write(&path, &bytes).expect("write");
        match load_model(&path) {
            Err(ModelFileError::Header { reason, .. }) => {
                assert!(reason.contains("4294967295 weights"), "{reason}")
            }
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn a_fifo_or_device_is_refused_without_blocking() {
        let dir = tempfile::tempdir().expect("temp dir");
        let fifo = dir.path().join("m.fifo");
        let made = std::process::Command::new("mkfifo").arg(&fifo).status();
        assert!(made.is_ok_and(|s| s.success()));
        for path in [fifo.as_path(), Path::new("/dev/zero")] {
            match load_model(path) {
                Err(e @ ModelFileError::File(_)) => {
                    assert!(e.to_string().contains("not a regular file"), "{e}")
                }
                other => panic!("{other:?}"),
            }
        }
    }

    #[test]
    fn every_truncation_is_refused_as_truncated() {
        let bytes = encode_model(&model());
        for cut in 0..bytes.len() {
            match decode(&bytes[..cut]) {
                Err(ModelFileError::Truncated { .. }) => {}
                other => panic!("cut at {cut}: {other:?}"),
            }
        }
    }

    #[test]
    fn damaged_foreign_and_newer_files_are_refused() {
        let bytes = encode_model(&model());
        let mut flipped = bytes.clone();
        let middle = flipped.len() / 2;
        flipped[middle] ^= 0x40;
        assert!(matches!(
            decode(&flipped),
            Err(ModelFileError::Checksum { .. })
        ));
        assert!(matches!(
            decode(b"GIF89a......................"),
            Err(ModelFileError::Foreign { .. })
        ));
        let mut newer = bytes.clone();
        newer[8] = 9;
        assert!(matches!(
            decode(&newer),
            Err(ModelFileError::Version { found: 9, .. })
        ));
    }

    #[test]
    fn unsupported_feature_spec_is_refused() {
        let m = model();
        let bytes = encode_model(&m);
        // Rewrite the spec version inside the JSON header and fix up the checksum, as a
        // model written by a future release would look.
        let needle = b"\"version\":1";
        let at = bytes
            .windows(needle.len())
            .position(|w| w == needle)
            .expect("spec version in header");
        let mut edited = bytes.clone();
        edited[at + 10] = b'7';
        let body_end = edited.len() - 4;
        let crc = crc32fast::hash(&edited[..body_end]);
        edited[body_end..].copy_from_slice(&crc.to_le_bytes());
        match decode(&edited) {
            Err(ModelFileError::Incompatible { source, .. }) => {
                assert!(
                    source.to_string().contains("feature spec version 7"),
                    "{source}"
                );
            }
            other => panic!("{other:?}"),
        }
    }
}
