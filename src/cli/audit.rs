//! `tamis audit`: a seeded random sample of held mail per domain for a person to review,
//! and the reviewer's answers recorded as audit reports.
//!
//! Why: complaints come from the people who notice a missing message; a random sample of
//! what was held does not depend on who complains, so the share of legitimate mail in it
//! estimates the false-positive rate among held mail without that bias (the `audit` rate
//! of `tamis figures`).
//!
//! Invariants: the sample is `Store::audit_sample` (bottom-k on a seeded hash, see
//! `store::sample`): the same seed and window give the same messages, and a message stays
//! in the queue as mail arrives. An answer is recorded only for mail actually held for the
//! domain named: the audit figures count nothing else.

use std::path::PathBuf;

use clap::Subcommand;
use serde::Serialize;

use super::input::BadInput;
use super::ops::{
    Format, StoreArgs, Time, Vectorizer, margin_text, parse_age, print_json, shown, utc,
};
use super::report::explain;
use super::{EXIT_OK, EXIT_PARTIAL};
use crate::policy::{Action, domain};
use crate::store::record::now;
use crate::store::{AuditItem, NewReport, ReportKind, ReportSource, SqliteStore, Store, UnixTime};

/// Arguments of `tamis audit`.
#[derive(clap::Args, Debug)]
#[command(after_long_help = AUDIT_HELP)]
pub struct AuditArgs {
    #[command(flatten)]
    store: StoreArgs,
    #[command(subcommand)]
    command: AuditCommand,
}

const AUDIT_HELP: &str = "\
Complaints come from people who notice a missing message; a random sample of held mail does
not depend on who complains. Review it, record the answers, and `tamis figures` shows the
share of legitimate mail among held mail (its 'audit' line).

  tamis audit sample --config /etc/tamis/tamis.toml --domain example.org --size 20
  tamis held show --config /etc/tamis/tamis.toml 01JX4Q8M2Z0000AB
  tamis audit answer --config /etc/tamis/tamis.toml --domain example.org 01JX4Q8M2Z0000AB=junk

The same --seed and --since give the same sample; answers are recorded only for mail held
for the domain named.

Exit codes: 0 success; 1 the store failed; 2 bad arguments; 3 some answer was not recorded
or not counted.";

#[derive(Subcommand, Debug)]
enum AuditCommand {
    /// Draw the sample: held messages chosen at random (repeatably, from the seed) for
    /// each domain, with what reviewers said about them so far.
    Sample(SampleArgs),
    /// Record a reviewer's answers: `ID=junk` or `ID=legitimate` for messages of the
    /// sample.
    Answer(AnswerArgs),
}

#[derive(clap::Args, Debug)]
struct SampleArgs {
    /// The recipient domain to sample; repeat for several. Without it, every domain with
    /// mail held in the window.
    #[arg(long)]
    domain: Vec<String>,
    /// Sample mail held within this age: 7d, 30d.
    #[arg(long, value_name = "AGE", value_parser = parse_age, default_value = "30d")]
    since: i64,
    /// Messages per domain.
    #[arg(long, default_value_t = 20)]
    size: usize,
    /// The seed: the same seed and window give the same sample. Change it for a fresh
    /// sample.
    #[arg(long, default_value_t = 1)]
    seed: u64,
}

#[derive(clap::Args, Debug)]
struct AnswerArgs {
    /// The domain the messages were sampled for.
    #[arg(long)]
    domain: String,
    /// Answers, `VERDICT_ID=junk` or `VERDICT_ID=legitimate`.
    #[arg(value_name = "ID=ANSWER")]
    answers: Vec<String>,
    /// A file of answers, one per line (`ID=junk`, or `ID junk`); `#` starts a comment.
    #[arg(long, value_name = "FILE")]
    from_file: Option<PathBuf>,
}

/// Runs `tamis audit`.
pub fn run(args: &AuditArgs) -> anyhow::Result<u8> {
    match &args.command {
        AuditCommand::Sample(a) => {
            let (_, store) = args.store.open()?;
            sample(&store, a, args.store.format)
        }
        AuditCommand::Answer(a) => answer(&args.store, a),
    }
}

