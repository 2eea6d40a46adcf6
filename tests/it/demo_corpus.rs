//! The demo corpus on disk and through the public API: the label file agrees with the files,
//! output is reproducible, and the corpus covers every charset and MIME shape it promises.
//!
//! The corpus is invented data; these tests check its plumbing, never a filter's accuracy.

use std::collections::{BTreeMap, BTreeSet};
use std::fs;
use std::path::Path;

use mailparse::{MailHeaderMap, ParsedMail};
use pretty_assertions::assert_eq;
use tamis::Label;
use tamis::demo::{self, LABELS_FILE};

fn read_labels(dir: &Path) -> Vec<(String, String, String)> {
    let text = fs::read_to_string(dir.join(LABELS_FILE)).expect("labels file");
    text.lines()
        .map(|line| {
            let cols: Vec<&str> = line.split('\t').collect();
            assert_eq!(cols.len(), 3, "three tab-separated columns: {line:?}");
            (
                cols[0].to_string(),
                cols[1].to_string(),
                cols[2].to_string(),
            )
        })
        .collect()
}

fn files_under(dir: &Path) -> BTreeSet<String> {
    let mut out = BTreeSet::new();
    for class in ["ham", "spam"] {
        for entry in fs::read_dir(dir.join(class)).expect("class directory") {
            let name = entry.expect("dir entry").file_name();
            out.insert(format!("{class}/{}", name.to_string_lossy()));
        }
    }
    out
}

#[test]
fn labels_file_matches_the_files_written() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let summary = demo::write_corpus(tmp.path(), 7, 300).expect("write corpus");
    let labels = read_labels(tmp.path());
    assert_eq!(labels.len(), 300);
    assert_eq!(summary.overall.total(), 300);

    let listed: BTreeSet<String> = labels.iter().map(|(p, _, _)| p.clone()).collect();
    assert_eq!(listed, files_under(tmp.path()));

    let mut per_domain: BTreeMap<String, (usize, usize)> = BTreeMap::new();
    let mut bytes = 0u64;
    for (path, label, domain) in &labels {
        assert!(
            path.starts_with(&format!("{label}/")),
            "{path} filed under {label}"
        );
        let raw = fs::read(tmp.path().join(path)).expect("message file");
        bytes += raw.len() as u64;
        let parsed = mailparse::parse_mail(&raw).expect("message parses");
        let to = parsed.headers.get_first_value("To").unwrap_or_default();
        let delivered = parsed
            .headers
            .get_all_values("Received")
            .join(" ")
            .contains(&format!("@{domain}>"));
        assert!(
            delivered || to.contains(domain.as_str()),
            "{path}: recipient domain {domain} not in its headers"
        );
        let entry = per_domain.entry(domain.clone()).or_default();
        match label.as_str() {
            "ham" => entry.0 += 1,
            "spam" => entry.1 += 1,
            other => panic!("unknown label {other}"),
        }
    }
    assert_eq!(bytes, summary.bytes);
    let from_summary: BTreeMap<String, (usize, usize)> = summary
        .per_domain
        .iter()
        .map(|(d, c)| (d.clone(), (c.ham, c.spam)))
        .collect();
    assert_eq!(per_domain, from_summary);
}

#[test]
fn two_runs_write_identical_corpora() {
    let a = tempfile::tempdir().expect("temp dir");
    let b = tempfile::tempdir().expect("temp dir");
    demo::write_corpus(a.path(), 21, 150).expect("first run");
    demo::write_corpus(b.path(), 21, 150).expect("second run");
    let files = files_under(a.path());
    assert_eq!(files, files_under(b.path()));
    for rel in files.iter().map(String::as_str).chain([LABELS_FILE]) {
        let left = fs::read(a.path().join(rel)).expect("file of first run");
        let right = fs::read(b.path().join(rel)).expect("file of second run");
        assert!(left == right, "{rel} differs between runs");
    }
}

#[test]
fn generate_and_write_agree() {
    let tmp = tempfile::tempdir().expect("temp dir");
    demo::write_corpus(tmp.path(), 5, 40).expect("write corpus");
    for msg in demo::generate(5, 40) {
        let path = tmp.path().join(msg.label.as_str()).join(&msg.name);
        assert_eq!(fs::read(&path).expect("message file"), msg.bytes);
    }
}

#[test]
fn ham_is_about_three_quarters_and_varies_by_domain() {
    let msgs: Vec<_> = demo::generate(7, 2000).collect();
    let ham = msgs.iter().filter(|m| m.label == Label::Ham).count();
    let share = ham as f64 / msgs.len() as f64;
    assert!((0.68..=0.82).contains(&share), "ham share {share}");
    let mut per_domain: BTreeMap<&str, (usize, usize)> = BTreeMap::new();
    for m in &msgs {
        let e = per_domain.entry(m.domain.as_str()).or_default();
        if m.label == Label::Ham {
            e.0 += 1;
        }
        e.1 += 1;
    }
    assert!(per_domain.len() >= 3, "several recipient domains");
    let shares: Vec<f64> = per_domain
        .values()
        .map(|(h, n)| *h as f64 / *n as f64)
        .collect();
    let spread = shares.iter().cloned().fold(f64::MIN, f64::max)
        - shares.iter().cloned().fold(f64::MAX, f64::min);
    assert!(spread > 0.1, "domains differ in their mix: {shares:?}");
}

