//! `tamis held`: the quarantine — list, show, release, delete and purge held mail.
//!
//! Invariants: a release goes through `Store::claim_release` and `Store::finish_release`,
//! so of two releases of one message, from any processes, exactly one re-injects it; a
//! message whose re-injection failed is put back in the held state, never lost; a release
//! records a legitimate report with the message's feature vector (the store does that in
//! `finish_release`). Released mail goes out byte for byte as it was held (over SMTP
//! only the transparency of RFC 5321 §4.5.2 is added, and undone by the server). Nothing
//! a sender wrote reaches the terminal unescaped; the exact bytes are written only to a
//! file, or to a standard output that is not a terminal.

use std::io::{IsTerminal, Write};
use std::path::{Path, PathBuf};

use clap::Subcommand;
use serde::Serialize;

use super::input::{BadInput, check_output};
use super::ops::{
    Format, StoreArgs, Time, Vectorizer, margin_text, parse_age, print_json, shown, shown_bytes,
    utc,
};
use super::{EXIT_FAILURE, EXIT_OK, EXIT_PARTIAL};
use crate::config::Config;
use crate::policy::Action;
use crate::release::{Deliver, Outcome, SmtpDelivery, Undelivered};
use crate::smtp::Failure;
use crate::store::record::now;
use crate::store::{HeldFilter, HeldMessage, HeldState, HeldSummary, SqliteStore, Store};

/// Arguments of `tamis held`.
#[derive(clap::Args, Debug)]
#[command(after_long_help = HELD_HELP)]
pub struct HeldArgs {
    #[command(flatten)]
    store: StoreArgs,
    #[command(subcommand)]
    command: HeldCommand,
}

#[derive(Subcommand, Debug)]
enum HeldCommand {
    /// List held mail, newest first, with the reasons it was held.
    List(ListArgs),
    /// Show one held message: envelope, header, the text as the filter saw it, reasons.
    Show(ShowArgs),
    /// Release held messages: re-inject them over SMTP to the configured next hop, or
    /// write them to a file. A release counts as a report that the message is legitimate.
    Release(ReleaseArgs),
    /// Delete held messages without delivering them.
    Delete(DeleteArgs),
    /// Remove held mail by age, or apply the configured retention.
    Purge(PurgeArgs),
    /// Put back to held the messages whose release was claimed long ago by a command that
    /// never finished (it died or lost the machine).
    Unclaim(UnclaimArgs),
}

#[derive(clap::Args, Debug)]
struct ListArgs {
    /// Only mail held for recipients of this domain.
    #[arg(long)]
    domain: Option<String>,
    /// Only mail held within this age: 12h, 7d, 2w.
    #[arg(long, value_name = "AGE", value_parser = parse_age)]
    since: Option<i64>,
    /// Only mail whose margin is at least this.
    #[arg(long, value_name = "MARGIN", allow_negative_numbers = true)]
    min_margin: Option<f64>,
    /// Only mail whose margin is at most this.
    #[arg(long, value_name = "MARGIN", allow_negative_numbers = true)]
    max_margin: Option<f64>,
    /// Which messages: still held, being released, or released (kept until they expire).
    #[arg(long, value_enum, default_value_t = StateArg::Held)]
    state: StateArg,
    /// At most this many messages.
    #[arg(long, default_value_t = 100)]
    limit: u32,
    /// Skip this many of the newest first (the next page).
    #[arg(long, default_value_t = 0)]
    offset: u64,
}

#[derive(clap::ValueEnum, Clone, Copy, Debug, PartialEq, Eq)]
enum StateArg {
    Held,
    Releasing,
    Released,
}

impl From<StateArg> for HeldState {
    fn from(s: StateArg) -> HeldState {
        match s {
            StateArg::Held => HeldState::Held,
            StateArg::Releasing => HeldState::Releasing,
            StateArg::Released => HeldState::Released,
        }
    }
}

