//! The invented demonstration corpus: labelled RFC 5322 messages for examples, benchmarks and
//! tests of the plumbing.
//!
//! Everything in it is made up for this project (the private `scenario` module holds the
//! cast): the organisations, people, products and offers, every line of text, every domain
//! (all under names reserved for documentation and testing) and every address (documentation
//! ranges).
//! It exists so that the tools can be tried without anyone's real mail. Because it is
//! invented, a model's score on it says nothing about how well tamis filters real mail.
//!
//! Invariants: the output is a pure function of `(seed, index)` — byte-identical across runs
//! and platforms, and a shorter corpus is a prefix of a longer one with the same seed; every
//! message parses as RFC 5322 with MIME and has `From`, `To`, `Subject`, `Date` and
//! `Message-ID` fields.

mod attach;
mod content;
mod ham;
mod mime;
mod rng;
mod scenario;
mod spam;

use std::collections::BTreeMap;
use std::fs;
use std::path::Path;

use crate::label::Label;
use content::{Attachment, Block, Draft, Lang, Layout};
use mime::{Charset, Cte, Part, WordEncoding};
use rng::Rng;
use scenario::{DOMAINS, Domain};

/// One generated message and its ground-truth label.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct DemoMessage {
    /// File name, unique within a corpus, e.g. `000123.eml`.
    pub name: String,
    /// Whether the scenario made this message junk or legitimate.
    pub label: Label,
    /// The recipient domain, for per-domain policy demonstrations.
    pub domain: String,
    /// The whole message as it would arrive at the relay (CRLF line ends).
    pub bytes: Vec<u8>,
}

/// Ham and spam counts.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct LabelCounts {
    /// Legitimate messages.
    pub ham: usize,
    /// Junk messages.
    pub spam: usize,
}

impl LabelCounts {
    fn add(&mut self, label: Label) {
        match label {
            Label::Ham => self.ham += 1,
            Label::Spam => self.spam += 1,
        }
    }

    /// All messages counted.
    pub fn total(&self) -> usize {
        self.ham + self.spam
    }
}

/// What [`write_corpus`] wrote.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct CorpusSummary {
    /// Counts over the whole corpus.
    pub overall: LabelCounts,
    /// Counts per recipient domain, in name order.
    pub per_domain: BTreeMap<String, LabelCounts>,
    /// Total size of the message files, in bytes.
    pub bytes: u64,
}

/// The name of the label file [`write_corpus`] writes beside the messages.
pub const LABELS_FILE: &str = "labels.tsv";

/// Generates `count` labelled messages.
///
/// Deterministic: same seed and count → byte-identical messages; message `i` does not depend
/// on `count`.
pub fn generate(seed: u64, count: usize) -> impl Iterator<Item = DemoMessage> {
    (0..count).map(move |i| message(seed, i))
}

/// Writes `DIR/spam/NAME`, `DIR/ham/NAME` and `DIR/labels.tsv` (lines:
/// `relative/path<TAB>spam|ham<TAB>domain`) and returns the counts.
///
/// Existing files of the same names are replaced; other files in `dir` are left alone. Every
/// file goes through [`crate::fsio::write_bytes`], so a link or device planted at one of the
/// names is refused, not followed.
pub fn write_corpus(
    dir: &Path,
    seed: u64,
    count: usize,
) -> Result<CorpusSummary, crate::fsio::FsioError> {
    for sub in ["spam", "ham"] {
        let folder = dir.join(sub);
        fs::create_dir_all(&folder)
            .map_err(|e| crate::fsio::FsioError::io(&folder, "create the folder", e))?;
    }
    // A bad labels path fails before thousands of messages are written.
    crate::fsio::check_target(&dir.join(LABELS_FILE))?;
    let mut labels = String::new();
    let mut summary = CorpusSummary::default();
    for msg in generate(seed, count) {
        let rel = format!("{}/{}", msg.label.as_str(), msg.name);
        crate::fsio::write_bytes(&dir.join(&rel), &msg.bytes)?;
        labels.push_str(&format!("{rel}\t{}\t{}\n", msg.label.as_str(), msg.domain));
        summary.overall.add(msg.label);
        summary
            .per_domain
            .entry(msg.domain.clone())
            .or_default()
            .add(msg.label);
        summary.bytes += msg.bytes.len() as u64;
    }
    crate::fsio::write_bytes(&dir.join(LABELS_FILE), labels.as_bytes())?;
    Ok(summary)
}

