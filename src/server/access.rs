//! Who may hold a relay connection: TCP peers are matched against an allow-list of address
//! ranges and counted per address, and may have to present a shared secret in `HELLO`
//! (PROTOCOL.md §3). The Unix socket relies on its file permissions instead.
//!
//! Invariants: an IPv4 peer seen through an IPv6 socket (`::ffff:a.b.c.d`) is matched as
//! the IPv4 address it is; a secret is compared in time that depends on its length only,
//! never on where the first difference lies, and is never printed (its `Debug` is
//! redacted); a per-peer slot is given back when its guard drops, whatever ended the
//! connection.

use std::collections::HashMap;
use std::fmt;
use std::net::IpAddr;
use std::path::{Path, PathBuf};
use std::str::FromStr;
use std::sync::{Arc, Mutex};

/// A range of IP addresses in CIDR notation (RFC 4632 §3.1): an address and a prefix
/// length, the bits after the prefix zero.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Cidr {
    network: IpAddr,
    prefix: u8,
}

impl Cidr {
    /// The loopback ranges, `127.0.0.0/8` and `::1/128`: the default allow-list.
    pub fn loopback() -> Vec<Cidr> {
        vec![
            Cidr {
                network: IpAddr::from([127, 0, 0, 0]),
                prefix: 8,
            },
            Cidr {
                network: IpAddr::from([0u16, 0, 0, 0, 0, 0, 0, 1]),
                prefix: 128,
            },
        ]
    }

    /// Whether `ip` lies in the range. IPv4-mapped IPv6 addresses count as IPv4.
    pub fn contains(&self, ip: IpAddr) -> bool {
        match (self.network, ip.to_canonical()) {
            (IpAddr::V4(net), IpAddr::V4(ip)) => {
                masked(u128::from(u32::from(ip)), 32, self.prefix) == u128::from(u32::from(net))
            }
            (IpAddr::V6(net), IpAddr::V6(ip)) => {
                masked(u128::from(ip), 128, self.prefix) == u128::from(net)
            }
            _ => false,
        }
    }
}

/// `value` (of `bits` bits) with everything after the first `prefix` bits cleared.
fn masked(value: u128, bits: u8, prefix: u8) -> u128 {
    let host_bits = u32::from(bits.saturating_sub(prefix));
    let mask = u128::MAX.checked_shl(host_bits).unwrap_or(0);
    value & mask
}

impl fmt::Display for Cidr {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}/{}", self.network, self.prefix)
    }
}

impl FromStr for Cidr {
    type Err = String;

    /// `"192.0.2.0/24"`, `"2001:db8::/32"`, or a single address (`"192.0.2.7"`, meaning
    /// `/32` or `/128`).
    fn from_str(text: &str) -> Result<Cidr, String> {
        let (addr, prefix) = match text.split_once('/') {
            Some((addr, prefix)) => (addr, Some(prefix)),
            None => (text, None),
        };
        let network: IpAddr = addr.parse().map_err(|_| {
            format!(
                "\"{text}\" is not an address range; write CIDR such as \"192.0.2.0/24\" or \"2001:db8::/32\""
            )
        })?;
        let bits: u8 = if network.is_ipv4() { 32 } else { 128 };
        let prefix = match prefix {
            None => bits,
            Some(p) => p.parse::<u8>().ok().filter(|p| *p <= bits).ok_or_else(|| {
                format!(
                    "\"{text}\" has a prefix length outside 0..={bits}; write one such as \"/24\""
                )
            })?,
        };
        let value = match network {
            IpAddr::V4(v4) => u128::from(u32::from(v4)),
            IpAddr::V6(v6) => u128::from(v6),
        };
        let cidr = Cidr { network, prefix };
        if masked(value, bits, prefix) != value {
            let base = match network {
                IpAddr::V4(_) => IpAddr::from(
                    u32::try_from(masked(value, bits, prefix))
                        .unwrap_or(0)
                        .to_be_bytes(),
                ),
                IpAddr::V6(_) => IpAddr::from(masked(value, bits, prefix).to_be_bytes()),
            };
            return Err(format!(
                "\"{text}\" sets bits after its prefix; write the range's first address, \"{base}/{prefix}\""
            ));
        }
        Ok(cidr)
    }
}

impl serde::Serialize for Cidr {
    fn serialize<S: serde::Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        serializer.collect_str(self)
    }
}

impl<'de> serde::Deserialize<'de> for Cidr {
    fn deserialize<D: serde::Deserializer<'de>>(deserializer: D) -> Result<Cidr, D::Error> {
        let text = String::deserialize(deserializer)?;
        text.parse().map_err(serde::de::Error::custom)
    }
}

/// Whether `ip` lies in any of `ranges`.
pub fn allowed(ranges: &[Cidr], ip: IpAddr) -> bool {
    ranges.iter().any(|r| r.contains(ip))
}

/// Shortest and longest shared secret accepted, in bytes.
pub const SECRET_LEN: std::ops::RangeInclusive<usize> = 16..=1024;

