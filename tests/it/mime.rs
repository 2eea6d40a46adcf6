//! Extraction against the MIME standards, and its behaviour on hostile input.

use pretty_assertions::assert_eq;
use tamis::mail::{ExtractLimits, Extracted, Extractor, MailError, Signal};

fn extract(raw: &[u8]) -> Extracted {
    extract_with(raw, ExtractLimits::default())
}

fn extract_with(raw: &[u8], limits: ExtractLimits) -> Extracted {
    let mut out = Extracted::default();
    Extractor::new(limits)
        .extract(raw, &mut out)
        .expect("input starts like mail");
    out
}

fn body(e: &Extracted) -> String {
    e.body.join("\n")
}

#[test]
fn rfc2047_section8_examples_decode_as_shown() {
    // RFC 2047 §8: the Subject example spanning two encoded-words in two charsets.
    let raw = b"Subject: =?ISO-8859-1?B?SWYgeW91IGNhbiByZWFkIHRoaXMgeW8=?=\r\n =?ISO-8859-2?B?dSB1bmRlcnN0YW5kIHRoZSBleGFtcGxlLg==?=\r\n\r\n";
    assert_eq!(
        extract(raw).subject,
        "If you can read this you understand the example."
    );
    // RFC 2047 §8: the table of encoded-word sequences and how they display. Whitespace
    // between adjacent encoded-words is dropped; underscore is a space in Q encoding.
    let cases = [
        ("(=?ISO-8859-1?Q?a?=)", "(a)"),
        ("(=?ISO-8859-1?Q?a?= b)", "(a b)"),
        ("(=?ISO-8859-1?Q?a?= =?ISO-8859-1?Q?b?=)", "(ab)"),
        ("(=?ISO-8859-1?Q?a?=  =?ISO-8859-1?Q?b?=)", "(ab)"),
        ("(=?ISO-8859-1?Q?a?=\r\n    =?ISO-8859-1?Q?b?=)", "(ab)"),
        ("(=?ISO-8859-1?Q?a_b?=)", "(a b)"),
        ("(=?ISO-8859-1?Q?a?= =?ISO-8859-2?Q?_b?=)", "(a b)"),
    ];
    for (encoded, shown) in cases {
        let raw = format!("Subject: {encoded}\r\n\r\n");
        assert_eq!(
            extract(raw.as_bytes()).subject,
            shown,
            "encoded: {encoded:?}"
        );
    }
}

#[test]
fn rfc2045_quoted_printable_in_a_message() {
    // RFC 2045 §6.7: rule (1) =XX octets, rule (3) trailing whitespace removed, rule (5)
    // soft line breaks; the RFC's own soft-break example "Now's the time =" / "for all folk
    // to come to the aid of their country."
    let raw = b"Content-Type: text/plain; charset=iso-8859-1\r\nContent-Transfer-Encoding: quoted-printable\r\n\r\nNow's the time =\r\nfor all folk to come=\r\n to the aid of their country.   \r\nCaf=E9 =3D 3=80\r\n";
    let e = extract(raw);
    assert_eq!(
        body(&e),
        "Now's the time for all folk to come to the aid of their country.\nCafé = 3€\n"
    );
    assert!(!e.signals.contains(&Signal::TransferMalformed));
}

#[test]
fn rfc2231_parameters_are_decoded() {
    // RFC 2231 §4 / §3: an extended boundary parameter with charset and language, and a
    // charset given the same way (the form CPython's msg_33 uses).
    let raw = b"Content-Type: multipart/mixed; boundary*=us-ascii'en'b%31\r\n\r\n--b1\r\nContent-Type: text/plain; charset*=us-ascii''iso-8859-1\r\n\r\ncaf\xe9\r\n--b1--\r\n";
    assert_eq!(body(&extract(raw)), "café");
}

