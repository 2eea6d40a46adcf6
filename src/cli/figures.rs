//! `tamis figures`: per-domain figures over a window — what the filter did, what people
//! said about it, the false-positive rate with its 95% bound against the domain's target,
//! and the catch rate — from `Store::figures`, whose definitions (`store::figures`) the
//! long help repeats word for word in substance.
//!
//! Invariant: a domain whose evidence is too thin is never reported as meeting or missing
//! its target; the command says why instead.

use serde::Serialize;

use super::EXIT_OK;
use super::input::BadInput;
use super::ops::{Format, StoreArgs, Time, parse_age, print_json, shown, utc};
use crate::store::figures::{ActionCounts, MIN_LEGITIMATE};
use crate::store::record::now;
use crate::store::{DomainFigures, Rate, Store, TargetCheck};

/// Arguments of `tamis figures`.
#[derive(clap::Args, Debug)]
#[command(after_long_help = DEFINITIONS)]
pub struct FiguresArgs {
    #[command(flatten)]
    store: StoreArgs,
    /// The window: verdicts made within this age (12h, 7d, 4w).
    #[arg(long, value_name = "AGE", value_parser = parse_age, default_value = "7d")]
    since: i64,
    /// Only this recipient domain (its figures are shown even when it had no mail).
    #[arg(long)]
    domain: Option<String>,
    /// The false-positive target for every domain (e.g. 0.001), instead of the
    /// configuration's `target_fpr` (per domain section, else `[policy] target_fpr`,
    /// default 0.001).
    #[arg(long, value_name = "RATE")]
    target: Option<f64>,
}

const DEFINITIONS: &str = "\
Example: tamis figures --config /etc/tamis/tamis.toml --since 30d --domain example.org

Definitions (per recipient domain D; the window selects verdicts made within --since):

  message      a journal entry with at least one recipient in D, counted once however
               many recipients of D it had. Its action is what was done for D; its enforced
               action what the policy would have done with tag_only off (the same outside
               tag-only mode). 'would quarantine' counts messages tagged only because of
               tag-only mode.
  label        what the latest matched report on the message for D says: a report naming
               D, or an operator's, auditor's or release's report naming no domain. A
               release is a legitimate report. Reports count whenever they were made; the
               window selects the messages. Unmatched reports are never labels.
  legitimate   messages labelled legitimate, plus unlabelled messages whose enforced action
               is accept (mail delivered untouched that nobody reported is taken as
               legitimate; common practice). Unlabelled tagged or held mail is in neither
               count: nobody has said what it is.
  false pos.   legitimate messages whose enforced action is quarantine: held (or held but
               for tag-only mode) mail that someone reported legitimate or released.
  FP rate      false positives / legitimate, with the one-sided 95% Clopper-Pearson upper
               bound (the true rate is at most this with 95% confidence) and lower bound.
  junk         messages labelled junk, plus unlabelled messages whose enforced action is
               quarantine. Caught: junk whose enforced action is quarantine.
  catch rate   caught / junk: the share of known or presumed junk kept out of the inbox.
  audit        over held mail of D with an audit answer: legitimate / reviewed. The audit
               sample is random, so this estimates the share of legitimate mail among held
               mail without the bias of who complains.
  target       met: the upper bound is at or below the target; missed: the lower bound is
               above it; undecided: the interval contains it, or the evidence is too thin.
  too thin     no matched report and no release about the window's mail (zero false
               positives then only means nobody looked), or fewer than 300 legitimate
               messages (even with none held, the 95% bound could not fall below 1%).

Exit codes: 0 success; 1 the store failed; 2 bad arguments or no store at the path.";

/// A rate in JSON.
#[derive(Serialize)]
struct RateOut {
    count: u64,
    of: u64,
    value: Option<f64>,
    lower_95: f64,
    upper_95: f64,
}

impl From<&Rate> for RateOut {
    fn from(r: &Rate) -> RateOut {
        RateOut {
            count: r.count,
            of: r.of,
            value: r.value,
            lower_95: r.lower,
            upper_95: r.upper,
        }
    }
}

/// One domain's figures in JSON, in the words people use (`legitimate`, not "not junk").
#[derive(Serialize)]
struct FiguresOut {
    domain: String,
    since: Time,
    messages: u64,
    by_action: ActionCounts,
    by_enforced_action: ActionCounts,
    would_quarantine: u64,
    unscanned: u64,
    reports_junk: u64,
    reports_legitimate: u64,
    releases: u64,
    unmatched_reports: u64,
    legitimate: u64,
    false_positives: RateOut,
    junk: u64,
    catch_rate: RateOut,
    audit_legitimate: RateOut,
    target_fpr: f64,
    /// `met`, `missed` or `undecided`.
    target: TargetCheck,
    too_thin: bool,
    thin_reason: Option<String>,
}

