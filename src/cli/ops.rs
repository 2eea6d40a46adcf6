//! Pieces shared by the operator commands (`held`, `report`, `audit`, `figures`): finding
//! the store, reading ages such as `7d`, writing times, vectorizing mail the way the
//! configured model sees it, and escaping what a sender wrote before it reaches a terminal.
//!
//! Invariants: a store is opened only when its file exists (an operator command never
//! creates an empty store by mistake); every text that came from a message or an envelope
//! is printed through [`shown`] or [`shown_bytes`], which leave no control or invisible
//! formatting character for a terminal to act on.

use std::fmt::{self, Write as _};
use std::path::PathBuf;

use anyhow::Context;
use serde::Serialize;

use super::input::BadInput;
use crate::analyze::Analyzer;
use crate::config::{Config, ModelSource};
use crate::features::{FeatureSpec, SparseVector};
use crate::logsafe::needs_escape;
use crate::store::{SqliteStore, StoreOptions, UnixTime};

/// Output formats of the operator commands.
#[derive(clap::ValueEnum, Clone, Copy, Debug, PartialEq, Eq)]
pub enum Format {
    /// Readable text; everything a sender wrote is escaped.
    Text,
    /// One JSON document, for scripts.
    Json,
}

/// Where the store is: the configuration `serve` uses, or a store file named directly.
#[derive(clap::Args, Debug, Clone)]
pub struct StoreArgs {
    /// The daemon's configuration file: the store is its `[store] path`, release settings
    /// its `[release]` table, targets its `[policy]`, the model its `[model]`. Without it
    /// (and without --store) the built-in defaults apply, as for `tamis serve`.
    #[arg(long, value_name = "FILE", global = true)]
    pub config: Option<PathBuf>,
    /// The store file itself, instead of --config (the built-in defaults apply to
    /// everything else).
    #[arg(long, value_name = "PATH", global = true, conflicts_with = "config")]
    pub store: Option<PathBuf>,
    /// `text` for people, `json` (one document) for scripts.
    #[arg(long, value_enum, default_value_t = Format::Text, global = true)]
    pub format: Format,
}

impl StoreArgs {
    /// The configuration: the file given, or the built-in defaults with the store path
    /// given.
    pub fn config(&self) -> anyhow::Result<Config> {
        let mut config = match &self.config {
            Some(path) => Config::load(path).map_err(|e| BadInput(e.to_string()))?,
            None => Config::default(),
        };
        if let Some(path) = &self.store {
            config.store.path = std::path::absolute(path).unwrap_or_else(|_| path.clone());
        }
        Ok(config)
    }

    /// The configuration and its store, opened. A store file that does not exist is bad
    /// input: the daemon creates it at its first start, and an operator command that
    /// created an empty one would only hide a wrong path.
    pub fn open(&self) -> anyhow::Result<(Config, SqliteStore)> {
        let config = self.config()?;
        let path = &config.store.path;
        if let Err(e) = std::fs::symlink_metadata(path)
            && e.kind() == std::io::ErrorKind::NotFound
        {
            let hint = if self.config.is_none() && self.store.is_none() {
                " (the built-in default; give --config with the daemon's configuration, or --store)"
            } else {
                ""
            };
            return Err(BadInput(format!(
                "{}: no store here{hint}; the daemon creates it when it starts",
                path.display()
            ))
            .into());
        }
        let store = SqliteStore::open(path, StoreOptions::from(&config.store))?;
        Ok((config, store))
    }
}

/// Reads an age such as `30s`, `15m`, `12h`, `7d` or `2w` as seconds (for clap).
pub fn parse_age(text: &str) -> Result<i64, String> {
    let text = text.trim();
    let split = text
        .find(|c: char| !c.is_ascii_digit())
        .unwrap_or(text.len());
    let (number, unit) = text.split_at(split);
    let per: i64 = match unit.trim() {
        "s" => 1,
        "m" => 60,
        "h" => 3_600,
        "d" => 86_400,
        "w" => 7 * 86_400,
        _ => {
            return Err(format!(
                "\"{text}\" is not an age; write a whole number and one unit: s, m, h, d or w (e.g. 7d)"
            ));
        }
    };
    number
        .parse::<i64>()
        .ok()
        .and_then(|n| n.checked_mul(per))
        .filter(|&s| s <= 100 * 366 * 86_400)
        .ok_or_else(|| format!("\"{text}\" is not an age of at most 100 years"))
}

/// A time as `YYYY-MM-DD HH:MM:SS` in UTC, for people.
pub fn utc(t: UnixTime) -> String {
    let (y, mo, d) = crate::calendar::civil_from_days(t.div_euclid(86_400));
    let s = t.rem_euclid(86_400);
    format!(
        "{y:04}-{mo:02}-{d:02} {:02}:{:02}:{:02}",
        s / 3600,
        s / 60 % 60,
        s % 60
    )
}

/// A time as RFC 3339 (`YYYY-MM-DDTHH:MM:SSZ`), for JSON.
pub fn rfc3339(t: UnixTime) -> String {
    utc(t).replacen(' ', "T", 1) + "Z"
}

/// A time in JSON: seconds since the epoch and RFC 3339.
#[derive(Debug, Clone, Serialize)]
pub struct Time {
    /// Seconds since the Unix epoch.
    pub unix: UnixTime,
    /// The same in RFC 3339, UTC.
    pub utc: String,
}