#[test]
fn alternative_is_read_once_and_attachments_become_signals() {
    let raw = b"Content-Type: multipart/mixed; boundary=m\r\n\r\n--m\r\nContent-Type: multipart/alternative; boundary=a\r\n\r\n--a\r\nContent-Type: text/plain\r\n\r\nhello there\r\n--a\r\nContent-Type: text/html\r\n\r\n<p>hello there</p>\r\n--a--\r\n--m\r\nContent-Type: application/pdf\r\nContent-Disposition: attachment; filename=x.pdf\r\n\r\nJVBERi0=\r\n--m\r\nContent-Type: text/plain\r\nContent-Disposition: attachment; filename=notes.txt\r\n\r\nsecret notes\r\n--m--\r\n";
    let e = extract(raw);
    assert_eq!(e.body.len(), 1, "one alternative read: {:?}", e.body);
    assert!(body(&e).contains("hello there"));
    assert!(!body(&e).contains("secret"));
    assert!(
        e.signals
            .contains(&Signal::Attachment("application/pdf".into()))
    );
    assert!(e.signals.contains(&Signal::Attachment("text/plain".into())));
    assert!(!e.signals.contains(&Signal::HtmlOnly));
}

#[test]
fn html_only_mail_is_marked() {
    let raw = b"Content-Type: text/html\r\n\r\n<html><body><p>Hello <b>reader</b></p><a href='https://promo.example/x'>here</a></body></html>";
    let e = extract(raw);
    assert!(e.signals.contains(&Signal::HtmlOnly));
    assert_eq!(e.url_hosts, vec!["promo.example"]);
}

#[test]
fn non_mail_is_refused() {
    let mut out = Extracted::default();
    let mut extractor = Extractor::default();
    assert_eq!(extractor.extract(b"", &mut out), Err(MailError::Empty));
    assert_eq!(
        extractor.extract(b"\x89PNG\r\n\x1a\n\0\0\0\rIHDR", &mut out),
        Err(MailError::NotMail)
    );
    assert_eq!(
        extractor.extract(b"\x7fELF\x02\x01\x01", &mut out),
        Err(MailError::NotMail)
    );
}

mod hostile {
    use super::*;
    use pretty_assertions::assert_eq;

    fn limits() -> ExtractLimits {
        ExtractLimits {
            max_text_bytes: 64 << 10,
            ..ExtractLimits::default()
        }
    }

    fn bounded(e: &Extracted) {
        let text: usize = e.body.iter().chain(&e.hidden).map(String::len).sum();
        // Each segment is cut at the text budget; URLs cut out only shrink it.
        assert!(text <= limits().max_text_bytes, "text {text} over the cap");
    }

    #[test]
    fn truncated_message_mid_part() {
        let raw = b"Content-Type: multipart/mixed; boundary=z\r\n\r\n--z\r\nContent-Type: text/plain\r\nContent-Transfer-Encoding: base64\r\n\r\naGVsbG8gd29y";
        let e = extract_with(raw, limits());
        assert!(e.signals.contains(&Signal::MultipartUnclosed));
        assert_eq!(body(&e), "hello wor");
    }

    #[test]
    fn missing_boundary_parameter_reads_body_as_text() {
        let e = extract_with(
            b"Content-Type: multipart/mixed\r\n\r\nplain words\r\n",
            limits(),
        );
        assert!(body(&e).contains("plain words"));
    }

    #[test]
    fn nesting_far_beyond_the_limit() {
        for depth in [100usize, 10_000] {
            let mut raw = Vec::new();
            for level in 0..depth {
                raw.extend_from_slice(
                    format!(
                        "Content-Type: multipart/mixed; boundary=b{level}\r\n\r\n--b{level}\r\n"
                    )
                    .as_bytes(),
                );
            }
            raw.extend_from_slice(b"Content-Type: text/plain\r\n\r\ndeep text\r\n");
            let e = extract_with(&raw, limits());
            assert!(e.signals.contains(&Signal::TooDeep), "depth {depth}");
            bounded(&e);
        }
    }

    #[test]
    fn many_parts_are_capped() {
        let mut raw = b"Content-Type: multipart/mixed; boundary=p\r\n\r\n".to_vec();
        for _ in 0..5_000 {
            raw.extend_from_slice(b"--p\r\nContent-Type: text/plain\r\n\r\nword\r\n");
        }
        let e = extract_with(&raw, limits());
        assert!(e.signals.contains(&Signal::TooManyParts));
        assert!(e.body.len() < limits().max_parts);
    }

    #[test]
    fn invalid_transfer_encodings() {
        let e = extract_with(
            b"Content-Transfer-Encoding: base64\r\n\r\n!!!!aGVsbG8=====@@@",
            limits(),
        );
        assert!(e.signals.contains(&Signal::TransferMalformed));
        assert_eq!(body(&e), "hello");
        let e = extract_with(
            b"Content-Transfer-Encoding: quoted-printable\r\n\r\n=ZZ=4=\r\n=E",
            limits(),
        );
        assert!(e.signals.contains(&Signal::TransferMalformed));
    }

