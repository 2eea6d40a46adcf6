//! The daemon's configuration: one TOML file, parsed and fully validated into typed values
//! before any socket is bound.
//!
//! `config/tamis.example.toml` shows every key with its default. Decisions that hold for
//! the whole file:
//!
//! - **Unknown keys are errors**, named in the message, so a misspelt key never silently
//!   falls back to a default.
//! - **Durations** are a whole number of seconds (`30`) or a string with one unit:
//!   `"250ms"`, `"30s"`, `"5m"`, `"1h"`. Written back in the largest unit that divides
//!   them exactly.
//! - **Sizes** are a whole number of bytes (`65536`) or a string with a binary unit:
//!   `"64 KiB"`, `"10 MiB"`, `"1 GiB"`. `KB`/`MB` are refused because they are ambiguous
//!   between powers of 1000 and 1024.
//! - **Addresses** are `"ip:port"` strings; `"off"` turns a listener off. **Address
//!   ranges** (`access.tcp_allow`) are CIDR strings such as `"192.0.2.0/24"`.
//! - **Secrets** are never written in the file: `access.secret_file` and
//!   `status.token_file` name files that hold them, checked by [`Config::load`] and read at
//!   start-up.
//! - **Paths** are absolute, or relative to the folder of the configuration file (not to
//!   the daemon's working directory, which a service manager chooses). [`Config::load`]
//!   makes the file's path absolute first, so every path it returns is absolute.
//! - The Unix socket `mode` is an octal string such as `"0660"`, never a TOML integer
//!   (a bare `660` would be read as decimal).
//!
//! Errors ([`ConfigError`]) carry the file name, line and column of the offending text,
//! the line itself and what to do about it.

use std::fmt;
use std::net::{IpAddr, Ipv4Addr, SocketAddr};
use std::path::{Path, PathBuf};
use std::time::Duration;

use serde::de::Error as _;
use serde::{Deserialize, Deserializer, Serialize, Serializer};

use crate::policy::Policy;
pub use crate::server::access::Cidr;
use crate::server::access::Secret;

/// Default TCP listener: loopback only.
pub const DEFAULT_TCP: SocketAddr = SocketAddr::new(IpAddr::V4(Ipv4Addr::LOCALHOST), 7357);
/// Default metrics listener: loopback only.
pub const DEFAULT_METRICS: SocketAddr = SocketAddr::new(IpAddr::V4(Ipv4Addr::LOCALHOST), 9357);
/// Default permissions of the Unix socket: owner and group may connect.
pub const DEFAULT_SOCKET_MODE: u32 = 0o660;
/// Longest grace period accepted for shutdown.
pub const MAX_GRACE_PERIOD: Duration = Duration::from_secs(600);
/// Longest Unix socket path in bytes: `sun_path` holds 108 bytes on Linux, one of them
/// the terminating NUL.
pub const MAX_SOCKET_PATH: usize = 107;
/// Smallest frame limit: the protocol lets a client announce no less than 4096 bytes
/// (`proto/PROTOCOL.md` §2, `HELLO`), and the server holds itself to the same floor.
pub const MIN_FRAME_BYTES: u32 = 4096;
/// Longest subject prefix in characters.
pub const MAX_SUBJECT_PREFIX: usize = 64;
/// The system's store file, for a daemon installed as a service with its own user:
/// used when `/var/lib/tamis` exists and this process may write there (see
/// [`default_store_path`] for the whole order).
pub const DEFAULT_STORE_PATH: &str = "/var/lib/tamis/store.sqlite";
/// The store's file name inside a state folder.
pub const STORE_FILE_NAME: &str = "store.sqlite";
/// Longest retention accepted, in days (100 years).
pub const MAX_RETENTION_DAYS: u32 = 36_500;

/// The whole configuration, validated.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Config {
    /// Address of the metrics endpoint; `None` (`"off"` in the file) serves no metrics.
    #[serde(default = "default_metrics", with = "optional_addr")]
    pub metrics: Option<SocketAddr>,
    /// What to do with a message that could not be scanned.
    #[serde(default)]
    pub on_failure: FailureMode,
    /// Where the relay protocol is served.
    #[serde(default, deserialize_with = "checked")]
    pub listen: Listeners,
    /// Who may connect over TCP.
    #[serde(default, deserialize_with = "checked")]
    pub access: Access,
    /// Resource limits per connection and message.
    #[serde(default, deserialize_with = "checked")]
    pub limits: Limits,
    /// Which model scores messages.
    #[serde(default)]
    pub model: ModelSource,
    /// Thresholds and actions per recipient domain.
    #[serde(default)]
    pub policy: Policy,
    /// Header edits on tagged mail.
    #[serde(default, deserialize_with = "checked")]
    pub headers: HeaderConfig,
    /// The store of held mail, the verdict journal and reports.
    #[serde(default, deserialize_with = "checked")]
    pub store: StoreConfig,
    /// Where released mail is re-injected over SMTP.
    #[serde(default, deserialize_with = "checked")]
    pub release: ReleaseConfig,
    /// The status page on the metrics listener.
    #[serde(default, deserialize_with = "checked")]
    pub status: StatusConfig,
    /// Log output.
    #[serde(default)]
    pub logging: Logging,
}

/// Largest configuration file read: far above any real one, small enough never to strain
/// memory.
pub const MAX_CONFIG_BYTES: u64 = 1 << 20;

impl Default for Config {
    /// Built-in defaults: TCP and metrics on loopback only, the limits of
    /// `proto/PROTOCOL.md` §3, the built-in demonstration model, a tag-only policy,
    /// accept-on-failure, human-readable logs at `info`.
    fn default() -> Config {
        Config {
            metrics: default_metrics(),
            on_failure: FailureMode::default(),
            listen: Listeners::default(),
            access: Access::default(),
            limits: Limits::default(),
            model: ModelSource::default(),
            policy: Policy::default(),
            headers: HeaderConfig::default(),
            store: StoreConfig::default(),
            release: ReleaseConfig::default(),
            status: StatusConfig::default(),
            logging: Logging::default(),
        }
    }
}

impl Config {
    /// Reads and validates a configuration file. Relative paths inside it are resolved
    /// against the folder the file is in.
    ///
    /// The read is bounded: anything but a regular file is refused without blocking (a
    /// FIFO), a file over [`MAX_CONFIG_BYTES`] is refused before it is read, and a read that
    /// stalls is abandoned after [`crate::fsio::READ_TIMEOUT`].
    pub fn load(path: &Path) -> Result<Config, ConfigError> {
        let read_error = |kind, message: String| ConfigError::Read {
            path: path.to_path_buf(),
            source: std::io::Error::new(kind, message),
        };
        let owned = path.to_path_buf();
        let bytes = crate::fsio::with_deadline(path, crate::fsio::READ_TIMEOUT, move || {
            crate::fsio::read_regular(&owned, MAX_CONFIG_BYTES, "a configuration file")
        })
        .map_err(|e| read_error(e.kind(), e.problem.to_string()))?;
        let text = String::from_utf8(bytes).map_err(|e| {
            read_error(
                std::io::ErrorKind::InvalidData,
                format!(
                    "it is not UTF-8 text (invalid byte at offset {})",
                    e.utf8_error().valid_up_to()
                ),
            )
        })?;
        let absolute = std::path::absolute(path).unwrap_or_else(|_| path.to_path_buf());
        let mut config = parse(&text, &path.display().to_string())?;
        config.resolve_paths(absolute.parent().unwrap_or(Path::new("")));
        config.validate_as(&path.display().to_string())?;
        config.check_files(&path.display().to_string())?;
        Ok(config)
    }

