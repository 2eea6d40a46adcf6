//! The store (`src/store/`): every record kind round-trips, held bytes come back exactly,
//! concurrent releases have one winner, and each bad store file — newer schema, garbage,
//! read-only, locked, disk full, killed mid-write — gives a clear error and loses nothing
//! already held. Figures are checked against hand counts and their bounds against SciPy.
//!
//! The crash, disk-full and permission tests need a second process: this test binary runs
//! itself, selecting the ignored test [`child_worker`] and telling it its role through the
//! `TAMIS_STORE_CHILD` variable.

use std::io::{BufRead, BufReader, Write};
use std::os::unix::fs::{MetadataExt, PermissionsExt};
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::sync::{Arc, Barrier};
use std::time::{Duration, Instant};

use pretty_assertions::assert_eq;
use tamis::features::SparseVector;
use tamis::policy::Action;
use tamis::rng::SplitMix64;
use tamis::store::figures::MIN_LEGITIMATE;
use tamis::store::sqlite::schema::SCHEMA_VERSION;
use tamis::store::{
    BatchSettings, Claim, DomainOutcome, HeldFilter, HeldState, Hold, HoldOutcome, JournalEntry,
    JournalWriter, MessageKey, NewReport, ReleaseOutcome, ReportKind, ReportSource, ReportStatus,
    SqliteStore, Store, StoreError, StoreOptions, TargetCheck,
};

use crate::python;

const T0: i64 = 1_800_000_000;

fn options() -> StoreOptions {
    StoreOptions {
        busy_timeout: Duration::from_secs(5),
        ..StoreOptions::default()
    }
}

fn open(path: &Path) -> SqliteStore {
    SqliteStore::open(path, options()).expect("open the store")
}

fn entry(id: &str, at: i64, margin: f64, outcomes: &[(&str, Action, Action)]) -> JournalEntry {
    JournalEntry {
        verdict_id: id.to_string(),
        at,
        model: "test model".to_string(),
        margin: Some(margin),
        probability: None,
        outcomes: outcomes
            .iter()
            .map(|&(domain, action, enforced)| DomainOutcome {
                domain: domain.to_string(),
                recipients: 1,
                action,
                enforced,
            })
            .collect(),
        size: 100,
        sender_domain: Some("sender.test".to_string()),
        reasons: vec!["body:\"claim your\"".to_string()],
        scanned: true,
        subject: None,
        message_key: None,
    }
}

/// A message of `size` bytes fixed by `seed`; random bytes do not compress.
fn message(seed: u64, size: usize) -> Vec<u8> {
    let mut rng = SplitMix64::new(seed);
    let mut out = format!("Subject: held {seed}\r\n\r\n").into_bytes();
    while out.len() < size {
        out.extend_from_slice(&rng.next_u64().to_le_bytes());
    }
    out.truncate(size.max(1));
    out
}

fn hold(store: &SqliteStore, id: &str, at: i64, domain: &str, bytes: &[u8]) -> HoldOutcome {
    let recipients = vec![format!("someone@{domain}")];
    let mut e = entry(
        id,
        at,
        2.0,
        &[(domain, Action::Quarantine, Action::Quarantine)],
    );
    e.size = bytes.len() as u64;
    store
        .hold(
            &e,
            &Hold {
                sender: "sender@sender.test",
                recipients: &recipients,
                message: bytes,
            },
        )
        .expect("hold")
}

fn user_report(id: &str, kind: ReportKind, domain: &str, at: i64) -> NewReport {
    NewReport {
        verdict_id: id.to_string(),
        kind,
        source: ReportSource::User,
        domain: Some(domain.to_string()),
        at,
        features: None,
    }
}

/// SQLite's own consistency check, through a connection of its own.
fn sqlite_integrity(path: &Path) -> String {
    let conn = rusqlite::Connection::open(path).expect("open with rusqlite");
    conn.query_row("PRAGMA integrity_check", [], |r| r.get::<_, String>(0))
        .expect("integrity_check runs")
}

// --- Round trips ---------------------------------------------------------------------

#[test]
fn every_record_kind_round_trips() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("store.sqlite");
    let store = SqliteStore::open(
        &path,
        StoreOptions {
            record_subject: true,
            ..options()
        },
    )
    .expect("open");

    // A journal entry with every field set.
    let mut e = entry(
        "0000000000000001",
        T0,
        -0.75,
        &[
            ("example.org", Action::Tag, Action::Quarantine),
            ("", Action::Accept, Action::Accept),
            ("mail.example.net", Action::Accept, Action::Accept),
        ],
    );
    e.probability = Some(0.125);
    e.outcomes[0].recipients = 3;
    e.subject = Some("Quarterly figures".to_string());
    e.message_key = MessageKey::of("<abc@mail.example.net>");
    e.reasons = vec!["body:\"free\"".to_string(), "url:promo.example".to_string()];
    store.record(std::slice::from_ref(&e)).expect("record");
    assert_eq!(
        store.journal_entry(&e.verdict_id).expect("read"),
        Some(e.clone())
    );

    // A held message: summary, envelope and bytes.
    let bytes = message(7, 5000);
    let recipients = vec!["Ann.Other@example.org".to_string()];
    let mut held = entry(
        "0000000000000002",
        T0 + 5,
        3.5,
        &[("example.org", Action::Quarantine, Action::Quarantine)],
    );
    held.size = bytes.len() as u64;
    let outcome = store
        .hold(
            &held,
            &Hold {
                sender: "promo@sender.test",
                recipients: &recipients,
                message: &bytes,
            },
        )
        .expect("hold");
    assert_eq!(outcome, HoldOutcome::Held);
    let got = store
        .get_held(&held.verdict_id)
        .expect("get")
        .expect("present");
    assert_eq!(got.message, bytes);
    assert_eq!(got.summary.entry, held);
    assert_eq!(got.summary.sender, "promo@sender.test");
    assert_eq!(got.summary.recipients, recipients);
    assert_eq!(got.summary.state, HeldState::Held);
    assert_eq!(got.summary.held_at, T0 + 5);
    assert_eq!(got.summary.expires_at, T0 + 5 + 30 * 86_400);
    assert_eq!(got.summary.size, bytes.len() as u64);
    assert!(got.summary.stored_size > 0);

    // A report with its feature vector.
    let features = SparseVector::from_pairs(vec![(3, 0.5), (1 << 20, -0.25), (4_000_000, 1.0)]);
    let report = NewReport {
        features: Some(features.clone()),
        ..user_report(
            &held.verdict_id,
            ReportKind::NotJunk,
            "Example.ORG",
            T0 + 60,
        )
    };
    let receipt = store.report(&report).expect("report");
    assert_eq!(receipt.status, ReportStatus::Matched);
    let stored = store.reports(0, 10).expect("reports");
    assert_eq!(stored.len(), 1);
    assert_eq!(stored[0].id, receipt.id);
    assert_eq!(stored[0].verdict_id, held.verdict_id);
    assert_eq!(stored[0].kind, ReportKind::NotJunk);
    assert_eq!(stored[0].source, ReportSource::User);
    assert_eq!(stored[0].domain.as_deref(), Some("example.org"));
    assert_eq!(stored[0].at, T0 + 60);
    assert_eq!(stored[0].features.as_ref(), Some(&features));

    // All of it survives closing and reopening.
    drop(store);
    let store = open(&path);
    assert_eq!(store.journal_entry(&e.verdict_id).expect("read"), Some(e));
    assert_eq!(
        store
            .get_held(&held.verdict_id)
            .expect("get")
            .map(|m| m.message),
        Some(bytes)
    );
}