    #[test]
    fn unknown_and_lying_charsets() {
        let e = extract_with(
            b"Content-Type: text/plain; charset=x-martian\r\n\r\nhello",
            limits(),
        );
        assert!(e.signals.contains(&Signal::CharsetUnknown));
        assert_eq!(body(&e), "hello");
        let e = extract_with(
            b"Content-Type: text/plain; charset=utf-8\r\n\r\nbad \xff\xfe bytes",
            limits(),
        );
        assert!(e.signals.contains(&Signal::CharsetInvalid));
        assert!(body(&e).contains("bytes"));
    }

    #[test]
    fn nul_bytes() {
        let e = extract_with(b"Subject: a\0b\r\n\r\nbody\0with nul", limits());
        assert!(e.signals.contains(&Signal::NulBytes));
        assert!(body(&e).contains("with nul"));
    }

    #[test]
    fn fifty_megabyte_single_line_body() {
        let mut raw = b"Subject: long\r\n\r\n".to_vec();
        raw.resize(raw.len() + (50 << 20), b'a');
        let e = extract_with(&raw, limits());
        assert!(e.signals.contains(&Signal::RawCapHit));
        assert!(e.signals.contains(&Signal::TextCapHit));
        bounded(&e);
    }

    #[test]
    fn huge_base64_and_html_bodies_stay_within_the_cap() {
        let mut raw =
            b"Content-Type: text/html\r\nContent-Transfer-Encoding: base64\r\n\r\n".to_vec();
        for _ in 0..200_000 {
            raw.extend_from_slice(b"PGRpdj5oZWxsbyB3b3JsZDwvZGl2Pgo=\r\n".as_slice());
        }
        let e = extract_with(&raw, limits());
        bounded(&e);
        let mut raw = b"Content-Type: text/html\r\n\r\n".to_vec();
        raw.extend(std::iter::repeat_n(b"<div>".as_slice(), 1_000_000).flatten());
        raw.extend_from_slice(b"deep");
        let e = extract_with(&raw, limits());
        bounded(&e);
    }
}

mod property {
    use proptest::prelude::*;
    use tamis::analyze::Analyzer;

    /// Pieces of MIME structure, so random messages reach deep into the walker rather than
    /// failing at the first line.
    fn mime_piece() -> impl Strategy<Value = Vec<u8>> {
        prop_oneof![
            Just(b"Content-Type: multipart/mixed; boundary=q\r\n\r\n".to_vec()),
            Just(b"Content-Type: multipart/alternative; boundary=\"q\"\r\n".to_vec()),
            Just(b"--q\r\n".to_vec()),
            Just(b"--q--\r\n".to_vec()),
            Just(b"Content-Type: text/html; charset=koi8-r\r\n\r\n".to_vec()),
            Just(b"Content-Type: message/rfc822\r\n\r\n".to_vec()),
            Just(b"Content-Transfer-Encoding: base64\r\n\r\n".to_vec()),
            Just(b"Content-Transfer-Encoding: quoted-printable\r\n\r\n=\r\n=4".to_vec()),
            Just(b"<div style=\"display:none\"><a href='http://x.example'>".to_vec()),
            Just(b"Subject: =?utf-8?b?w6k=?= =?x?q?a?=\r\n".to_vec()),
            proptest::collection::vec(any::<u8>(), 0..64),
        ]
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(512))]

        #[test]
        fn arbitrary_messages_never_panic(pieces in proptest::collection::vec(mime_piece(), 0..24)) {
            let mut raw = b"Subject: p\r\n".to_vec();
            for piece in pieces {
                raw.extend_from_slice(&piece);
            }
            let mut analyzer = Analyzer::default();
            let vector = analyzer.vectorize(&raw).expect("starts with a header");
            let norm = vector.l2_norm();
            prop_assert!(vector.is_empty() || (norm - 1.0).abs() < 1e-4);
        }

        #[test]
        fn arbitrary_bytes_never_panic(raw in proptest::collection::vec(any::<u8>(), 0..2048)) {
            let mut analyzer = Analyzer::default();
            let _ = analyzer.vectorize(&raw);
        }
    }
}
