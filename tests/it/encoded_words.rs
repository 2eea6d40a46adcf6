//! Header decoding: RFC 2047 encoded words against Python's `email` package, against the
//! reader it replaced (the `mailparse` crate) on real messages, and in linear time.

use std::collections::BTreeMap;
use std::path::PathBuf;
use std::time::{Duration, Instant};

use mailparse::{MailAddr, MailHeader, MailHeaderMap, ParsedMail};
use pretty_assertions::assert_eq;
use tamis::analyze::Analyzer;
use tamis::mail::address::{first_domain, first_domain_counted};
use tamis::mail::encoded_words::{
    MAX_FIELD_BYTES, decode_unstructured, decode_unstructured_counted,
};

/// Generates encoded words with Python's own encoder (`email.header.Header`, and
/// `email.charset.Charset` for the charset and B or Q encoding), joined with plain words and
/// folded, and decodes each value with `str(make_header(decode_header(value)))`.
const GENERATE: &str = r#"
import json, random, sys
import email.charset
from email.header import Header, decode_header, make_header
rng = random.Random(int(sys.argv[1]))
texts = {
    "utf-8": ["café crème", "Привет мир", "こんにちは世界", "naïve résumé ☃", "price 100€ today", "emoji 🎉 party", "a_b=c?d"],
    "iso-8859-1": ["café crème", "Grüße aus Köln", "señor niño", "plain ascii words"],
    "iso-8859-2": ["Zażółć gęślą jaźń", "Příliš žluťoučký kůň"],
    "iso-8859-7": ["Καλημέρα κόσμε"],
    "koi8-r": ["Привет мир", "съешь же ещё этих"],
    "windows-1251": ["Привет мир", "Ещё раз"],
    "shift_jis": ["こんにちは世界", "日本語"],
    "euc-jp": ["こんにちは世界"],
    "iso-2022-jp": ["こんにちは世界", "日本語のテキスト"],
    "gb2312": ["你好世界"],
    "big5": ["你好世界"],
    "euc-kr": ["안녕하세요"],
}
plain = ["Re:", "Fwd:", "hello", "(note)", "offer", "[list]", "x,y", "two words"]
out = []
for _ in range(int(sys.argv[2])):
    parts = []
    for _ in range(rng.randint(1, 4)):
        if rng.random() < 0.3:
            parts.append(rng.choice(plain))
            continue
        name = rng.choice(sorted(texts))
        charset = email.charset.Charset(name)
        charset.header_encoding = rng.choice([email.charset.BASE64, email.charset.QP])
        header = Header(rng.choice(texts[name]), charset, maxlinelen=rng.choice([40, 76, 200]))
        # Python labels GB2312 and Big5 output with its codec names (`eucgb2312_cn`,
        # `big5_tw`), which no mail reader knows; mail carries the IANA names.
        encoded = header.encode(linesep="\r\n")
        for codec, iana in [("eucgb2312_cn", "gb2312"), ("big5_tw", "big5")]:
            encoded = encoded.replace(codec, iana)
        parts.append(encoded)
    value = " ".join(parts)
    out.append({"value": value, "expected": str(make_header(decode_header(value)))})
print(json.dumps(out))
"#;

#[test]
fn generated_encoded_words_decode_as_python_decodes_them() {
    let out = crate::python::run(GENERATE, &["2047", "600"], b"");
    let cases: Vec<BTreeMap<String, String>> = serde_json::from_slice(&out).expect("JSON");
    assert_eq!(cases.len(), 600);
    for case in &cases {
        let value = &case["value"];
        assert_eq!(
            decode_unstructured(value.as_bytes()),
            case["expected"],
            "value {value:?}"
        );
    }
}