/// The shared secret TCP clients present in `HELLO`.
#[derive(Clone, PartialEq, Eq)]
pub struct Secret(Vec<u8>);

impl fmt::Debug for Secret {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("Secret(<redacted>)")
    }
}

/// Why a secret file cannot be used.
#[derive(Debug, thiserror::Error)]
pub enum SecretError {
    /// It could not be read.
    #[error("cannot read the secret file {}: {source}; check the path and that the daemon's user may read it", path.display())]
    Read {
        /// The file.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// It is not a regular file.
    #[error("the secret file {} is not a regular file; point access.secret_file at a plain file", path.display())]
    NotAFile {
        /// The file.
        path: PathBuf,
    },
    /// Every user may read it.
    #[error("the secret file {} can be read or written by every user (mode {mode:04o}); restrict it, e.g. chmod 0600 or 0640", path.display())]
    Exposed {
        /// The file.
        path: PathBuf,
        /// Its permission bits.
        mode: u32,
    },
    /// Too short or too long.
    #[error("the secret in {} is {len} bytes; use 16 to 1024 bytes, e.g. 32 random bytes written as hex", path.display())]
    Length {
        /// The file.
        path: PathBuf,
        /// The secret's length.
        len: usize,
    },
}

impl Secret {
    /// Reads a secret file: a regular file that other users cannot access, holding 16 to
    /// 1024 bytes; one trailing LF or CRLF, as editors add, is not part of the secret.
    pub fn read(path: &Path) -> Result<Secret, SecretError> {
        use std::os::unix::fs::PermissionsExt;
        let read_error = |source| SecretError::Read {
            path: path.to_path_buf(),
            source,
        };
        let meta = std::fs::metadata(path).map_err(read_error)?;
        if !meta.is_file() {
            return Err(SecretError::NotAFile {
                path: path.to_path_buf(),
            });
        }
        let mode = meta.permissions().mode() & 0o777;
        if mode & 0o007 != 0 {
            return Err(SecretError::Exposed {
                path: path.to_path_buf(),
                mode,
            });
        }
        // Read at most one byte past the longest secret (and its line end), so a huge file
        // costs nothing.
        use std::io::Read;
        let limit = (*SECRET_LEN.end() + 3) as u64;
        let mut bytes = Vec::new();
        std::fs::File::open(path)
            .and_then(|f| f.take(limit).read_to_end(&mut bytes))
            .map_err(read_error)?;
        let trimmed = bytes
            .strip_suffix(b"\r\n")
            .or_else(|| bytes.strip_suffix(b"\n"))
            .unwrap_or(&bytes);
        if !SECRET_LEN.contains(&trimmed.len()) {
            return Err(SecretError::Length {
                path: path.to_path_buf(),
                len: trimmed.len(),
            });
        }
        Ok(Secret(trimmed.to_vec()))
    }

    /// A secret from bytes already in memory (tests, embedding).
    pub fn from_bytes(bytes: &[u8]) -> Secret {
        Secret(bytes.to_vec())
    }

    /// The secret's bytes, for a client that presents it in `HELLO` (`tamis check`).
    pub fn bytes(&self) -> &[u8] {
        &self.0
    }

    /// Whether `presented` is the secret. The time taken depends on the secret's length
    /// only: every byte is compared, differences are folded together, and the answer is
    /// read at the end (common practice for comparing secrets).
    pub fn matches(&self, presented: &[u8]) -> bool {
        let mut difference = u8::from(presented.len() != self.0.len());
        for (i, expected) in self.0.iter().enumerate() {
            difference |= expected ^ presented.get(i).copied().unwrap_or(0);
        }
        std::hint::black_box(difference) == 0
    }
}

/// Open TCP connections per peer address, against a cap.
#[derive(Debug)]
pub struct PeerCounts {
    cap: u32,
    open: Mutex<HashMap<IpAddr, u32>>,
}

/// One connection's place in [`PeerCounts`]; dropping it gives the place back.
#[derive(Debug)]
pub struct PeerSlot {
    counts: Arc<PeerCounts>,
    ip: IpAddr,
}

impl PeerCounts {
    /// Counts allowing at most `cap` connections per address.
    pub fn new(cap: u32) -> Arc<PeerCounts> {
        Arc::new(PeerCounts {
            cap,
            open: Mutex::new(HashMap::new()),
        })
    }

    /// A slot for one more connection from `ip`, or `None` when it already holds `cap`.
    pub fn enter(self: &Arc<Self>, ip: IpAddr) -> Option<PeerSlot> {
        let ip = ip.to_canonical();
        let mut open = match self.open.lock() {
            Ok(guard) => guard,
            Err(poisoned) => poisoned.into_inner(),
        };
        let count = open.entry(ip).or_insert(0);
        if *count >= self.cap {
            return None;
        }
        *count += 1;
        Some(PeerSlot {
            counts: Arc::clone(self),
            ip,
        })
    }