#[derive(clap::Args, Debug)]
struct ShowArgs {
    /// The verdict id of the held message (from `held list`).
    id: String,
    /// Write the message's exact bytes to standard output instead (refused when standard
    /// output is a terminal: a sender controls those bytes). Changes nothing in the store.
    #[arg(long)]
    raw: bool,
    /// Most bytes of extracted text shown per part.
    #[arg(long, value_name = "BYTES", default_value_t = 16 * 1024)]
    max_text: usize,
}

#[derive(clap::Args, Debug)]
#[command(after_long_help = RELEASE_HELP)]
struct ReleaseArgs {
    /// Verdict ids of the held messages (from `held list`).
    #[arg(required = true, value_name = "ID")]
    ids: Vec<String>,
    /// Write the one message given to this file (created with mode 0600) instead of
    /// re-injecting it; `-` writes it to standard output (not to a terminal).
    #[arg(long, value_name = "FILE", conflicts_with = "into")]
    to: Option<PathBuf>,
    /// Write each message to FOLDER/<verdict id>.eml (mode 0600) instead of re-injecting.
    #[arg(long, value_name = "FOLDER")]
    into: Option<PathBuf>,
    /// Re-inject to this `host:port` instead of `[release] next_hop`.
    #[arg(long, value_name = "HOST:PORT", conflicts_with_all = ["to", "into"])]
    next_hop: Option<String>,
}

const HELD_HELP: &str = "\
Examples (the daemon's configuration names the store, the model and the next hop):
  tamis held list --config /etc/tamis/tamis.toml --domain example.org --since 2d
  tamis held show --config /etc/tamis/tamis.toml 01JX4Q8M2Z0000AB
  tamis held release --config /etc/tamis/tamis.toml 01JX4Q8M2Z0000AB
  tamis held release --config /etc/tamis/tamis.toml 01JX4Q8M2Z0000AB --to message.eml
  tamis held purge --config /etc/tamis/tamis.toml --older-than 30d

`release` re-injects over SMTP to `[release] next_hop`: point it at a port of your relay
that delivers without asking tamis again, or the message would be judged (and held) anew.
Each subcommand's --help says more. Everything a sender wrote is escaped on a terminal.

Exit codes: 0 success; 1 operational failure (the store, or a next hop that did not take
released mail); 2 bad arguments or no store at the path; 3 partly done (some message not
found, already released or being released elsewhere).";

const RELEASE_HELP: &str = "\
Each message goes to its held recipients with its original sender, byte for byte as it was
held. It is claimed first, so a second release of the same message at the same time, from
this or another command, does nothing. If the next hop refuses or cannot be reached, the
message stays held and the command says why:
  a 4xx refusal       the next hop refused for now; try again later;
  a 5xx refusal       it will refuse this message again; release it with --to and deliver
                      it by hand;
  a connection error  the next hop is down or unreachable; the remaining messages are not
                      tried.
Every recipient must be accepted: one refused recipient leaves the whole message held.

Exit codes: 0 every message released; 1 some message could not be delivered (still held),
or the store failed; 2 bad arguments; 3 some message was not found, already released or
being released by another command (nothing done for it).";

#[derive(clap::Args, Debug)]
struct DeleteArgs {
    /// Verdict ids of the held messages.
    #[arg(required = true, value_name = "ID")]
    ids: Vec<String>,
}

#[derive(clap::Args, Debug)]
#[command(group(clap::ArgGroup::new("what").required(true).args(["older_than", "retention"])))]
struct PurgeArgs {
    /// Remove held mail (held or released, not being released) held longer ago than this:
    /// 30d, 2w.
    #[arg(long, value_name = "AGE", value_parser = parse_age)]
    older_than: Option<i64>,
    /// Apply the configured retention: held mail past its expiry (`[store]
    /// quarantine_days`), and journal entries and reports older than `[store]
    /// journal_days`.
    #[arg(long)]
    retention: bool,
}