#[test]
fn subject_is_dropped_unless_configured() {
    let dir = tempfile::tempdir().expect("temp dir");
    let store = open(&dir.path().join("store.sqlite"));
    let mut e = entry("S1", T0, 0.0, &[("a.test", Action::Accept, Action::Accept)]);
    e.subject = Some("private matters".to_string());
    store.record(&[e]).expect("record");
    let back = store.journal_entry("S1").expect("read").expect("present");
    assert_eq!(back.subject, None);
}

#[test]
fn held_bytes_equal_the_bytes_given() {
    let dir = tempfile::tempdir().expect("temp dir");
    let store = open(&dir.path().join("store.sqlite"));
    // Every byte value, bare CR and LF, NUL, a line without an end, and a large random
    // body that does not compress.
    let mut odd: Vec<u8> = (0..=255u8).collect();
    odd.extend_from_slice(b"\r\n.\r\n\n\r\0no end");
    let cases = [
        odd,
        message(1, 1),
        message(2, 3 << 20),
        b"x".repeat(1 << 20),
    ];
    for (i, bytes) in cases.iter().enumerate() {
        let id = format!("BYTES{i}");
        assert_eq!(
            hold(&store, &id, T0 + i as i64, "a.test", bytes),
            HoldOutcome::Held
        );
        let got = store.get_held(&id).expect("get").expect("held");
        assert!(got.message == *bytes, "case {i}: bytes differ");
    }
    let listed = store.list_held(&HeldFilter::default()).expect("list");
    assert_eq!(listed.len(), cases.len());
}

#[test]
fn a_message_handed_over_again_is_not_held_twice() {
    // tamis stopped between commit and verdict; the relay retries, tamis scans again and
    // makes a new verdict id: the store answers with the first one.
    let dir = tempfile::tempdir().expect("temp dir");
    let store = open(&dir.path().join("store.sqlite"));
    let bytes = message(3, 2000);
    assert_eq!(
        hold(&store, "FIRST", T0, "a.test", &bytes),
        HoldOutcome::Held
    );
    assert_eq!(
        hold(&store, "RETRY", T0 + 30, "a.test", &bytes),
        HoldOutcome::AlreadyHeld {
            verdict_id: "FIRST".to_string()
        }
    );
    // Holding the same verdict again is a no-op, not an error.
    assert_eq!(
        hold(&store, "FIRST", T0, "a.test", &bytes),
        HoldOutcome::Held
    );
    assert_eq!(store.held_totals().expect("totals").messages, 1);
    assert_eq!(store.journal_entry("RETRY").expect("read"), None);
}

#[test]
fn list_filters_by_domain_time_and_margin_newest_first() {
    let dir = tempfile::tempdir().expect("temp dir");
    let store = open(&dir.path().join("store.sqlite"));
    for i in 0..10 {
        let domain = if i % 2 == 0 { "a.test" } else { "b.test" };
        let recipients = vec![format!("x@{domain}")];
        let bytes = message(100 + i, 300);
        let mut e = entry(
            &format!("L{i}"),
            T0 + i as i64 * 60,
            i as f64,
            &[(domain, Action::Quarantine, Action::Quarantine)],
        );
        e.size = bytes.len() as u64;
        store
            .hold(
                &e,
                &Hold {
                    sender: "s@sender.test",
                    recipients: &recipients,
                    message: &bytes,
                },
            )
            .expect("hold");
    }
    let ids = |filter: HeldFilter| -> Vec<String> {
        store
            .list_held(&filter)
            .expect("list")
            .into_iter()
            .map(|h| h.entry.verdict_id)
            .collect()
    };
    assert_eq!(
        ids(HeldFilter {
            limit: 3,
            ..HeldFilter::default()
        }),
        ["L9", "L8", "L7"]
    );
    assert_eq!(
        ids(HeldFilter {
            limit: 3,
            offset: 3,
            ..HeldFilter::default()
        }),
        ["L6", "L5", "L4"]
    );
    assert_eq!(
        ids(HeldFilter {
            domain: Some("A.TEST".to_string()),
            ..HeldFilter::default()
        }),
        ["L8", "L6", "L4", "L2", "L0"]
    );
    assert_eq!(
        ids(HeldFilter {
            since: Some(T0 + 120),
            until: Some(T0 + 300),
            ..HeldFilter::default()
        }),
        ["L4", "L3", "L2"]
    );
    assert_eq!(
        ids(HeldFilter {
            min_margin: Some(6.5),
            max_margin: Some(8.0),
            ..HeldFilter::default()
        }),
        ["L8", "L7"]
    );
    assert!(
        ids(HeldFilter {
            state: HeldState::Released,
            ..HeldFilter::default()
        })
        .is_empty()
    );
}

#[test]
fn find_verdict_by_message_id_and_recipient_domain() {
    let dir = tempfile::tempdir().expect("temp dir");
    let store = open(&dir.path().join("store.sqlite"));
    let key = MessageKey::of("<m1@sender.test>").expect("key");
    let mut a = entry(
        "MID-A",
        T0,
        0.0,
        &[("a.test", Action::Accept, Action::Accept)],
    );
    a.message_key = Some(key);
    let mut b = entry(
        "MID-B",
        T0 + 1,
        0.0,
        &[("b.test", Action::Tag, Action::Tag)],
    );
    b.message_key = Some(key);
    store.record(&[a, b]).expect("record");
    assert_eq!(
        store.find_verdict(&key, "A.test").expect("find"),
        Some("MID-A".to_string())
    );
    assert_eq!(
        store.find_verdict(&key, "b.test").expect("find"),
        Some("MID-B".to_string())
    );
    assert_eq!(store.find_verdict(&key, "c.test").expect("find"), None);
    let other = MessageKey::of("m2@sender.test").expect("key");
    assert_eq!(store.find_verdict(&other, "a.test").expect("find"), None);
}

// --- Release -------------------------------------------------------------------------