    /// Parses and validates configuration text. `source_name` names the text in errors
    /// and, read as a path, its folder is the base for relative paths (a bare file name
    /// leaves them relative to the working directory; [`Config::load`] avoids that).
    pub fn from_toml_str(text: &str, source_name: &str) -> Result<Config, ConfigError> {
        let mut config = parse(text, source_name)?;
        config.resolve_paths(Path::new(source_name).parent().unwrap_or(Path::new("")));
        config.validate_as(source_name)?;
        Ok(config)
    }

    /// Checks every rule a parsed file is held to, for a configuration built in code.
    /// Parsing runs the same checks (with line and column), so a value from
    /// [`Config::from_toml_str`] always passes.
    pub fn validate(&self) -> Result<(), ConfigError> {
        self.validate_as("(configuration built in code)")
    }

    /// The configuration as TOML, in the file's own syntax.
    pub fn to_toml_string(&self) -> Result<String, ConfigError> {
        toml::to_string(self).map_err(|e| ConfigError::Invalid {
            file: "(configuration built in code)".to_string(),
            location: None,
            message: e.to_string(),
            hint: "report this as a bug: every valid configuration should serialise".to_string(),
        })
    }

    /// Checks the files the configuration names and the daemon reads at start-up (the
    /// shared secret), so `tamis config check` and a start fail the same way. Parsing text
    /// alone ([`Config::from_toml_str`]) does not look at the file system.
    pub fn check_files(&self, file: &str) -> Result<(), ConfigError> {
        if let Some(path) = &self.access.secret_file {
            Secret::read(path).map_err(|e| {
                let (message, hint) = split_hint(&e.to_string());
                ConfigError::Invalid {
                    file: file.to_string(),
                    location: None,
                    message: format!("access.secret_file: {message}"),
                    hint,
                }
            })?;
        }
        if let Some(path) = &self.status.token_file {
            crate::status::auth::Token::read(path).map_err(|e| {
                let (message, hint) = split_hint(&e.to_string());
                ConfigError::Invalid {
                    file: file.to_string(),
                    location: None,
                    message,
                    hint,
                }
            })?;
        }
        Ok(())
    }

    fn validate_as(&self, file: &str) -> Result<(), ConfigError> {
        let located = |message: String| {
            let (message, hint) = split_hint(&message);
            ConfigError::Invalid {
                file: file.to_string(),
                location: None,
                message,
                hint,
            }
        };
        self.listen.check().map_err(located)?;
        self.limits.check().map_err(located)?;
        self.access.check().map_err(located)?;
        if self.listen.tcp.is_some() && self.access.tcp_allow.is_empty() {
            return Err(located(
                "access.tcp_allow is empty, so no TCP peer could connect; list the relays' address ranges, or set listen.tcp = \"off\"".to_string(),
            ));
        }
        self.headers.check().map_err(located)?;
        self.store.check().map_err(located)?;
        self.release.check().map_err(located)?;
        if let Some(hop) = &self.release.next_hop {
            check_next_hop(hop).map_err(located)?;
        }
        self.status.check().map_err(located)?;
        if !self.store.enabled && self.policy.quarantines_anywhere() {
            return Err(located(
                "store.enabled = false, but the policy quarantines mail (tag_only is off in some section), and a quarantined message must be kept in the store; enable the store, or set tag_only = true in every section".to_string(),
            ));
        }
        if let ModelSource::File(path) = &self.model
            && path.as_os_str().is_empty()
        {
            return Err(located(
                "model.path is empty; give the model file's path, or remove the key to use the built-in demonstration model".to_string(),
            ));
        }
        if let (Some(tcp), Some(metrics)) = (self.listen.tcp, self.metrics)
            && overlaps(tcp, metrics)
        {
            return Err(located(format!(
                "listen.tcp ({tcp}) and metrics ({metrics}) would share a port; give the metrics endpoint its own port"
            )));
        }
        Ok(())
    }

    fn resolve_paths(&mut self, base: &Path) {
        let resolve = |p: &mut PathBuf| {
            if p.is_relative() && !p.as_os_str().is_empty() {
                *p = base.join(&*p);
            }
        };
        if let Some(unix) = &mut self.listen.unix {
            resolve(&mut unix.path);
        }
        if let ModelSource::File(path) = &mut self.model {
            resolve(path);
        }
        if let Some(path) = &mut self.access.secret_file {
            resolve(path);
        }
        resolve(&mut self.store.path);
        if let Some(path) = &mut self.status.token_file {
            resolve(path);
        }
    }
}

/// Two socket addresses that cannot both be bound: same port, and the same IP or one
/// of them the unspecified address.
fn overlaps(a: SocketAddr, b: SocketAddr) -> bool {
    a.port() == b.port()
        && a.port() != 0
        && (a.ip() == b.ip() || a.ip().is_unspecified() || b.ip().is_unspecified())
}

/// Where the relay protocol is served. At least one listener is required.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Listeners {
    /// A Unix socket; none by default.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub unix: Option<UnixSocket>,
    /// A TCP address; `None` (`"off"`) serves no TCP. Default `127.0.0.1:7357`.
    #[serde(default = "default_tcp", with = "optional_addr")]
    pub tcp: Option<SocketAddr>,
}

impl Default for Listeners {
    fn default() -> Listeners {
        Listeners {
            unix: None,
            tcp: default_tcp(),
        }
    }
}

impl Check for Listeners {
    fn check(&self) -> Result<(), String> {
        if self.unix.is_none() && self.tcp.is_none() {
            return Err("no listener is configured; set listen.tcp to an address or add a [listen.unix] section".to_string());
        }
        if let Some(unix) = &self.unix {
            unix.check()?;
        }
        Ok(())
    }
}

/// A Unix socket listener. (Named apart from `std`'s and `tokio`'s `UnixListener`, which
/// the server uses.)
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct UnixSocket {
    /// Socket path; relative paths are resolved against the config file's folder.
    pub path: PathBuf,
    /// Permission bits for the socket file, at most `0o777`. Default `0o660`.
    #[serde(default = "default_mode", with = "octal_mode")]
    pub mode: u32,
}

impl Check for UnixSocket {
    fn check(&self) -> Result<(), String> {
        if self.path.as_os_str().is_empty() {
            return Err(
                "listen.unix.path is empty; give the socket's path, e.g. \"/run/tamis/tamis.sock\""
                    .to_string(),
            );
        }
        let len = self.path.as_os_str().len();
        if len > MAX_SOCKET_PATH {
            return Err(format!(
                "listen.unix.path {} is {len} bytes, more than a Unix socket address holds ({MAX_SOCKET_PATH}); choose a shorter path",
                self.path.display()
            ));
        }
        if self.mode > 0o777 {
            return Err(format!(
                "listen.unix.mode {:04o} sets bits beyond 0777; use permission bits only, e.g. \"0660\"",
                self.mode
            ));
        }
        Ok(())
    }
}

/// Who may hold a TCP connection (`proto/PROTOCOL.md` §3). The Unix socket relies on its
/// file permissions (`listen.unix.mode`) instead.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Access {
    /// Peer address ranges allowed to connect over TCP; others get `FAULT DENIED`. Default
    /// loopback only (`127.0.0.0/8`, `::1/128`).
    pub tcp_allow: Vec<Cidr>,
    /// A file holding a shared secret that TCP clients must present in `HELLO`; `None`
    /// asks for none. Read at start-up; never written into the configuration itself.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub secret_file: Option<PathBuf>,
}