/// Legitimate messages labelled junk (reported by mistake), per mille.
pub const HAM_REPORTED_PER_MILLE: u32 = 15;
/// Junk messages labelled legitimate (never reported), per mille.
pub const SPAM_UNREPORTED_PER_MILLE: u32 = 2;

/// 2026-03-02T00:00:00Z: the scenario's mail arrives over the six weeks after it.
const EPOCH: i64 = 1_772_409_600;

fn message(seed: u64, index: usize) -> DemoMessage {
    let mut rng = Rng::for_item(seed, index as u64);
    let weights: Vec<u32> = DOMAINS.iter().map(|d| d.weight).collect();
    let dom = DOMAINS
        .get(rng.weighted(&weights))
        .or_else(|| DOMAINS.first());
    let Some(dom) = dom else {
        // DOMAINS is a non-empty constant; this arm only keeps the function total.
        return DemoMessage {
            name: format!("{index:06}.eml"),
            label: Label::Ham,
            domain: String::new(),
            bytes: Vec::new(),
        };
    };
    let label = if rng.chance(dom.ham_per_mille) {
        Label::Ham
    } else {
        Label::Spam
    };
    let (to_name, to_addr) = scenario::recipient(&mut rng, dom);
    let mut draft = match label {
        Label::Ham => ham::draft(&mut rng, dom, &to_name),
        Label::Spam => spam::draft(&mut rng, dom, &to_name, &to_addr),
    };
    if label == Label::Ham && draft.layout == Layout::Plain && rng.chance(60) {
        draft.attachments.push(Attachment::Png {
            filename: format!("photo-{}.png", rng.range(100, 999)),
        });
    }
    let bytes = encode_message(&mut rng, dom, label, &draft, &to_name, &to_addr);
    // Labels from user reports are noisy: people report newsletters they signed up for
    // (1.5% of legitimate mail here), and a little junk is never reported (0.2%), so the
    // demo, like real report data, has no perfect answer.
    let label = match label {
        Label::Ham if rng.chance(HAM_REPORTED_PER_MILLE) => Label::Spam,
        Label::Spam if rng.chance(SPAM_UNREPORTED_PER_MILLE) => Label::Ham,
        label => label,
    };
    DemoMessage {
        name: format!("{index:06}.eml"),
        label,
        domain: dom.name.to_string(),
        bytes,
    }
}

fn choose_charset(rng: &mut Rng, draft: &Draft) -> Charset {
    if draft.needs_utf8 {
        return Charset::Utf8;
    }
    let (choices, weights): (&[Charset], &[u32]) = match draft.lang {
        Lang::En => (
            &[
                Charset::Ascii,
                Charset::Utf8,
                Charset::Windows1252,
                Charset::Latin1,
                Charset::Latin9,
            ],
            &[25, 45, 12, 12, 6],
        ),
        Lang::De => (
            &[
                Charset::Latin9,
                Charset::Latin1,
                Charset::Utf8,
                Charset::Windows1252,
            ],
            &[35, 25, 30, 10],
        ),
        Lang::Fr => (
            &[
                Charset::Latin1,
                Charset::Windows1252,
                Charset::Utf8,
                Charset::Latin9,
            ],
            &[35, 20, 35, 10],
        ),
        Lang::Ru => (
            &[Charset::Koi8R, Charset::Windows1251, Charset::Utf8],
            &[40, 30, 30],
        ),
        Lang::Ja => (&[Charset::Iso2022Jp, Charset::Utf8], &[70, 30]),
    };
    let chosen = choices
        .get(rng.weighted(weights))
        .copied()
        .unwrap_or(Charset::Utf8);
    // Fall back where the text has a character the charset lacks (a euro sign in Latin-1, a
    // name with a letter from another script), as a mail client would.
    let sample = format!("{} {}", draft.subject, draft.from_name);
    let all_text = content::render_plain(&draft.blocks, draft.lang) + &sample;
    if chosen.encode(&all_text).is_some() {
        chosen
    } else {
        Charset::Utf8
    }
}