#[test]
fn concurrent_claims_for_release_have_exactly_one_winner() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("store.sqlite");
    let first = Arc::new(open(&path));
    // A second handle with its own connections, as the command line next to the daemon.
    let second = Arc::new(open(&path));
    const MESSAGES: usize = 40;
    for i in 0..MESSAGES {
        hold(
            &first,
            &format!("C{i}"),
            T0 + i as i64,
            "a.test",
            &message(i as u64, 800),
        );
    }
    let barrier = Arc::new(Barrier::new(2));
    let racers: Vec<_> = [first.clone(), second.clone()]
        .into_iter()
        .map(|store| {
            let barrier = barrier.clone();
            std::thread::spawn(move || {
                (0..MESSAGES)
                    .map(|i| {
                        barrier.wait();
                        match store.claim_release(&format!("C{i}")).expect("claim") {
                            Claim::Won(m) => {
                                assert_eq!(m.message, message(i as u64, 800));
                                1u32
                            }
                            Claim::InProgress => 0,
                            other => panic!("unexpected claim answer {other:?}"),
                        }
                    })
                    .collect::<Vec<u32>>()
            })
        })
        .collect();
    let wins: Vec<Vec<u32>> = racers
        .into_iter()
        .map(|h| h.join().expect("racer"))
        .collect();
    assert_eq!(wins[0].len(), MESSAGES);
    for (i, (a, b)) in wins[0].iter().zip(&wins[1]).enumerate() {
        assert_eq!(a + b, 1, "message C{i}: exactly one winner");
    }

    // Delivered: released, and counted as a not-junk report; a later claim is refused.
    let features = SparseVector::from_pairs(vec![(9, 1.0)]);
    let delivered = ReleaseOutcome::Delivered {
        at: T0 + 500,
        features: Some(features.clone()),
    };
    assert!(second.finish_release("C0", &delivered).expect("finish"));
    assert_eq!(
        first.claim_release("C0").expect("claim"),
        Claim::AlreadyReleased
    );
    assert!(
        !first
            .finish_release("C0", &delivered)
            .expect("finish twice")
    );
    let reports = first.reports(0, 10).expect("reports");
    assert_eq!(reports.len(), 1);
    assert_eq!(
        (reports[0].kind, reports[0].source, reports[0].status),
        (
            ReportKind::NotJunk,
            ReportSource::Release,
            ReportStatus::Matched
        )
    );
    assert_eq!(reports[0].features.as_ref(), Some(&features));

    // Failed: back to held, and it can be claimed again.
    assert!(
        first
            .finish_release("C1", &ReleaseOutcome::Failed)
            .expect("fail")
    );
    assert!(matches!(
        second.claim_release("C1").expect("claim"),
        Claim::Won(_)
    ));
    assert_eq!(first.claim_release("nope").expect("claim"), Claim::NotFound);

    // A message being released cannot be deleted; a stale claim goes back to held.
    assert!(!first.delete_held("C2").expect("delete"));
    assert_eq!(
        first.reset_stale_claims(i64::MAX).expect("reset"),
        MESSAGES as u64 - 1
    );
    assert!(first.delete_held("C2").expect("delete"));
    assert_eq!(first.get_held("C2").expect("get"), None);
}

// --- Bad store files -----------------------------------------------------------------

fn expect_err(result: Result<SqliteStore, StoreError>) -> StoreError {
    match result {
        Ok(_) => panic!("the store opened but should have been refused"),
        Err(e) => e,
    }
}

#[test]
fn a_new_store_file_has_mode_0600() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("store.sqlite");
    let store = open(&path);
    hold(&store, "P1", T0, "a.test", b"Subject: x\r\n\r\nbody\r\n");
    for file in ["store.sqlite", "store.sqlite-wal", "store.sqlite-shm"] {
        let mode = std::fs::metadata(dir.path().join(file))
            .expect("exists")
            .permissions()
            .mode();
        assert_eq!(mode & 0o777, 0o600, "{file}");
    }
}

#[test]
fn a_symlink_a_folder_or_a_missing_folder_is_refused() {
    let dir = tempfile::tempdir().expect("temp dir");
    let target = dir.path().join("real.sqlite");
    drop(open(&target));
    let link = dir.path().join("link.sqlite");
    std::os::unix::fs::symlink(&target, &link).expect("symlink");
    let e = expect_err(SqliteStore::open(&link, options()));
    assert!(
        matches!(
            e,
            StoreError::NotRegularFile {
                kind: "a symbolic link",
                ..
            }
        ),
        "{e}"
    );
    assert!(e.to_string().contains("link.sqlite"), "{e}");

    let e = expect_err(SqliteStore::open(dir.path(), options()));
    assert!(
        matches!(
            e,
            StoreError::NotRegularFile {
                kind: "a folder",
                ..
            }
        ),
        "{e}"
    );

    let e = expect_err(SqliteStore::open(
        &dir.path().join("absent/store.sqlite"),
        options(),
    ));
    assert!(matches!(e, StoreError::MissingFolder { .. }), "{e}");
    assert!(e.to_string().contains("create it"), "{e}");
}

#[test]
fn a_store_of_a_newer_schema_is_refused_untouched() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("store.sqlite");
    hold(
        &open(&path),
        "N1",
        T0,
        "a.test",
        b"Subject: x\r\n\r\nbody\r\n",
    );
    {
        let conn = rusqlite::Connection::open(&path).expect("open");
        conn.pragma_update(None, "user_version", SCHEMA_VERSION + 7)
            .expect("bump version");
    }
    let before = std::fs::read(&path).expect("read");
    let e = expect_err(SqliteStore::open(&path, options()));
    match &e {
        StoreError::NewerSchema {
            found, supported, ..
        } => {
            assert_eq!((*found, *supported), (SCHEMA_VERSION + 7, SCHEMA_VERSION));
        }
        other => panic!("expected NewerSchema, got {other}"),
    }
    let text = e.to_string();
    assert!(text.contains("store.sqlite"), "{text}");
    assert!(
        text.contains(&format!("{}", SCHEMA_VERSION + 7))
            && text.contains(&format!("({SCHEMA_VERSION})")),
        "{text}"
    );
    assert_eq!(
        std::fs::read(&path).expect("read"),
        before,
        "refused file is left untouched"
    );
}

#[test]
fn a_garbage_file_or_another_programs_database_is_not_a_store() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("garbage.sqlite");
    let garbage = message(99, 16 * 1024);
    std::fs::write(&path, &garbage).expect("write");
    let e = expect_err(SqliteStore::open(&path, options()));
    assert!(matches!(e, StoreError::NotAStore { .. }), "{e}");
    assert!(e.to_string().contains("garbage.sqlite"), "{e}");
    assert_eq!(
        std::fs::read(&path).expect("read"),
        garbage,
        "left untouched"
    );

    let other = dir.path().join("other.sqlite");
    {
        let conn = rusqlite::Connection::open(&other).expect("open");
        conn.execute_batch("CREATE TABLE contacts (name TEXT)")
            .expect("create");
    }
    let e = expect_err(SqliteStore::open(&other, options()));
    assert!(matches!(e, StoreError::NotAStore { .. }), "{e}");
    assert!(e.to_string().contains("another program"), "{e}");
}

#[test]
fn a_store_file_without_owner_write_permission_is_read_only() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("store.sqlite");
    drop(open(&path));
    std::fs::set_permissions(&path, std::fs::Permissions::from_mode(0o400)).expect("chmod");
    let e = expect_err(SqliteStore::open(&path, options()));
    assert!(matches!(e, StoreError::ReadOnly { .. }), "{e}");
    assert!(e.to_string().contains("0400"), "{e}");
}