impl Default for Access {
    fn default() -> Access {
        Access {
            tcp_allow: Cidr::loopback(),
            secret_file: None,
        }
    }
}

impl Check for Access {
    fn check(&self) -> Result<(), String> {
        if let Some(path) = &self.secret_file
            && path.as_os_str().is_empty()
        {
            return Err(
                "access.secret_file is empty; give the secret file's path, or remove the key to ask for no secret"
                    .to_string(),
            );
        }
        Ok(())
    }
}

/// Resource limits. Every value must be greater than zero.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Limits {
    /// Connections served at once; further ones get `FAULT BUSY`.
    #[serde(deserialize_with = "positive_u32")]
    pub max_connections: u32,
    /// TCP connections served at once from one peer address; `None` (the default) allows
    /// up to `max_connections`. Further ones get `FAULT BUSY`.
    #[serde(
        skip_serializing_if = "Option::is_none",
        deserialize_with = "optional_positive_u32"
    )]
    pub max_connections_per_peer: Option<u32>,
    /// Largest frame accepted, in bytes (announced in `WELCOME`); at least 4096.
    #[serde(with = "size_u32")]
    pub max_frame_bytes: u32,
    /// Largest message scanned (header fields and body), in bytes.
    #[serde(with = "size_u64")]
    pub max_message_bytes: u64,
    /// Bytes all open messages may hold together; a message that cannot get more is
    /// decided on what it has (`MESSAGE_TOO_LARGE`).
    #[serde(with = "size_u64")]
    pub max_buffered_bytes: u64,
    /// Most header fields kept per message.
    #[serde(deserialize_with = "positive_u32")]
    pub max_fields: u32,
    /// Most recipients per message; at most 65,535 (the `VERDICT` count is a `u16`).
    #[serde(deserialize_with = "positive_u32")]
    pub max_recipients: u32,
    /// Longest header field value kept, in bytes.
    #[serde(with = "size_u32")]
    pub max_field_bytes: u32,
    /// Close a connection that has not completed its `HELLO` this long after it was
    /// accepted.
    #[serde(with = "duration")]
    pub handshake_timeout: Duration,
    /// Close a connection that sends no frame but `PING` for this long.
    #[serde(with = "duration")]
    pub idle_timeout: Duration,
    /// Close a connection that takes longer than this to finish a frame it started.
    #[serde(with = "duration")]
    pub read_timeout: Duration,
    /// Time allowed at shutdown to finish in-flight work; at most 10 minutes.
    #[serde(with = "duration")]
    pub grace_period: Duration,
}

impl Default for Limits {
    /// The server defaults of `proto/PROTOCOL.md` §3 and §7.
    fn default() -> Limits {
        Limits {
            max_connections: 256,
            max_connections_per_peer: None,
            max_frame_bytes: 65_536,
            max_message_bytes: 10 * 1024 * 1024,
            max_buffered_bytes: 256 * 1024 * 1024,
            max_fields: 1000,
            max_recipients: 1000,
            max_field_bytes: 32 * 1024,
            handshake_timeout: Duration::from_secs(10),
            idle_timeout: Duration::from_secs(300),
            read_timeout: Duration::from_secs(30),
            grace_period: Duration::from_secs(10),
        }
    }
}

impl Check for Limits {
    fn check(&self) -> Result<(), String> {
        let counts = [
            ("max_connections", u64::from(self.max_connections)),
            ("max_frame_bytes", u64::from(self.max_frame_bytes)),
            ("max_message_bytes", self.max_message_bytes),
            ("max_buffered_bytes", self.max_buffered_bytes),
            ("max_fields", u64::from(self.max_fields)),
            ("max_recipients", u64::from(self.max_recipients)),
            ("max_field_bytes", u64::from(self.max_field_bytes)),
        ];
        for (key, value) in counts {
            if value == 0 {
                return Err(format!("limits.{key} is 0; it must be at least 1"));
            }
        }
        let durations = [
            ("handshake_timeout", self.handshake_timeout),
            ("idle_timeout", self.idle_timeout),
            ("read_timeout", self.read_timeout),
            ("grace_period", self.grace_period),
        ];
        for (key, value) in durations {
            if value.is_zero() {
                return Err(format!(
                    "limits.{key} is zero; give a positive duration such as \"30s\""
                ));
            }
        }
        if let Some(per_peer) = self.max_connections_per_peer
            && per_peer > self.max_connections
        {
            return Err(format!(
                "limits.max_connections_per_peer ({per_peer}) exceeds limits.max_connections ({}); lower it, or remove it to allow one peer every connection",
                self.max_connections
            ));
        }
        if self.max_frame_bytes < MIN_FRAME_BYTES {
            return Err(format!(
                "limits.max_frame_bytes is {}, below the protocol's floor of {MIN_FRAME_BYTES}; raise it to at least {MIN_FRAME_BYTES}",
                self.max_frame_bytes
            ));
        }
        if self.max_recipients > u32::from(u16::MAX) {
            return Err(format!(
                "limits.max_recipients is {}, more than a verdict can list ({}); lower it",
                self.max_recipients,
                u16::MAX
            ));
        }
        if u64::from(self.max_field_bytes) > self.max_message_bytes {
            return Err(format!(
                "limits.max_field_bytes ({}) exceeds limits.max_message_bytes ({}); a field cannot be larger than the message holding it, lower max_field_bytes",
                self.max_field_bytes, self.max_message_bytes
            ));
        }
        if self.grace_period > MAX_GRACE_PERIOD {
            return Err(format!(
                "limits.grace_period is {}, longer than 10 minutes; a service manager would kill the daemon first, choose \"10m\" or less",
                duration::display(self.grace_period)
            ));
        }
        Ok(())
    }
}

/// Which model scores messages.
#[derive(Debug, Clone, PartialEq, Default)]
pub enum ModelSource {
    /// The built-in demonstration model (no `path` given). For trying tamis out only.
    #[default]
    Builtin,
    /// A model file written by `tamis train`; relative paths are resolved against the
    /// config file's folder.
    File(PathBuf),
}

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawModel {
    #[serde(
        default,
        skip_serializing_if = "Option::is_none",
        deserialize_with = "model_path"
    )]
    path: Option<PathBuf>,
}

/// A model path, refused where it is read when empty.
fn model_path<'de, D: Deserializer<'de>>(deserializer: D) -> Result<Option<PathBuf>, D::Error> {
    let path = PathBuf::deserialize(deserializer)?;
    if path.as_os_str().is_empty() {
        return Err(D::Error::custom(
            "model.path is empty; give the model file's path, or remove the key to use the built-in demonstration model",
        ));
    }
    Ok(Some(path))
}

impl<'de> Deserialize<'de> for ModelSource {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<ModelSource, D::Error> {
        let raw = RawModel::deserialize(deserializer)?;
        Ok(match raw.path {
            None => ModelSource::Builtin,
            Some(p) => ModelSource::File(p),
        })
    }
}

impl Serialize for ModelSource {
    fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        let path = match self {
            ModelSource::Builtin => None,
            ModelSource::File(p) => Some(p.clone()),
        };
        RawModel { path }.serialize(serializer)
    }
}

/// Header edits on tagged mail (`proto/PROTOCOL.md` §4).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct HeaderConfig {
    /// Add `X-Tamis-Verdict` to tagged mail. Default on.
    pub verdict_field: bool,
    /// Text put in front of the Subject of tagged mail, e.g. `"[junk?] "`; `None` (an
    /// empty string in the file) leaves the Subject alone. Default none.
    #[serde(with = "subject_prefix")]
    pub subject_prefix: Option<String>,
}

