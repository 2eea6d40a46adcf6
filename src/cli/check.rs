//! `tamis check`: a protocol client that sends messages to a running daemon and prints the
//! verdicts.
//!
//! Failures are reported once each: a daemon that does not answer within `--timeout` is an
//! operational failure (exit 1) named with its address; when the conversation breaks
//! mid-run, the cause is printed once and every file not yet answered gets its own "not
//! checked" line, so a script can tell which verdicts it is missing.

use std::collections::BTreeMap;
use std::io::{Read, Write};
use std::path::{Path, PathBuf};
use std::time::Duration;

use serde::Serialize;

use super::input::{BadInput, Format};
use super::{EXIT_BAD_INPUT, EXIT_FAILURE, EXIT_OK};
use crate::proto::client::{Client, ClientError};
use crate::server::access::Secret;

/// Largest message file sent. The daemon scans at most its `limits.max_message_bytes`
/// (10 MiB by default) and answers for the rest unscanned; more than this is never useful
/// from a test tool and would only fill memory.
pub const MAX_FILE_BYTES: u64 = 256 << 20;

/// The daemon's address on built-in defaults.
pub const DEFAULT_ADDRESS: &str = "127.0.0.1:7357";

/// Arguments of `tamis check`.
#[derive(clap::Args, Debug)]
pub struct CheckArgs {
    /// Daemon address: `host:port` or `unix:/path/to/socket`.
    #[arg(long, value_name = "ADDR", default_value = DEFAULT_ADDRESS)]
    connect: String,
    /// Envelope sender (empty for the null sender).
    #[arg(long = "from", value_name = "ADDRESS", default_value = "")]
    from: String,
    /// Envelope recipient; repeat for several.
    #[arg(long = "rcpt", value_name = "ADDRESS", required = true)]
    rcpt: Vec<String>,
    /// Output format: `text`, or `json` (one object per line).
    #[arg(long, value_enum, default_value_t = Format::Text)]
    format: Format,
    /// Seconds to wait for each answer from the daemon before giving up.
    #[arg(long, value_name = "SECONDS", default_value_t = 30, value_parser = clap::value_parser!(u64).range(1..=3600))]
    timeout: u64,
    /// A file holding the shared secret the daemon asks TCP clients for (its
    /// `access.secret_file`); the same rules apply: 16 to 1024 bytes, not readable by others.
    #[arg(long, value_name = "FILE")]
    secret_file: Option<PathBuf>,
    /// Message files.
    #[arg(required = true, value_name = "FILE")]
    files: Vec<PathBuf>,
}

#[derive(Serialize)]
struct Line<'a> {
    file: String,
    id: &'a str,
    actions: BTreeMap<&'a str, &'static str>,
    margin: Option<f64>,
    probability: Option<f64>,
    edits: Vec<String>,
    reasons: &'a [String],
}

/// Whether a client error is a read that timed out (`SO_RCVTIMEO` gives `EAGAIN`).
fn timed_out(e: &ClientError) -> bool {
    matches!(e, ClientError::Io(io) if matches!(
        io.kind(),
        std::io::ErrorKind::WouldBlock | std::io::ErrorKind::TimedOut
    ))
}

/// The failure of a conversation, in words, naming the daemon once.
fn describe(e: &ClientError, addr: &str, timeout: u64) -> String {
    match e {
        e if timed_out(e) => format!("the daemon at {addr} did not answer within {timeout} s"),
        ClientError::Io(io) => format!("lost the connection to the daemon at {addr}: {io}"),
        other => format!("the daemon at {addr} ended the conversation: {other}"),
    }
}

/// Reads a message file, at most [`MAX_FILE_BYTES`].
fn read_message(path: &Path) -> Result<Vec<u8>, String> {
    let mut raw = Vec::new();
    std::fs::File::open(path)
        .and_then(|f| f.take(MAX_FILE_BYTES + 1).read_to_end(&mut raw))
        .map_err(|e| format!("cannot read: {e}"))?;
    if raw.len() as u64 > MAX_FILE_BYTES {
        return Err(format!(
            "larger than {MAX_FILE_BYTES} bytes; not sent (the daemon scans at most its limits.max_message_bytes)"
        ));
    }
    Ok(raw)
}

/// Runs `tamis check`.
pub fn run(args: &CheckArgs) -> anyhow::Result<u8> {
    let timeout = Duration::from_secs(args.timeout);
    let secret = match &args.secret_file {
        Some(path) => Some(Secret::read(path).map_err(|e| BadInput(e.to_string()))?),
        None => None,
    };
    let presented = secret.as_ref().map(Secret::bytes);
    let mut client = match Client::connect_with_secret(&args.connect, timeout, presented) {
        Ok(client) => client,
        Err(e) if timed_out(&e) => {
            anyhow::bail!("{}", describe(&e, &args.connect, args.timeout))
        }
        Err(e) => {
            return Err(BadInput(format!(
                "cannot talk to the daemon at {}: {e}",
                args.connect
            ))
            .into());
        }
    };
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    let mut code = EXIT_OK;
    for (n, path) in args.files.iter().enumerate() {
        let raw = match read_message(path) {
            Ok(raw) => raw,
            Err(e) => {
                eprintln!("tamis: {}: {e}", path.display());
                code = EXIT_BAD_INPUT;
                continue;
            }
        };
        let verdict = match client.scan(&args.from, &args.rcpt, &raw) {
            Ok(verdict) => verdict,
            Err(e) => {
                // The conversation is over: say why once, then account for every file
                // that has no verdict.
                out.flush()?;
                eprintln!(
                    "tamis: {} while checking {}",
                    describe(&e, &args.connect, args.timeout),
                    path.display()
                );
                for rest in args.files.iter().skip(n) {
                    eprintln!("tamis: {}: not checked", rest.display());
                }
                return Ok(EXIT_FAILURE);
            }
        };
        let line = Line {
            file: path.display().to_string(),
            id: &verdict.verdict_id,
            actions: verdict
                .recipients
                .iter()
                .map(|r| (r.address.as_str(), r.action.as_str()))
                .collect(),
            margin: verdict.margin.is_finite().then_some(verdict.margin),
            probability: verdict
                .probability
                .is_finite()
                .then_some(verdict.probability),
            edits: verdict
                .edits
                .iter()
                .map(|e| format!("{}: {}", e.name, e.value))
                .collect(),
            reasons: &verdict.reasons,
        };
        match args.format {
            Format::Json => {
                serde_json::to_writer(&mut out, &line)?;
                writeln!(out)?;
            }
            Format::Text => {
                let actions: Vec<String> = line
                    .actions
                    .iter()
                    .map(|(r, a)| format!("{r}={a}"))
                    .collect();
                let margin = line
                    .margin
                    .map_or("not scanned".to_string(), |m| format!("{m:+.4}"));
                writeln!(
                    out,
                    "{}: {} margin {} [{}]",
                    line.file,
                    line.id,
                    margin,
                    actions.join(", ")
                )?;
                for edit in &line.edits {
                    writeln!(out, "  + {edit}")?;
                }
            }
        }
    }
    out.flush()?;
    let _ = client.bye();
    Ok(code)
}