#[test]
fn a_store_the_daemon_user_cannot_write_is_read_only() {
    // A folder and file the daemon's user cannot write. Root writes anyway, so as root the
    // child runs as `nobody` (util-linux's setpriv).
    let dir = tempfile::tempdir().expect("temp dir");
    let folder = dir.path().join("state");
    std::fs::create_dir(&folder).expect("mkdir");
    let existing = folder.join("store.sqlite");
    hold(
        &open(&existing),
        "R1",
        T0,
        "a.test",
        b"Subject: x\r\n\r\nkept\r\n",
    );
    std::fs::set_permissions(&existing, std::fs::Permissions::from_mode(0o644)).expect("chmod");
    std::fs::set_permissions(&folder, std::fs::Permissions::from_mode(0o555)).expect("chmod");
    std::fs::set_permissions(dir.path(), std::fs::Permissions::from_mode(0o755)).expect("chmod");

    let (prefix, exe) = unprivileged(dir.path());
    for path in [folder.join("new.sqlite"), existing.clone()] {
        let out = run_child(prefix.clone(), &exe, "open", &path);
        assert!(
            out.iter()
                .any(|l| l.starts_with("error read-only ") && l.contains(path_name(&path))),
            "{path:?}: {out:?}"
        );
    }
    std::fs::set_permissions(&folder, std::fs::Permissions::from_mode(0o755)).expect("chmod");
    let store = open(&existing);
    assert_eq!(
        store.get_held("R1").expect("get").map(|m| m.message),
        Some(b"Subject: x\r\n\r\nkept\r\n".to_vec())
    );
}

fn path_name(path: &Path) -> &str {
    path.file_name().and_then(|n| n.to_str()).unwrap_or("")
}

#[test]
fn a_locked_store_is_a_clear_error_within_the_busy_timeout() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("store.sqlite");
    let timeout = Duration::from_millis(300);
    let store = SqliteStore::open(
        &path,
        StoreOptions {
            busy_timeout: timeout,
            ..options()
        },
    )
    .expect("open");
    hold(&store, "K0", T0, "a.test", b"Subject: x\r\n\r\nfirst\r\n");

    let other = rusqlite::Connection::open(&path).expect("another connection");
    other.execute_batch("BEGIN EXCLUSIVE").expect("lock");
    let recipients = vec!["x@a.test".to_string()];
    let started = Instant::now();
    let result = store.hold(
        &entry(
            "K1",
            T0 + 1,
            2.0,
            &[("a.test", Action::Quarantine, Action::Quarantine)],
        ),
        &Hold {
            sender: "",
            recipients: &recipients,
            message: b"Subject: y\r\n\r\nsecond\r\n",
        },
    );
    let waited = started.elapsed();
    let e = result.expect_err("the lock is held");
    assert!(matches!(e, StoreError::Busy { .. }), "{e}");
    assert!(
        e.to_string().contains("store.sqlite") && e.to_string().contains("locked"),
        "{e}"
    );
    assert!(
        waited >= timeout.mul_f64(0.8),
        "gave up after {waited:?}, before the timeout"
    );
    assert!(
        waited < timeout + Duration::from_secs(3),
        "waited {waited:?}, far past the timeout"
    );
    // Readers are not blocked by a writer in WAL mode, and nothing held was lost.
    assert_eq!(store.held_totals().expect("totals").messages, 1);

    other.execute_batch("ROLLBACK").expect("unlock");
    assert_eq!(
        store
            .hold(
                &entry(
                    "K1",
                    T0 + 1,
                    2.0,
                    &[("a.test", Action::Quarantine, Action::Quarantine)]
                ),
                &Hold {
                    sender: "",
                    recipients: &recipients,
                    message: b"Subject: y\r\n\r\nsecond\r\n"
                },
            )
            .expect("hold after the lock is gone"),
        HoldOutcome::Held
    );
}

#[test]
fn a_full_disk_is_an_error_and_loses_nothing_held() {
    // RLIMIT_FSIZE stands in for a full disk: writes past the limit fail with EFBIG. The
    // child ignores SIGXFSZ (ignored signals survive exec), which would otherwise kill it.
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("store.sqlite");
    {
        let store = open(&path);
        for i in 0..3 {
            hold(
                &store,
                &format!("D{i}"),
                T0 + i,
                "a.test",
                &message(i as u64, 20_000),
            );
        }
    }
    let limited = vec![
        "sh".to_string(),
        "-c".to_string(),
        "trap '' XFSZ; ulimit -f 2048; exec \"$0\" \"$@\"".to_string(),
    ];
    let out = run_child(limited, &this_binary(), "hold-big", &path);
    let big = out
        .iter()
        .find(|l| l.starts_with("big "))
        .cloned()
        .unwrap_or_default();
    assert!(
        big.starts_with("big error io ") || big.starts_with("big error full "),
        "{out:?}"
    );
    assert!(big.contains("store.sqlite"), "{big}");
    eprintln!("the child's hold of 6 MiB under a 1–2 MiB limit: {big}");
    // The same process goes on: a small hold after the failure succeeds.
    assert!(out.iter().any(|l| l == "small held"), "{out:?}");

    assert_eq!(sqlite_integrity(&path), "ok");
    let store = open(&path);
    for i in 0..3 {
        let got = store
            .get_held(&format!("D{i}"))
            .expect("get")
            .expect("still held");
        assert!(got.message == message(i as u64, 20_000), "D{i} changed");
    }
    assert_eq!(store.get_held("BIG").expect("get"), None);
    assert!(store.get_held("SMALL").expect("get").is_some());
    assert!(
        store.journal_entry("BIG").expect("read").is_none(),
        "no half-written entry"
    );
}

#[test]
fn integrity_holds_after_a_kill_mid_batch() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("store.sqlite");
    drop(open(&path));
    let mut child = child_command(Vec::new(), &this_binary(), "batches", &path)
        .stdout(Stdio::piped())
        .spawn()
        .expect("start the writer");
    let stdout = child.stdout.take().expect("piped");
    let mut held = Vec::new();
    for line in BufReader::new(stdout).lines() {
        let line = line.expect("read");
        if let Some(id) = child_line(&line).and_then(|l| l.strip_prefix("held ")) {
            held.push(id.to_string());
            if held.len() == 12 {
                break;
            }
        }
    }
    // Let it get into the next batch, then kill -9.
    std::thread::sleep(Duration::from_millis(7));
    child.kill().expect("SIGKILL");
    let _ = child.wait();
    assert_eq!(held.len(), 12, "the writer reported its holds");

    // SQLite's own check (PRAGMA integrity_check) on the file as the kill left it.
    assert_eq!(sqlite_integrity(&path), "ok");
    let store = open(&path);
    for (i, id) in held.iter().enumerate() {
        let got = store
            .get_held(id)
            .expect("get")
            .unwrap_or_else(|| panic!("{id} was lost"));
        assert!(got.message == message(i as u64, 3000), "{id} changed");
    }
    // Batches are all or nothing.
    let conn = rusqlite::Connection::open(&path).expect("open");
    let rows: i64 = conn
        .query_row(
            "SELECT count(*) FROM journal WHERE verdict_id LIKE 'B%'",
            [],
            |r| r.get(0),
        )
        .expect("count");
    assert_eq!(
        rows % BATCH as i64,
        0,
        "{rows} batch rows: a batch was half-written"
    );
    assert!(rows >= 12 * BATCH as i64);
    drop(conn);
    // A restart neither loses nor duplicates: holding a reported message again is a no-op.
    let bytes = message(0, 3000);
    assert_eq!(
        hold(&store, &held[0], T0, "a.test", &bytes),
        HoldOutcome::Held
    );
    assert_eq!(
        hold(&store, "AGAIN", T0, "a.test", &bytes),
        HoldOutcome::AlreadyHeld {
            verdict_id: held[0].clone()
        }
    );
}