fn choose_cte(rng: &mut Rng, charset: Charset, text: &str, html: bool) -> Cte {
    if charset == Charset::Iso2022Jp {
        return if rng.chance(150) {
            Cte::Base64
        } else {
            Cte::SevenBit
        };
    }
    let ascii = text.is_ascii();
    let draw = rng.below(100);
    let (plain_cut, qp_cut) = if html { (25, 80) } else { (45, 80) };
    if draw < plain_cut || (ascii && draw < plain_cut + 30) {
        if ascii { Cte::SevenBit } else { Cte::EightBit }
    } else if draw < qp_cut {
        Cte::QuotedPrintable
    } else {
        Cte::Base64
    }
}

fn text_part(rng: &mut Rng, subtype: &'static str, text: String, charset: Charset) -> Part {
    let cte = choose_cte(rng, charset, &text, subtype == "html");
    Part::Text {
        subtype,
        text,
        charset,
        cte,
        filename: None,
    }
}

fn boundary(rng: &mut Rng) -> String {
    // '=' and '_' never occur in base64 or in unencoded generated text lines starting a line
    // with "--", so the boundary cannot collide with a body.
    match rng.below(3) {
        0 => format!("----=_Part_{}_{}", rng.range(1000, 99_999), rng.alnum(12)),
        1 => format!("=_{}", rng.hex(24)),
        _ => format!("_b1_{}", rng.alnum(20)),
    }
}

fn html_for(draft: &Draft, charset: Charset) -> String {
    content::render_html(&draft.blocks, &draft.subject, draft.accent).replacen(
        "charset=utf-8",
        &format!("charset={}", charset.label()),
        1,
    )
}

fn body_tree(rng: &mut Rng, draft: &Draft, charset: Charset, date: &str) -> Part {
    let plain = || content::render_plain(&draft.blocks, draft.lang);
    let body = match draft.layout {
        Layout::Plain => text_part(rng, "plain", plain(), charset),
        Layout::HtmlOnly => text_part(rng, "html", html_for(draft, charset), charset),
        Layout::Alternative => {
            let p = text_part(rng, "plain", plain(), charset);
            let h = text_part(rng, "html", html_for(draft, charset), charset);
            Part::Multipart {
                subtype: "alternative",
                boundary: boundary(rng),
                parts: vec![p, h],
            }
        }
        Layout::ImageOnly => {
            let html = text_part(rng, "html", html_for(draft, charset), charset);
            let cid = draft.blocks.iter().find_map(|b| match b {
                Block::Image { src, .. } => src.strip_prefix("cid:").map(str::to_string),
                _ => None,
            });
            match cid {
                Some(id) => {
                    let (w, h) = (rng.range(40, 80) as u32, rng.range(20, 40) as u32);
                    Part::Multipart {
                        subtype: "related",
                        boundary: boundary(rng),
                        parts: vec![
                            html,
                            Part::Binary {
                                mime: "image/png",
                                filename: Some(format!("{}.png", rng.alnum(8))),
                                data: attach::png(rng, w, h),
                                content_id: Some(id),
                                inline: true,
                            },
                        ],
                    }
                }
                None => html,
            }
        }
        Layout::Digest => {
            let intro = text_part(rng, "plain", plain(), charset);
            let mut posts = Vec::new();
            for item in &draft.digest {
                let mut m = Vec::new();
                for line in [
                    format!("From: {}", item.from),
                    format!("Subject: {}", item.subject),
                    format!("Date: {date}"),
                    format!("Message-ID: <{}@lists.example.org>", rng.alnum(18)),
                    "MIME-Version: 1.0".to_string(),
                    "Content-Type: text/plain; charset=\"us-ascii\"".to_string(),
                    "Content-Transfer-Encoding: 7bit".to_string(),
                    String::new(),
                ] {
                    m.extend_from_slice(line.as_bytes());
                    m.extend_from_slice(b"\r\n");
                }
                for line in item.text.lines() {
                    m.extend_from_slice(line.as_bytes());
                    m.extend_from_slice(b"\r\n");
                }
                posts.push(Part::Message { bytes: m });
            }
            Part::Multipart {
                subtype: "mixed",
                boundary: boundary(rng),
                parts: vec![
                    intro,
                    Part::Multipart {
                        subtype: "digest",
                        boundary: boundary(rng),
                        parts: posts,
                    },
                ],
            }
        }
    };
    if draft.attachments.is_empty() {
        return body;
    }
    let mut parts = vec![body];
    for a in &draft.attachments {
        parts.push(match a {
            Attachment::Pdf { filename, lines } => Part::Binary {
                mime: "application/pdf",
                filename: Some(filename.clone()),
                data: attach::pdf(rng, lines),
                content_id: None,
                inline: false,
            },
            Attachment::Png { filename } => {
                let (w, h) = (rng.range(24, 64) as u32, rng.range(16, 40) as u32);
                Part::Binary {
                    mime: "image/png",
                    filename: Some(filename.clone()),
                    data: attach::png(rng, w, h),
                    content_id: None,
                    inline: false,
                }
            }
            Attachment::Zip { filename, inner } => {
                let payload = {
                    let n = rng.range(800, 4000);
                    rng.bytes(n)
                };
                Part::Binary {
                    mime: "application/zip",
                    filename: Some(filename.clone()),
                    data: attach::zip(&[(inner.clone(), payload)]),
                    content_id: None,
                    inline: false,
                }
            }
            Attachment::Text { filename, text } => Part::Text {
                subtype: "plain",
                text: text.clone(),
                charset: Charset::Ascii,
                cte: Cte::SevenBit,
                filename: Some(filename.clone()),
            },
        });
    }
    Part::Multipart {
        subtype: "mixed",
        boundary: boundary(rng),
        parts,
    }
}

