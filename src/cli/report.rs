//! `tamis report`: what people say about verdicts — junk or legitimate — for message
//! files or verdict ids, recorded in the store as evidence for the figures and retraining.
//!
//! A file is joined to its verdict by the id in its topmost `X-Tamis-Verdict` field (the
//! one the last relay added), else by its Message-ID and the reporter's domain
//! (`Store::find_verdict`). Invariants: a report never counts unless the store matched it
//! (its verdict is in the journal and, when a domain is named, has a recipient there); an
//! id whose journal entry belongs to another message (its Message-ID differs) is not
//! trusted; each report keeps the message's hashed feature vector under the configured
//! model's spec, never its content; and every report that does not count is said plainly,
//! with the exit code [`super::EXIT_PARTIAL`].

use std::io::Read;
use std::path::{Path, PathBuf};

use serde::Serialize;

use super::input::BadInput;
use super::ops::{StoreArgs, Vectorizer, print_json, shown};
use super::{EXIT_BAD_INPUT, EXIT_OK, EXIT_PARTIAL};
use crate::mail::headers::{first_structured, parse_section};
use crate::policy::VERDICT_FIELD;
use crate::store::record::now;
use crate::store::{
    MessageKey, NewReport, ReportKind, ReportReceipt, ReportSource, ReportStatus, SqliteStore,
    Store, StoreError,
};

/// Arguments of `tamis report`.
#[derive(clap::Args, Debug)]
#[command(after_long_help = REPORT_HELP)]
pub struct ReportArgs {
    #[command(flatten)]
    store: StoreArgs,
    /// What the reporter says about the messages.
    #[arg(value_enum)]
    kind: KindArg,
    /// Message files as the recipient received them (with the `X-Tamis-Verdict` field
    /// tamis added, if any). Needs --domain.
    #[arg(value_name = "FILE")]
    files: Vec<PathBuf>,
    /// A verdict id to report on (from a log line, `held list` or the header field);
    /// repeat for several.
    #[arg(long = "id", value_name = "ID")]
    ids: Vec<String>,
    /// Who says so: a recipient (`user`, needs --domain), an `operator`, or a person
    /// reviewing the audit sample (`audit`; `tamis audit answer` records those too).
    #[arg(long = "by", value_enum, default_value_t = By::Operator)]
    by: By,
    /// The recipient domain the report is about: the domain of the mailbox the message
    /// was reported from. Required for files (it finds the verdict by Message-ID and
    /// refuses an id made for another domain) and for `--by user`.
    #[arg(long)]
    domain: Option<String>,
}

