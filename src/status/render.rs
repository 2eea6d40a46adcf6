//! The page's HTML: the overview, a domain's view, the answer to an action, and errors,
//! around the charts of [`super::svg`].
//!
//! Invariants: every value that came from a message or a peer (domains, addresses,
//! header fields, reasons, verdict ids) goes through [`Html::text`] or [`Html::attr`];
//! the document is self-contained — one inline style sheet whose hash the
//! Content-Security-Policy names ([`content_security_policy`]), inline SVG, no script, no
//! external resource — so it reads the same with JavaScript off; figures the charts show
//! are also in tables, each cell marked with a `data-k` name.

use std::sync::OnceLock;

use sha2::{Digest, Sha256};

use super::html::{Html, count, percent, url_encode, utc};
use super::page::{Context, DomainLine, DomainView, HeldLine, Overview, Section, WINDOWS, Window};
use super::svg;
use crate::policy::Scale;
use crate::store::figures::{DomainFigures, MIN_LEGITIMATE, TargetCheck};
use crate::store::{AuditItem, HeldState, ReportKind};

/// The page's only style sheet.
const STYLE: &str = r#"
:root{--ink:#1f2328;--soft:#5d6670;--paper:#f6f4ef;--card:#fffefb;--rule:#d9d4c7;--band:#2b3a33;
--a:#8fae8b;--t:#d9a441;--q:#b5473a;--d:#7f8c99;--l:#5f8f6a;--j:#b5473a;--met:#4f7f5a;--miss:#b5473a;--und:#8a8f96}
*{box-sizing:border-box}
body{margin:0;background:var(--paper);color:var(--ink);font:13px/1.4 "DejaVu Sans","Liberation Sans",system-ui,sans-serif}
a{color:#1d5c8a}
.top{background:var(--band);color:#eef0e8;padding:7px 16px;display:flex;gap:18px;align-items:baseline;flex-wrap:wrap}
.top .mark{font-weight:700;letter-spacing:.14em;text-transform:lowercase;font-size:15px}
.top a{color:#f2e7c4}
.top .crumb{font-size:14px}
.top .facts{margin-left:auto;font-size:12px;color:#cfd6cc}
.win a,.win b{padding:1px 6px;border:1px solid #55675d;margin-left:-1px;text-decoration:none}
.win b{background:#eef0e8;color:var(--band)}
main{padding:12px 16px;max-width:1240px}
.panel{background:var(--card);border:1px solid var(--rule);border-left:4px solid var(--band);padding:8px 12px 10px;margin:0 0 12px}
h2{font-size:11px;letter-spacing:.12em;text-transform:uppercase;color:var(--soft);margin:0 0 6px;font-weight:700}
.row{display:flex;gap:12px;flex-wrap:wrap}
.row>.panel{flex:1 1 300px}
.big{font-size:26px;font-weight:700;font-variant-numeric:tabular-nums}
.muted{color:var(--soft)}
.check{display:inline-block;padding:0 7px;border:2px solid;font-weight:700;font-size:11px;letter-spacing:.08em;text-transform:uppercase}
.check.met{color:var(--met)}.check.missed{color:var(--miss)}.check.undecided{color:var(--und)}
.thin{border-left:3px solid var(--t);padding-left:7px;margin:6px 0 0;color:#5b4a1e}
table{border-collapse:collapse;width:100%}
th,td{padding:3px 7px;text-align:left;vertical-align:top;border-bottom:1px solid #ece8de}
th{font-size:11px;color:var(--soft);font-weight:600;border-bottom:1px solid var(--rule);white-space:nowrap}
td.dom{white-space:nowrap}
td.n,th.n{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
tbody tr:nth-child(even){background:#faf8f3}
table.kv td{border:0;padding:1px 7px 1px 0}
table.kv td:first-child,table.kv td:nth-child(3){white-space:nowrap}
table.kv td.n{padding-right:14px}
.mono{font-family:"DejaVu Sans Mono","Liberation Mono",monospace;font-size:12px}
.why{font-family:"DejaVu Sans Mono","Liberation Mono",monospace;font-size:11px;color:#4a4f55}
.why span{display:inline-block;background:#f1ede3;border:1px solid #e2dccd;padding:0 4px;margin:0 3px 2px 0}
.env{font-size:12px;color:var(--soft)}
button{font:inherit;font-size:11px;padding:1px 7px;border:1px solid #9aa39b;background:#f4f2ec;cursor:pointer}
button.rel{border-color:var(--band)}
.act{background:#ece7da;border:1px solid var(--rule);padding:6px 10px;margin:0 0 12px}
.act input{font:inherit;width:22em}
.key{display:flex;gap:14px;font-size:12px;color:var(--soft);margin-top:2px}
.key i{display:inline-block;width:10px;height:10px;margin-right:4px;vertical-align:-1px}
.key .a{background:var(--a)}.key .t{background:var(--t)}.key .q{background:var(--q)}.key .d{background:var(--d)}
.key .w{background:repeating-linear-gradient(45deg,#d9a441,#d9a441 2px,#b5473a 2px,#b5473a 4px)}
.key .l{background:var(--l)}.key .j{background:var(--j)}
svg{display:block;max-width:100%;height:auto}
svg text{font:10px "DejaVu Sans","Liberation Sans",sans-serif;fill:var(--soft)}
svg .yl,svg .xl9,svg .il5{text-anchor:end}svg .xl,svg .il,svg .none{text-anchor:middle}svg .xl0,svg .il0{text-anchor:start}
svg .none{font-size:12px}
svg .ax{stroke:#7b8178}svg .grid{stroke:#e6e1d5}svg .tick{stroke:#9aa098}
svg .a{fill:var(--a)}svg .t{fill:var(--t)}svg .q{fill:var(--q)}svg .d{fill:var(--d)}
svg .w{fill:url(#hatch)}svg .hl{stroke:var(--q);stroke-width:2.4}
svg .l{fill:var(--l)}svg .j{fill:var(--j)}
svg .tl{stroke:var(--t);stroke-width:1.5;stroke-dasharray:4 3}svg .ql{stroke:var(--q);stroke-width:1.5;stroke-dasharray:4 3}
svg .tlt{fill:#8a6414}svg .qlt{fill:var(--q)}svg .side{font-weight:700}
svg .track{fill:#ebe7dc}svg .met{fill:var(--met)}svg .missed{fill:var(--miss)}svg .undecided{fill:var(--und)}
svg .est{fill:var(--ink)}svg .target{stroke:var(--ink);stroke-width:1.5;stroke-dasharray:3 2}
footer{padding:0 16px 16px;color:var(--soft);font-size:11px}
"#;

/// The `Content-Security-Policy` the page is served with: nothing may load or run but the
/// page's own style sheet (named by its SHA-256), forms post only to the page itself, and
/// no other site may frame it.
pub fn content_security_policy() -> &'static str {
    static CSP: OnceLock<String> = OnceLock::new();
    CSP.get_or_init(|| {
        let digest = Sha256::digest(STYLE.as_bytes());
        format!(
            "default-src 'none'; style-src 'sha256-{}'; form-action 'self'; frame-ancestors 'none'; base-uri 'none'",
            base64(&digest)
        )
    })
}

/// Standard base64 with padding (RFC 4648 §4).
fn base64(bytes: &[u8]) -> String {
    const ABC: &[u8; 64] = b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/";
    let mut out = String::with_capacity(bytes.len().div_ceil(3) * 4);
    for chunk in bytes.chunks(3) {
        let b = [
            chunk.first().copied().unwrap_or(0),
            chunk.get(1).copied().unwrap_or(0),
            chunk.get(2).copied().unwrap_or(0),
        ];
        let v = (u32::from(b[0]) << 16) | (u32::from(b[1]) << 8) | u32::from(b[2]);
        for i in 0..4 {
            if i <= chunk.len() {
                let index = ((v >> (18 - 6 * i)) & 63) as usize;
                out.push(char::from(ABC.get(index).copied().unwrap_or(b'A')));
            } else {
                out.push('=');
            }
        }
    }
    out
}

/// How a domain is named on the page.
fn domain_name(domain: &str) -> &str {
    if domain.is_empty() {
        "(no domain)"
    } else {
        domain
    }
}

fn domain_href(domain: &str, window: Window) -> String {
    format!("/domain?d={}&w={}", url_encode(domain), window.name)
}

fn head(h: &mut Html, title: &str) {
    h.raw("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><meta name=\"viewport\" content=\"width=device-width, initial-scale=1\"><meta name=\"referrer\" content=\"no-referrer\"><title>")
        .text(title)
        .raw("</title><style>")
        .raw(STYLE)
        .raw("</style></head><body>");
}

/// The dark band on top: where we are, the model, the mode, the window links.
fn band(h: &mut Html, context: &Context, domain: Option<&str>) {
    h.raw("<header class=\"top\"><span class=\"mark\">tamis</span><span class=\"crumb\">");
    match domain {
        None => {
            h.raw("status");
        }
        Some(d) => {
            h.raw("<a href=\"")
                .attr(&format!("/?w={}", context.window.name))
                .raw("\">status</a> › <b>")
                .text(domain_name(d))
                .raw("</b>");
        }
    }
    h.raw("</span><span class=\"win\">");
    for w in WINDOWS {
        if w == context.window {
            h.raw("<b>").text(w.name).raw("</b>");
        } else {
            let href = match domain {
                None => format!("/?w={}", w.name),
                Some(d) => domain_href(d, w),
            };
            h.raw("<a href=\"")
                .attr(&href)
                .raw("\">")
                .text(w.name)
                .raw("</a>");
        }
    }
    h.raw("</span><span class=\"facts\">model <span class=\"mono\">")
        .text(&context.model)
        .raw("</span> · ");
    if context.policy.tag_only() {
        h.raw("tag-only by default");
    } else {
        h.raw("quarantine on by default");
    }
    h.raw(" · ")
        .text(&utc(context.now))
        .raw(" UTC</span></header><main>");
}

fn foot(h: &mut Html, context: &Context) {
    h.raw("</main><footer>");
    match &context.store {
        Some(location) => {
            h.raw("store ").text(location);
        }
        None => {
            h.raw("no store");
        }
    }
    h.raw(" · false-positive target per domain: ")
        .text(&percent(context.policy.target_fpr()))
        .raw(" unless its section sets target_fpr · bounds are one-sided 95% Clopper–Pearson · ");
    if context.actions {
        h.raw("actions need the token");
    } else {
        h.raw("read-only: no [status] token_file");
    }
    h.raw("</footer></body></html>\n");
}

fn check_badge(h: &mut Html, check: TargetCheck) {
    let (class, word) = match check {
        TargetCheck::Met => ("met", "target met"),
        TargetCheck::Missed => ("missed", "target missed"),
        TargetCheck::Undecided => ("undecided", "undecided"),
    };
    h.raw("<span class=\"check ")
        .raw(class)
        .raw("\" data-k=\"check\">")
        .raw(word)
        .raw("</span>");
}

fn cell(h: &mut Html, key: &'static str, value: u64) {
    h.raw("<td class=\"n\" data-k=\"")
        .raw(key)
        .raw("\">")
        .text(&count(value))
        .raw("</td>");
}

fn thresholds_text(section: &Section) -> String {
    let t = section.thresholds;
    let (scale, fmt): (&str, fn(f64) -> String) = match t.scale() {
        Scale::Margin => ("margin", |v| format!("{v:+.3}")),
        Scale::Probability => ("P(junk)", |v| format!("{v:.4}")),
    };
    let hold = if section.tag_only {
        "tag-only (would hold)"
    } else {
        "hold"
    };
    format!(
        "tag at {scale} ≥ {}, {hold} at ≥ {}{}",
        fmt(t.tag()),
        fmt(t.quarantine()),
        if section.own {
            ""
        } else {
            " (default section)"
        }
    )
}

fn rate_cells(h: &mut Html, f: &DomainFigures) {
    match f.false_positives.value {
        Some(v) if f.too_thin => {
            h.raw("<td class=\"n muted\" data-k=\"fp\" title=\"too thin to claim a rate\">")
                .text(&percent(v))
                .raw(" thin</td>");
        }
        Some(v) => {
            h.raw("<td class=\"n\" data-k=\"fp\">")
                .text(&percent(v))
                .raw("</td>");
        }
        None => {
            h.raw("<td class=\"n muted\" data-k=\"fp\">–</td>");
        }
    }
    h.raw("<td class=\"n\" data-k=\"fp-bound\">")
        .text(&percent(f.false_positives.upper))
        .raw("</td>");
}

/// The overview page.
pub fn overview(o: &Overview) -> String {
    let c = &o.context;
    let mut h = Html::new();
    head(&mut h, "tamis status");
    band(&mut h, c, None);
    if c.store.is_none() {
        h.raw("<section class=\"panel\"><h2>No store</h2><p>This daemon runs without a store: verdicts are not journaled and nothing is held, so there is nothing to show here yet.</p></section>");
    }
    h.raw("<div class=\"row\"><section class=\"panel\"><h2>Held now</h2><span class=\"big\" data-k=\"held-now\">")
        .text(&count(o.held.messages))
        .raw("</span> <span class=\"muted\">messages, ")
        .text(&count(o.held.bytes.div_ceil(1024)))
        .raw(" KiB</span></section><section class=\"panel\"><h2>Verdicts in the window</h2><span class=\"big\" data-k=\"verdicts\">")
        .show(count(o.volume.iter().map(|b| b.by_action.total()).sum()))
        .raw("</span> <span class=\"muted\">per recipient domain, last ")
        .text(c.window.name)
        .raw("</span></section></div>");
    h.raw("<section class=\"panel\"><h2>Verdicts over time, all domains</h2>");
    h.append(svg::volume(
        &o.volume,
        c.window.bucket,
        "verdicts per time bucket by action, all domains",
    ));
    volume_key(&mut h);
    h.raw("</section>");
    h.raw("<section class=\"panel\"><h2>Domains</h2>");
    if o.domains.is_empty() {
        h.raw("<p class=\"muted\" data-k=\"no-domains\">No verdicts yet in this window, and no domain has its own policy section.</p>");
    } else {
        h.raw("<table><thead><tr><th>recipient domain</th><th class=\"n\">messages</th><th class=\"n\">accept</th><th class=\"n\">tag</th><th class=\"n\">would hold</th><th class=\"n\">held</th><th class=\"n\">held now</th><th class=\"n\">junk rep.</th><th class=\"n\">legit. rep.</th><th class=\"n\">releases</th><th class=\"n\">false pos.</th><th class=\"n\">95% bound</th><th class=\"n\">target</th><th>against it</th><th>thresholds</th></tr></thead><tbody>");
        for line in &o.domains {
            overview_row(&mut h, line, c.window);
        }
        h.raw("</tbody></table>");
        if o.more_domains > 0 {
            h.raw("<p class=\"muted\">")
                .text(&count(o.more_domains as u64))
                .raw(" quieter domains left off; open one by its address: /domain?d=NAME</p>");
        }
    }
    h.raw("</section>");
    foot(&mut h, c);
    h.finish()
}

fn overview_row(h: &mut Html, line: &DomainLine, window: Window) {
    let f = &line.figures;
    h.raw("<tr data-domain=\"")
        .attr(&f.domain)
        .raw("\"><td class=\"dom\"><a href=\"")
        .attr(&domain_href(&f.domain, window))
        .raw("\">")
        .text(domain_name(&f.domain))
        .raw("</a></td>");
    cell(h, "messages", f.messages());
    cell(h, "accept", f.by_action.accept);
    cell(h, "tag", f.by_action.tag);
    cell(h, "would-hold", f.would_quarantine);
    cell(h, "held", f.by_action.quarantine);
    cell(h, "held-now", line.held);
    cell(h, "reports-junk", f.reports_junk);
    cell(h, "reports-legitimate", f.reports_not_junk);
    cell(h, "releases", f.releases);
    rate_cells(h, f);
    h.raw("<td class=\"n\" data-k=\"target\">")
        .text(&percent(line.target))
        .raw("</td><td>");
    check_badge(h, line.check);
    h.raw("</td><td class=\"env\">")
        .text(&thresholds_text(&line.section))
        .raw("</td></tr>");
}

fn volume_key(h: &mut Html) {
    h.raw("<div class=\"key\"><span><i class=\"a\"></i>accept</span><span><i class=\"t\"></i>tag</span><span><i class=\"w\"></i>tag, would be held with tag-only off</span><span><i class=\"q\"></i>held</span><span><i class=\"d\"></i>defer</span></div>");
}

/// A domain's view.
pub fn domain(v: &DomainView) -> String {
    let c = &v.context;
    let f = &v.figures;
    let mut h = Html::new();
    head(&mut h, &format!("tamis · {}", domain_name(&v.domain)));
    band(&mut h, c, Some(&v.domain));
    h.raw("<div class=\"row\"><section class=\"panel\" id=\"fp\"><h2>False positives among legitimate mail</h2>");
    match f.false_positives.value {
        Some(value) => {
            h.raw("<span class=\"big\" data-k=\"fp\">")
                .text(&percent(value))
                .raw("</span> ");
        }
        None => {
            h.raw("<span class=\"big muted\" data-k=\"fp\">–</span> ");
        }
    }
    h.raw("<span class=\"muted\">")
        .text(&count(f.false_positives.count))
        .raw(" of ")
        .text(&count(f.false_positives.of))
        .raw(" legitimate · at most <b data-k=\"fp-bound\">")
        .text(&percent(f.false_positives.upper))
        .raw("</b> (95%) · target <b data-k=\"target\">")
        .text(&percent(v.target))
        .raw("</b></span> ");
    check_badge(&mut h, v.check);
    h.append(svg::interval(
        &f.false_positives,
        v.target,
        v.check,
        "false-positive rate, its 95% interval (bar) and the target (dashed), log scale",
    ));
    if let Some(reason) = &f.thin_reason {
        h.raw("<p class=\"thin\" data-k=\"thin\">Too thin to claim a rate: ")
            .text(reason)
            .raw(".</p>");
    }
    h.raw("</section><section class=\"panel\" id=\"counts\"><h2>Counts, last ")
        .text(c.window.name)
        .raw("</h2><table class=\"kv\"><tbody>");
    let rows: [(&'static str, &'static str, u64); 8] = [
        ("messages", "messages", f.messages()),
        ("accept", "accepted", f.by_action.accept),
        ("tag", "tagged", f.by_action.tag),
        ("would-hold", "… of them would be held", f.would_quarantine),
        ("held", "held", f.by_action.quarantine),
        ("defer", "deferred", f.by_action.defer),
        ("unscanned", "not scanned", f.unscanned),
        ("legitimate", "legitimate (FP denominator)", f.legitimate),
    ];
    let rows2: [(&'static str, &'static str, u64); 5] = [
        ("reports-junk", "reported junk", f.reports_junk),
        (
            "reports-legitimate",
            "reported legitimate",
            f.reports_not_junk,
        ),
        ("releases", "released", f.releases),
        (
            "unmatched",
            "reports refused as evidence",
            f.unmatched_reports,
        ),
        ("junk", "junk (known or presumed)", f.junk),
    ];
    for pair in rows
        .iter()
        .zip(rows2.iter().map(Some).chain(std::iter::repeat(None)))
    {
        let ((k1, l1, v1), second) = pair;
        h.raw("<tr><td>").raw(l1).raw("</td>");
        cell(&mut h, k1, *v1);
        match second {
            Some((k2, l2, v2)) => {
                h.raw("<td>").raw(l2).raw("</td>");
                cell(&mut h, k2, *v2);
            }
            None => {
                h.raw("<td></td><td></td>");
            }
        }
        h.raw("</tr>");
    }
    h.raw("<tr><td>catch rate</td><td class=\"n\" data-k=\"catch\">");
    match f.catch_rate.value {
        Some(r) => h.text(&percent(r)),
        None => h.raw("–"),
    };
    h.raw("</td><td>audited: legitimate / reviewed</td><td class=\"n\" data-k=\"audit\">")
        .text(&count(f.audit.count))
        .raw(" / ")
        .text(&count(f.audit.of))
        .raw("</td></tr></tbody></table></section>");
    h.raw("<section class=\"panel\" id=\"policy\"><h2>Thresholds in force</h2><table class=\"kv\"><tbody><tr><td>section</td><td data-k=\"section\">");
    if v.section.own {
        h.raw("own: [policy.domains.\"").text(&v.domain).raw("\"]");
    } else {
        h.raw("[policy.default]");
    }
    let t = v.section.thresholds;
    let scale = match t.scale() {
        Scale::Margin => "margin",
        Scale::Probability => "probability of junk",
    };
    h.raw("</td></tr><tr><td>on</td><td>")
        .raw(scale)
        .raw("</td></tr><tr><td>tag at ≥</td><td class=\"mono\" data-k=\"tag-at\">")
        .show(format_args!("{:+.4}", t.tag()))
        .raw("</td></tr><tr><td>hold at ≥</td><td class=\"mono\" data-k=\"hold-at\">")
        .show(format_args!("{:+.4}", t.quarantine()))
        .raw("</td></tr><tr><td>mode</td><td data-k=\"mode\">");
    if v.section.tag_only {
        h.raw("tag-only: would-be holds are tagged and delivered");
    } else {
        h.raw("quarantine on");
    }
    h.raw("</td></tr></tbody></table><p class=\"muted\">At least ")
        .text(&count(MIN_LEGITIMATE))
        .raw(
            " legitimate messages, and some reports, before a rate is claimed.</p></section></div>",
        );

    h.raw("<section class=\"panel\"><h2>Verdicts over time</h2>");
    h.append(svg::volume(
        &v.volume,
        c.window.bucket,
        "verdicts per time bucket by action",
    ));
    volume_key(&mut h);
    h.raw("</section><section class=\"panel\"><h2>Margins of reported mail</h2>");
    h.append(svg::margins(
        &v.margins,
        &v.section,
        "margins of mail reported legitimate (up) and junk (down), with the thresholds",
    ));
    h.raw("<div class=\"key\"><span><i class=\"l\"></i>reported legitimate or released: <b data-k=\"margins-legitimate\">")
        .text(&count(v.margins.legitimate.iter().sum()))
        .raw("</b></span><span><i class=\"j\"></i>reported junk: <b data-k=\"margins-junk\">")
        .text(&count(v.margins.junk.iter().sum()))
        .raw("</b></span><span>legitimate bars right of the hold line are held good mail</span></div></section>");

    if c.actions {
        h.raw("<form method=\"post\" action=\"/act\"><div class=\"act\"><label>token <input type=\"password\" name=\"token\" autocomplete=\"off\"></label> <input type=\"hidden\" name=\"domain\" value=\"")
            .attr(&v.domain)
            .raw("\"> <span class=\"muted\">needed for the buttons below; reports from the held list are the operator's, from the audit queue the auditor's</span></div>");
    }
    held_section(&mut h, v);
    audit_section(&mut h, v);
    if c.actions {
        h.raw("</form>");
    }
    foot(&mut h, c);
    h.finish()
}

fn envelope(h: &mut Html, line: &HeldLine) {
    h.raw("<td><div data-k=\"from\">")
        .text(line.from.as_deref().unwrap_or("(no From)"))
        .raw("</div><div data-k=\"subject\"><b>")
        .text(line.subject.as_deref().unwrap_or("(no Subject)"))
        .raw("</b></div><div class=\"env\">envelope <span data-k=\"sender\">")
        .text(if line.summary.sender.is_empty() {
            "<>"
        } else {
            &line.summary.sender
        })
        .raw("</span> → <span data-k=\"recipients\">")
        .text(&line.summary.recipients.join(", "))
        .raw("</span></div></td>");
}

fn reasons(h: &mut Html, line: &HeldLine) {
    h.raw("<td class=\"why\" data-k=\"reasons\">");
    for reason in line.summary.entry.reasons.iter().take(6) {
        h.raw("<span>").text_max(reason, 60).raw("</span>");
    }
    h.raw("</td>");
}

fn margin_cell(h: &mut Html, line: &HeldLine) {
    match line.summary.entry.margin {
        Some(m) => h
            .raw("<td class=\"n mono\">")
            .show(format_args!("{m:+.3}"))
            .raw("</td>"),
        None => h.raw("<td class=\"n muted\">–</td>"),
    };
}

fn button(
    h: &mut Html,
    class: &'static str,
    verb: &'static str,
    verdict: &str,
    label: &'static str,
) {
    h.raw("<button class=\"")
        .raw(class)
        .raw("\" name=\"act\" value=\"")
        .attr(&format!("{verb}:{verdict}"))
        .raw("\">")
        .raw(label)
        .raw("</button> ");
}

fn held_section(h: &mut Html, v: &DomainView) {
    h.raw("<section class=\"panel\" id=\"held\"><h2>Held mail, newest first</h2>");
    if v.held.is_empty() {
        h.raw("<p class=\"muted\" data-k=\"no-held\">Nothing held for this domain.</p></section>");
        return;
    }
    h.raw("<table><thead><tr><th>held</th><th class=\"n\">margin</th><th>message</th><th>why (strongest features)</th><th>verdict</th>");
    if v.context.actions {
        h.raw("<th>act</th>");
    }
    h.raw("</tr></thead><tbody>");
    for line in &v.held {
        let id = &line.summary.entry.verdict_id;
        h.raw("<tr data-verdict=\"")
            .attr(id)
            .raw("\"><td class=\"mono\">")
            .text(&utc(line.summary.held_at))
            .raw("</td>");
        margin_cell(h, line);
        envelope(h, line);
        reasons(h, line);
        h.raw("<td class=\"mono\">").text(id).raw("</td>");
        if v.context.actions {
            h.raw("<td>");
            button(h, "", "legitimate", id, "legitimate");
            button(h, "", "junk", id, "junk");
            button(h, "rel", "release", id, "release");
            h.raw("</td>");
        }
        h.raw("</tr>");
    }
    h.raw("</tbody></table><p>");
    if v.held_offset > 0 {
        let back = v
            .held_offset
            .saturating_sub(u64::from(super::page::HELD_PAGE));
        h.raw("<a href=\"")
            .attr(&format!(
                "{}&held={back}",
                domain_href(&v.domain, v.context.window)
            ))
            .raw("\">← newer</a> ");
    }
    h.raw("<span class=\"muted\">")
        .text(&count(v.held_offset + 1))
        .raw("–")
        .text(&count(v.held_offset + v.held.len() as u64))
        .raw("</span>");
    if v.held_more {
        let next = v.held_offset + u64::from(super::page::HELD_PAGE);
        h.raw(" <a href=\"")
            .attr(&format!(
                "{}&held={next}",
                domain_href(&v.domain, v.context.window)
            ))
            .raw("\">older →</a>");
    }
    h.raw("</p></section>");
}

fn audit_section(h: &mut Html, v: &DomainView) {
    h.raw("<section class=\"panel\" id=\"audit\"><h2>Audit queue: a random sample of mail held in the window</h2>");
    if v.audit.is_empty() {
        h.raw("<p class=\"muted\" data-k=\"no-audit\">Nothing held in this window to sample.</p></section>");
        return;
    }
    let open = v.audit.iter().filter(|(a, _)| a.reviewed.is_none()).count();
    h.raw("<p class=\"muted\"><span data-k=\"audit-open\">")
        .text(&count(open as u64))
        .raw("</span> of ")
        .text(&count(v.audit.len() as u64))
        .raw(" still to review. The sample is drawn at random, not by who complains, so its legitimate share estimates the false positives among held mail.</p>");
    h.raw("<table><thead><tr><th>held</th><th class=\"n\">margin</th><th>message</th><th>why</th><th>state</th><th>review</th></tr></thead><tbody>");
    for (item, line) in &v.audit {
        audit_row(h, item, line, v.context.actions);
    }
    h.raw("</tbody></table></section>");
}

fn audit_row(h: &mut Html, item: &AuditItem, line: &HeldLine, actions: bool) {
    let id = &line.summary.entry.verdict_id;
    h.raw("<tr data-verdict=\"")
        .attr(id)
        .raw("\"><td class=\"mono\">")
        .text(&utc(line.summary.held_at))
        .raw("</td>");
    margin_cell(h, line);
    envelope(h, line);
    reasons(h, line);
    h.raw("<td>")
        .raw(match item.held.state {
            HeldState::Held => "held",
            HeldState::Releasing => "releasing",
            HeldState::Released => "released",
        })
        .raw("</td><td data-k=\"reviewed\">");
    match item.reviewed {
        Some(ReportKind::Junk) => {
            h.raw("junk");
        }
        Some(ReportKind::NotJunk) => {
            h.raw("legitimate");
        }
        None if actions => {
            button(h, "", "audit-legitimate", id, "legitimate");
            button(h, "", "audit-junk", id, "junk");
        }
        None => {
            h.raw("<span class=\"muted\">to review</span>");
        }
    }
    h.raw("</td></tr>");
}

/// A small page that answers an action or explains a failure, with a way back.
pub fn message(context: &Context, title: &str, text: &str, back: Option<&str>) -> String {
    let mut h = Html::new();
    head(&mut h, &format!("tamis · {title}"));
    band(&mut h, context, back);
    h.raw("<section class=\"panel\"><h2>")
        .text(title)
        .raw("</h2><p data-k=\"outcome\">")
        .text_max(text, 2000)
        .raw("</p><p><a href=\"")
        .attr(&match back {
            Some(d) => domain_href(d, context.window),
            None => format!("/?w={}", context.window.name),
        })
        .raw("\">back</a></p></section>");
    foot(&mut h, context);
    h.finish()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn base64_matches_the_rfc_vectors() {
        // RFC 4648 §10 test vectors.
        for (input, output) in [
            ("", ""),
            ("f", "Zg=="),
            ("fo", "Zm8="),
            ("foo", "Zm9v"),
            ("foob", "Zm9vYg=="),
            ("fooba", "Zm9vYmE="),
            ("foobar", "Zm9vYmFy"),
        ] {
            assert_eq!(base64(input.as_bytes()), output);
        }
    }

    #[test]
    fn the_policy_names_the_style_sheet_and_nothing_else() {
        let csp = content_security_policy();
        assert!(
            csp.starts_with("default-src 'none'; style-src 'sha256-"),
            "{csp}"
        );
        assert!(
            !csp.contains("script-src") && !csp.contains("unsafe"),
            "{csp}"
        );
    }
}