impl Time {
    /// `t` in both forms.
    pub fn of(t: UnixTime) -> Time {
        Time {
            unix: t,
            utc: rfc3339(t),
        }
    }
}

/// Text from a sender (or anyone else) made safe to print: controls, invisible
/// formatting characters and backslashes are escaped (`\n`, `\u{1b}`, `\\`), nothing is
/// cut. See [`crate::logsafe`] for the characters and why.
pub struct Shown<'a>(&'a [u8]);

/// Wraps text for printing; see [`Shown`].
pub fn shown(text: &str) -> Shown<'_> {
    Shown(text.as_bytes())
}

/// Wraps bytes for printing; bytes that are not UTF-8 are written `\xNN`.
pub fn shown_bytes(bytes: &[u8]) -> Shown<'_> {
    Shown(bytes)
}

impl fmt::Display for Shown<'_> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for chunk in self.0.utf8_chunks() {
            for c in chunk.valid().chars() {
                match c {
                    '\\' => f.write_str("\\\\")?,
                    '\n' => f.write_str("\\n")?,
                    '\r' => f.write_str("\\r")?,
                    '\t' => f.write_str("\\t")?,
                    c if needs_escape(c) => write!(f, "\\u{{{:x}}}", u32::from(c))?,
                    c => f.write_char(c)?,
                }
            }
            for b in chunk.invalid() {
                write!(f, "\\x{b:02x}")?;
            }
        }
        Ok(())
    }
}

/// Turns mail into the hashed feature vector the configured model would see, so a report
/// can keep it for retraining without keeping the mail.
pub struct Vectorizer {
    analyzer: Option<Analyzer>,
}

impl Vectorizer {
    /// A vectorizer for the configured model's feature spec (the built-in model's spec
    /// when none is configured). When the model file cannot be read, says so on stderr
    /// and vectorizes nothing: reports are still recorded, without their vector.
    pub fn for_config(config: &Config) -> Vectorizer {
        let spec: anyhow::Result<FeatureSpec> = match &config.model {
            ModelSource::Builtin => Ok(crate::model::builtin::demonstration_spec()),
            ModelSource::File(path) => crate::model::file::load_model(path)
                .map(|m| m.spec().clone())
                .with_context(|| format!("cannot read the model {}", path.display())),
        };
        let analyzer = spec.and_then(|s| Ok(Analyzer::new(s)?));
        match analyzer {
            Ok(a) => Vectorizer { analyzer: Some(a) },
            Err(e) => {
                eprintln!(
                    "tamis: {e:#}; reports are recorded without the message's feature vector"
                );
                Vectorizer { analyzer: None }
            }
        }
    }

    /// The message's vector, or `None` when it is not mail or no model spec is known.
    pub fn vector(&mut self, raw: &[u8]) -> Option<SparseVector> {
        self.analyzer
            .as_mut()
            .and_then(|a| a.vectorize(raw).ok().cloned())
    }

    /// The analyzer, for showing what the filter saw.
    pub fn analyzer(&mut self) -> Option<&mut Analyzer> {
        self.analyzer.as_mut()
    }
}

/// Prints one JSON document and a line end on stdout.
pub fn print_json<T: Serialize>(value: &T) -> anyhow::Result<()> {
    use std::io::Write;
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    serde_json::to_writer_pretty(&mut out, value)?;
    writeln!(out)?;
    out.flush()?;
    Ok(())
}

/// A margin as the verdict field writes it, or `-` when the message was not scanned.
pub fn margin_text(margin: Option<f64>) -> String {
    match margin {
        Some(m) => {
            let text = crate::policy::format_margin(m);
            if text.starts_with('-') {
                text
            } else {
                format!("+{text}")
            }
        }
        None => "-".to_string(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ages_have_one_unit() {
        assert_eq!(parse_age("7d"), Ok(7 * 86_400));
        assert_eq!(parse_age("30s"), Ok(30));
        assert_eq!(parse_age("2w"), Ok(14 * 86_400));
        assert_eq!(parse_age("12 h"), Ok(12 * 3600));
        for bad in ["", "7", "d", "-1d", "1.5d", "7days", "99999999999999999d"] {
            assert!(parse_age(bad).is_err(), "{bad:?}");
        }
    }

    #[test]
    fn times_are_utc_dates() {
        // Checked with GNU date: `date -u -d @951782400` is 2000-02-29 00:00:00 (a leap
        // day of a year divisible by 400), `date -u -d @1800000000` 2027-01-15 08:00:00,
        // `date -u -d @-1` 1969-12-31 23:59:59.
        assert_eq!(utc(0), "1970-01-01 00:00:00");
        assert_eq!(utc(951_782_400), "2000-02-29 00:00:00");
        assert_eq!(utc(1_800_000_000), "2027-01-15 08:00:00");
        assert_eq!(utc(-1), "1969-12-31 23:59:59");
        assert_eq!(rfc3339(4_102_444_800), "2100-01-01T00:00:00Z");
    }

    #[test]
    fn shown_text_cannot_drive_a_terminal() {
        let hostile = "Re: hi\x1b[2J\r\nX-Forged: 1\u{202e}\\n";
        let text = shown(hostile).to_string();
        assert_eq!(text, "Re: hi\\u{1b}[2J\\r\\nX-Forged: 1\\u{202e}\\\\n");
        assert!(!text.chars().any(needs_escape));
        assert_eq!(shown_bytes(b"caf\xc3\xa9 \xff!").to_string(), "café \\xff!");
    }
}