impl Default for HeaderConfig {
    fn default() -> HeaderConfig {
        HeaderConfig {
            verdict_field: true,
            subject_prefix: None,
        }
    }
}

impl Check for HeaderConfig {
    fn check(&self) -> Result<(), String> {
        match &self.subject_prefix {
            Some(prefix) => check_subject_prefix(prefix),
            None => Ok(()),
        }
    }
}

fn check_subject_prefix(prefix: &str) -> Result<(), String> {
    if let Some(bad) = prefix.chars().find(|c| !(' '..='~').contains(c)) {
        return Err(format!(
            "headers.subject_prefix contains {bad:?}; use printable ASCII only (a header field may carry nothing else without RFC 2047 encoding, and a line break would end the field)"
        ));
    }
    if prefix.chars().count() > MAX_SUBJECT_PREFIX {
        return Err(format!(
            "headers.subject_prefix is longer than {MAX_SUBJECT_PREFIX} characters; shorten it"
        ));
    }
    Ok(())
}

/// Where a default store location came from (see [`default_store_path`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum StoreOrigin {
    /// `$STATE_DIRECTORY`, which systemd sets for a unit with `StateDirectory=`.
    StateDirectory,
    /// `/var/lib/tamis`, which exists and this process may write.
    System,
    /// `$XDG_STATE_HOME/tamis` or `~/.local/state/tamis`: the user's own state folder,
    /// created (mode 0700) when the daemon starts.
    User,
    /// None of the above could be used: `/var/lib/tamis`, which start-up will refuse with
    /// a message saying to create it or set `[store] path`.
    Fallback,
}

impl StoreOrigin {
    /// Where the location came from, for the start-up line.
    pub fn describe(self) -> &'static str {
        match self {
            StoreOrigin::StateDirectory => "the service's state directory ($STATE_DIRECTORY)",
            StoreOrigin::System => "the system state folder",
            StoreOrigin::User => "your user's state folder (no [store] path configured)",
            StoreOrigin::Fallback => "the system state folder, which is not usable yet",
        }
    }
}

/// The store file used when the configuration sets no `[store] path`, first match wins:
///
/// 1. `$STATE_DIRECTORY/store.sqlite` — systemd's `StateDirectory=` (the first folder
///    when it lists several);
/// 2. `/var/lib/tamis/store.sqlite` when that folder exists and this process may write it
///    (a packaged install creates it for the daemon's user);
/// 3. `$XDG_STATE_HOME/tamis/store.sqlite`, else `~/.local/state/tamis/store.sqlite` — so
///    `tamis serve` works for a user on a fresh machine; the folder is created at start;
/// 4. `/var/lib/tamis/store.sqlite` otherwise (start-up then says what to do).
///
/// The daemon and the operator commands resolve it the same way, so they find the same
/// store when run as the same user.
pub fn default_store_path() -> (PathBuf, StoreOrigin) {
    default_store_path_from(|name| std::env::var_os(name), writable_folder)
}

/// [`default_store_path`] with the environment and the writability check given, for
/// tests.
pub fn default_store_path_from(
    env: impl Fn(&str) -> Option<std::ffi::OsString>,
    writable: impl Fn(&Path) -> bool,
) -> (PathBuf, StoreOrigin) {
    let absolute = |name: &str| env(name).map(PathBuf::from).filter(|p| p.is_absolute());
    // systemd joins several folders with ':'; the first is the unit's own.
    if let Some(state) = env("STATE_DIRECTORY")
        .and_then(|v| {
            v.to_str()
                .and_then(|s| s.split(':').next())
                .map(PathBuf::from)
        })
        .filter(|p| p.is_absolute())
    {
        return (state.join(STORE_FILE_NAME), StoreOrigin::StateDirectory);
    }
    let system = Path::new(DEFAULT_STORE_PATH);
    if system.parent().is_some_and(&writable) {
        return (system.to_path_buf(), StoreOrigin::System);
    }
    let user = absolute("XDG_STATE_HOME")
        .or_else(|| absolute("HOME").map(|home| home.join(".local").join("state")));
    if let Some(base) = user {
        return (base.join("tamis").join(STORE_FILE_NAME), StoreOrigin::User);
    }
    (system.to_path_buf(), StoreOrigin::Fallback)
}

/// Whether `folder` is a folder this process may create files in.
fn writable_folder(folder: &Path) -> bool {
    use rustix::fs::Access;
    folder.is_dir() && rustix::fs::access(folder, Access::WRITE_OK | Access::EXEC_OK).is_ok()
}

/// The store (`src/store/`): held mail, the verdict journal and reports, in one SQLite
/// file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct StoreConfig {
    /// Whether the daemon keeps a store at all. Default on. Off, nothing is journalled or
    /// held, and the policy must be tag-only everywhere (a quarantine would have nowhere
    /// to keep the message).
    pub enabled: bool,
    /// The store file; relative paths are resolved against the config file's folder.
    /// Default: see [`default_store_path`] (`$STATE_DIRECTORY`, `/var/lib/tamis`, then the
    /// user's state folder). Created with mode 0600 if missing; its folder must exist,
    /// except the user's state folder, which the daemon creates.
    pub path: PathBuf,
    /// Days a held message is kept before it is purged; 1 to 36 500. Default 30.
    #[serde(deserialize_with = "positive_u32")]
    pub quarantine_days: u32,
    /// Days journal entries and reports are kept; 1 to 36 500. Default 90.
    #[serde(deserialize_with = "positive_u32")]
    pub journal_days: u32,
    /// Keep each message's Subject in the journal. Default off: the journal keeps no
    /// content, only scores, domains and feature names.
    pub record_subject: bool,
}

impl Default for StoreConfig {
    fn default() -> StoreConfig {
        StoreConfig {
            enabled: true,
            path: default_store_path().0,
            quarantine_days: 30,
            journal_days: 90,
            record_subject: false,
        }
    }
}

impl Check for StoreConfig {
    fn check(&self) -> Result<(), String> {
        if self.path.as_os_str().is_empty() {
            return Err(format!(
                "store.path is empty; give the store file's path, e.g. \"{DEFAULT_STORE_PATH}\", or remove the key for that default"
            ));
        }
        for (key, days) in [
            ("quarantine_days", self.quarantine_days),
            ("journal_days", self.journal_days),
        ] {
            if days == 0 {
                return Err(format!("store.{key} is 0; keep records at least 1 day"));
            }
            if days > MAX_RETENTION_DAYS {
                return Err(format!(
                    "store.{key} is {days}, more than {MAX_RETENTION_DAYS} days (100 years); choose a shorter retention"
                ));
            }
        }
        Ok(())
    }
}

/// Where `tamis held release` re-injects released mail: the relay's SMTP port for mail
/// that needs no more filtering (`src/smtp/`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct ReleaseConfig {
    /// The next hop as `"host:port"` (a name, an IPv4 address, or an IPv6 address in
    /// brackets); `None` (`"off"`, the default) releases only to files.
    #[serde(with = "next_hop")]
    pub next_hop: Option<String>,
    /// The name sent in `EHLO`; `None` uses this machine's host name. Set it to the host's
    /// fully qualified name (RFC 5321 §4.1.1.1).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub helo_name: Option<String>,
    /// Opening the connection. Default 30 s.
    #[serde(with = "duration")]
    pub connect_timeout: Duration,
    /// The greeting and each command's reply. Default 5 min (RFC 5321 §4.5.3.2).
    #[serde(with = "duration")]
    pub command_timeout: Duration,
    /// Each write of the message. Default 3 min (RFC 5321 §4.5.3.2).
    #[serde(with = "duration")]
    pub data_block_timeout: Duration,
    /// The reply after the whole message. Default 10 min (RFC 5321 §4.5.3.2).
    #[serde(with = "duration")]
    pub data_end_timeout: Duration,
}