/// An `Authentication-Results` verdict triple (RFC 8601 result names).
fn auth_results(
    rng: &mut Rng,
    label: Label,
    draft: &Draft,
) -> (&'static str, &'static str, &'static str) {
    // Class-dependent but overlapping: junk from freshly registered domains often passes,
    // and forwarded or list mail often fails, so the results hint without deciding.
    let list_mail = draft.list.is_some() && draft.layout != Layout::Alternative;
    let (spf_w, dkim_w, dmarc_w): ([u32; 5], [u32; 3], [u32; 3]) = match label {
        Label::Ham if list_mail => ([70, 8, 8, 8, 6], [60, 15, 25], [60, 25, 15]),
        Label::Ham => ([86, 4, 3, 4, 3], [78, 16, 6], [75, 20, 5]),
        Label::Spam => ([30, 20, 15, 25, 10], [22, 58, 20], [18, 52, 30]),
    };
    let spf = ["pass", "softfail", "fail", "none", "neutral"];
    let dkim = ["pass", "none", "fail"];
    let dmarc = ["pass", "none", "fail"];
    (
        spf.get(rng.weighted(&spf_w)).copied().unwrap_or("none"),
        dkim.get(rng.weighted(&dkim_w)).copied().unwrap_or("none"),
        dmarc.get(rng.weighted(&dmarc_w)).copied().unwrap_or("none"),
    )
}

fn push_header(out: &mut Vec<u8>, name: &str, value: &str) {
    out.extend_from_slice(name.as_bytes());
    out.extend_from_slice(b": ");
    out.extend_from_slice(value.as_bytes());
    out.extend_from_slice(b"\r\n");
}

/// Folds a long base64 value onto continuation lines of at most 78 characters.
fn fold_b64(value: &str, first_room: usize) -> String {
    let mut out = String::new();
    let mut rest = value;
    let mut room = first_room;
    while !rest.is_empty() {
        let cut = room.min(rest.len());
        let (head, tail) = rest.split_at(cut);
        out.push_str(head);
        rest = tail;
        if !rest.is_empty() {
            out.push_str("\r\n\t ");
        }
        room = 70;
    }
    out
}