const REPORT_HELP: &str = "\
Examples:
  tamis report junk --by user --domain example.org --config /etc/tamis/tamis.toml reported/*.eml
  tamis report legitimate --id 01JX4Q8M2Z0000AB --config /etc/tamis/tamis.toml

A report counts as evidence only when its verdict is in the journal and, when a domain is
named, one of the verdict's recipients is in that domain. Anything else is recorded as
unmatched and never counted (an unknown or expired id, an id made for another domain), or
refused without being recorded (a file with no usable X-Tamis-Verdict field whose Message-ID
matches no verdict, or whose field names the verdict of another message). Each line says
which. A release of held mail already counts as a legitimate report.

Exit codes: 0 every report counted; 1 the store failed; 2 bad arguments or an unreadable
file; 3 some report was not counted (recorded as unmatched, or refused).";

#[derive(clap::ValueEnum, Clone, Copy, Debug, PartialEq, Eq)]
enum KindArg {
    /// The messages are junk.
    Junk,
    /// The messages are legitimate mail.
    Legitimate,
}

impl From<KindArg> for ReportKind {
    fn from(k: KindArg) -> ReportKind {
        match k {
            KindArg::Junk => ReportKind::Junk,
            KindArg::Legitimate => ReportKind::NotJunk,
        }
    }
}

#[derive(clap::ValueEnum, Clone, Copy, Debug, PartialEq, Eq)]
enum By {
    /// A recipient of the message.
    User,
    /// An operator.
    Operator,
    /// A reviewer of the audit sample.
    Audit,
}

impl From<By> for ReportSource {
    fn from(b: By) -> ReportSource {
        match b {
            By::User => ReportSource::User,
            By::Operator => ReportSource::Operator,
            By::Audit => ReportSource::Audit,
        }
    }
}

/// How a report found its verdict.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Join {
    /// The id in the file's `X-Tamis-Verdict` field.
    Header,
    /// The file's Message-ID and the reporter's domain.
    MessageId,
    /// An id given on the command line.
    Id,
}

/// What a file's header says about its verdict.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct HeaderIds {
    /// The id in the topmost `X-Tamis-Verdict` field: `Some(Ok(id))`, or `Some(Err(()))`
    /// when the field is there but holds no valid id.
    pub verdict: Option<Result<String, ()>>,
    /// The key of its Message-ID.
    pub message_key: Option<MessageKey>,
}

/// Reads the verdict id and the Message-ID key from a message's header section.
pub fn header_ids(message: &[u8]) -> HeaderIds {
    let section = parse_section(message);
    HeaderIds {
        verdict: first_structured(&section.fields, VERDICT_FIELD)
            .map(|value| verdict_id_of_field(&value).ok_or(())),
        message_key: first_structured(&section.fields, "Message-ID")
            .and_then(|value| MessageKey::of(&value)),
    }
}

/// The `id=` parameter of an `X-Tamis-Verdict` value (`tag; id=<id>; margin=<m>`, see
/// `proto/PROTOCOL.md` §4.4), when it is a plausible verdict id: 1 to 64 ASCII letters and
/// digits.
pub fn verdict_id_of_field(value: &str) -> Option<String> {
    value.split(';').find_map(|part| {
        let (name, id) = part.split_once('=')?;
        if !name.trim().eq_ignore_ascii_case("id") {
            return None;
        }
        let id = id.trim();
        (!id.is_empty() && id.len() <= 64 && id.bytes().all(|b| b.is_ascii_alphanumeric()))
            .then(|| id.to_string())
    })
}

/// Finds the verdict a reported file is about: `Ok(Ok((id, how)))` to record, or
/// `Ok(Err(why))` when there is nothing trustworthy to record.
///
/// The header's id is used when its journal entry is this message's (same Message-ID, or
/// either has none); an id unknown to the journal is still recorded (as unmatched) unless
/// the Message-ID finds the real verdict.
pub fn resolve_file(
    store: &dyn Store,
    ids: &HeaderIds,
    domain: &str,
) -> Result<Result<(String, Join), String>, StoreError> {
    let mut unknown = None;
    let mut why = None;
    match &ids.verdict {
        Some(Ok(id)) => match store.journal_entry(id)? {
            Some(entry) => match (entry.message_key, ids.message_key) {
                (Some(theirs), Some(ours)) if theirs != ours => {
                    why = Some(format!(
                        "its {VERDICT_FIELD} field names verdict {id}, which was made for another message (the Message-IDs differ): a forged or copied field"
                    ));
                }
                _ => return Ok(Ok((id.clone(), Join::Header))),
            },
            None => unknown = Some(id.clone()),
        },
        Some(Err(())) => {
            why = Some(format!(
                "its {VERDICT_FIELD} field holds no valid id (damaged or forged)"
            ));
        }
        None => {}
    }
    if let Some(key) = &ids.message_key
        && let Some(id) = store.find_verdict(key, domain)?
    {
        return Ok(Ok((id, Join::MessageId)));
    }
    if let Some(id) = unknown {
        return Ok(Ok((id, Join::Header)));
    }
    let message_id = if ids.message_key.is_some() {
        format!("its Message-ID matches no verdict for {}", shown(domain))
    } else {
        "it has no Message-ID".to_string()
    };
    Ok(Err(match why {
        Some(why) => format!("{why}, and {message_id}"),
        None => format!("it has no {VERDICT_FIELD} field, and {message_id}"),
    }))
}

/// One report's outcome, as printed.
#[derive(Serialize)]
struct Outcome {
    /// The file or `id`.
    input: String,
    #[serde(skip_serializing_if = "Option::is_none")]
    verdict_id: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    joined_by: Option<Join>,
    /// `matched`, `unknown-verdict`, `domain-mismatch`, `no-reporter-domain` (recorded),
    /// `refused` (not recorded), `unreadable`.
    status: &'static str,
    counted: bool,
    #[serde(skip_serializing_if = "Option::is_none")]
    report_id: Option<i64>,
    with_features: bool,
    detail: String,
}

/// The plain-words account of a recorded report.
pub fn explain(receipt: &ReportReceipt, verdict_id: &str, domain: Option<&str>) -> String {
    let id = shown(verdict_id);
    match receipt.status {
        ReportStatus::Matched => format!("counted (report {} on verdict {id})", receipt.id),
        ReportStatus::UnknownVerdict => format!(
            "NOT counted: no verdict {id} in the journal (never made here, or past retention); recorded as unmatched"
        ),
        ReportStatus::DomainMismatch => format!(
            "NOT counted: verdict {id} has no recipient in {} (a forged or mistaken id); recorded as unmatched",
            shown(domain.unwrap_or("-"))
        ),
        ReportStatus::NoReporterDomain => {
            "NOT counted: a user's report must name the user's domain (--domain); recorded as unmatched"
                .to_string()
        }
    }
}

/// Reads at most `limit` bytes of a message file (a larger one is read in part: the header
/// and what the filter would examine are at its start).
fn read_message(path: &Path, limit: usize) -> Result<Vec<u8>, String> {
    let (file, _) = crate::fsio::open_regular(path).map_err(|e| e.to_string())?;
    let mut bytes = Vec::new();
    file.take(limit as u64)
        .read_to_end(&mut bytes)
        .map_err(|e| format!("{}: cannot read it: {e}", path.display()))?;
    Ok(bytes)
}

/// Runs `tamis report`.
pub fn run(args: &ReportArgs) -> anyhow::Result<u8> {
    if args.files.is_empty() && args.ids.is_empty() {
        return Err(BadInput(
            "nothing to report: give message files, or --id VERDICT_ID (repeatable)".into(),
        )
        .into());
    }
    let domain = match &args.domain {
        Some(d) => Some(
            crate::policy::domain::validate(d)
                .map_err(|e| BadInput(format!("--domain \"{}\" is not a domain: {e}", shown(d))))?,
        ),
        None => None,
    };
    if domain.is_none() && args.by == By::User {
        return Err(BadInput(
            "--by user needs --domain: a user's report is checked against the user's own domain"
                .into(),
        )
        .into());
    }
    if domain.is_none() && !args.files.is_empty() {
        return Err(BadInput(
            "reporting files needs --domain (the domain of the mailbox they were reported from): it finds a verdict by Message-ID and refuses an id made for another domain".into(),
        )
        .into());
    }
    if let Some(bad) = args
        .ids
        .iter()
        .find(|id| id.is_empty() || id.len() > 64 || !id.bytes().all(|b| b.is_ascii_graphic()))
    {
        return Err(BadInput(format!(
            "--id \"{}\" is not a verdict id (1 to 64 printable ASCII characters)",
            shown(bad)
        ))
        .into());
    }
    let (config, store) = args.store.open()?;
    let mut vectorizer = Vectorizer::for_config(&config);
    let kind = ReportKind::from(args.kind);
    let source = ReportSource::from(args.by);
    let limit = crate::mail::ExtractLimits::default().max_raw_bytes;
    let mut outcomes = Vec::new();

    for path in &args.files {
        let input = path.display().to_string();
        let bytes = match read_message(path, limit) {
            Ok(b) => b,
            Err(e) => {
                outcomes.push(Outcome {
                    input,
                    verdict_id: None,
                    joined_by: None,
                    status: "unreadable",
                    counted: false,
                    report_id: None,
                    with_features: false,
                    detail: format!("NOT recorded: {e}"),
                });
                continue;
            }
        };
        let domain_name = domain.as_deref().unwrap_or_default();
        match resolve_file(&store, &header_ids(&bytes), domain_name)? {
            Err(why) => outcomes.push(Outcome {
                input,
                verdict_id: None,
                joined_by: None,
                status: "refused",
                counted: false,
                report_id: None,
                with_features: false,
                detail: format!("NOT counted, not recorded: {why}"),
            }),
            Ok((verdict_id, join)) => {
                let features = vectorizer.vector(&bytes);
                outcomes.push(record(
                    &store,
                    input,
                    verdict_id,
                    join,
                    (kind, source, domain.as_deref()),
                    features,
                )?);
            }
        }
    }
    for id in &args.ids {
        let features = match store.get_held(id)? {
            Some(held) => vectorizer.vector(&held.message),
            None => None,
        };
        outcomes.push(record(
            &store,
            "id".to_string(),
            id.clone(),
            Join::Id,
            (kind, source, domain.as_deref()),
            features,
        )?);
    }
    print(&outcomes, args.store.format, kind)?;
    Ok(if outcomes.iter().any(|o| o.status == "unreadable") {
        EXIT_BAD_INPUT
    } else if outcomes.iter().any(|o| !o.counted) {
        EXIT_PARTIAL
    } else {
        EXIT_OK
    })
}

fn record(
    store: &SqliteStore,
    input: String,
    verdict_id: String,
    join: Join,
    (kind, source, domain): (ReportKind, ReportSource, Option<&str>),
    features: Option<crate::features::SparseVector>,
) -> anyhow::Result<Outcome> {
    let with_features = features.is_some();
    let receipt = store.report(&NewReport {
        verdict_id: verdict_id.clone(),
        kind,
        source,
        domain: domain.map(str::to_string),
        at: now(),
        features,
    })?;
    let detail = explain(&receipt, &verdict_id, domain);
    Ok(Outcome {
        input,
        joined_by: Some(join),
        status: receipt.status.as_str(),
        counted: receipt.status.is_matched(),
        report_id: Some(receipt.id),
        with_features,
        detail,
        verdict_id: Some(verdict_id),
    })
}

fn print(outcomes: &[Outcome], format: super::ops::Format, kind: ReportKind) -> anyhow::Result<()> {
    let counted = outcomes.iter().filter(|o| o.counted).count();
    let kind_name = match kind {
        ReportKind::Junk => "junk",
        ReportKind::NotJunk => "legitimate",
    };
    if format == super::ops::Format::Json {
        return print_json(&serde_json::json!({
            "kind": kind_name,
            "reports": outcomes,
            "counted": counted,
            "not_counted": outcomes.len() - counted,
        }));
    }
    for o in outcomes {
        let joined = match o.joined_by {
            Some(Join::Header) => " (by its X-Tamis-Verdict field)",
            Some(Join::MessageId) => " (by its Message-ID)",
            _ => "",
        };
        let name = if o.input == "id" {
            shown(o.verdict_id.as_deref().unwrap_or("-")).to_string()
        } else {
            shown(&o.input).to_string()
        };
        println!("{name}: {}{joined}", o.detail);
    }
    println!(
        "{counted} of {} {kind_name} report(s) counted{}",
        outcomes.len(),
        if counted < outcomes.len() {
            "; the others are not evidence (see each line)"
        } else {
            ""
        }
    );
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_id_is_read_from_the_verdict_field() {
        // The field's form is proto/PROTOCOL.md §4.4.
        assert_eq!(
            verdict_id_of_field("tag; id=01JX4Q8M2Z0000AB; margin=1.2500"),
            Some("01JX4Q8M2Z0000AB".to_string())
        );
        assert_eq!(
            verdict_id_of_field(" tag ;ID = abc123 "),
            Some("abc123".to_string())
        );
        for bad in ["tag", "tag; id=", "tag; id=a/b", "tag; id=<script>", "id"] {
            assert_eq!(verdict_id_of_field(bad), None, "{bad:?}");
        }
    }

    #[test]
    fn header_ids_take_the_topmost_field_and_the_message_id() {
        let message = b"X-Tamis-Verdict: tag; id=TOP1; margin=1.0\r\nX-Tamis-Verdict: tag; id=LOWER2\r\nMessage-ID: <m1@example.org>\r\n\r\nbody\r\n";
        let ids = header_ids(message);
        assert_eq!(ids.verdict, Some(Ok("TOP1".to_string())));
        assert_eq!(ids.message_key, MessageKey::of("m1@example.org"));
        let damaged = header_ids(b"X-Tamis-Verdict: tag; id=\x1b[31m\r\n\r\n");
        assert_eq!(damaged.verdict, Some(Err(())));
        assert_eq!(header_ids(b"Subject: x\r\n\r\n"), HeaderIds::default());
    }
}
