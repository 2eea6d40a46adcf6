//! The learning commands end to end on a small invented corpus: train, eval, tune, score,
//! features, and the errors an operator meets with bad input.
//!
//! The demo corpus is invented data: these tests check that the commands work together and
//! report what they promise, not how accurate a model is.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::sync::OnceLock;

use serde_json::Value;

fn tamis() -> Command {
    Command::new(env!("CARGO_BIN_EXE_tamis"))
}

fn run(args: &[&str]) -> Output {
    tamis().args(args).output().expect("run tamis")
}

fn ok(args: &[&str]) -> String {
    let out = run(args);
    assert!(
        out.status.success(),
        "tamis {args:?} failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).expect("UTF-8 output")
}

struct Fixture {
    _dir: tempfile::TempDir,
    corpus: PathBuf,
    held: PathBuf,
    model: PathBuf,
    report: PathBuf,
    train_json: Value,
}

/// One corpus and one trained model shared by the tests of this module.
fn fixture() -> &'static Fixture {
    static FIXTURE: OnceLock<Fixture> = OnceLock::new();
    FIXTURE.get_or_init(|| {
        let dir = tempfile::tempdir().expect("temp dir");
        let corpus = dir.path().join("corpus");
        let held = dir.path().join("held");
        ok(&[
            "corpus",
            "--out",
            s(&corpus),
            "--count",
            "600",
            "--seed",
            "3",
        ]);
        ok(&["corpus", "--out", s(&held), "--count", "400", "--seed", "4"]);
        let model = dir.path().join("demo.tamis");
        let report = dir.path().join("report");
        let labels = corpus.join("labels.tsv");
        let out = ok(&[
            "train",
            "--labels",
            s(&labels),
            "--out",
            s(&model),
            "--report",
            s(&report),
            "--ngram",
            "1,2",
            "--c",
            "0.3,1",
            "--folds",
            "3",
            "--hash-bits",
            "16",
            "--format",
            "json",
        ]);
        let train_json = serde_json::from_str(&out).expect("train JSON");
        Fixture {
            _dir: dir,
            corpus,
            held,
            model,
            report,
            train_json,
        }
    })
}

fn s(p: &Path) -> &str {
    p.to_str().expect("UTF-8 temp path")
}

#[test]
fn train_reports_selection_and_writes_model_and_plots() {
    let f = fixture();
    let r = &f.train_json;
    assert_eq!(
        r["candidates"].as_array().map(Vec::len),
        Some(4),
        "2 orders x 2 C"
    );
    let chosen = &r["chosen"];
    let best = r["candidates"]
        .as_array()
        .expect("candidates")
        .iter()
        .map(|c| c["tpr_at_target"].as_f64().expect("tpr"))
        .fold(0.0, f64::max);
    assert_eq!(
        chosen["tpr_at_target"].as_f64(),
        Some(best),
        "the chosen candidate is the best"
    );
    assert!(r["n_spam"].as_u64() > Some(50) && r["n_ham"].as_u64() > Some(200));
    assert!(f.model.exists());
    for file in ["report.json", "roc.svg", "scores.svg"] {
        let path = f.report.join(file);
        let text = std::fs::read_to_string(&path).expect("report file");
        assert!(text.len() > 200, "{file} is too small");
        if file.ends_with(".svg") {
            assert!(text.contains("<svg"), "{file} is SVG");
        }
    }
}

#[test]
fn eval_json_has_the_documented_fields_per_domain() {
    let f = fixture();
    let labels = f.held.join("labels.tsv");
    let out = ok(&[
        "eval",
        "--model",
        s(&f.model),
        "--labels",
        s(&labels),
        "--format",
        "json",
    ]);
    let r: Value = serde_json::from_str(&out).expect("eval JSON");
    for key in ["auc", "tpr_at_fpr", "n_spam", "n_ham", "domains"] {
        assert!(r.get(key).is_some(), "missing {key}");
    }
    assert!(r["tpr_at_fpr"]["0.001"].is_number() && r["tpr_at_fpr"]["0.01"].is_number());
    let auc = r["auc"].as_f64().expect("auc");
    assert!((0.5..=1.0).contains(&auc));
    let domains = r["domains"].as_object().expect("domains");
    assert!(
        domains.len() >= 3,
        "demo corpus has several recipient domains"
    );
    let total: u64 = domains
        .values()
        .map(|d| d["n_ham"].as_u64().unwrap_or(0))
        .sum();
    assert_eq!(Some(total), r["n_ham"].as_u64());
}