#[derive(Serialize)]
struct SampleOut {
    domain: String,
    since: Time,
    seed: u64,
    reviewed: usize,
    messages: Vec<SampleItem>,
}

#[derive(Serialize)]
struct SampleItem {
    verdict_id: String,
    held_at: Time,
    state: crate::store::HeldState,
    margin: Option<f64>,
    sender: String,
    recipients: Vec<String>,
    reasons: Vec<String>,
    /// `junk`, `legitimate`, or null when not reviewed yet.
    reviewed: Option<&'static str>,
}

fn kind_name(kind: ReportKind) -> &'static str {
    match kind {
        ReportKind::Junk => "junk",
        ReportKind::NotJunk => "legitimate",
    }
}

fn sample(store: &SqliteStore, args: &SampleArgs, format: Format) -> anyhow::Result<u8> {
    if args.size == 0 {
        return Err(BadInput("--size must be at least 1".into()).into());
    }
    let since: UnixTime = now().saturating_sub(args.since);
    let domains: Vec<String> = if args.domain.is_empty() {
        store
            .figures(since, None)?
            .into_iter()
            .filter(|f| f.by_action.quarantine > 0)
            .map(|f| f.domain)
            .collect()
    } else {
        args.domain.iter().map(|d| domain::normalize(d)).collect()
    };
    let mut out = Vec::new();
    for name in domains {
        let items = store.audit_sample(&name, since, args.size, args.seed)?;
        out.push(SampleOut {
            reviewed: items.iter().filter(|i| i.reviewed.is_some()).count(),
            messages: items.iter().map(item).collect(),
            domain: name,
            since: Time::of(since),
            seed: args.seed,
        });
    }
    if format == Format::Json {
        print_json(&serde_json::json!({ "samples": out }))?;
        return Ok(EXIT_OK);
    }
    if out.is_empty() {
        println!("no mail held since {} UTC: nothing to audit", utc(since));
    }
    for s in &out {
        println!(
            "{}: {} held message(s) drawn (seed {}, held since {} UTC), {} reviewed",
            shown(&s.domain),
            s.messages.len(),
            s.seed,
            utc(since),
            s.reviewed
        );
        for m in &s.messages {
            println!(
                "  [{:^10}] {}  {}  margin {:>8}  from <{}>  reasons: {}",
                m.reviewed.unwrap_or(""),
                shown(&m.verdict_id),
                utc(m.held_at.unix),
                margin_text(m.margin),
                shown(&m.sender),
                m.reasons
                    .iter()
                    .take(5)
                    .map(|r| shown(r).to_string())
                    .collect::<Vec<_>>()
                    .join(", ")
            );
        }
        if !s.messages.is_empty() {
            println!(
                "  review each with `tamis held show ID`, then: tamis audit answer --domain {} ID=junk ID=legitimate ...",
                shown(&s.domain)
            );
        }
    }
    Ok(EXIT_OK)
}

fn item(i: &AuditItem) -> SampleItem {
    let h = &i.held;
    SampleItem {
        verdict_id: h.entry.verdict_id.clone(),
        held_at: Time::of(h.held_at),
        state: h.state,
        margin: h.entry.margin,
        sender: h.sender.clone(),
        recipients: h.recipients.clone(),
        reasons: h.entry.reasons.clone(),
        reviewed: i.reviewed.map(kind_name),
    }
}

/// Parses `ID=junk`, `ID=legitimate` (or `ID junk`).
fn parse_answer(text: &str) -> Result<(String, ReportKind), String> {
    let (id, answer) = text
        .split_once('=')
        .or_else(|| text.split_once(char::is_whitespace))
        .ok_or_else(|| {
            format!(
                "\"{}\" is not an answer; write ID=junk or ID=legitimate",
                shown(text)
            )
        })?;
    let (id, answer) = (id.trim(), answer.trim());
    if id.is_empty() || id.len() > 64 || !id.bytes().all(|b| b.is_ascii_alphanumeric()) {
        return Err(format!("\"{}\" is not a verdict id", shown(id)));
    }
    let kind = match answer.to_ascii_lowercase().as_str() {
        "junk" => ReportKind::Junk,
        "legitimate" => ReportKind::NotJunk,
        _ => {
            return Err(format!(
                "\"{}\" is not an answer for {id}; say junk or legitimate",
                shown(answer)
            ));
        }
    };
    Ok((id.to_string(), kind))
}