impl Default for ReleaseConfig {
    fn default() -> ReleaseConfig {
        let t = crate::smtp::Timeouts::default();
        ReleaseConfig {
            next_hop: None,
            helo_name: None,
            connect_timeout: t.connect,
            command_timeout: t.command,
            data_block_timeout: t.data_block,
            data_end_timeout: t.data_end,
        }
    }
}

/// The status page (`src/status/`), served on the metrics listener: read-only unless a
/// token file is set.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct StatusConfig {
    /// A file holding the bearer token that actions changing state (reports, releases)
    /// must present; `None` (the default) keeps the page read-only. Same rules as
    /// `access.secret_file`: a regular file other users cannot read, 16 to 1024 bytes.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub token_file: Option<PathBuf>,
    /// Host names the page answers to besides IP addresses and `localhost` (a request
    /// naming any other host is refused, so a web page cannot reach the loopback page
    /// through a DNS name it controls). Default none.
    pub host_names: Vec<String>,
    /// Messages in each domain's audit queue, 1 to 200. Default 20.
    #[serde(deserialize_with = "positive_u32")]
    pub audit_size: u32,
    /// Seed of the audit sample, so the page and `tamis audit` can show the same queue.
    /// Default 1.
    pub audit_seed: u64,
}

/// Largest audit queue the page shows.
pub const MAX_AUDIT_SIZE: u32 = 200;

impl Default for StatusConfig {
    fn default() -> StatusConfig {
        StatusConfig {
            token_file: None,
            host_names: Vec::new(),
            audit_size: 20,
            audit_seed: 1,
        }
    }
}

impl ReleaseConfig {
    /// The SMTP client's timeouts.
    pub fn timeouts(&self) -> crate::smtp::Timeouts {
        crate::smtp::Timeouts {
            connect: self.connect_timeout,
            command: self.command_timeout,
            data_block: self.data_block_timeout,
            data_end: self.data_end_timeout,
        }
    }
}

impl Check for ReleaseConfig {
    fn check(&self) -> Result<(), String> {
        if let Some(name) = &self.helo_name {
            crate::smtp::client::check_helo_name(name)
                .map_err(|e| e.replacen("the HELO name", "release.helo_name", 1))?;
        }
        for (key, value) in [
            ("connect_timeout", self.connect_timeout),
            ("command_timeout", self.command_timeout),
            ("data_block_timeout", self.data_block_timeout),
            ("data_end_timeout", self.data_end_timeout),
        ] {
            if value.is_zero() {
                return Err(format!(
                    "release.{key} is zero; give a positive duration such as \"30s\""
                ));
            }
        }
        Ok(())
    }
}

impl Check for StatusConfig {
    fn check(&self) -> Result<(), String> {
        if let Some(path) = &self.token_file
            && path.as_os_str().is_empty()
        {
            return Err(
                "status.token_file is empty; give the token file's path, or remove the key to keep the page read-only"
                    .to_string(),
            );
        }
        for name in &self.host_names {
            crate::policy::domain::validate(name).map_err(|reason| {
                format!("status.host_names: \"{name}\" is not a host name ({reason}); list names such as \"mail-filter.example.org\"")
            })?;
        }
        if self.audit_size == 0 || self.audit_size > MAX_AUDIT_SIZE {
            return Err(format!(
                "status.audit_size is {}; give 1 to {MAX_AUDIT_SIZE}",
                self.audit_size
            ));
        }
        Ok(())
    }
}

/// Checks a next hop written `host:port` (the form `release.next_hop` takes).
pub fn check_next_hop(text: &str) -> Result<(), String> {
    let bad = |why: &str| {
        format!(
            "release.next_hop \"{}\" {why}; write \"host:port\" such as \"127.0.0.1:10025\" or \"[::1]:10025\", or \"off\"",
            crate::logsafe::safe(text)
        )
    };
    let Some((host, port)) = text.rsplit_once(':') else {
        return Err(bad("has no port"));
    };
    match port.parse::<u16>() {
        Ok(p) if p > 0 => {}
        _ => return Err(bad("has no valid port (1 to 65535)")),
    }
    let bracketed = host.strip_prefix('[').and_then(|h| h.strip_suffix(']'));
    let valid_host = match bracketed {
        Some(v6) => v6.parse::<std::net::Ipv6Addr>().is_ok(),
        None => {
            !host.is_empty()
                && host
                    .bytes()
                    .all(|b| b.is_ascii_alphanumeric() || b == b'.' || b == b'-')
        }
    };
    if !valid_host {
        return Err(bad("has no valid host name or address"));
    }
    Ok(())
}

/// `"host:port"` or `"off"`.
mod next_hop {
    use super::*;

    pub fn serialize<S: Serializer>(
        value: &Option<String>,
        serializer: S,
    ) -> Result<S::Ok, S::Error> {
        serializer.serialize_str(value.as_deref().unwrap_or("off"))
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(
        deserializer: D,
    ) -> Result<Option<String>, D::Error> {
        let text = String::deserialize(deserializer)?;
        if text == "off" {
            return Ok(None);
        }
        check_next_hop(&text).map_err(D::Error::custom)?;
        Ok(Some(text))
    }
}

/// What happens to a message that could not be scanned (model missing, scoring failed).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum FailureMode {
    /// Deliver it with an `X-Tamis-Unscanned` field: mail keeps flowing.
    #[default]
    Accept,
    /// Ask the relay to answer with a temporary failure: the sender retries later.
    Defer,
}

impl FailureMode {
    /// The mode as the configuration writes it.
    pub fn as_str(self) -> &'static str {
        match self {
            FailureMode::Accept => "accept",
            FailureMode::Defer => "defer",
        }
    }
}

/// Log output.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Logging {
    /// Line format.
    pub format: LogFormat,
    /// Least severe level written.
    pub level: LogLevel,
}

/// Log line format.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum LogFormat {
    /// One readable line per event.
    #[default]
    Human,
    /// One JSON object per line, for log collectors.
    Json,
}

/// Least severe log level written.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum LogLevel {
    /// Errors only.
    Error,
    /// Warnings and errors.
    Warn,
    /// Start-up, reloads, shutdown and problems.
    #[default]
    Info,
    /// Per-connection detail.
    Debug,
    /// Everything.
    Trace,
}

impl LogLevel {
    /// The level's name, as `tracing` filters spell it.
    pub fn as_str(self) -> &'static str {
        match self {
            LogLevel::Error => "error",
            LogLevel::Warn => "warn",
            LogLevel::Info => "info",
            LogLevel::Debug => "debug",
            LogLevel::Trace => "trace",
        }
    }
}

// --- Errors -----------------------------------------------------------------------------

/// A line and column in the configuration text, both counted from 1; the column counts
/// characters.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Location {
    /// Line number.
    pub line: usize,
    /// Column number.
    pub column: usize,
    /// The text of that line, shown under the message.
    pub text: String,
}