#[derive(clap::Args, Debug)]
struct UnclaimArgs {
    /// Put back claims older than this. A claim this old belongs to a release that died:
    /// the longest release waits for the timeouts in `[release]`. A message put back may
    /// have been delivered already; releasing it again delivers it twice.
    #[arg(long, value_name = "AGE", value_parser = parse_age, default_value = "1h")]
    older_than: i64,
}

/// Runs `tamis held`.
pub fn run(args: &HeldArgs) -> anyhow::Result<u8> {
    let (config, store) = args.store.open()?;
    let format = args.store.format;
    match &args.command {
        HeldCommand::List(a) => list(&store, a, format),
        HeldCommand::Show(a) => show(&store, &config, a, format),
        HeldCommand::Release(a) => release(&store, &config, a, format),
        HeldCommand::Delete(a) => delete(&store, a, format),
        HeldCommand::Purge(a) => purge(&store, a, format),
        HeldCommand::Unclaim(a) => unclaim(&store, a, format),
    }
}

// --- list ----------------------------------------------------------------------------

/// A held message in JSON.
#[derive(Serialize)]
struct HeldOut<'a> {
    verdict_id: &'a str,
    held_at: Time,
    expires_at: Time,
    state: HeldState,
    sender: &'a str,
    recipients: &'a [String],
    size: u64,
    stored_size: u64,
    margin: Option<f64>,
    probability: Option<f64>,
    model: &'a str,
    domains: Vec<DomainOut<'a>>,
    reasons: &'a [String],
}

#[derive(Serialize)]
struct DomainOut<'a> {
    domain: &'a str,
    recipients: u32,
    action: &'static str,
    enforced: &'static str,
}

impl<'a> HeldOut<'a> {
    fn of(s: &'a HeldSummary) -> HeldOut<'a> {
        HeldOut {
            verdict_id: &s.entry.verdict_id,
            held_at: Time::of(s.held_at),
            expires_at: Time::of(s.expires_at),
            state: s.state,
            sender: &s.sender,
            recipients: &s.recipients,
            size: s.size,
            stored_size: s.stored_size,
            margin: s.entry.margin,
            probability: s.entry.probability,
            model: &s.entry.model,
            domains: s
                .entry
                .outcomes
                .iter()
                .map(|o| DomainOut {
                    domain: &o.domain,
                    recipients: o.recipients,
                    action: o.action.as_str(),
                    enforced: o.enforced.as_str(),
                })
                .collect(),
            reasons: &s.entry.reasons,
        }
    }
}

fn list(store: &SqliteStore, args: &ListArgs, format: Format) -> anyhow::Result<u8> {
    let filter = HeldFilter {
        domain: args.domain.clone(),
        since: args.since.map(|age| now().saturating_sub(age)),
        until: None,
        min_margin: args.min_margin,
        max_margin: args.max_margin,
        state: args.state.into(),
        limit: args.limit,
        offset: args.offset,
    };
    let held = store.list_held(&filter)?;
    if format == Format::Json {
        let out: Vec<HeldOut<'_>> = held.iter().map(HeldOut::of).collect();
        print_json(&serde_json::json!({ "held": out }))?;
        return Ok(EXIT_OK);
    }
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    for s in &held {
        write_summary(&mut out, s)?;
    }
    let state = format!("{:?}", args.state).to_lowercase();
    match held.len() {
        0 => writeln!(out, "no {state} messages match")?,
        n if n as u64 == u64::from(args.limit) => writeln!(
            out,
            "{n} {state} messages shown, newest first; more may follow: --offset {}",
            args.offset + n as u64
        )?,
        n => writeln!(out, "{n} {state} messages, newest first")?,
    }
    out.flush()?;
    Ok(EXIT_OK)
}

fn write_summary(out: &mut impl Write, s: &HeldSummary) -> std::io::Result<()> {
    let e = &s.entry;
    let more = s.recipients.len().saturating_sub(3);
    let recipients: Vec<String> = s
        .recipients
        .iter()
        .take(3)
        .map(|r| format!("<{}>", shown(r)))
        .collect();
    writeln!(
        out,
        "{}  {}  margin {:>8}  {:>9} B  {:?}  from <{}> to {}{}",
        shown(&e.verdict_id),
        utc(s.held_at),
        margin_text(e.margin),
        s.size,
        s.state,
        shown(&s.sender),
        recipients.join(", "),
        if more > 0 {
            format!(" (+{more} more)")
        } else {
            String::new()
        }
    )?;
    let domains: Vec<String> = e
        .outcomes
        .iter()
        .filter(|o| o.action == Action::Quarantine)
        .map(|o| shown(&o.domain).to_string())
        .collect();
    let reasons: Vec<String> = e.reasons.iter().map(|r| shown(r).to_string()).collect();
    writeln!(
        out,
        "    held for {}; reasons: {}",
        domains.join(", "),
        if reasons.is_empty() {
            "(none recorded)".to_string()
        } else {
            reasons.join(", ")
        }
    )
}

// --- show ----------------------------------------------------------------------------

#[derive(Serialize)]
struct ShowOut<'a> {
    #[serde(flatten)]
    held: HeldOut<'a>,
    header: Vec<String>,
    seen: Option<SeenOut<'a>>,
}