#[test]
fn language_suffixes_decode_as_python_reads_them() {
    // RFC 2231 §5 adds `*language` to an encoded word's charset. Reference: Python's
    // header registry (`email.policy.default`), which drops the language;
    // `email.header.decode_header` does not know the suffix.
    let values = [
        "=?utf-8*en?q?caf=C3=A9?=",
        "=?ISO-8859-1*fr?B?Y2Fm6Q==?= au lait",
        "Re: =?us-ascii*en-US?q?plain_words?= =?utf-8*de?q?Gr=C3=BC=C3=9Fe?=",
    ];
    let script = r#"
import email, email.policy, json, sys
out = []
for value in json.load(sys.stdin):
    m = email.message_from_string("Subject: " + value + "\n\n", policy=email.policy.default)
    out.append(str(m["subject"]))
print(json.dumps(out))
"#;
    let input = serde_json::to_vec(&values).expect("JSON");
    let out = crate::python::run(script, &[], &input);
    let expected: Vec<String> = serde_json::from_slice(&out).expect("JSON");
    for (value, expected) in values.iter().zip(&expected) {
        assert_eq!(&decode_unstructured(value.as_bytes()), expected, "{value}");
    }
}

/// The domain of the first address as the `mailparse` crate read it before
/// [`tamis::mail::address`] replaced it.
fn previous_sender_domain(field: &MailHeader<'_>) -> Option<String> {
    let addresses = mailparse::addrparse_header(field).ok()?;
    let first = addresses.iter().find_map(|a| match a {
        MailAddr::Single(info) => Some(info.addr.clone()),
        MailAddr::Group(group) => group.addrs.first().map(|i| i.addr.clone()),
    })?;
    let domain = first.rsplit_once('@')?.1.trim().trim_end_matches('.');
    (!domain.is_empty()).then(|| domain.to_ascii_lowercase())
}

fn cpython_messages() -> Vec<(String, Vec<u8>)> {
    let script = "import os, test; print(os.path.join(os.path.dirname(test.__file__), 'test_email', 'data'))";
    let out = crate::python::run(script, &[], b"");
    let dir = PathBuf::from(String::from_utf8(out).expect("UTF-8 path").trim());
    let mut messages = Vec::new();
    for entry in std::fs::read_dir(&dir).expect("CPython's test_email data") {
        let path = entry.expect("entry").path();
        let name = path.file_name().map(|n| n.to_string_lossy().into_owned());
        if let Some(name) = name.filter(|n| n.starts_with("msg_")) {
            messages.push((
                format!("cpython/{name}"),
                std::fs::read(&path).expect("read"),
            ));
        }
    }
    assert!(messages.len() >= 40, "CPython's test messages found");
    messages
}

fn fixture_messages() -> Vec<(String, Vec<u8>)> {
    let root = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/invariance");
    let mut messages = Vec::new();
    for group in std::fs::read_dir(&root).expect("fixtures") {
        for file in std::fs::read_dir(group.expect("group").path()).expect("group dir") {
            let path = file.expect("file").path();
            let name = path
                .strip_prefix(&root)
                .unwrap_or(&path)
                .display()
                .to_string();
            messages.push((
                format!("fixtures/{name}"),
                std::fs::read(&path).expect("read"),
            ));
        }
    }
    messages
}

fn all_parts<'a>(mail: &'a ParsedMail<'a>, out: &mut Vec<&'a ParsedMail<'a>>) {
    out.push(mail);
    for part in &mail.subparts {
        all_parts(part, out);
    }
}

/// Messages and header fields where the new reading deliberately differs from the old.
const DELIBERATE: &[(&str, &str, &str)] = &[];

#[test]
fn ordinary_mail_reads_as_the_previous_reader_read_it() {
    let mut messages = cpython_messages();
    messages.extend(fixture_messages());
    for seed in [1, 2, 3] {
        messages.extend(tamis::demo::generate(seed, 500).map(|m| (m.name, m.bytes)));
    }
    let mut differences = BTreeMap::new();
    let mut fields = 0usize;
    for (name, raw) in &messages {
        let Ok(mail) = mailparse::parse_mail(raw) else {
            continue;
        };
        let mut parts = Vec::new();
        all_parts(&mail, &mut parts);
        for part in parts {
            for header in &part.headers {
                fields += 1;
                let key = header.get_key();
                let old = header.get_value();
                let new = decode_unstructured(header.get_value_raw());
                if old != new {
                    differences.insert((name.clone(), key.clone()), format!("{old:?} → {new:?}"));
                }
            }
            if let Some(from) = part.headers.get_first_header("From") {
                let old = previous_sender_domain(from);
                let new = first_domain(from.get_value_raw());
                if old != new {
                    differences.insert(
                        (name.clone(), "From domain".into()),
                        format!("{old:?} → {new:?}"),
                    );
                }
            }
        }
    }
    assert!(fields > 10_000, "only {fields} fields compared");
    let deliberate: BTreeMap<(String, String), &str> = DELIBERATE
        .iter()
        .map(|(m, f, why)| ((m.to_string(), f.to_string()), *why))
        .collect();
    let unexpected: Vec<String> = differences
        .iter()
        .filter(|(k, _)| !deliberate.contains_key(*k))
        .map(|((m, f), d)| format!("{m} {f}: {d}"))
        .collect();
    assert!(
        unexpected.is_empty(),
        "{} differences:\n{}",
        unexpected.len(),
        unexpected.join("\n")
    );
}

