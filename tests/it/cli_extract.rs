//! `tamis extract` as a user runs it: JSON output, invariance groups, bad files.

use std::process::Command;

use pretty_assertions::assert_eq;
use serde_json::Value;

fn tamis() -> Command {
    Command::new(env!("CARGO_BIN_EXE_tamis"))
}

#[test]
fn json_lines_have_the_documented_fields_and_groups_agree() {
    for group in ["latin", "cyrillic", "japanese", "lookalike"] {
        let files = crate::invariance::group_files(group);
        let out = tamis()
            .args(["extract", "--format", "json"])
            .args(&files)
            .output()
            .expect("run tamis");
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        let lines: Vec<Value> = String::from_utf8(out.stdout)
            .expect("UTF-8 output")
            .lines()
            .map(|l| serde_json::from_str(l).expect("one JSON object per line"))
            .collect();
        assert_eq!(lines.len(), files.len());
        for line in &lines {
            for key in [
                "file",
                "subject_tokens",
                "body_tokens",
                "url_hosts",
                "signals",
                "features",
            ] {
                assert!(line.get(key).is_some(), "missing {key} in {line}");
            }
            assert!(line["features"].as_u64().is_some_and(|n| n > 0));
            assert_eq!(
                line["body_tokens"], lines[0]["body_tokens"],
                "{group}: {}",
                line["file"]
            );
        }
    }
}

#[test]
fn non_mail_file_exits_2_naming_the_file() {
    let dir = tempfile::tempdir().expect("temp dir");
    let binary = dir.path().join("picture.png");
    std::fs::write(&binary, b"\x89PNG\r\n\x1a\n\0\0\0\rIHDR\0\0").expect("write");
    let empty = dir.path().join("empty.eml");
    std::fs::write(&empty, b"").expect("write");
    for path in [&binary, &empty] {
        let out = tamis()
            .arg("extract")
            .arg(path)
            .output()
            .expect("run tamis");
        assert_eq!(out.status.code(), Some(2));
        let stderr = String::from_utf8_lossy(&out.stderr);
        assert!(
            stderr.contains(&path.display().to_string()),
            "stderr: {stderr}"
        );
    }
    let missing = dir.path().join("no-such.eml");
    let out = tamis()
        .arg("extract")
        .arg(&missing)
        .output()
        .expect("run tamis");
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("no-such.eml"));
}

#[test]
fn good_files_are_still_reported_beside_bad_ones() {
    let dir = tempfile::tempdir().expect("temp dir");
    let bad = dir.path().join("bad.bin");
    std::fs::write(&bad, [0u8, 159, 146, 150]).expect("write");
    let good = crate::invariance::group_files("latin").remove(0);
    let out = tamis()
        .args(["extract", "--format", "json"])
        .arg(&bad)
        .arg(&good)
        .output()
        .expect("run tamis");
    assert_eq!(out.status.code(), Some(2));
    assert_eq!(String::from_utf8_lossy(&out.stdout).lines().count(), 1);
}