/// What the filter saw, as `tamis extract` reports it.
#[derive(Serialize)]
struct SeenOut<'a> {
    subject: &'a str,
    body: &'a [String],
    hidden: &'a [String],
    url_hosts: &'a [String],
    sender_domain: Option<&'a str>,
    auth_results: &'a [String],
    signals: Vec<String>,
    subject_tokens: Vec<&'a str>,
    body_tokens: Vec<&'a str>,
    hidden_tokens: Vec<&'a str>,
}

/// The header section's lines (up to the first empty line), without line ends.
fn header_lines(message: &[u8]) -> Vec<&[u8]> {
    let mut lines = Vec::new();
    for line in message.split(|&b| b == b'\n') {
        let line = line.strip_suffix(b"\r").unwrap_or(line);
        if line.is_empty() {
            break;
        }
        lines.push(line);
    }
    lines
}

fn show(
    store: &SqliteStore,
    config: &Config,
    args: &ShowArgs,
    format: Format,
) -> anyhow::Result<u8> {
    let Some(held) = store.get_held(&args.id)? else {
        return Err(BadInput(format!(
            "no held message has the verdict id \"{}\" (never held, deleted or purged); `tamis held list` shows the ids",
            shown(&args.id)
        ))
        .into());
    };
    if args.raw {
        return write_stdout(&held.message).map(|()| EXIT_OK);
    }
    let mut vectorizer = Vectorizer::for_config(config);
    let analyzer = vectorizer.analyzer().and_then(|a| {
        let read = a.vectorize(&held.message).is_ok();
        read.then_some(&*a)
    });
    let seen = analyzer.map(|a| {
        let x = a.extracted();
        let f = a.fields();
        SeenOut {
            subject: &x.subject,
            body: &x.body,
            hidden: &x.hidden,
            url_hosts: &x.url_hosts,
            sender_domain: x.sender_domain.as_deref(),
            auth_results: &x.auth_results,
            signals: x.signals.iter().map(ToString::to_string).collect(),
            subject_tokens: f.subject.iter().collect(),
            body_tokens: f.body.iter().collect(),
            hidden_tokens: f.hidden.iter().collect(),
        }
    });
    let header = header_lines(&held.message);
    if format == Format::Json {
        let out = ShowOut {
            held: HeldOut::of(&held.summary),
            header: header
                .iter()
                .map(|l| String::from_utf8_lossy(l).into_owned())
                .collect(),
            seen,
        };
        print_json(&out)?;
        return Ok(EXIT_OK);
    }
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    write_details(&mut out, &held, &header, seen.as_ref(), args.max_text)?;
    out.flush()?;
    Ok(EXIT_OK)
}