/// Values that made the previous reader quadratic, and variations: repeated openers, with
/// and without the whitespace that lets a word start, unclosed words, closers that are not
/// followed by a boundary, and many well-formed words.
const HOSTILE_UNITS: [&str; 8] = [
    "=?",
    "=? ",
    " =?utf-8?q?a",
    "=?utf-8?q?a?= ",
    "?=",
    " =?x?q??=x",
    "(=?(=?)",
    " =?utf-8?b?w6k=?=\r\n",
];

fn repeated(unit: &str, len: usize) -> String {
    unit.repeat(len / unit.len() + 1)
}

#[test]
fn tokenizing_is_linear_in_the_value_length() {
    // The work counter sums the bytes every scan examined. Linear time: bounded work per
    // byte, and ten times the input costs at most about ten times the work. The previous
    // reader searched for a closer again from every opener and indexed characters from the
    // start of the line, which is quadratic on these values.
    for unit in HOSTILE_UNITS {
        let small = repeated(unit, 64 << 10);
        let large = repeated(unit, 640 << 10);
        let work = |value: &str| tamis::mail::encoded_words::tokenize(value, |_| {});
        let (w_small, w_large) = (work(&small), work(&large));
        for (value, w) in [(&small, w_small), (&large, w_large)] {
            assert!(
                w <= 4 * value.len(),
                "{unit:?}: {w} bytes examined for {} bytes",
                value.len()
            );
        }
        assert!(
            w_large <= 11 * w_small,
            "{unit:?}: work {w_small} at 64 KiB but {w_large} at 640 KiB"
        );
    }
}

#[test]
fn what_is_decoded_per_field_is_bounded() {
    for unit in HOSTILE_UNITS {
        let (text_64k, work_64k) = decode_unstructured_counted(repeated(unit, 64 << 10).as_bytes());
        let (text_640k, work_640k) =
            decode_unstructured_counted(repeated(unit, 640 << 10).as_bytes());
        assert_eq!(
            work_64k, work_640k,
            "{unit:?}: only the first bytes are read"
        );
        assert_eq!(text_64k, text_640k);
        assert!(work_64k <= 4 * MAX_FIELD_BYTES);
        let (_, work) = first_domain_counted(repeated(unit, 640 << 10).as_bytes());
        assert!(
            work <= 4 * MAX_FIELD_BYTES,
            "{unit:?}: From read up to the cap"
        );
    }
}

/// The shortest of a few timings of `f`, to keep a busy machine's noise out.
fn best_of(runs: usize, mut f: impl FnMut()) -> Duration {
    (0..runs)
        .map(|_| {
            let start = Instant::now();
            f();
            start.elapsed()
        })
        .min()
        .unwrap_or_default()
}

#[test]
fn a_subject_of_repeated_openers_costs_linear_time_end_to_end() {
    // Not a timed test: two timings in the same process, compared as a ratio with
    // generous slack. Ten times the input must cost far less than the hundred times a
    // quadratic reading costs (the previous one took 0.18 s at 64 KB and 13.5 s at 600 KB).
    // The Content-Type is a structured field read by the MIME parser, whose RFC 2231
    // continuation handling compares every `*0` parameter with every other: quadratic in
    // the parameter count unless the field is cut first.
    let message = |len: usize| {
        let value = repeated("=?", len);
        let params: String = (0..len / 10).map(|i| format!("p{i}*0*=x;")).collect();
        format!(
            "From: {value}\r\nSubject: {value}\r\nTo: {value}\r\n\
             Content-Type: text/plain; {params}\r\n\r\nbody\r\n"
        )
        .into_bytes()
    };
    let (small, large) = (message(64 << 10), message(640 << 10));
    let mut analyzer = Analyzer::default();
    let mut run = |raw: &[u8]| {
        analyzer.vectorize(raw).expect("starts like mail");
    };
    let t_small = best_of(5, || run(&small));
    let t_large = best_of(5, || run(&large));
    let ratio = t_large.as_secs_f64() / t_small.as_secs_f64().max(1e-6);
    assert!(
        ratio < 30.0,
        "64 KiB took {t_small:?}, 640 KiB took {t_large:?}: ratio {ratio:.1}"
    );
}