#[derive(Serialize)]
struct AnswerOut {
    verdict_id: String,
    answer: &'static str,
    counted: bool,
    #[serde(skip_serializing_if = "Option::is_none")]
    report_id: Option<i64>,
    detail: String,
}

fn answer(store_args: &StoreArgs, args: &AnswerArgs) -> anyhow::Result<u8> {
    let name = domain::validate(&args.domain).map_err(|e| {
        BadInput(format!(
            "--domain \"{}\" is not a domain: {e}",
            shown(&args.domain)
        ))
    })?;
    let mut answers = Vec::new();
    for text in &args.answers {
        answers.push(parse_answer(text).map_err(BadInput)?);
    }
    if let Some(path) = &args.from_file {
        let bytes = crate::fsio::read_regular(path, 1 << 20, "an answers file")
            .map_err(|e| BadInput(e.to_string()))?;
        let text = String::from_utf8(bytes)
            .map_err(|_| BadInput(format!("{}: not UTF-8 text", path.display())))?;
        for (n, line) in text.lines().enumerate() {
            let line = line.split('#').next().unwrap_or("").trim();
            if line.is_empty() {
                continue;
            }
            answers.push(
                parse_answer(line)
                    .map_err(|e| BadInput(format!("{}:{}: {e}", path.display(), n + 1)))?,
            );
        }
    }
    if answers.is_empty() {
        return Err(BadInput(
            "no answers: give ID=junk or ID=legitimate, or --from-file FILE".into(),
        )
        .into());
    }
    let (config, store) = store_args.open()?;
    let mut vectorizer = Vectorizer::for_config(&config);
    let mut out = Vec::new();
    for (id, kind) in answers {
        let held = store.get_held(&id)?;
        let held_here = held.as_ref().is_some_and(|h| {
            h.summary
                .entry
                .outcomes
                .iter()
                .any(|o| o.domain == name && o.action == Action::Quarantine)
        });
        let Some(held) = held.filter(|_| held_here) else {
            out.push(AnswerOut {
                detail: format!(
                    "NOT recorded: no mail held for {} has this verdict id; audit answers are about held mail of the domain sampled",
                    shown(&name)
                ),
                verdict_id: id,
                answer: kind_name(kind),
                counted: false,
                report_id: None,
            });
            continue;
        };
        let receipt = store.report(&NewReport {
            verdict_id: id.clone(),
            kind,
            source: ReportSource::Audit,
            domain: Some(name.clone()),
            at: now(),
            features: vectorizer.vector(&held.message),
        })?;
        out.push(AnswerOut {
            detail: explain(&receipt, &id, Some(&name)),
            verdict_id: id,
            answer: kind_name(kind),
            counted: receipt.status.is_matched(),
            report_id: Some(receipt.id),
        });
    }
    if store_args.format == Format::Json {
        print_json(&serde_json::json!({ "domain": name, "answers": out }))?;
    } else {
        for a in &out {
            println!("{} {}: {}", shown(&a.verdict_id), a.answer, a.detail);
        }
    }
    Ok(if out.iter().all(|a| a.counted) {
        EXIT_OK
    } else {
        EXIT_PARTIAL
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn answers_name_an_id_and_junk_or_legitimate() {
        assert_eq!(
            parse_answer("ABC123=junk"),
            Ok(("ABC123".to_string(), ReportKind::Junk))
        );
        assert_eq!(
            parse_answer("ABC123  Legitimate"),
            Ok(("ABC123".to_string(), ReportKind::NotJunk))
        );
        for bad in [
            "ABC123",
            "ABC123=spam",
            "=junk",
            "a/b=junk",
            "ABC123=not-junk",
        ] {
            assert!(parse_answer(bad).is_err(), "{bad:?}");
        }
    }
}