fn write_details(
    out: &mut impl Write,
    held: &HeldMessage,
    header: &[&[u8]],
    seen: Option<&SeenOut<'_>>,
    max_text: usize,
) -> std::io::Result<()> {
    let s = &held.summary;
    let e = &s.entry;
    writeln!(out, "verdict     {}", shown(&e.verdict_id))?;
    writeln!(
        out,
        "state       {:?}, held {} UTC, expires {} UTC",
        s.state,
        utc(s.held_at),
        utc(s.expires_at)
    )?;
    let probability = e
        .probability
        .map(|p| format!(", P(junk) {p:.4}"))
        .unwrap_or_default();
    writeln!(
        out,
        "score       margin {}{probability}, model {}",
        margin_text(e.margin),
        shown(&e.model)
    )?;
    for o in &e.outcomes {
        let tag_only = if o.action != o.enforced {
            format!(" (would be {} with tag-only off)", o.enforced)
        } else {
            String::new()
        };
        writeln!(
            out,
            "domain      {}: {} for {} recipient(s){tag_only}",
            shown(&o.domain),
            o.action,
            o.recipients
        )?;
    }
    writeln!(out, "sender      <{}>", shown(&s.sender))?;
    for r in &s.recipients {
        writeln!(out, "recipient   <{}>", shown(r))?;
    }
    writeln!(
        out,
        "size        {} bytes ({} stored)",
        s.size, s.stored_size
    )?;
    for r in &e.reasons {
        writeln!(out, "reason      {}", shown(r))?;
    }
    writeln!(out, "--- header")?;
    for line in header {
        writeln!(out, "{}", shown_bytes(line))?;
    }
    let Some(seen) = seen else {
        writeln!(
            out,
            "--- the filter could not read this as mail (no header section)"
        )?;
        return Ok(());
    };
    writeln!(out, "--- what the filter saw")?;
    writeln!(out, "subject     {}", shown(seen.subject))?;
    for (name, parts) in [("body", seen.body), ("hidden", seen.hidden)] {
        for part in parts {
            let cut = cut_at(part, max_text);
            writeln!(
                out,
                "{name:<11} {}{}",
                shown(cut),
                if cut.len() < part.len() {
                    format!(" ...[+{} bytes; --max-text]", part.len() - cut.len())
                } else {
                    String::new()
                }
            )?;
        }
    }
    let list = |items: &[String]| {
        items
            .iter()
            .map(|i| shown(i).to_string())
            .collect::<Vec<_>>()
            .join(", ")
    };
    writeln!(out, "url hosts   {}", list(seen.url_hosts))?;
    writeln!(
        out,
        "from domain {}",
        shown(seen.sender_domain.unwrap_or("-"))
    )?;
    writeln!(out, "auth        {}", list(seen.auth_results))?;
    writeln!(out, "signals     {}", seen.signals.join(", "))?;
    for (name, tokens) in [
        ("subject", &seen.subject_tokens),
        ("body", &seen.body_tokens),
        ("hidden", &seen.hidden_tokens),
    ] {
        let text = tokens.join(" ");
        writeln!(
            out,
            "{:<11} {} tokens: {}",
            format!("{name} words"),
            tokens.len(),
            shown(cut_at(&text, max_text))
        )?;
    }
    Ok(())
}

/// The longest prefix of `text` of at most `max` bytes that ends on a character boundary.
fn cut_at(text: &str, max: usize) -> &str {
    let mut end = max.min(text.len());
    while !text.is_char_boundary(end) {
        end -= 1;
    }
    text.get(..end).unwrap_or(text)
}

/// Writes bytes a sender controls to standard output, unless it is a terminal.
fn write_stdout(bytes: &[u8]) -> anyhow::Result<()> {
    let stdout = std::io::stdout();
    if stdout.is_terminal() {
        return Err(BadInput(
            "standard output is a terminal: the message's exact bytes (which its sender chose) are written only to a file or a pipe; redirect it, e.g. `> message.eml`".to_string(),
        )
        .into());
    }
    let mut out = stdout.lock();
    out.write_all(bytes)?;
    out.flush()?;
    Ok(())
}