    /// Connections open from `ip`.
    pub fn open_from(&self, ip: IpAddr) -> u32 {
        let open = match self.open.lock() {
            Ok(guard) => guard,
            Err(poisoned) => poisoned.into_inner(),
        };
        open.get(&ip.to_canonical()).copied().unwrap_or(0)
    }
}

impl Drop for PeerSlot {
    fn drop(&mut self) {
        let mut open = match self.counts.open.lock() {
            Ok(guard) => guard,
            Err(poisoned) => poisoned.into_inner(),
        };
        if let Some(count) = open.get_mut(&self.ip) {
            *count = count.saturating_sub(1);
            if *count == 0 {
                open.remove(&self.ip);
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn ip(text: &str) -> IpAddr {
        text.parse().unwrap_or(IpAddr::from([0, 0, 0, 0]))
    }

    #[test]
    fn ranges_parse_and_match() {
        let net: Cidr = "192.0.2.0/24".parse().expect("valid");
        assert!(net.contains(ip("192.0.2.200")));
        assert!(!net.contains(ip("192.0.3.1")));
        // An IPv4 peer on a dual-stack socket.
        assert!(net.contains(ip("::ffff:192.0.2.9")));
        let v6: Cidr = "2001:db8::/32".parse().expect("valid");
        assert!(v6.contains(ip("2001:db8:1::7")));
        assert!(!v6.contains(ip("2001:db9::1")));
        assert!(!v6.contains(ip("192.0.2.1")));
        let one: Cidr = "198.51.100.7".parse().expect("valid");
        assert_eq!(one.to_string(), "198.51.100.7/32");
        assert!(one.contains(ip("198.51.100.7")) && !one.contains(ip("198.51.100.8")));
        let all: Cidr = "0.0.0.0/0".parse().expect("valid");
        assert!(all.contains(ip("203.0.113.1")));
        assert!(allowed(&Cidr::loopback(), ip("127.1.2.3")));
        assert!(allowed(&Cidr::loopback(), ip("::1")));
        assert!(!allowed(&Cidr::loopback(), ip("192.0.2.1")));
    }

    #[test]
    fn bad_ranges_say_what_to_write() {
        for (text, words) in [
            ("localhost", "not an address range"),
            ("192.0.2.0/33", "prefix length"),
            ("192.0.2.0/x", "prefix length"),
            ("127.0.0.1/8", "\"127.0.0.0/8\""),
            ("2001:db8::1/32", "\"2001:db8::/32\""),
        ] {
            let e = text.parse::<Cidr>().expect_err(text);
            assert!(e.contains(words), "{text}: {e}");
        }
    }

    #[test]
    fn secrets_compare_whole() {
        let s = Secret::from_bytes(b"0123456789abcdef");
        assert!(s.matches(b"0123456789abcdef"));
        assert!(!s.matches(b"0123456789abcdeF"));
        assert!(!s.matches(b"0123456789abcde"));
        assert!(!s.matches(b"0123456789abcdef0"));
        assert!(!s.matches(b""));
        assert_eq!(format!("{s:?}"), "Secret(<redacted>)");
    }

    #[test]
    fn secret_files_are_private_regular_and_of_sane_length() {
        use std::os::unix::fs::PermissionsExt;
        let dir = tempfile::tempdir().expect("temp dir");
        let path = dir.path().join("relay.secret");
        std::fs::write(&path, b"0123456789abcdef0123\n").expect("write");
        std::fs::set_permissions(&path, std::fs::Permissions::from_mode(0o640)).expect("chmod");
        let s = Secret::read(&path).expect("valid");
        assert!(
            s.matches(b"0123456789abcdef0123"),
            "the line end is not part of it"
        );
        std::fs::set_permissions(&path, std::fs::Permissions::from_mode(0o644)).expect("chmod");
        assert!(matches!(
            Secret::read(&path),
            Err(SecretError::Exposed { .. })
        ));
        std::fs::write(&path, b"short\n").expect("write");
        std::fs::set_permissions(&path, std::fs::Permissions::from_mode(0o600)).expect("chmod");
        assert!(matches!(
            Secret::read(&path),
            Err(SecretError::Length { len: 5, .. })
        ));
        assert!(matches!(
            Secret::read(dir.path()),
            Err(SecretError::NotAFile { .. })
        ));
        assert!(matches!(
            Secret::read(&dir.path().join("absent")),
            Err(SecretError::Read { .. })
        ));
    }

    #[test]
    fn peer_slots_are_counted_and_given_back() {
        let counts = PeerCounts::new(2);
        let a = ip("192.0.2.1");
        let first = counts.enter(a);
        let second = counts.enter(ip("::ffff:192.0.2.1"));
        assert!(first.is_some() && second.is_some());
        assert!(counts.enter(a).is_none(), "a third from the same address");
        assert!(counts.enter(ip("192.0.2.2")).is_some(), "another address");
        drop(first);
        assert_eq!(counts.open_from(a), 1);
        assert!(counts.enter(a).is_some());
    }
}