/// A configuration that cannot be used, with where and what to do.
#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    /// The file could not be read.
    #[error("{}: cannot read the configuration file: {source}; check the path and its permissions", path.display())]
    Read {
        /// The path given.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// The text is not valid TOML, or a value breaks a rule.
    #[error("{}", display_invalid(file, location.as_ref(), message, hint))]
    Invalid {
        /// The file name as given.
        file: String,
        /// Where in the text, when known (rules across sections have no single place).
        location: Option<Location>,
        /// What is wrong.
        message: String,
        /// What to do about it.
        hint: String,
    },
}

impl ConfigError {
    /// The line and column, when the error has a place in the text.
    pub fn line_column(&self) -> Option<(usize, usize)> {
        match self {
            ConfigError::Invalid {
                location: Some(l), ..
            } => Some((l.line, l.column)),
            _ => None,
        }
    }

    /// What is wrong, without the place or the hint.
    pub fn message(&self) -> String {
        match self {
            ConfigError::Invalid { message, .. } => message.clone(),
            other => other.to_string(),
        }
    }
}

fn display_invalid(file: &str, location: Option<&Location>, message: &str, hint: &str) -> String {
    match location {
        Some(l) => {
            let gutter = l.line.to_string().len();
            format!(
                "{file}:{}:{}: {message}\n{:gutter$} |\n{} | {}\n{:gutter$} | {:>col$}\nhelp: {hint}",
                l.line,
                l.column,
                "",
                l.line,
                l.text,
                "",
                "^",
                col = l.column
            )
        }
        None => format!("{file}: {message}\nhelp: {hint}"),
    }
}

/// Messages written in this crate say "problem; remedy". The first `"; "` splits them;
/// messages from the TOML parser get a hint chosen by their kind.
fn split_hint(message: &str) -> (String, String) {
    if let Some((problem, remedy)) = message.split_once("; ") {
        return (problem.to_string(), remedy.to_string());
    }
    let hint = if message.starts_with("unknown field") {
        "remove the key or correct its spelling; config/tamis.example.toml lists every key"
    } else if message.starts_with("missing field") {
        "add the missing key; config/tamis.example.toml shows it with its default"
    } else if message.starts_with("unknown variant") {
        "use one of the values listed"
    } else if message.starts_with("invalid type") || message.starts_with("invalid value") {
        "write the value in the form config/tamis.example.toml shows"
    } else if message.starts_with("duplicate key") {
        "keep only one of the two"
    } else {
        "fix the TOML syntax at this place (see https://toml.io)"
    };
    (message.to_string(), hint.to_string())
}

fn locate(text: &str, offset: usize) -> Option<Location> {
    let before = text.get(..offset)?;
    let line_start = before.rfind('\n').map_or(0, |i| i + 1);
    let line = before.matches('\n').count() + 1;
    let column = before.get(line_start..)?.chars().count() + 1;
    let rest = text.get(line_start..)?;
    let line_text = rest.split('\n').next().unwrap_or("").trim_end_matches('\r');
    Some(Location {
        line,
        column,
        text: line_text.to_string(),
    })
}

fn parse(text: &str, source_name: &str) -> Result<Config, ConfigError> {
    toml::from_str::<Config>(text).map_err(|e| {
        let (message, hint) = split_hint(e.message());
        ConfigError::Invalid {
            file: source_name.to_string(),
            location: e.span().and_then(|span| locate(text, span.start)),
            message,
            hint,
        }
    })
}

// --- Value forms -----------------------------------------------------------------------

/// Rules a section checks after its values parsed; the message says "problem; remedy".
trait Check {
    fn check(&self) -> Result<(), String>;
}

/// Deserialises a section and runs its checks there, so the error points at the section.
fn checked<'de, D, T>(deserializer: D) -> Result<T, D::Error>
where
    D: Deserializer<'de>,
    T: Deserialize<'de> + Check,
{
    let value = T::deserialize(deserializer)?;
    value.check().map_err(D::Error::custom)?;
    Ok(value)
}

fn default_tcp() -> Option<SocketAddr> {
    Some(DEFAULT_TCP)
}

fn default_metrics() -> Option<SocketAddr> {
    Some(DEFAULT_METRICS)
}

fn default_mode() -> u32 {
    DEFAULT_SOCKET_MODE
}

/// An integer or a string, as several keys accept either.
enum IntOrText {
    Int(i64),
    Text(String),
}

impl<'de> Deserialize<'de> for IntOrText {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<IntOrText, D::Error> {
        struct IntOrTextVisitor;
        impl serde::de::Visitor<'_> for IntOrTextVisitor {
            type Value = IntOrText;

            fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str("an integer or a string")
            }

            fn visit_i64<E: serde::de::Error>(self, v: i64) -> Result<IntOrText, E> {
                Ok(IntOrText::Int(v))
            }

            fn visit_u64<E: serde::de::Error>(self, v: u64) -> Result<IntOrText, E> {
                i64::try_from(v)
                    .map(IntOrText::Int)
                    .map_err(|_| E::custom(format!("{v} is too large")))
            }

            fn visit_str<E: serde::de::Error>(self, v: &str) -> Result<IntOrText, E> {
                Ok(IntOrText::Text(v.to_string()))
            }
        }
        deserializer.deserialize_any(IntOrTextVisitor)
    }
}

/// `"ip:port"` or `"off"`.
mod optional_addr {
    use super::*;

    pub fn serialize<S: Serializer>(
        value: &Option<SocketAddr>,
        serializer: S,
    ) -> Result<S::Ok, S::Error> {
        match value {
            Some(addr) => serializer.collect_str(addr),
            None => serializer.serialize_str("off"),
        }
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(
        deserializer: D,
    ) -> Result<Option<SocketAddr>, D::Error> {
        let text = String::deserialize(deserializer)?;
        if text == "off" {
            return Ok(None);
        }
        text.parse().map(Some).map_err(|_| {
            D::Error::custom(format!(
                "\"{text}\" is not an address; write \"ip:port\" such as \"127.0.0.1:7357\" or \"[::1]:7357\", or \"off\""
            ))
        })
    }
}

/// Permission bits as an octal string.
mod octal_mode {
    use super::*;

    pub fn serialize<S: Serializer>(value: &u32, serializer: S) -> Result<S::Ok, S::Error> {
        serializer.serialize_str(&format!("{value:04o}"))
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(deserializer: D) -> Result<u32, D::Error> {
        let text = match IntOrText::deserialize(deserializer)? {
            IntOrText::Text(t) => t,
            IntOrText::Int(i) => {
                return Err(D::Error::custom(format!(
                    "the mode {i} is an integer; write it as an octal string such as \"0660\""
                )));
            }
        };
        let digits = text.strip_prefix("0o").unwrap_or(&text);
        let valid =
            (3..=4).contains(&digits.len()) && digits.bytes().all(|b| (b'0'..=b'7').contains(&b));
        match u32::from_str_radix(digits, 8) {
            Ok(mode) if valid && mode <= 0o777 => Ok(mode),
            _ => Err(D::Error::custom(format!(
                "\"{text}\" is not a permission mode; write three or four octal digits up to \"0777\", such as \"0660\""
            ))),
        }
    }
}

/// Positive integers, checked where they are read so an error points at the value.
fn positive_u32<'de, D: Deserializer<'de>>(deserializer: D) -> Result<u32, D::Error> {
    let value = u32::deserialize(deserializer)?;
    if value == 0 {
        return Err(D::Error::custom(
            "0 is not allowed here; give a value of at least 1",
        ));
    }
    Ok(value)
}

/// An optional positive integer, checked where it is read.
fn optional_positive_u32<'de, D: Deserializer<'de>>(
    deserializer: D,
) -> Result<Option<u32>, D::Error> {
    positive_u32(deserializer).map(Some)
}

/// The subject prefix: a string, empty meaning none, checked where it is read.
mod subject_prefix {
    use super::*;