fn to_out(f: &DomainFigures, target: f64) -> FiguresOut {
    FiguresOut {
        domain: f.domain.clone(),
        since: Time::of(f.since),
        messages: f.messages(),
        by_action: f.by_action,
        by_enforced_action: f.by_enforced_action,
        would_quarantine: f.would_quarantine,
        unscanned: f.unscanned,
        reports_junk: f.reports_junk,
        reports_legitimate: f.reports_not_junk,
        releases: f.releases,
        unmatched_reports: f.unmatched_reports,
        legitimate: f.legitimate,
        false_positives: (&f.false_positives).into(),
        junk: f.junk,
        catch_rate: (&f.catch_rate).into(),
        audit_legitimate: (&f.audit).into(),
        target_fpr: target,
        target: f.against(target),
        too_thin: f.too_thin,
        thin_reason: f.thin_reason.clone(),
    }
}

/// A share as a percentage with enough digits for small rates.
fn percent(x: f64) -> String {
    let p = x * 100.0;
    if p == 0.0 || p >= 10.0 {
        format!("{p:.1}%")
    } else if p >= 0.1 {
        format!("{p:.2}%")
    } else {
        format!("{p:.3}%")
    }
}

fn rate_text(r: &Rate, of_what: &str) -> String {
    match r.value {
        None => format!("0 of 0 {of_what}: no rate"),
        Some(v) => format!(
            "{} of {} {of_what} = {} (95% bounds {} to {})",
            r.count,
            r.of,
            percent(v),
            percent(r.lower),
            percent(r.upper)
        ),
    }
}

fn write_text(f: &FiguresOut, raw: &DomainFigures) {
    let name = if f.domain.is_empty() {
        "(recipients without a domain)".to_string()
    } else {
        shown(&f.domain).to_string()
    };
    let a = &f.by_action;
    println!("{name}  (verdicts since {} UTC)", utc(f.since.unix));
    println!(
        "  messages        {}: accept {}, tag {}, quarantine {}, defer {}",
        f.messages, a.accept, a.tag, a.quarantine, a.defer
    );
    if f.would_quarantine > 0 {
        println!(
            "  tag-only        {} tagged message(s) would have been held with tag_only off",
            f.would_quarantine
        );
    }
    if f.unscanned > 0 {
        println!(
            "  unscanned       {} (the failure mode decided)",
            f.unscanned
        );
    }
    println!(
        "  reports         junk {}, legitimate {}; releases {}; unmatched {} (not counted)",
        f.reports_junk, f.reports_legitimate, f.releases, f.unmatched_reports
    );
    println!(
        "  false positives {}",
        rate_text(&raw.false_positives, "legitimate")
    );
    println!("  catch rate      {}", rate_text(&raw.catch_rate, "junk"));
    if raw.audit.of > 0 {
        println!(
            "  audit           {}",
            rate_text(&raw.audit, "reviewed held messages legitimate")
        );
    }
    let verdict = match f.target {
        TargetCheck::Met => format!(
            "MET: the false-positive rate is at most {} with 95% confidence",
            percent(raw.false_positives.upper)
        ),
        TargetCheck::Missed => format!(
            "MISSED: the false-positive rate is above it with 95% confidence (at least {})",
            percent(raw.false_positives.lower)
        ),
        TargetCheck::Undecided if f.too_thin => "cannot tell: the evidence is too thin".to_string(),
        TargetCheck::Undecided => {
            "cannot tell yet: the 95% interval contains the target".to_string()
        }
    };
    println!("  target {:<8} {verdict}", percent(f.target_fpr));
    if let Some(why) = &f.thin_reason {
        println!("  too thin        {why}");
    }
    println!();
}

/// Runs `tamis figures`.
pub fn run(args: &FiguresArgs) -> anyhow::Result<u8> {
    if let Some(t) = args.target
        && !(t > 0.0 && t < 1.0)
    {
        return Err(BadInput(format!(
            "--target {t} is not a rate; give a share between 0 and 1, e.g. 0.001 for 0.1%"
        ))
        .into());
    }
    let (config, store) = args.store.open()?;
    let since = now().saturating_sub(args.since);
    let figures = store.figures(since, args.domain.as_deref())?;
    let target_of = |domain: &str| {
        args.target
            .unwrap_or_else(|| config.policy.target_fpr_of_domain(domain))
    };
    if args.store.format == Format::Json {
        let out: Vec<FiguresOut> = figures
            .iter()
            .map(|f| to_out(f, target_of(&f.domain)))
            .collect();
        print_json(&serde_json::json!({
            "since": Time::of(since),
            "min_legitimate": MIN_LEGITIMATE,
            "domains": out,
        }))?;
        return Ok(EXIT_OK);
    }
    if figures.is_empty() {
        println!("no verdicts since {} UTC", utc(since));
    }
    for f in &figures {
        write_text(&to_out(f, target_of(&f.domain)), f);
    }
    Ok(EXIT_OK)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn percentages_keep_small_rates_readable() {
        assert_eq!(percent(0.0), "0.0%");
        assert_eq!(percent(0.000_98), "0.098%");
        assert_eq!(percent(0.0123), "1.23%");
        assert_eq!(percent(0.5), "50.0%");
    }
}