// --- release -------------------------------------------------------------------------

/// Where released mail goes.
enum Target<'a> {
    Smtp(Box<SmtpDelivery>),
    File(&'a Path),
    Stdout,
    Folder(&'a Path),
}

impl Target<'_> {
    fn describe(&self) -> String {
        match self {
            Target::Smtp(smtp) => format!("re-injected to {}", smtp.next_hop()),
            Target::File(p) => format!("written to {}", p.display()),
            Target::Stdout => "written to standard output".to_string(),
            Target::Folder(p) => format!("written into {}", p.display()),
        }
    }

    fn close(self) {
        if let Target::Smtp(smtp) = self {
            smtp.close();
        }
    }
}

impl Deliver for Target<'_> {
    fn deliver(&mut self, held: &HeldMessage) -> Result<String, Undelivered> {
        let id = &held.summary.entry.verdict_id;
        let written = match self {
            Target::File(path) => write_private(path, &held.message),
            Target::Folder(folder) => {
                write_private(&folder.join(format!("{id}.eml")), &held.message)
            }
            Target::Stdout => write_stdout(&held.message),
            Target::Smtp(smtp) => {
                return smtp.deliver(held).map_err(|u| Undelivered {
                    detail: with_advice(&u),
                    ..u
                });
            }
        };
        match written {
            Ok(()) => Ok(self.describe()),
            Err(e) => Err(Undelivered {
                failure: Failure::Permanent,
                detail: format!("{e:#}"),
            }),
        }
    }
}

/// What happened to one message.
#[derive(Serialize)]
struct ReleaseResult {
    verdict_id: String,
    /// `released`, `failed` (still held), `not-tried` (still held), `not-found`,
    /// `already-released`, `in-progress`.
    outcome: &'static str,
    /// For a failure: `transient` (4xx), `permanent` (5xx or not sendable), `connection`.
    #[serde(skip_serializing_if = "Option::is_none")]
    failure: Option<&'static str>,
    detail: String,
}

fn failure_name(f: Failure) -> &'static str {
    match f {
        Failure::Transient => "transient",
        Failure::Permanent => "permanent",
        Failure::Connection => "connection",
    }
}

fn release_target<'a>(config: &Config, args: &'a ReleaseArgs) -> anyhow::Result<Target<'a>> {
    if let Some(path) = &args.to {
        if args.ids.len() != 1 {
            return Err(BadInput(format!(
                "--to writes one message, and {} ids were given; use --into FOLDER for several",
                args.ids.len()
            ))
            .into());
        }
        if path.as_os_str() == "-" {
            if std::io::stdout().is_terminal() {
                return Err(BadInput(
                    "--to - writes the message's exact bytes, which its sender chose, and standard output is a terminal; redirect it to a file".to_string(),
                )
                .into());
            }
            return Ok(Target::Stdout);
        }
        check_output(path)?;
        return Ok(Target::File(path));
    }
    if let Some(folder) = &args.into {
        if !folder.is_dir() {
            return Err(BadInput(format!("--into {}: not a folder", folder.display())).into());
        }
        if let Some(bad) = args
            .ids
            .iter()
            .find(|id| !id.bytes().all(|b| b.is_ascii_alphanumeric()))
        {
            return Err(BadInput(format!(
                "\"{}\" is not a verdict id (letters and digits only), so it cannot name a file",
                shown(bad)
            ))
            .into());
        }
        return Ok(Target::Folder(folder));
    }
    let next_hop = match (&args.next_hop, &config.release.next_hop) {
        (Some(hop), _) => {
            crate::config::check_next_hop(hop)
                .map_err(|e| BadInput(e.replacen("release.next_hop", "--next-hop", 1)))?;
            hop.clone()
        }
        (None, Some(hop)) => hop.clone(),
        (None, None) => {
            return Err(BadInput(
                "no next hop to re-inject to: set `next_hop` in the configuration's [release] table (and give --config), or --next-hop HOST:PORT, or write the message to a file with --to FILE".to_string(),
            )
            .into());
        }
    };
    let helo_name = config
        .release
        .helo_name
        .clone()
        .unwrap_or_else(crate::release::host_name);
    Ok(Target::Smtp(Box::new(SmtpDelivery::new(
        &next_hop,
        &helo_name,
        config.release.timeouts(),
    ))))
}