// --- Child processes -----------------------------------------------------------------

const BATCH: usize = 200;

/// How to run a child as a user without write access: as `nobody` through util-linux's
/// `setpriv` when this process is root, as itself otherwise. As root the test binary is
/// first copied into `dir` (mode 0755), so `nobody` can run it wherever the checkout is.
fn unprivileged(dir: &Path) -> (Vec<String>, PathBuf) {
    let exe = std::env::current_exe().expect("test binary path");
    let euid = std::fs::metadata("/proc/self")
        .map(|m| m.uid())
        .unwrap_or(0);
    if euid != 0 {
        return (Vec::new(), exe);
    }
    let copy = dir.join("store-child");
    std::fs::copy(&exe, &copy).expect("copy the test binary");
    std::fs::set_permissions(&copy, std::fs::Permissions::from_mode(0o755)).expect("chmod");
    let prefix = [
        "setpriv",
        "--reuid=65534",
        "--regid=65534",
        "--clear-groups",
    ];
    (prefix.map(String::from).to_vec(), copy)
}

/// The test binary itself, for children run as this user.
fn this_binary() -> PathBuf {
    std::env::current_exe().expect("test binary path")
}

fn child_command(prefix: Vec<String>, exe: &Path, role: &str, path: &Path) -> Command {
    let mut argv: Vec<String> = prefix;
    argv.push(exe.to_string_lossy().into_owned());
    argv.extend(
        [
            "store::child_worker",
            "--exact",
            "--ignored",
            "--nocapture",
            "--test-threads=1",
        ]
        .map(String::from),
    );
    let mut cmd = Command::new(&argv[0]);
    cmd.args(&argv[1..])
        .env("TAMIS_STORE_CHILD", role)
        .env("TAMIS_STORE_PATH", path)
        .stdin(Stdio::null())
        .stderr(Stdio::inherit());
    cmd
}

/// Runs a child to the end and returns its own lines (`CHILD ` prefix removed).
fn run_child(prefix: Vec<String>, exe: &Path, role: &str, path: &Path) -> Vec<String> {
    let out = child_command(prefix, exe, role, path)
        .output()
        .expect("run the child");
    let text = String::from_utf8_lossy(&out.stdout);
    let lines: Vec<String> = text
        .lines()
        .filter_map(|l| child_line(l).map(String::from))
        .collect();
    assert!(out.status.success(), "child {role} failed: {text}");
    lines
}

/// A line the child said, wherever it starts: the test harness prints the test's name
/// without a line end before the test runs.
fn child_line(line: &str) -> Option<&str> {
    line.find("CHILD ")
        .and_then(|i| line.get(i + "CHILD ".len()..))
}

fn say(line: &str) {
    let mut out = std::io::stdout().lock();
    let _ = writeln!(out, "CHILD {line}");
    let _ = out.flush();
}

fn describe(result: Result<HoldOutcome, StoreError>) -> String {
    match result {
        Ok(_) => "held".to_string(),
        Err(e) => format!("error {} {e}", e.kind()),
    }
}

/// The child processes' entry point (see the module documentation). Run by hand with
/// `--ignored` it has no role and runs the batch writer briefly in-process instead, so
/// it checks something either way.
#[test]
#[ignore = "started by the crash, disk-full and permission tests as a child process"]
fn child_worker() {
    let role = std::env::var("TAMIS_STORE_CHILD").unwrap_or_default();
    let path = std::env::var_os("TAMIS_STORE_PATH").map(PathBuf::from);
    match (role.as_str(), path) {
        ("open", Some(path)) => match SqliteStore::open(&path, options()) {
            Ok(_) => say("opened"),
            Err(e) => say(&format!("error {} {e}", e.kind())),
        },
        ("hold-big", Some(path)) => {
            let store = open(&path);
            let recipients = vec!["x@a.test".to_string()];
            let big = message(1234, 6 << 20);
            let mut e = entry(
                "BIG",
                T0 + 100,
                3.0,
                &[("a.test", Action::Quarantine, Action::Quarantine)],
            );
            e.size = big.len() as u64;
            say(&format!(
                "big {}",
                describe(store.hold(
                    &e,
                    &Hold {
                        sender: "",
                        recipients: &recipients,
                        message: &big
                    }
                ))
            ));
            let small = message(4321, 500);
            let mut e = entry(
                "SMALL",
                T0 + 101,
                3.0,
                &[("a.test", Action::Quarantine, Action::Quarantine)],
            );
            e.size = small.len() as u64;
            say(&format!(
                "small {}",
                describe(store.hold(
                    &e,
                    &Hold {
                        sender: "",
                        recipients: &recipients,
                        message: &small
                    }
                ))
            ));
        }
        ("batches", Some(path)) => write_batches(&path, 2000),
        _ => {
            let dir = tempfile::tempdir().expect("temp dir");
            let path = dir.path().join("store.sqlite");
            write_batches(&path, 3);
            let store = open(&path);
            assert_eq!(store.held_totals().expect("totals").messages, 3);
        }
    }
}

/// Journal batches of [`BATCH`] entries, each followed by one hold whose id is printed
/// once it returned.
fn write_batches(path: &Path, rounds: usize) {
    let store = open(path);
    for round in 0..rounds {
        let batch: Vec<JournalEntry> = (0..BATCH)
            .map(|j| {
                entry(
                    &format!("B{round:06}{j:04}"),
                    T0 + round as i64,
                    -1.0,
                    &[("a.test", Action::Accept, Action::Accept)],
                )
            })
            .collect();
        store.record(&batch).expect("record a batch");
        let id = format!("H{round:06}");
        let bytes = message(round as u64, 3000);
        assert_eq!(
            hold(&store, &id, T0 + round as i64, "a.test", &bytes),
            HoldOutcome::Held
        );
        say(&format!("held {id}"));
    }
}

// --- Reports and figures -------------------------------------------------------------

