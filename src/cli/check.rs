//! `tamis check`: a protocol client that sends messages to a running daemon and prints the
//! verdicts.

use std::collections::BTreeMap;
use std::io::Write;
use std::path::PathBuf;
use std::time::Duration;

use serde::Serialize;

use super::input::{BadInput, Format};
use super::{EXIT_BAD_INPUT, EXIT_OK};
use crate::proto::client::Client;

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

/// Runs `tamis check`.
pub fn run(args: &CheckArgs) -> anyhow::Result<u8> {
    let mut client = Client::connect(&args.connect, Duration::from_secs(30)).map_err(|e| {
        BadInput(format!(
            "cannot talk to the daemon at {}: {e}",
            args.connect
        ))
    })?;
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    let mut code = EXIT_OK;
    for path in &args.files {
        let raw = match std::fs::read(path) {
            Ok(raw) => raw,
            Err(e) => {
                eprintln!("tamis: {}: cannot read: {e}", path.display());
                code = EXIT_BAD_INPUT;
                continue;
            }
        };
        let verdict = client.scan(&args.from, &args.rcpt, &raw)?;
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