/// An SMTP failure with what to do about it.
fn with_advice(u: &Undelivered) -> String {
    let advice = match u.failure {
        Failure::Transient => "the next hop refused for now; try again later",
        Failure::Permanent => {
            "the next hop will refuse this message again as it is; release it with --to FILE and deliver it by hand"
        }
        Failure::Connection => "check that the next hop is up, then try again",
    };
    format!("{}; {advice}", u.detail)
}

/// Writes held mail to a file only its owner can read, atomically.
fn write_private(path: &Path, bytes: &[u8]) -> anyhow::Result<()> {
    crate::fsio::write_file_mode(path, 0o600, |out| out.write_all(bytes))
        .map_err(super::input::write_failed)
}

fn release(
    store: &SqliteStore,
    config: &Config,
    args: &ReleaseArgs,
    format: Format,
) -> anyhow::Result<u8> {
    let mut target = release_target(config, args)?;
    let to_stdout = matches!(target, Target::Stdout);
    let mut vectorizer = Vectorizer::for_config(config);
    let mut features = |raw: &[u8]| vectorizer.vector(raw);
    let mut results = Vec::new();
    // Once the next hop cannot be reached, the other messages are left held untried
    // rather than each waiting for its own connection timeout.
    let mut unreachable: Option<String> = None;
    for id in &args.ids {
        let result = |outcome, failure, detail: String| ReleaseResult {
            verdict_id: id.clone(),
            outcome,
            failure,
            detail,
        };
        if let Some(why) = &unreachable {
            results.push(result(
                "not-tried",
                Some("connection"),
                format!("not tried, still held: {why}"),
            ));
            continue;
        }
        match crate::release::release(store, id, &mut target, &mut features)? {
            Outcome::Released { detail, .. } => results.push(result("released", None, detail)),
            Outcome::Unrecorded { detail, error } => {
                // Delivered, but not recorded: say exactly what state it is in.
                let done = format!(
                    "{detail}, but the store could not record the release ({error}); the message stays marked as being released, and `held unclaim` would make it releasable (and deliverable) again"
                );
                results.push(result("released", None, done));
                report(&results, format, to_stdout)?;
                return Ok(EXIT_FAILURE);
            }
            Outcome::Failed(u) => {
                if u.failure == Failure::Connection {
                    unreachable = Some(u.detail.clone());
                }
                results.push(result(
                    "failed",
                    Some(failure_name(u.failure)),
                    format!("NOT released, still held: {}", u.detail),
                ));
            }
            Outcome::NotFound => results.push(result(
                "not-found",
                None,
                "no held message has this verdict id (never held, deleted or purged)".to_string(),
            )),
            Outcome::AlreadyReleased => results.push(result(
                "already-released",
                None,
                "already released; nothing done".to_string(),
            )),
            Outcome::InProgress => results.push(result(
                "in-progress",
                None,
                "another release of this message is in progress; nothing done".to_string(),
            )),
        }
    }
    target.close();
    report(&results, format, to_stdout)?;
    let failed = results
        .iter()
        .any(|r| matches!(r.outcome, "failed" | "not-tried"));
    let skipped = results.iter().any(|r| r.outcome != "released");
    Ok(if failed {
        EXIT_FAILURE
    } else if skipped {
        EXIT_PARTIAL
    } else {
        EXIT_OK
    })
}