#[test]
fn unmatched_and_forged_reports_are_never_counted() {
    let dir = tempfile::tempdir().expect("temp dir");
    let store = open(&dir.path().join("store.sqlite"));
    let mut batch = Vec::new();
    for i in 0..400 {
        batch.push(entry(
            &format!("A{i}"),
            T0,
            -1.0,
            &[("a.test", Action::Accept, Action::Accept)],
        ));
    }
    batch.push(entry(
        "ONLY-B",
        T0,
        3.0,
        &[("b.test", Action::Quarantine, Action::Quarantine)],
    ));
    store.record(&batch).expect("record");
    let baseline = store.figures(T0, Some("a.test")).expect("figures");

    let cases = [
        // An id nobody made (or purged).
        (
            user_report("ZZZZZZZZZZZZZZZZ", ReportKind::NotJunk, "a.test", T0 + 1),
            ReportStatus::UnknownVerdict,
        ),
        // A real id of another domain's mail, reported from a.test: forged or mistaken.
        (
            user_report("ONLY-B", ReportKind::NotJunk, "a.test", T0 + 2),
            ReportStatus::DomainMismatch,
        ),
        // A user report that names no domain cannot be checked.
        (
            NewReport {
                domain: None,
                ..user_report("A1", ReportKind::Junk, "a.test", T0 + 3)
            },
            ReportStatus::NoReporterDomain,
        ),
    ];
    for (report, expected) in &cases {
        assert_eq!(store.report(report).expect("record").status, *expected);
    }
    let after = store.figures(T0, Some("a.test")).expect("figures");
    let b = store.figures(T0, Some("b.test")).expect("figures");
    assert_eq!(after[0].unmatched_reports, 2);
    let mut expected = baseline[0].clone();
    expected.unmatched_reports = 2;
    assert_eq!(
        after,
        vec![expected],
        "unmatched reports change nothing but their own count"
    );
    assert_eq!((b[0].reports_not_junk, b[0].false_positives.count), (0, 0));
    // They are kept, but only as unmatched.
    let stored = store.reports(0, 10).expect("reports");
    assert_eq!(stored.iter().filter(|r| r.status.is_matched()).count(), 0);
    assert_eq!(stored.len(), 3);
}

/// The hand-built journal of [`figures_on_a_hand_built_journal_equal_the_counts`].
fn hand_built(store: &SqliteStore) {
    use Action::{Accept as A, Quarantine as Q, Tag as T};
    let mut batch = Vec::new();
    // a.test, enforcing: 50 accepted, 10 tagged; 8 held below.
    for i in 0..50 {
        batch.push(entry(&format!("aA{i}"), T0 + i, -1.0, &[("a.test", A, A)]));
    }
    for i in 0..10 {
        batch.push(entry(&format!("aT{i}"), T0 + i, 0.5, &[("a.test", T, T)]));
    }
    // b.test, tag-only: 20 accepted, 2 tagged, 3 tagged that would have been held.
    for i in 0..20 {
        batch.push(entry(&format!("bA{i}"), T0 + i, -1.0, &[("b.test", A, A)]));
    }
    for i in 0..2 {
        batch.push(entry(&format!("bT{i}"), T0 + i, 0.5, &[("b.test", T, T)]));
    }
    for i in 0..3 {
        batch.push(entry(&format!("bW{i}"), T0 + i, 2.0, &[("b.test", T, Q)]));
    }
    // One message to both domains, accepted for both.
    batch.push(entry(
        "both",
        T0,
        -2.0,
        &[("a.test", A, A), ("b.test", A, A)],
    ));
    // Before the window: must not count, nor must reports about it.
    for i in 0..5 {
        batch.push(entry(
            &format!("old{i}"),
            T0 - 1000,
            2.0,
            &[("a.test", A, A)],
        ));
    }
    // An unscanned message, accepted by the failure mode.
    let mut unscanned = entry("aU", T0, 0.0, &[("a.test", A, A)]);
    unscanned.scanned = false;
    unscanned.margin = None;
    batch.push(unscanned);
    store.record(&batch).expect("record");
    for i in 0..8 {
        hold(
            store,
            &format!("aQ{i}"),
            T0 + i,
            "a.test",
            &message(500 + i as u64, 400),
        );
    }

    let r = |id: &str, kind, source, domain: Option<&str>| {
        let receipt = store
            .report(&NewReport {
                verdict_id: id.to_string(),
                kind,
                source,
                domain: domain.map(String::from),
                at: T0 + 3600,
                features: None,
            })
            .expect("report");
        assert_eq!(receipt.status, ReportStatus::Matched, "{id}");
    };
    use ReportKind::{Junk, NotJunk};
    use ReportSource::{Audit, Operator, User};
    // Held mail of a.test: aQ0, aQ1 reported not junk by users; aQ2 first called junk by
    // its user, later not junk by the audit (latest wins: not junk); aQ3 reported junk;
    // aQ4 audited junk; aQ5 released. aQ6, aQ7 nobody said anything about.
    r("aQ0", NotJunk, User, Some("a.test"));
    r("aQ1", NotJunk, User, Some("A.Test"));
    r("aQ2", Junk, User, Some("a.test"));
    r("aQ2", NotJunk, Audit, None);
    r("aQ3", Junk, User, Some("a.test"));
    r("aQ4", Junk, Audit, Some("a.test"));
    assert!(matches!(
        store.claim_release("aQ5").expect("claim"),
        Claim::Won(_)
    ));
    assert!(
        store
            .finish_release(
                "aQ5",
                &ReleaseOutcome::Delivered {
                    at: T0 + 4000,
                    features: None
                }
            )
            .expect("release")
    );
    // Accepted mail of a.test: three missed junk, one confirmed legitimate twice.
    r("aA0", Junk, User, Some("a.test"));
    r("aA1", Junk, User, Some("a.test"));
    r("aA2", Junk, Operator, None);
    r("aA3", NotJunk, User, Some("a.test"));
    r("aA3", NotJunk, User, Some("a.test"));
    // A tagged message of a.test that was legitimate.
    r("aT0", NotJunk, User, Some("a.test"));
    // The message to both domains, cleared by an operator for both.
    r("both", NotJunk, Operator, None);
    // b.test: a would-be quarantine reported legitimate, one reported junk.
    r("bW0", NotJunk, User, Some("b.test"));
    r("bW1", Junk, User, Some("b.test"));
    // Reports about mail before the window.
    r("old0", NotJunk, User, Some("a.test"));
}