#[test]
fn tune_writes_a_policy_and_says_when_data_are_too_few() {
    let f = fixture();
    let labels = f.held.join("labels.tsv");
    let out = run(&["tune", "--model", s(&f.model), "--labels", s(&labels)]);
    assert!(out.status.success());
    let snippet = String::from_utf8_lossy(&out.stdout);
    assert!(snippet.contains("[policy.default]"));
    assert!(snippet.contains("[policy.domains."));
    // ~300 legitimate messages cannot support 0.1% (about 3,000 are needed at 95%).
    assert!(String::from_utf8_lossy(&out.stderr).contains("cannot support"));
}

#[test]
fn score_explains_with_readable_features() {
    let f = fixture();
    let spam_dir = f.held.join("spam");
    let first = std::fs::read_dir(&spam_dir)
        .expect("spam dir")
        .next()
        .expect("a spam file")
        .expect("entry")
        .path();
    let out = ok(&[
        "score",
        "--model",
        s(&f.model),
        "--format",
        "json",
        "--top",
        "5",
        s(&first),
    ]);
    let line: Value = serde_json::from_str(out.trim()).expect("score JSON");
    for key in ["file", "margin", "probability", "top"] {
        assert!(line.get(key).is_some(), "missing {key}");
    }
    let top = line["top"].as_array().expect("top");
    assert_eq!(top.len(), 5);
    for t in top {
        let name = t["feature"].as_str().expect("feature");
        assert!(name.contains(':'), "namespace:feature form: {name}");
        assert!(t["contribution"].is_number());
    }
    let p = line["probability"].as_f64().expect("probability");
    assert!((0.0..=1.0).contains(&p));
}

#[test]
fn features_file_trains_the_same_model_as_mail() {
    let f = fixture();
    let dir = tempfile::tempdir().expect("temp dir");
    let svm = dir.path().join("train.svm");
    let labels = f.corpus.join("labels.tsv");
    let chosen = &f.train_json["chosen"];
    let order = chosen["max_ngram"].to_string();
    let c = chosen["c"].to_string();
    ok(&[
        "features",
        "--labels",
        s(&labels),
        "--ngram",
        &order,
        "--hash-bits",
        "16",
        "--out",
        s(&svm),
    ]);
    let text = std::fs::read_to_string(&svm).expect("svmlight file");
    let first = text.lines().next().expect("a line");
    assert!(
        first.starts_with("+1 ") || first.starts_with("-1 "),
        "{first}"
    );
    let from_file = dir.path().join("from-file.tamis");
    let out = ok(&[
        "train",
        "--svmlight",
        s(&svm),
        "--ngram",
        &order,
        "--c",
        &c,
        "--folds",
        "3",
        "--hash-bits",
        "16",
        "--out",
        s(&from_file),
        "--format",
        "json",
    ]);
    let r: Value = serde_json::from_str(&out).expect("train JSON");
    // Same vectors, same folds, same solver: the same out-of-fold AUC as from the mail.
    assert_eq!(r["cv_auc"], chosen["auc"]);
}

mod bad_input {
    use super::*;

    #[test]
    fn a_single_class_corpus_says_what_is_missing() {
        let f = fixture();
        let dir = tempfile::tempdir().expect("temp dir");
        let out = run(&[
            "train",
            "--ham",
            s(&f.corpus.join("ham")),
            "--out",
            s(&dir.path().join("m")),
        ]);
        assert_eq!(out.status.code(), Some(2));
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(err.contains("no junk"), "{err}");
    }