/// Prints the results: on stdout, or on stderr when the message itself went to stdout.
fn report(results: &[ReleaseResult], format: Format, to_stdout: bool) -> anyhow::Result<()> {
    let released = results.iter().filter(|r| r.outcome == "released").count();
    if format == Format::Json && !to_stdout {
        print_json(&serde_json::json!({
            "results": results,
            "released": released,
            "not_released": results.len() - released,
        }))?;
        return Ok(());
    }
    let mut text = String::new();
    for r in results {
        text.push_str(&format!("{}: {}\n", shown(&r.verdict_id), r.detail));
    }
    text.push_str(&format!(
        "{released} of {} message(s) released\n",
        results.len()
    ));
    if to_stdout {
        eprint!("{text}");
    } else {
        print!("{text}");
    }
    Ok(())
}

// --- delete, purge, unclaim ----------------------------------------------------------

fn delete(store: &SqliteStore, args: &DeleteArgs, format: Format) -> anyhow::Result<u8> {
    let mut results = Vec::new();
    for id in &args.ids {
        let (outcome, detail) = if store.delete_held(id)? {
            ("deleted", "deleted")
        } else {
            match store.get_held(id)? {
                Some(h) if h.summary.state == HeldState::Releasing => (
                    "in-progress",
                    "being released by another command; not deleted",
                ),
                _ => (
                    "not-found",
                    "no held message has this verdict id; nothing deleted",
                ),
            }
        };
        results.push(serde_json::json!({ "verdict_id": id, "outcome": outcome, "detail": detail }));
        if format == Format::Text {
            println!("{}: {detail}", shown(id));
        }
    }
    let all = results.iter().all(|r| r["outcome"] == "deleted");
    if format == Format::Json {
        print_json(&serde_json::json!({ "results": results }))?;
    }
    Ok(if all { EXIT_OK } else { EXIT_PARTIAL })
}

fn purge(store: &SqliteStore, args: &PurgeArgs, format: Format) -> anyhow::Result<u8> {
    let at = now();
    if let Some(age) = args.older_than {
        let cutoff = at.saturating_sub(age);
        let held = store.purge_held_before(cutoff)?;
        if format == Format::Json {
            print_json(&serde_json::json!({ "held": held, "before": Time::of(cutoff) }))?;
        } else {
            println!(
                "removed {held} held message(s) held before {} UTC",
                utc(cutoff)
            );
        }
    } else {
        let counts = store.purge_expired(at)?;
        if format == Format::Json {
            print_json(&counts)?;
        } else {
            println!(
                "removed {} expired held message(s), {} journal entr(ies) and {} report(s) past retention",
                counts.held, counts.journal, counts.reports
            );
        }
    }
    Ok(EXIT_OK)
}

fn unclaim(store: &SqliteStore, args: &UnclaimArgs, format: Format) -> anyhow::Result<u8> {
    let cutoff = now().saturating_sub(args.older_than);
    let n = store.reset_stale_claims(cutoff)?;
    if format == Format::Json {
        print_json(&serde_json::json!({ "put_back": n, "claimed_before": Time::of(cutoff) }))?;
    } else {
        println!(
            "{n} message(s) whose release was claimed before {} UTC are held again",
            utc(cutoff)
        );
    }
    Ok(EXIT_OK)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn header_lines_stop_at_the_empty_line() {
        let lines = header_lines(b"A: 1\r\n b\r\nC: 2\n\r\nbody\r\n");
        assert_eq!(lines, vec![&b"A: 1"[..], b" b", b"C: 2"]);
        assert!(header_lines(b"\r\nbody").is_empty());
    }

    #[test]
    fn cuts_fall_on_character_boundaries() {
        assert_eq!(cut_at("héllo", 2), "h");
        assert_eq!(cut_at("héllo", 3), "hé");
        assert_eq!(cut_at("abc", 10), "abc");
    }
}