#[test]
fn figures_on_a_hand_built_journal_equal_the_counts() {
    let dir = tempfile::tempdir().expect("temp dir");
    let store = open(&dir.path().join("store.sqlite"));
    hand_built(&store);
    let all = store.figures(T0, None).expect("figures");
    assert_eq!(
        all.iter().map(|f| f.domain.as_str()).collect::<Vec<_>>(),
        ["a.test", "b.test"]
    );
    let (a, b) = (&all[0], &all[1]);

    // a.test: 50 + 1 (both) + 1 (unscanned) accepted, 10 tagged, 8 held.
    assert_eq!(
        (
            a.by_action.accept,
            a.by_action.tag,
            a.by_action.quarantine,
            a.by_action.defer
        ),
        (52, 10, 8, 0)
    );
    assert_eq!(a.messages(), 70);
    assert_eq!((a.would_quarantine, a.unscanned), (0, 1));
    // Junk: aQ2(user), aQ3, aQ4(audit), aA0, aA1, aA2(operator) = 6.
    // Not junk: aQ0, aQ1, aQ2(audit), aA3 ×2, aT0, both = 7; releases: aQ5.
    assert_eq!((a.reports_junk, a.reports_not_junk, a.releases), (6, 7, 1));
    // Legitimate: labelled not junk aQ0 aQ1 aQ2 aQ5 aA3 aT0 both = 7, plus unlabelled
    // accepted: 52 - aA0..aA3 (4) - both (1) = 47. Total 54.
    assert_eq!(a.legitimate, 54);
    // False positives: held and labelled not junk: aQ0, aQ1, aQ2, aQ5.
    assert_eq!((a.false_positives.count, a.false_positives.of), (4, 54));
    // Junk: labelled junk aQ3 aQ4 aA0 aA1 aA2 = 5, plus unlabelled held aQ6 aQ7 = 2.
    // Caught: aQ3, aQ4, aQ6, aQ7.
    assert_eq!(a.junk, 7);
    assert_eq!((a.catch_rate.count, a.catch_rate.of), (4, 7));
    // Audit: aQ2 (not junk) and aQ4 (junk) reviewed.
    assert_eq!((a.audit.count, a.audit.of), (1, 2));
    assert_eq!(a.unmatched_reports, 0);
    assert!(
        a.too_thin,
        "54 legitimate messages are fewer than {MIN_LEGITIMATE}"
    );

    // b.test: 20 + 1 accepted, 5 tagged of which 3 would have been held.
    assert_eq!(
        (b.by_action.accept, b.by_action.tag, b.by_action.quarantine),
        (21, 5, 0)
    );
    assert_eq!(
        (b.by_enforced_action.tag, b.by_enforced_action.quarantine),
        (2, 3)
    );
    assert_eq!(b.would_quarantine, 3);
    assert_eq!((b.reports_junk, b.reports_not_junk, b.releases), (1, 2, 0));
    // Legitimate: bW0 and both labelled, plus 20 unlabelled accepted = 22; the would-be
    // quarantine bW0 is a false positive.
    assert_eq!((b.legitimate, b.false_positives.count), (22, 1));
    // Junk: bW1 (labelled) + bW2 (unlabelled would-be held); both caught.
    assert_eq!((b.junk, b.catch_rate.count), (2, 2));

    // One domain only gives the same figures; a domain without mail gives zeros.
    assert_eq!(
        store.figures(T0, Some("B.test")).expect("figures"),
        vec![b.clone()]
    );
    let none = store.figures(T0, Some("c.test")).expect("figures");
    assert_eq!(
        (none.len(), none[0].messages(), none[0].too_thin),
        (1, 0, true)
    );
    // A later window leaves the earlier mail out.
    let late = store.figures(T0 + 40, Some("a.test")).expect("figures");
    assert_eq!(late[0].by_action.accept, 10);
}

#[test]
fn enough_evidence_is_judged_against_a_target() {
    let dir = tempfile::tempdir().expect("temp dir");
    let store = open(&dir.path().join("store.sqlite"));
    let mut batch: Vec<JournalEntry> = (0..3000)
        .map(|i| {
            entry(
                &format!("E{i}"),
                T0,
                -1.0,
                &[("a.test", Action::Accept, Action::Accept)],
            )
        })
        .collect();
    batch.push(entry(
        "EQ",
        T0,
        3.0,
        &[("a.test", Action::Quarantine, Action::Quarantine)],
    ));
    store.record(&batch).expect("record");
    store
        .report(&user_report("EQ", ReportKind::Junk, "a.test", T0 + 5))
        .expect("report");
    let f = &store.figures(T0, None).expect("figures")[0];
    assert!(!f.too_thin, "{:?}", f.thin_reason);
    // 0 of 3000: upper bound ≈ 3/3000 = 0.001 (rule of three).
    assert_eq!(f.against(0.002), TargetCheck::Met);
    assert_eq!(f.against(0.0005), TargetCheck::Undecided);
    store
        .report(&user_report("EQ", ReportKind::NotJunk, "a.test", T0 + 9))
        .expect("report");
    for i in 0..30 {
        store
            .report(&user_report(
                &format!("E{i}"),
                ReportKind::NotJunk,
                "a.test",
                T0 + 9,
            ))
            .expect("report");
    }
    let f = &store.figures(T0, None).expect("figures")[0];
    assert_eq!(f.false_positives.count, 1);
    assert_eq!(f.against(0.00001), TargetCheck::Missed);
}

#[test]
fn clopper_pearson_bounds_match_scipy() {
    // Reference: scipy.stats.beta.ppf — upper = ppf(0.95, k + 1, n - k), lower =
    // ppf(0.05, k, n - k + 1), the one-sided 95% Clopper–Pearson bounds.
    let dir = tempfile::tempdir().expect("temp dir");
    let store = open(&dir.path().join("store.sqlite"));
    hand_built(&store);
    let all = store.figures(T0, None).expect("figures");
    let mut rates: Vec<tamis::store::Rate> = all
        .iter()
        .flat_map(|f| [f.false_positives, f.catch_rate, f.audit])
        .collect();
    for (k, n) in [(0, 300), (2, 40_000), (17, 1000), (999, 1000), (5, 5)] {
        rates.push(tamis::store::Rate::new(k, n));
    }
    let input: String = rates
        .iter()
        .map(|r| format!("{} {}\n", r.count, r.of))
        .collect();
    let script = r#"
import sys
from scipy.stats import beta
for line in sys.stdin:
    k, n = map(int, line.split())
    upper = 1.0 if k == n else beta.ppf(0.95, k + 1, n - k)
    lower = 0.0 if k == 0 else beta.ppf(0.05, k, n - k + 1)
    print(repr(float(lower)), repr(float(upper)))
"#;
    let out = python::run(script, &[], input.as_bytes());
    let text = String::from_utf8(out).expect("utf-8");
    let reference: Vec<(f64, f64)> = text
        .lines()
        .map(|l| {
            let mut it = l
                .split_whitespace()
                .map(|x| x.parse::<f64>().expect("number"));
            (it.next().expect("lower"), it.next().expect("upper"))
        })
        .collect();
    assert_eq!(reference.len(), rates.len());
    for (rate, (lower, upper)) in rates.iter().zip(reference) {
        let close = |a: f64, b: f64| (a - b).abs() <= 1e-9 * b.abs().max(1e-12);
        assert!(
            close(rate.upper, upper),
            "{}/{}: upper {} vs scipy {upper}",
            rate.count,
            rate.of,
            rate.upper
        );
        assert!(
            close(rate.lower, lower),
            "{}/{}: lower {} vs scipy {lower}",
            rate.count,
            rate.of,
            rate.lower
        );
    }
}

// --- Journal writer ------------------------------------------------------------------

#[test]
fn the_journal_writer_batches_from_many_threads_and_loses_nothing() {
    let dir = tempfile::tempdir().expect("temp dir");
    let store: Arc<dyn Store> = Arc::new(open(&dir.path().join("store.sqlite")));
    let errors = Arc::new(std::sync::Mutex::new(Vec::new()));
    let seen = errors.clone();
    let writer = JournalWriter::start(
        store.clone(),
        BatchSettings {
            queue: 20_000,
            ..BatchSettings::default()
        },
        Box::new(move |e: &StoreError, n| seen.lock().expect("lock").push((e.kind(), n))),
    )
    .expect("start");
    let writer = Arc::new(writer);
    let threads: Vec<_> = (0..4)
        .map(|t| {
            let writer = writer.clone();
            std::thread::spawn(move || {
                for i in 0..2500 {
                    let e = entry(
                        &format!("W{t}-{i}"),
                        T0,
                        0.0,
                        &[("a.test", Action::Accept, Action::Accept)],
                    );
                    assert!(writer.submit(e).is_ok(), "the queue has room");
                }
            })
        })
        .collect();
    for t in threads {
        t.join().expect("submitter");
    }
    // One invalid entry costs only itself.
    assert!(
        writer
            .submit(entry(
                "",
                T0,
                0.0,
                &[("a.test", Action::Accept, Action::Accept)]
            ))
            .is_ok()
    );
    Arc::try_unwrap(writer).expect("sole owner").close();
    let f = store.figures(T0, Some("a.test")).expect("figures");
    assert_eq!(f[0].messages(), 10_000);
    assert_eq!(*errors.lock().expect("lock"), vec![("invalid", 1)]);
}

