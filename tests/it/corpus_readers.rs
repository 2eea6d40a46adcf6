//! Corpus readers on the layouts operators keep mail in: Maildir (common practice: cur/,
//! new/, tmp/), mbox (RFC 4155), folders of message files, and labels files.

use std::path::{Path, PathBuf};

use tamis::Label;
use tamis::train::corpus::{FileKind, plan};

fn message(subject: &str) -> String {
    format!("From: a@example.org\r\nSubject: {subject}\r\n\r\nbody of {subject}\r\n")
}

fn write(path: &Path, text: &str) {
    std::fs::create_dir_all(path.parent().expect("parent")).expect("mkdir");
    std::fs::write(path, text).expect("write");
}

fn subjects(spam: &[PathBuf], ham: &[PathBuf], labels: Option<&Path>) -> Vec<(String, Label)> {
    let plan = plan(spam, ham, labels).expect("plan");
    plan.messages(1 << 20)
        .map(|m| {
            let m = m.expect("readable");
            let text = String::from_utf8(m.bytes).expect("utf-8");
            let subject = text
                .lines()
                .find_map(|l| l.strip_prefix("Subject: "))
                .expect("subject")
                .to_string();
            (subject, m.label)
        })
        .collect()
}

#[test]
fn maildir_reads_cur_and_new_but_not_tmp() {
    let dir = tempfile::tempdir().expect("temp dir");
    let maildir = dir.path().join("Junk");
    write(&maildir.join("cur/1700000000.1.host:2,S"), &message("seen"));
    write(&maildir.join("new/1700000001.2.host"), &message("new"));
    write(
        &maildir.join("tmp/1700000002.3.host"),
        &message("in delivery"),
    );
    let got = subjects(&[maildir], &[], None);
    assert_eq!(
        got,
        vec![
            ("seen".to_string(), Label::Spam),
            ("new".to_string(), Label::Spam)
        ]
    );
}

#[test]
fn mbox_files_and_message_folders_are_recognised() {
    let dir = tempfile::tempdir().expect("temp dir");
    let mbox = dir.path().join("kept.mbox");
    let text = format!(
        "From a@example.org Sat Jan  3 01:05:34 2026\n{}\nFrom b@example.org Sat Jan  3 01:06:00 2026\n{}",
        message("one").replace("\r\n", "\n"),
        message("two").replace("\r\n", "\n")
    );
    write(&mbox, &text);
    let folder = dir.path().join("eml");
    write(&folder.join("a.eml"), &message("three"));
    write(&folder.join("nested/b.eml"), &message("four"));
    write(&folder.join(".hidden.eml"), &message("hidden"));
    let p = plan(&[], &[mbox.clone(), folder.clone()], None).expect("plan");
    assert_eq!(p.files[0].kind, FileKind::Mbox);
    let got: Vec<String> = subjects(&[], &[mbox, folder], None)
        .into_iter()
        .map(|(s, _)| s)
        .collect();
    assert_eq!(got, vec!["one", "two", "three", "four"]);
}

#[test]
fn labels_paths_are_relative_and_symlinks_are_followed() {
    let dir = tempfile::tempdir().expect("temp dir");
    let store = dir.path().join("store");
    write(&store.join("x.eml"), &message("linked"));
    write(&store.join("y.eml"), &message("plain"));
    let lists = dir.path().join("lists");
    std::fs::create_dir_all(&lists).expect("mkdir");
    std::os::unix::fs::symlink(store.join("x.eml"), lists.join("link.eml")).expect("symlink");
    std::os::unix::fs::symlink(&store, lists.join("store-link")).expect("dir symlink");
    let labels = lists.join("labels.tsv");
    write(
        &labels,
        "# path\tlabel\tdomain\nlink.eml\tspam\tExample.ORG.\nstore-link/y.eml\tham\n../store/missing.eml\tham\n",
    );
    let p = plan(&[], &[], Some(&labels)).expect("plan");
    assert_eq!(p.files.len(), 2);
    assert_eq!(p.files[0].domain.as_deref(), Some("example.org"));
    assert_eq!(p.problems.len(), 1, "{:?}", p.problems);
    assert!(p.problems[0].path.ends_with("missing.eml"));
    let got = subjects(&[], &[], Some(&labels));
    assert_eq!(
        got,
        vec![
            ("linked".to_string(), Label::Spam),
            ("plain".to_string(), Label::Ham)
        ]
    );
}

#[test]
fn symlink_cycles_end() {
    let dir = tempfile::tempdir().expect("temp dir");
    let a = dir.path().join("a");
    write(&a.join("m.eml"), &message("once"));
    std::os::unix::fs::symlink(&a, a.join("loop")).expect("symlink");
    let got = subjects(&[a], &[], None);
    assert_eq!(got.len(), 1, "{got:?}");
}

#[test]
fn unreadable_paths_are_problems_not_failures() {
    let dir = tempfile::tempdir().expect("temp dir");
    let p = plan(&[dir.path().join("nope")], &[], None).expect("plan");
    assert!(p.files.is_empty());
    assert_eq!(p.problems.len(), 1);
    assert!(p.problems[0].what.contains("cannot read"));
}