    pub fn serialize<S: Serializer>(
        value: &Option<String>,
        serializer: S,
    ) -> Result<S::Ok, S::Error> {
        serializer.serialize_str(value.as_deref().unwrap_or(""))
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(
        deserializer: D,
    ) -> Result<Option<String>, D::Error> {
        let text = String::deserialize(deserializer)?;
        if text.is_empty() {
            return Ok(None);
        }
        check_subject_prefix(&text).map_err(D::Error::custom)?;
        Ok(Some(text))
    }
}

/// Splits `"30s"` or `"64 KiB"` into its leading digits and the unit after them (blanks
/// before the unit removed), for the duration and size notations.
fn split_number_unit(text: &str) -> (&str, &str) {
    let split = text
        .find(|c: char| !c.is_ascii_digit())
        .unwrap_or(text.len());
    let (number, unit) = text.split_at(split);
    (number, unit.trim_start())
}

/// Durations: whole seconds, or a string with one unit (`ms`, `s`, `m`, `h`).
pub mod duration {
    use super::*;

    const UNITS: [(&str, u64); 4] = [("h", 3_600_000), ("m", 60_000), ("s", 1000), ("ms", 1)];

    /// Parses `"250ms"`, `"30s"`, `"5m"`, `"1h"` (spaces allowed before the unit).
    pub fn parse(text: &str) -> Result<Duration, String> {
        let text = text.trim();
        let (number, unit) = super::split_number_unit(text);
        let err = || {
            format!(
                "\"{text}\" is not a duration; write a whole number with one unit: \"250ms\", \"30s\", \"5m\" or \"1h\" (or an integer number of seconds)"
            )
        };
        let n: u64 = number.parse().map_err(|_| err())?;
        let millis_per = UNITS
            .iter()
            .find(|(name, _)| *name == unit)
            .map(|(_, m)| *m)
            .ok_or_else(err)?;
        n.checked_mul(millis_per)
            .map(Duration::from_millis)
            .ok_or_else(|| format!("\"{text}\" is too long a duration; choose a smaller value"))
    }

    /// Writes a duration in the largest unit that divides it exactly.
    pub fn display(value: Duration) -> String {
        let millis = value.as_millis();
        for (name, per) in UNITS {
            let per = u128::from(per);
            if millis.is_multiple_of(per) {
                return format!("{}{name}", millis / per);
            }
        }
        format!("{millis}ms")
    }

    pub(super) fn serialize<S: Serializer>(
        value: &Duration,
        serializer: S,
    ) -> Result<S::Ok, S::Error> {
        serializer.serialize_str(&display(*value))
    }

    pub(super) fn deserialize<'de, D: Deserializer<'de>>(
        deserializer: D,
    ) -> Result<Duration, D::Error> {
        match IntOrText::deserialize(deserializer)? {
            IntOrText::Int(i) => u64::try_from(i)
                .ok()
                .filter(|&s| s > 0)
                .map(Duration::from_secs)
                .ok_or_else(|| {
                    D::Error::custom(format!(
                        "{i} seconds is not a positive duration; give one such as \"30s\""
                    ))
                }),
            IntOrText::Text(t) => match parse(&t) {
                Ok(d) if d.is_zero() => Err(D::Error::custom(format!(
                    "\"{t}\" is zero; give a positive duration such as \"30s\""
                ))),
                Ok(d) => Ok(d),
                Err(e) => Err(D::Error::custom(e)),
            },
        }
    }
}

/// Sizes: whole bytes, or a string with a binary unit (`B`, `KiB`, `MiB`, `GiB`).
pub mod size {
    use super::*;

    const UNITS: [(&str, u64); 4] = [
        ("GiB", 1 << 30),
        ("MiB", 1 << 20),
        ("KiB", 1 << 10),
        ("B", 1),
    ];

    /// Parses `"512 B"`, `"64 KiB"`, `"10 MiB"`, `"1 GiB"` (the space is optional).
    pub fn parse(text: &str) -> Result<u64, String> {
        let text = text.trim();
        let (number, unit) = super::split_number_unit(text);
        let n: u64 = number.parse().map_err(|_| {
            format!("\"{text}\" is not a size; write a whole number with a unit such as \"64 KiB\" or \"10 MiB\" (or an integer number of bytes)")
        })?;
        let per = UNITS
            .iter()
            .find(|(name, _)| *name == unit)
            .map(|(_, p)| *p)
            .ok_or_else(|| {
                format!("\"{unit}\" is not a size unit; use B, KiB, MiB or GiB (powers of 1024; KB and MB are refused as ambiguous)")
            })?;
        n.checked_mul(per)
            .ok_or_else(|| format!("\"{text}\" is too large; choose a smaller size"))
    }

    /// Writes a size in the largest binary unit that divides it exactly.
    pub fn display(value: u64) -> String {
        for (name, per) in UNITS {
            if value >= per && value.is_multiple_of(per) && per > 1 {
                return format!("{} {name}", value / per);
            }
        }
        format!("{value} B")
    }

    pub(super) fn deserialize_u64<'de, D: Deserializer<'de>>(
        deserializer: D,
    ) -> Result<u64, D::Error> {
        match IntOrText::deserialize(deserializer)? {
            IntOrText::Int(i) => u64::try_from(i).ok().filter(|&b| b > 0).ok_or_else(|| {
                D::Error::custom(format!(
                    "{i} bytes is not a positive size; give one such as \"64 KiB\""
                ))
            }),
            IntOrText::Text(t) => match parse(&t) {
                Ok(0) => Err(D::Error::custom(format!(
                    "\"{t}\" is zero; give a positive size such as \"64 KiB\""
                ))),
                Ok(b) => Ok(b),
                Err(e) => Err(D::Error::custom(e)),
            },
        }
    }
}

mod size_u64 {
    use super::*;

    pub fn serialize<S: Serializer>(value: &u64, serializer: S) -> Result<S::Ok, S::Error> {
        serializer.serialize_str(&size::display(*value))
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(deserializer: D) -> Result<u64, D::Error> {
        size::deserialize_u64(deserializer)
    }
}

mod size_u32 {
    use super::*;

    pub fn serialize<S: Serializer>(value: &u32, serializer: S) -> Result<S::Ok, S::Error> {
        serializer.serialize_str(&size::display(u64::from(*value)))
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(deserializer: D) -> Result<u32, D::Error> {
        let value = size::deserialize_u64(deserializer)?;
        u32::try_from(value).map_err(|_| {
            D::Error::custom(format!(
                "{} is too large for this limit; the largest allowed is {} (4 GiB - 1 B)",
                size::display(value),
                u32::MAX
            ))
        })
    }
}

impl fmt::Display for FailureMode {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            FailureMode::Accept => "accept",
            FailureMode::Defer => "defer",
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn durations_parse_and_print() {
        assert_eq!(duration::parse("30s"), Ok(Duration::from_secs(30)));
        assert_eq!(duration::parse("5 m"), Ok(Duration::from_secs(300)));
        assert_eq!(duration::parse("250ms"), Ok(Duration::from_millis(250)));
        assert_eq!(duration::parse("1h"), Ok(Duration::from_secs(3600)));
        for bad in ["", "s", "30", "1.5s", "-1s", "30 sec", "5d"] {
            assert!(duration::parse(bad).is_err(), "{bad:?}");
        }
        assert_eq!(duration::display(Duration::from_secs(300)), "5m");
        assert_eq!(duration::display(Duration::from_secs(90)), "90s");
        assert_eq!(duration::display(Duration::from_millis(1500)), "1500ms");
        assert_eq!(duration::display(Duration::ZERO), "0h");
    }