#[test]
fn the_journal_writer_never_blocks_on_a_locked_store() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("store.sqlite");
    let store: Arc<dyn Store> = Arc::new(
        SqliteStore::open(
            &path,
            StoreOptions {
                busy_timeout: Duration::from_millis(400),
                ..options()
            },
        )
        .expect("open"),
    );
    let lost = Arc::new(std::sync::atomic::AtomicUsize::new(0));
    let counter = lost.clone();
    let writer = JournalWriter::start(
        store.clone(),
        BatchSettings {
            max_batch: 8,
            max_delay: Duration::from_millis(5),
            queue: 4,
        },
        Box::new(move |e: &StoreError, n| {
            assert!(matches!(e, StoreError::Busy { .. }), "{e}");
            counter.fetch_add(n, std::sync::atomic::Ordering::SeqCst);
        }),
    )
    .expect("start");
    let other = rusqlite::Connection::open(&path).expect("another connection");
    other.execute_batch("BEGIN EXCLUSIVE").expect("lock");
    let started = Instant::now();
    let mut refused = 0;
    for i in 0..50 {
        let e = entry(
            &format!("X{i}"),
            T0,
            0.0,
            &[("a.test", Action::Accept, Action::Accept)],
        );
        if writer.submit(e).is_err() {
            refused += 1;
        }
    }
    assert!(
        started.elapsed() < Duration::from_millis(300),
        "submit waited for the store"
    );
    assert!(refused > 0, "a full queue refuses instead of blocking");
    std::thread::sleep(Duration::from_millis(500));
    other.execute_batch("ROLLBACK").expect("unlock");
    writer.close();
    let written = store.figures(T0, Some("a.test")).expect("figures")[0].messages() as usize;
    let lost = lost.load(std::sync::atomic::Ordering::SeqCst);
    assert!(lost > 0, "the lock cost a batch");
    assert_eq!(
        written + lost + refused,
        50,
        "every entry is written, reported lost or refused"
    );
}

// --- Audit sample and retention ------------------------------------------------------

#[test]
fn the_audit_sample_is_stable_for_a_seed() {
    let dir = tempfile::tempdir().expect("temp dir");
    let store = open(&dir.path().join("store.sqlite"));
    for i in 0..60 {
        let domain = if i < 40 { "a.test" } else { "b.test" };
        hold(
            &store,
            &format!("Q{i:02}"),
            T0 + i,
            domain,
            &message(700 + i as u64, 300),
        );
    }
    let ids = |seed: u64| -> Vec<String> {
        store
            .audit_sample("a.test", T0, 10, seed)
            .expect("sample")
            .into_iter()
            .map(|item| item.held.entry.verdict_id)
            .collect()
    };
    let first = ids(7);
    assert_eq!(first.len(), 10);
    assert_eq!(ids(7), first, "same seed, same sample");
    assert_ne!(ids(8), first, "another seed, another sample");
    assert!(
        first
            .iter()
            .all(|id| id[1..].parse::<u32>().is_ok_and(|n| n < 40)),
        "only a.test mail: {first:?}"
    );
    // Reviewing one marks it; releasing another keeps it in the sample (no bias from
    // what happened to it).
    store
        .report(&NewReport {
            verdict_id: first[0].clone(),
            kind: ReportKind::NotJunk,
            source: ReportSource::Audit,
            domain: None,
            at: T0 + 100,
            features: None,
        })
        .expect("audit");
    assert!(matches!(
        store.claim_release(&first[1]).expect("claim"),
        Claim::Won(_)
    ));
    assert!(
        store
            .finish_release(
                &first[1],
                &ReleaseOutcome::Delivered {
                    at: T0 + 200,
                    features: None
                }
            )
            .expect("release")
    );
    let again = store.audit_sample("a.test", T0, 10, 7).expect("sample");
    assert_eq!(
        again
            .iter()
            .map(|i| i.held.entry.verdict_id.clone())
            .collect::<Vec<_>>(),
        first
    );
    assert_eq!(again[0].reviewed, Some(ReportKind::NotJunk));
    assert_eq!(again[1].reviewed, None);
    assert_eq!(again[1].held.state, HeldState::Released);
}

#[test]
fn purging_removes_expired_mail_and_old_journal_but_keeps_what_is_held() {
    let dir = tempfile::tempdir().expect("temp dir");
    let store = SqliteStore::open(
        &dir.path().join("store.sqlite"),
        StoreOptions {
            quarantine_days: 10,
            journal_days: 5,
            ..options()
        },
    )
    .expect("open");
    let day = 86_400;
    hold(&store, "OLD-HELD", T0, "a.test", &message(1, 300));
    hold(&store, "NEW-HELD", T0 + 8 * day, "a.test", &message(2, 300));
    let old: Vec<JournalEntry> = (0..5000)
        .map(|i| {
            entry(
                &format!("J{i}"),
                T0,
                0.0,
                &[("a.test", Action::Accept, Action::Accept)],
            )
        })
        .collect();
    store.record(&old).expect("record");
    store
        .record(&[entry(
            "RECENT",
            T0 + 8 * day,
            0.0,
            &[("a.test", Action::Accept, Action::Accept)],
        )])
        .expect("record");
    store
        .report(&user_report("J1", ReportKind::Junk, "a.test", T0 + 60))
        .expect("report");

    // Day 9: journal entries older than 5 days go (but not those of held mail); nothing
    // has expired from the quarantine yet.
    let counts = store.purge_expired(T0 + 9 * day).expect("purge");
    assert_eq!((counts.held, counts.journal, counts.reports), (0, 5000, 1));
    assert!(
        store.journal_entry("OLD-HELD").expect("read").is_some(),
        "kept with its held mail"
    );
    assert!(store.journal_entry("RECENT").expect("read").is_some());
    // Day 11: the first held message expired, and its entry can now go.
    let counts = store.purge_expired(T0 + 11 * day).expect("purge");
    assert_eq!((counts.held, counts.journal), (1, 1));
    assert_eq!(store.get_held("OLD-HELD").expect("get"), None);
    assert!(store.get_held("NEW-HELD").expect("get").is_some());
    // An operator's purge by age.
    assert_eq!(store.purge_held_before(T0 + 9 * day).expect("purge"), 1);
    assert_eq!(store.held_totals().expect("totals").messages, 0);
    // A report on a purged verdict is unmatched.
    let receipt = store
        .report(&user_report("J2", ReportKind::Junk, "a.test", T0))
        .expect("report");
    assert_eq!(receipt.status, ReportStatus::UnknownVerdict);
    assert!(store.integrity_check().expect("check").is_empty());
}