    #[test]
    fn missing_and_unreadable_paths_are_listed_and_counted() {
        let f = fixture();
        let dir = tempfile::tempdir().expect("temp dir");
        let labels = dir.path().join("labels.tsv");
        let spam = f.corpus.join("spam");
        let ham = f.corpus.join("ham");
        std::fs::write(
            &labels,
            format!(
                "{}\tspam\n{}\tham\nno/such/file.eml\tham\n",
                s(&spam),
                s(&ham)
            ),
        )
        .expect("write labels");
        let out = run(&[
            "eval",
            "--model",
            s(&f.model),
            "--labels",
            s(&labels),
            "--format",
            "json",
        ]);
        assert!(out.status.success());
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(
            err.contains("no/such/file.eml") && err.contains("missing"),
            "{err}"
        );
        assert!(err.contains("1 path(s) or message(s) skipped"), "{err}");
    }

    #[test]
    fn a_malformed_labels_line_names_line_and_column() {
        let dir = tempfile::tempdir().expect("temp dir");
        let labels = dir.path().join("labels.tsv");
        std::fs::write(&labels, "a.eml\tspam\nb.eml\tjunk\n").expect("write labels");
        let out = run(&[
            "train",
            "--labels",
            s(&labels),
            "--out",
            s(&dir.path().join("m")),
        ]);
        assert_eq!(out.status.code(), Some(2));
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(
            err.contains("labels.tsv:2:7") && err.contains("junk"),
            "{err}"
        );
    }

    #[test]
    fn a_malformed_svmlight_file_names_line_and_column() {
        let dir = tempfile::tempdir().expect("temp dir");
        let svm = dir.path().join("bad.svm");
        std::fs::write(&svm, "+1 3:0.5 7:1\n-1 4:0.25 2:x\n").expect("write");
        let out = run(&[
            "train",
            "--svmlight",
            s(&svm),
            "--ngram",
            "1",
            "--out",
            s(&dir.path().join("m")),
        ]);
        assert_eq!(out.status.code(), Some(2));
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(err.contains("bad.svm") && err.contains(":2:"), "{err}");
    }

    #[test]
    fn check_without_a_daemon_says_where_it_tried() {
        let f = fixture();
        let port = std::net::TcpListener::bind("127.0.0.1:0")
            .expect("bind")
            .local_addr()
            .expect("addr")
            .port();
        let addr = format!("127.0.0.1:{port}");
        let message = f.corpus.join("labels.tsv");
        let out = run(&[
            "check",
            "--connect",
            &addr,
            "--rcpt",
            "a@example.org",
            s(&message),
        ]);
        assert_eq!(out.status.code(), Some(2));
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(
            err.contains(&addr) && err.contains("cannot talk to the daemon"),
            "{err}"
        );
    }

    #[test]
    fn damaged_and_foreign_model_files_are_refused() {
        let f = fixture();
        let dir = tempfile::tempdir().expect("temp dir");
        let mut bytes = std::fs::read(&f.model).expect("model");
        let middle = bytes.len() / 2;
        bytes[middle] ^= 1;
        let damaged = dir.path().join("damaged.tamis");
        std::fs::write(&damaged, &bytes).expect("write");
        let truncated = dir.path().join("truncated.tamis");
        std::fs::write(&truncated, &bytes[..bytes.len() / 3]).expect("write");
        let foreign = dir.path().join("foreign.tamis");
        std::fs::write(&foreign, b"%PDF-1.7 not a model").expect("write");
        let message = f.corpus.join("labels.tsv");
        for (path, word) in [
            (&damaged, "corrupted"),
            (&truncated, "truncated"),
            (&foreign, "not a tamis model"),
        ] {
            let out = run(&["score", "--model", s(path), s(&message)]);
            assert_eq!(out.status.code(), Some(2));
            let err = String::from_utf8_lossy(&out.stderr);
            assert!(err.contains(word) && err.contains(s(path)), "{err}");
        }
    }
}