    #[test]
    fn sizes_parse_and_print() {
        assert_eq!(size::parse("64 KiB"), Ok(65_536));
        assert_eq!(size::parse("10MiB"), Ok(10 << 20));
        assert_eq!(size::parse("512 B"), Ok(512));
        for bad in ["", "KiB", "10 MB", "10 kb", "1.5 MiB", "99999999999 GiB"] {
            assert!(size::parse(bad).is_err(), "{bad:?}");
        }
        assert_eq!(size::display(65_536), "64 KiB");
        assert_eq!(size::display(10 << 20), "10 MiB");
        assert_eq!(size::display(1000), "1000 B");
    }

    #[test]
    fn locate_counts_lines_and_characters() {
        let text = "a = 1\nbé = \"x\"\n";
        let at = text.find("= \"x\"").unwrap_or(0);
        let loc = locate(text, at);
        assert_eq!(
            loc.map(|l| (l.line, l.column, l.text)),
            Some((2, 4, "bé = \"x\"".to_string()))
        );
        assert!(locate(text, 1000).is_none());
    }

    #[test]
    fn store_section_defaults_resolves_and_checks() {
        let c = Config::from_toml_str("", "/etc/tamis/tamis.toml").unwrap_or_default();
        assert_eq!(c.store, StoreConfig::default());
        assert_eq!(c.store.path, default_store_path().0);
        assert!(c.store.enabled);
        assert!(!c.store.record_subject);
        let c = Config::from_toml_str(
            "[store]\npath = \"state/store.sqlite\"\nquarantine_days = 7\nrecord_subject = true\n",
            "/etc/tamis/tamis.toml",
        );
        let store = c.map(|c| c.store).ok();
        assert_eq!(
            store.as_ref().map(|s| (
                s.path.clone(),
                s.quarantine_days,
                s.journal_days,
                s.record_subject
            )),
            Some((PathBuf::from("/etc/tamis/state/store.sqlite"), 7, 90, true))
        );
        for (bad, needle) in [
            ("[store]\nquarantine_days = 0\n", "at least 1"),
            ("[store]\njournal_days = 40000\n", "36500"),
            ("[store]\npath = \"\"\n", "store.path is empty"),
            ("[store]\nkeep = 3\n", "unknown field"),
            (
                "[store]\nenabled = false\n[policy]\ntag_only = false\n",
                "a quarantined message must be kept",
            ),
        ] {
            let e = Config::from_toml_str(bad, "t.toml").map(drop).err();
            let text = e.map(|e| e.to_string()).unwrap_or_default();
            assert!(text.contains(needle), "{bad:?} gave {text:?}");
        }
    }

    #[test]
    fn release_section_defaults_and_checks() {
        let c = Config::from_toml_str("", "/etc/tamis/tamis.toml").unwrap_or_default();
        assert_eq!(c.release, ReleaseConfig::default());
        assert_eq!(c.release.next_hop, None);
        // RFC 5321 §4.5.3.2: 5 minutes for commands, 10 for the end of the data.
        assert_eq!(c.release.command_timeout, Duration::from_secs(300));
        assert_eq!(c.release.data_end_timeout, Duration::from_secs(600));
        let c = Config::from_toml_str(
            "[release]\nnext_hop = \"[::1]:10025\"\nhelo_name = \"filter.example.org\"\ncommand_timeout = \"30s\"\n",
            "/etc/tamis/tamis.toml",
        )
        .ok();
        assert_eq!(
            c.as_ref()
                .map(|c| (c.release.next_hop.clone(), c.release.timeouts().command)),
            Some((Some("[::1]:10025".to_string()), Duration::from_secs(30)))
        );
        let text = c.and_then(|c| c.to_toml_string().ok()).unwrap_or_default();
        assert!(text.contains("next_hop = \"[::1]:10025\""), "{text}");
        for (bad, needle) in [
            (
                "[release]\nnext_hop = \"relay.example.org\"\n",
                "has no port",
            ),
            (
                "[release]\nnext_hop = \"relay.example.org:0\"\n",
                "valid port",
            ),
            ("[release]\nnext_hop = \"relay example:25\"\n", "host name"),
            ("[release]\nnext_hop = \"[::1:25\"\n", "host name"),
            ("[release]\nhelo_name = \"a b\"\n", "release.helo_name"),
            ("[release]\ncommand_timeout = \"0s\"\n", "zero"),
            ("[release]\nhop = \"x:1\"\n", "unknown field"),
        ] {
            let e = Config::from_toml_str(bad, "t.toml").map(drop).err();
            let text = e.map(|e| e.to_string()).unwrap_or_default();
            assert!(text.contains(needle), "{bad:?} gave {text:?}");
        }
    }

    #[test]
    fn the_default_store_location_follows_the_environment() {
        use std::ffi::OsString;
        let env = |pairs: &'static [(&'static str, &'static str)]| {
            move |name: &str| {
                pairs
                    .iter()
                    .find(|(k, _)| *k == name)
                    .map(|(_, v)| OsString::from(v))
            }
        };
        let nothing_writable = |_: &Path| false;
        let all = env(&[
            ("STATE_DIRECTORY", "/var/lib/tamis-unit:/var/lib/other"),
            ("XDG_STATE_HOME", "/home/u/.state"),
            ("HOME", "/home/u"),
        ]);
        assert_eq!(
            default_store_path_from(all, |_| true),
            (
                PathBuf::from("/var/lib/tamis-unit/store.sqlite"),
                StoreOrigin::StateDirectory
            )
        );
        let user = env(&[("XDG_STATE_HOME", "/home/u/.state"), ("HOME", "/home/u")]);
        assert_eq!(
            default_store_path_from(user, |p| p == Path::new("/var/lib/tamis")),
            (PathBuf::from(DEFAULT_STORE_PATH), StoreOrigin::System)
        );
        assert_eq!(
            default_store_path_from(user, nothing_writable),
            (
                PathBuf::from("/home/u/.state/tamis/store.sqlite"),
                StoreOrigin::User
            )
        );
        // A relative XDG_STATE_HOME is to be ignored (XDG Base Directory Specification).
        let home = env(&[("XDG_STATE_HOME", "rel"), ("HOME", "/home/u")]);
        assert_eq!(
            default_store_path_from(home, nothing_writable).0,
            PathBuf::from("/home/u/.local/state/tamis/store.sqlite")
        );
        assert_eq!(
            default_store_path_from(env(&[]), nothing_writable),
            (PathBuf::from(DEFAULT_STORE_PATH), StoreOrigin::Fallback)
        );
    }

    #[test]
    fn overlapping_addresses() {
        let a: SocketAddr = "127.0.0.1:9000".parse().unwrap_or(DEFAULT_TCP);
        let b: SocketAddr = "0.0.0.0:9000".parse().unwrap_or(DEFAULT_TCP);
        let c: SocketAddr = "127.0.0.1:9001".parse().unwrap_or(DEFAULT_TCP);
        assert!(overlaps(a, b));
        assert!(!overlaps(a, c));
    }
}
