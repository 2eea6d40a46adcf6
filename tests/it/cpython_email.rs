//! Every message in CPython's own email test data, compared with Python's `email` package.
//!
//! Reference: CPython's `Lib/test/test_email/data` (found through `python3 -c "import test"`)
//! parsed by `email.message_from_bytes(..., policy=email.policy.default)`; for each
//! text/plain part, `get_content()`. Both sides' texts go through the same tamis
//! normalization and must give the same tokens, except for the deliberate differences
//! listed in `DELIBERATE` with the reason for each.

use std::collections::BTreeMap;
use std::path::PathBuf;

use tamis::mail::{ExtractLimits, decoded_text_parts};
use tamis::text::TokenBuffer;

const REFERENCE: &str = r#"
import email, email.policy, json, os, sys, test
data = os.path.join(os.path.dirname(test.__file__), "test_email", "data")
out = {"dir": data, "files": {}}
for name in sorted(os.listdir(data)):
    if not name.startswith("msg_"):
        continue
    with open(os.path.join(data, name), "rb") as f:
        msg = email.message_from_bytes(f.read(), policy=email.policy.default)
    texts = []
    for part in msg.walk():
        if part.is_multipart() or part.get_content_type() != "text/plain":
            continue
        try:
            texts.append(part.get_content())
        except Exception as e:
            texts.append({"error": repr(e)})
    out["files"][name] = texts
print(json.dumps(out))
"#;

/// Files where tamis deliberately reads text/plain parts differently from Python.
const DELIBERATE: &[(&str, &str)] = &[
    (
        "msg_17.txt",
        "multipart whose boundary never appears: Python yields no parts; tamis reads the body \
         as text, so junk cannot hide its words behind a broken boundary",
    ),
    (
        "msg_31.txt",
        "declared boundary `BOUNDARY_` never appears (delimiters use `BOUNDARY`): same rule \
         as msg_17, the body is read as text rather than dropped",
    ),
    (
        "msg_25.txt",
        "multipart/report whose boundary parameter is cut off (`bo`): without a usable \
         boundary tamis reads the body as text (as for msg_17), Python yields no parts",
    ),
    (
        "msg_41.txt",
        "multipart/alternative with no boundary parameter: read as text, as for msg_25",
    ),
    (
        "msg_19.txt",
        "a digest body with no header section at all: tamis refuses input whose first line \
         is not a header field, Python parses it as a headerless message",
    ),
    (
        "msg_36.txt",
        "message/external-body: the entity only points at content stored elsewhere (RFC 2046 \
         §5.2.3); tamis does not read its phantom header block as message text",
    ),
];

/// Parts without any token are dropped on both sides: an empty part carries nothing a
/// reader or the filter could see, and parsers differ on whether to list it.
fn nonempty(parts: impl Iterator<Item = Vec<String>>) -> Vec<Vec<String>> {
    parts.filter(|t| !t.is_empty()).collect()
}

fn tokens(text: &str) -> Vec<String> {
    let mut buffer = TokenBuffer::new();
    buffer.push_text(text);
    buffer.iter().map(str::to_string).collect()
}

#[test]
fn text_plain_parts_match_python_email() {
    let out = crate::python::run(REFERENCE, &[], b"");
    let reference: serde_json::Value = serde_json::from_slice(&out).expect("Python JSON");
    let dir = PathBuf::from(reference["dir"].as_str().expect("data dir"));
    let files = reference["files"].as_object().expect("files map");
    assert!(
        files.len() >= 40,
        "expected CPython's ~45 test messages, found {}",
        files.len()
    );

    let mut mismatches = BTreeMap::new();
    for (name, texts) in files {
        let raw = std::fs::read(dir.join(name)).expect("read test message");
        let ours: Vec<Vec<String>> = match decoded_text_parts(&raw, ExtractLimits::default()) {
            Ok(parts) => nonempty(
                parts
                    .iter()
                    .filter(|p| p.mimetype == "text/plain")
                    .map(|p| tokens(&p.text)),
            ),
            Err(e) => {
                mismatches.insert(name.clone(), format!("tamis refused the message: {e}"));
                continue;
            }
        };
        let theirs = nonempty(
            texts
                .as_array()
                .expect("list of texts")
                .iter()
                .map(|t| t.as_str().map(tokens).unwrap_or_default()),
        );
        if ours != theirs {
            mismatches.insert(
                name.clone(),
                format!("tamis parts {:?}\npython parts {:?}", ours, theirs),
            );
        }
    }
    let deliberate: BTreeMap<&str, &str> = DELIBERATE.iter().copied().collect();
    let unexpected: Vec<String> = mismatches
        .iter()
        .filter(|(name, _)| !deliberate.contains_key(name.as_str()))
        .map(|(name, why)| format!("{name}: {why}"))
        .collect();
    assert!(
        unexpected.is_empty(),
        "differences from Python's email package:\n{}",
        unexpected.join("\n\n")
    );
    let stale: Vec<&&str> = deliberate
        .keys()
        .filter(|k| !mismatches.contains_key(**k))
        .collect();
    assert!(
        stale.is_empty(),
        "listed as deliberate but now identical: {stale:?}"
    );
}