/// What one message contributes to the coverage tally.
fn tally(part: &ParsedMail<'_>, seen: &mut BTreeSet<String>) {
    let ct = &part.ctype;
    seen.insert(format!("type:{}", ct.mimetype));
    if ct.mimetype.starts_with("text/") {
        seen.insert(format!("charset:{}", ct.charset.to_ascii_lowercase()));
        let cte = part
            .headers
            .get_first_value("Content-Transfer-Encoding")
            .unwrap_or_else(|| "7bit".to_string());
        seen.insert(format!("cte:{}", cte.to_ascii_lowercase()));
    }
    for sub in &part.subparts {
        tally(sub, seen);
    }
}

#[test]
fn corpus_covers_every_charset_and_mime_shape() {
    let mut seen = BTreeSet::new();
    for msg in demo::generate(7, 2000) {
        let parsed = mailparse::parse_mail(&msg.bytes).expect("message parses");
        tally(&parsed, &mut seen);
        let raw_subject = String::from_utf8_lossy(&msg.bytes)
            .lines()
            .find(|l| l.starts_with("Subject:"))
            .unwrap_or_default()
            .to_string();
        if raw_subject.contains("?B?") {
            seen.insert("subject:encoded-b".to_string());
        }
        if raw_subject.contains("?Q?") {
            seen.insert("subject:encoded-q".to_string());
        }
        let text = String::from_utf8_lossy(&msg.bytes);
        if text.contains("display:none") {
            seen.insert("trick:hidden-html".to_string());
        }
    }
    let expected = [
        "charset:utf-8",
        "charset:us-ascii",
        "charset:iso-8859-1",
        "charset:iso-8859-15",
        "charset:windows-1252",
        "charset:koi8-r",
        "charset:windows-1251",
        "charset:iso-2022-jp",
        "cte:7bit",
        "cte:8bit",
        "cte:quoted-printable",
        "cte:base64",
        "type:text/plain",
        "type:text/html",
        "type:multipart/alternative",
        "type:multipart/mixed",
        "type:multipart/related",
        "type:multipart/digest",
        "type:message/rfc822",
        "type:application/pdf",
        "type:application/zip",
        "type:image/png",
        "subject:encoded-b",
        "subject:encoded-q",
        "trick:hidden-html",
    ];
    let missing: Vec<&str> = expected
        .iter()
        .copied()
        .filter(|e| !seen.contains(*e))
        .collect();
    assert_eq!(missing, Vec::<&str>::new());
}

#[test]
fn corpus_contains_the_text_disguises() {
    let mut lookalike = false;
    let mut zero_width = false;
    let mut spaced = false;
    for msg in demo::generate(7, 2000).filter(|m| m.label == Label::Spam) {
        let parsed = mailparse::parse_mail(&msg.bytes).expect("message parses");
        let mut text = parsed
            .headers
            .get_first_value("Subject")
            .unwrap_or_default();
        let mut stack = vec![&parsed];
        while let Some(p) = stack.pop() {
            if p.ctype.mimetype.starts_with("text/") {
                text.push_str(&p.get_body().unwrap_or_default());
            }
            stack.extend(p.subparts.iter());
        }
        // A Cyrillic letter directly after a Latin one: a look-alike inside a Latin word.
        lookalike |= text
            .chars()
            .zip(text.chars().skip(1))
            .any(|(a, b)| a.is_ascii_alphabetic() && ('\u{400}'..='\u{4ff}').contains(&b));
        zero_width |= text.contains(['\u{200b}', '\u{200c}', '\u{2060}', '\u{feff}']);
        spaced |= [
            "P R I Z E",
            "p r i z e",
            "O R D E R",
            "o r d e r",
            "C L A I M",
            "c l a i m",
            "F R E E",
            "f r e e",
            "N O W",
            "W O N",
            "w o n",
        ]
        .iter()
        .any(|s| text.contains(s));
    }
    assert!(lookalike, "look-alike Cyrillic letters");
    assert!(zero_width, "zero-width characters inside words");
    assert!(spaced, "s p a c e d letters");
}

#[test]
fn python_email_reads_the_subjects_mailparse_reads() {
    // Reference parser: CPython's `email` package (policy=default decodes RFC 2047 words).
    let tmp = tempfile::tempdir().expect("temp dir");
    let msgs: Vec<_> = demo::generate(9, 120).collect();
    for m in &msgs {
        fs::write(tmp.path().join(&m.name), &m.bytes).expect("write message");
    }
    let script = r#"
import email, email.policy, os, sys, json
d = sys.argv[1]
out = {}
for name in sorted(os.listdir(d)):
    with open(os.path.join(d, name), 'rb') as f:
        m = email.message_from_bytes(f.read(), policy=email.policy.default)
    out[name] = str(m['subject'])
print(json.dumps(out))
"#;
    let dir = tmp.path().to_string_lossy().into_owned();
    let out = crate::python::run(script, &[&dir], b"");
    let py: BTreeMap<String, String> = serde_json::from_slice(&out).expect("JSON from python");
    for m in &msgs {
        let parsed = mailparse::parse_mail(&m.bytes).expect("message parses");
        let ours = parsed
            .headers
            .get_first_value("Subject")
            .unwrap_or_default();
        assert_eq!(py.get(&m.name), Some(&ours), "{}", m.name);
    }
}