fn encode_message(
    rng: &mut Rng,
    dom: &Domain,
    label: Label,
    draft: &Draft,
    to_name: &str,
    to_addr: &str,
) -> Vec<u8> {
    let charset = choose_charset(rng, draft);
    let how = match draft.lang {
        Lang::Ru | Lang::Ja => {
            if rng.chance(800) {
                WordEncoding::B
            } else {
                WordEncoding::Q
            }
        }
        _ => {
            if rng.chance(350) {
                WordEncoding::B
            } else {
                WordEncoding::Q
            }
        }
    };
    let sent = EPOCH + rng.below(42 * 86_400) as i64;
    let sender_tz = *rng
        .pick(&[0, 60, 120, -300, -240, 540, 180, 330])
        .unwrap_or(&0);
    let sender_tz = match draft.lang {
        Lang::De | Lang::Fr => 60,
        Lang::Ru => 180,
        Lang::Ja => 540,
        Lang::En => sender_tz,
    };
    let date = mime::rfc5322_date(sent, sender_tz);
    let from_domain = draft.sender_domain().to_string();
    let (helo, rdns, ip) = &draft.relay;
    let mut out = Vec::with_capacity(8192);

    let return_path = if draft.bulk {
        format!("bounce-{}@{from_domain}", rng.hex(10))
    } else {
        draft.from_addr.clone()
    };
    push_header(&mut out, "Return-Path", &format!("<{return_path}>"));
    let store_id = rng.alnum(14);
    push_header(
        &mut out,
        "Received",
        &format!(
            "from {mx} ({mx} [192.0.2.5])\r\n\tby {store} with LMTP id {store_id}\r\n\tfor <{to_addr}>; {}",
            mime::rfc5322_date(sent + 4 + rng.below(5) as i64, dom.tz),
            mx = dom.mx,
            store = dom.store,
        ),
    );
    if !rng.chance(40) {
        let (spf, dkim, dmarc) = auth_results(rng, label, draft);
        push_header(
            &mut out,
            "Authentication-Results",
            &format!(
                "{};\r\n\tspf={spf} smtp.mailfrom={from_domain};\r\n\tdkim={dkim} header.d={from_domain};\r\n\tdmarc={dmarc} header.from={from_domain}",
                dom.mx
            ),
        );
    }
    let rdns_part = if rdns.is_empty() {
        format!("unknown [{ip}]")
    } else {
        format!("{rdns} [{ip}]")
    };
    let tls = if rng.chance(800) { "ESMTPS" } else { "ESMTP" };
    push_header(
        &mut out,
        "Received",
        &format!(
            "from {helo} ({rdns_part})\r\n\tby {mx} with {tls} id {}\r\n\tfor <{to_addr}>; {}",
            rng.alnum(12),
            mime::rfc5322_date(sent + 1 + rng.below(3) as i64, dom.tz),
            mx = dom.mx,
        ),
    );
    if label == Label::Ham && rng.chance(600) {
        push_header(
            &mut out,
            "Received",
            &format!(
                "from [10.{}.{}.{}] (desktop.internal [10.{0}.{1}.{2}])\r\n\tby {helo} with ESMTPSA id {}; {date}",
                rng.range(0, 255),
                rng.range(0, 255),
                rng.range(2, 254),
                rng.alnum(10)
            ),
        );
    }
    if (label == Label::Ham && rng.chance(750)) || (label == Label::Spam && rng.chance(300)) {
        let selector = rng.pick_str(&["s1", "mail", "k2026", "sel1", "default"]);
        let bh = mime::base64(&rng.bytes(32));
        let b = mime::base64(&rng.bytes(256));
        push_header(
            &mut out,
            "DKIM-Signature",
            &format!(
                "v=1; a=rsa-sha256; c=relaxed/relaxed; d={from_domain};\r\n\ts={selector}; t={sent}; h=from:to:subject:date:message-id:mime-version;\r\n\tbh={bh};\r\n\tb={}",
                fold_b64(&b, 64)
            ),
        );
    }
    push_header(&mut out, "Date", &date);
    push_header(
        &mut out,
        "From",
        &mime::mailbox(&draft.from_name, &draft.from_addr, charset, how),
    );
    if label == Label::Spam && rng.chance(150) {
        push_header(&mut out, "To", "undisclosed-recipients:;");
    } else {
        push_header(
            &mut out,
            "To",
            &mime::mailbox(to_name, to_addr, charset, how),
        );
    }
    if let Some(reply_to) = &draft.reply_to {
        push_header(&mut out, "Reply-To", reply_to);
    }
    push_header(
        &mut out,
        "Subject",
        &mime::encode_words(&draft.subject, charset, how),
    );
    let id_domain = if label == Label::Spam && rng.chance(300) {
        scenario::junk_domain(rng)
    } else {
        from_domain.clone()
    };
    push_header(
        &mut out,
        "Message-ID",
        &format!("<{}.{}@{id_domain}>", rng.alnum(16), sent),
    );
    if let Some(parent) = &draft.in_reply_to {
        push_header(&mut out, "In-Reply-To", parent);
        push_header(&mut out, "References", parent);
    }
    if let Some(list) = &draft.list {
        push_header(&mut out, "List-Id", &list.id);
        push_header(
            &mut out,
            "List-Unsubscribe",
            &format!("<{}>", list.unsubscribe),
        );
        if draft.layout != Layout::Plain {
            push_header(
                &mut out,
                "List-Unsubscribe-Post",
                "List-Unsubscribe=One-Click",
            );
        }
    }
    if draft.bulk {
        push_header(&mut out, "Precedence", "bulk");
    }
    push_header(&mut out, "MIME-Version", "1.0");
    let tree = body_tree(rng, draft, charset, &date);
    mime::encode_part(&tree, &mut out);
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn generation_is_deterministic() {
        let a: Vec<_> = generate(7, 60).collect();
        let b: Vec<_> = generate(7, 60).collect();
        assert_eq!(a, b);
        let c: Vec<_> = generate(8, 60).collect();
        assert_ne!(a, c);
    }

    #[test]
    fn shorter_corpus_is_a_prefix() {
        let long: Vec<_> = generate(3, 40).collect();
        let short: Vec<_> = generate(3, 25).collect();
        assert_eq!(long.get(..25), Some(short.as_slice()));
    }

    #[test]
    fn both_labels_present() {
        let msgs: Vec<_> = generate(7, 200).collect();
        assert!(msgs.iter().any(|m| m.label == Label::Spam));
        assert!(msgs.iter().any(|m| m.label == Label::Ham));
    }

    #[test]
    fn every_message_parses_with_from_and_subject() {
        for m in generate(11, 400) {
            let parsed = mailparse::parse_mail(&m.bytes);
            let Ok(parsed) = parsed else {
                panic!("{} does not parse", m.name);
            };
            use mailparse::MailHeaderMap;
            let from = parsed.headers.get_first_value("From");
            let subject = parsed.headers.get_first_value("Subject");
            assert!(from.is_some_and(|f| f.contains('@')), "{}: From", m.name);
            assert!(
                subject.is_some_and(|s| !s.is_empty()),
                "{}: Subject",
                m.name
            );
            assert!(parsed.headers.get_first_value("Message-ID").is_some());
            assert!(parsed.headers.get_first_value("Date").is_some());
        }
    }

    #[test]
    fn lines_are_crlf_and_short() {
        for m in generate(5, 300) {
            for line in m.bytes.split(|b| *b == b'\n') {
                assert!(line.len() <= 998, "{}: long line", m.name);
            }
            let lf = m.bytes.iter().filter(|b| **b == b'\n').count();
            let crlf = m.bytes.windows(2).filter(|w| w == b"\r\n").count();
            assert_eq!(lf, crlf, "{}: bare LF", m.name);
        }
    }

    #[test]
    fn only_reserved_domains_appear_in_addresses() {
        let reserved = |d: &str| {
            let d = d.trim_end_matches(['>', ';', ')', ']', ',', '"']);
            d.ends_with(".test")
                || d.ends_with(".example")
                || d == "example.org"
                || d == "example.com"
                || d == "example.net"
                || d.ends_with(".example.org")
                || d.ends_with(".example.com")
                || d.ends_with(".example.net")
        };
        for m in generate(13, 300) {
            let Ok(parsed) = mailparse::parse_mail(&m.bytes) else {
                panic!("{} does not parse", m.name);
            };
            for h in &parsed.headers {
                if matches!(
                    h.get_key().as_str(),
                    "From" | "To" | "Reply-To" | "Return-Path"
                ) {
                    for word in h.get_value().split_whitespace() {
                        if let Some((_, domain)) = word.rsplit_once('@') {
                            assert!(reserved(domain), "{}: {domain}", m.name);
                        }
                    }
                }
            }
        }
    }
}
