//! The store with 10^6 journal entries: the per-domain figures against the baseline of one
//! plain `count(*)` pass over the same rows in the same run (the ratio says what the
//! figures cost beyond touching every row once), and the two writes the daemon makes per
//! message — a journal batch and a durable hold — for the throughput budget.

use std::hint::black_box;
use std::time::Duration;

use criterion::{Criterion, criterion_group, criterion_main};
use tamis::policy::Action;
use tamis::rng::SplitMix64;
use tamis::store::{
    DomainOutcome, Hold, JournalEntry, NewReport, ReportKind, ReportSource, SqliteStore, Store,
    StoreOptions,
};

const ROWS: usize = 1_000_000;
/// Rows when the bench runs as a test (`cargo test --all-targets`), to check it works.
const TEST_ROWS: usize = 10_000;
const DOMAINS: usize = 20;
const NOW: i64 = 1_800_000_000;
const DAY: i64 = 86_400;

fn entry(id: String, at: i64, rng: &mut SplitMix64) -> JournalEntry {
    let domain = format!("d{}.example", rng.below(DOMAINS));
    let roll = rng.below(100);
    let (action, enforced) = match roll {
        0..80 => (Action::Accept, Action::Accept),
        80..93 => (Action::Tag, Action::Tag),
        93..96 => (Action::Tag, Action::Quarantine),
        _ => (Action::Quarantine, Action::Quarantine),
    };
    JournalEntry {
        verdict_id: id,
        at,
        model: "bench model".to_string(),
        margin: Some(rng.unit() * 4.0 - 2.0),
        probability: None,
        outcomes: vec![DomainOutcome {
            domain,
            recipients: 1,
            action,
            enforced,
        }],
        size: 4000,
        sender_domain: Some("sender.example".to_string()),
        reasons: vec![
            "body:\"offer\"".to_string(),
            "url:promo.example".to_string(),
        ],
        scanned: true,
        subject: None,
        message_key: None,
    }
}

fn bench(c: &mut Criterion) {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("store.sqlite");
    let store = SqliteStore::open(&path, StoreOptions::default()).expect("open");
    let mut rng = SplitMix64::new(1);
    // `cargo bench` passes `--bench`; without it this is a quick run as a test.
    let rows = if std::env::args().any(|a| a == "--bench") {
        ROWS
    } else {
        TEST_ROWS
    };
    let mut batch = Vec::with_capacity(10_000);
    for i in 0..rows {
        let at = NOW - 30 * DAY + (i as i64 * 30 * DAY) / rows as i64;
        batch.push(entry(format!("V{i:015}"), at, &mut rng));
        if batch.len() == batch.capacity() {
            store.record(&batch).expect("record");
            batch.clear();
        }
    }
    store.record(&batch).expect("record");
    for i in 0..10_000 {
        let report = NewReport {
            verdict_id: format!("V{:015}", rng.below(rows)),
            kind: if i % 3 == 0 {
                ReportKind::NotJunk
            } else {
                ReportKind::Junk
            },
            source: ReportSource::Operator,
            domain: None,
            at: NOW,
            features: None,
        };
        store.report(&report).expect("report");
    }
    let raw = rusqlite::Connection::open(&path).expect("raw connection");

    let mut group = c.benchmark_group("store_figures_10^6");
    group
        .sample_size(10)
        .measurement_time(Duration::from_secs(20));
    group.bench_function("count(*) over journal_domain (baseline)", |b| {
        b.iter(|| {
            raw.query_row("SELECT count(*) FROM journal_domain", [], |r| {
                r.get::<_, i64>(0)
            })
            .expect("count")
        })
    });
    group.bench_function("figures, all domains, 30 days", |b| {
        b.iter(|| black_box(store.figures(NOW - 31 * DAY, None).expect("figures")))
    });
    group.bench_function("figures, one domain, 7 days", |b| {
        b.iter(|| {
            black_box(
                store
                    .figures(NOW - 7 * DAY, Some("d3.example"))
                    .expect("figures"),
            )
        })
    });
    group.finish();

    let mut group = c.benchmark_group("store_writes");
    group.sample_size(20);
    let mut next = rows;
    group.bench_function("journal batch of 256 entries", |b| {
        b.iter(|| {
            let batch: Vec<JournalEntry> = (0..256)
                .map(|_| {
                    next += 1;
                    entry(format!("V{next:015}"), NOW, &mut rng)
                })
                .collect();
            store.record(&batch).expect("record")
        })
    });
    let message = vec![b'x'; 8000];
    let recipients = vec!["someone@d1.example".to_string()];
    group.bench_function("hold one 8 kB message (fsync)", |b| {
        b.iter(|| {
            next += 1;
            let mut e = entry(format!("V{next:015}"), NOW, &mut rng);
            e.outcomes[0].action = Action::Quarantine;
            let mut body = message.clone();
            body.extend_from_slice(e.verdict_id.as_bytes());
            store
                .hold(
                    &e,
                    &Hold {
                        sender: "s@sender.example",
                        recipients: &recipients,
                        message: &body,
                    },
                )
                .expect("hold")
        })
    });
    group.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