mod property {
    use proptest::prelude::*;
    use tamis::mail::encoded_words::decode_unstructured;

    /// Pieces of well-formed header values: encoded words (correctly padded), plain words,
    /// the separators the previous reader treated as word boundaries, folding, and stray
    /// openers and closers (which glue words together).
    fn piece() -> impl Strategy<Value = &'static str> {
        prop_oneof![
            Just("=?utf-8?q?caf=C3=A9?="),
            Just("=?UTF-8?B?w6k=?="),
            Just("=?iso-8859-1?q?a_b?="),
            Just("=?koi8-r?b?8NLJ18XU?="),
            Just("=?x-unknown?q?a?="),
            Just("plain"),
            Just("Re:"),
            Just(" "),
            Just("  "),
            Just("\t"),
            Just("\r\n "),
            Just("\r\n\t"),
            Just("("),
            Just(")"),
            Just(","),
            Just("\""),
            Just("<"),
            Just("=?"),
            Just("?="),
        ]
    }

    fn display_name() -> impl Strategy<Value = &'static str> {
        prop_oneof![
            Just(""),
            Just("Ada Quill "),
            Just("\"Quill, Ada\" "),
            Just("\"A \\\"q\\\" B\" "),
            Just("=?utf-8?q?Ad=C3=A0?= "),
            Just("=?utf-8?b?QWTDoA==?= =?utf-8?q?_Quill?= "),
            Just("Ada (the first) "),
        ]
    }

    fn address() -> impl Strategy<Value = &'static str> {
        prop_oneof![
            Just("ada@Example.ORG"),
            Just("ada.quill@mail.example.net."),
            Just("x+tag@sub.example.test"),
        ]
    }

    /// A well-formed mailbox (RFC 5322 §3.4): name-addr or addr-spec with a comment.
    fn mailbox() -> impl Strategy<Value = String> {
        (display_name(), address(), any::<bool>()).prop_map(|(name, addr, angle)| {
            if angle || !name.is_empty() {
                format!("{name}<{addr}>")
            } else {
                format!("{addr} (comment)")
            }
        })
    }

    /// A well-formed address list, possibly with a group first.
    fn address_list() -> impl Strategy<Value = String> {
        (
            proptest::collection::vec(mailbox(), 1..4),
            prop_oneof![Just(None), Just(Some("Team:")), Just(Some("\"Team, A\":"))],
            any::<bool>(),
        )
            .prop_map(|(boxes, group, empty_group)| {
                let list = boxes.join(",\r\n ");
                match group {
                    // After the list: the previous reader failed on a mailbox that
                    // follows an empty group (`G:;, a@b`), which RFC 5322 §3.4 allows
                    // and tamis reads (see the unit tests of `tamis::mail::address`).
                    Some(g) if empty_group => format!("{list}, {g};"),
                    Some(g) => format!("{g} {list};"),
                    None => list,
                }
            })
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(2000))]

        #[test]
        fn well_formed_from_fields_give_the_previous_sender_domain(list in address_list()) {
            let raw = format!("From: {list}\r\n");
            let (header, _) = mailparse::parse_header(raw.as_bytes()).expect("a field");
            prop_assert_eq!(
                tamis::mail::address::first_domain(header.get_value_raw()),
                super::previous_sender_domain(&header),
                "{}", list
            );
        }

        #[test]
        fn well_formed_values_read_as_the_previous_reader_read_them(
            pieces in proptest::collection::vec(piece(), 0..12)
        ) {
            let value = pieces.concat();
            let raw = format!("Subject: {value}\r\n");
            let (header, _) = mailparse::parse_header(raw.as_bytes()).expect("a field");
            prop_assert_eq!(decode_unstructured(header.get_value_raw()), header.get_value());
        }
    }
}
