//! The status page's queries on the SQLite store: volume per time bucket, the margins of
//! reported mail, held mail per domain, and the start of a held message.
//!
//! Every query is bounded by what it is asked about, never by the size of the journal: a
//! domain's rows are found by a range search of `journal_domain_by_domain` (domain, time),
//! all domains' rows by a range search of `journal_by_time`, reports through
//! `report_by_journal`, held mail through `held_by_state`. The tests below check the
//! query plans, and count the rows SQLite visits, so an index lost in a later migration
//! shows up as a failing test rather than a slow page.

use rusqlite::{Connection, OptionalExtension, params};

use super::fail::{Ctx, Failure};
use super::{action_of, to_u64};
use crate::store::blob;
use crate::store::record::{HeldState, ReportKind, UnixTime};
use crate::store::views::{Buckets, DomainHeld, MarginBins, MarginHistogram, VolumeBucket};

/// Verdicts of one domain per bucket, action and enforced action.
pub(super) const VOLUME_ONE: &str = "
SELECT (d.at - ?1) / ?3, d.action, d.enforced, count(*)
FROM journal_domain d
WHERE d.domain = ?4 AND d.at >= ?1 AND d.at < ?2
GROUP BY 1, 2, 3";

/// Verdicts of every domain per bucket: the window's journal entries by time, then their
/// domain rows by primary key (`CROSS JOIN` keeps that order).
pub(super) const VOLUME_ALL: &str = "
SELECT (j.at - ?1) / ?3, d.action, d.enforced, count(*)
FROM journal j CROSS JOIN journal_domain d ON d.journal_id = j.id
WHERE j.at >= ?1 AND j.at < ?2
GROUP BY 1, 2, 3";

/// Per message of a domain with a matched report that applies to it, the margin and the
/// kind of its latest such report (SQLite takes a bare column from the row that holds the
/// `max()`), as the figures label messages. The reports lead; each finds its message's
/// domain row by primary key (the unary `+` keeps SQLite from searching the domain index
/// instead, which would visit the domain's whole window once per report).
pub(super) const REPORTED_MARGINS: &str = "
SELECT j.margin, r.kind, max(r.id)
FROM report r
CROSS JOIN journal_domain d ON d.journal_id = r.journal_id
CROSS JOIN journal j ON j.id = r.journal_id
WHERE r.journal_id IS NOT NULL AND r.status = 0
  AND +d.domain = ?1 AND +d.at >= ?2
  AND (r.domain IS NULL OR r.domain = d.domain)
GROUP BY r.journal_id";

/// Held messages per domain they are held for.
pub(super) const HELD_BY_DOMAIN: &str = "
SELECT d.domain, count(*), coalesce(sum(h.size), 0)
FROM held h CROSS JOIN journal_domain d ON d.journal_id = h.journal_id
WHERE h.state = ?1 AND d.action = ?2
GROUP BY d.domain ORDER BY d.domain";

/// The compressed copy of one held message.
pub(super) const HELD_CONTENT: &str = "
SELECT c.content FROM journal j
JOIN held h ON h.journal_id = j.id
JOIN held_content c ON c.held_id = h.id
WHERE j.verdict_id = ?1";

/// Messages per bucket for one domain (`Some`) or summed over all; exactly
/// `buckets.count` buckets, oldest first.
pub(super) fn volume(
    tx: &Connection,
    ctx: Ctx<'_>,
    domain: Option<&str>,
    buckets: &Buckets,
) -> Result<Vec<VolumeBucket>, Failure> {
    let mut out: Vec<VolumeBucket> = (0..buckets.count)
        .map(|i| VolumeBucket {
            start: buckets
                .since
                .saturating_add(buckets.width.saturating_mul(i64::from(i))),
            ..VolumeBucket::default()
        })
        .collect();
    let (sql, name) = match domain {
        Some(d) => (VOLUME_ONE, rusqlite::types::Value::Text(d.to_string())),
        None => (VOLUME_ALL, rusqlite::types::Value::Null),
    };
    let mut stmt = tx.prepare_cached(sql)?;
    let mut rows = if domain.is_some() {
        stmt.query(params![buckets.since, buckets.until(), buckets.width, name])?
    } else {
        stmt.query(params![buckets.since, buckets.until(), buckets.width])?
    };
    while let Some(r) = rows.next()? {
        let index: i64 = r.get(0)?;
        let messages = to_u64(r.get(3)?, "count", ctx)?;
        let action = action_of(r.get(1)?, ctx)?;
        let enforced = action_of(r.get(2)?, ctx)?;
        // The WHERE clause keeps the index in range; a row outside would be a damaged
        // time, skipped rather than trusted.
        if let Some(bucket) = usize::try_from(index).ok().and_then(|i| out.get_mut(i)) {
            bucket.add(action, enforced, messages);
        }
    }
    Ok(out)
}

/// The margins of a domain's labelled messages with verdicts at or after `since`.
pub(super) fn reported_margins(
    tx: &Connection,
    ctx: Ctx<'_>,
    domain: &str,
    since: UnixTime,
    bins: &MarginBins,
) -> Result<MarginHistogram, Failure> {
    let mut histogram = MarginHistogram::empty(*bins);
    let mut stmt = tx.prepare_cached(REPORTED_MARGINS)?;
    let mut rows = stmt.query(params![domain, since])?;
    while let Some(r) = rows.next()? {
        let margin: Option<f64> = r.get(0)?;
        let code: i64 = r.get(1)?;
        let kind = ReportKind::from_code(code)
            .ok_or_else(|| ctx.damaged(format!("unknown report kind {code}")))?;
        histogram.add(margin, kind == ReportKind::Junk);
    }
    Ok(histogram)
}

/// Held mail per domain, sorted by domain.
pub(super) fn held_by_domain(tx: &Connection, ctx: Ctx<'_>) -> Result<Vec<DomainHeld>, Failure> {
    let mut stmt = tx.prepare_cached(HELD_BY_DOMAIN)?;
    let mut rows = stmt.query(params![
        HeldState::Held.code(),
        super::action_code(crate::policy::Action::Quarantine)
    ])?;
    let mut out = Vec::new();
    while let Some(r) = rows.next()? {
        out.push(DomainHeld {
            domain: r.get(0)?,
            messages: to_u64(r.get(1)?, "count", ctx)?,
            bytes: to_u64(r.get(2)?, "size", ctx)?,
        });
    }
    Ok(out)
}

/// The first `max_bytes` of a held message, in any state.
pub(super) fn held_head(
    tx: &Connection,
    ctx: Ctx<'_>,
    verdict_id: &str,
    max_bytes: usize,
) -> Result<Option<Vec<u8>>, Failure> {
    let stored: Option<Vec<u8>> = tx
        .prepare_cached(HELD_CONTENT)?
        .query_row([verdict_id], |r| r.get(0))
        .optional()?;
    match stored {
        None => Ok(None),
        Some(stored) => blob::decompress_prefix(&stored, max_bytes)
            .map(Some)
            .map_err(|e| ctx.damaged(format!("held message {verdict_id}: {e}"))),
    }
}

#[cfg(test)]
mod tests {
    use rusqlite::StatementStatus;

    use super::*;
    use crate::policy::Action;
    use crate::store::record::{DomainOutcome, Hold, JournalEntry, NewReport, ReportSource};
    use crate::store::sqlite::SqliteStore;
    use crate::store::{Store, StoreOptions};

    fn entry(id: usize, at: i64, domain: &str, action: Action) -> JournalEntry {
        JournalEntry {
            verdict_id: format!("V{id:08}"),
            at,
            model: "m".to_string(),
            margin: Some(id as f64 / 1000.0 - 1.0),
            probability: None,
            outcomes: vec![DomainOutcome {
                domain: domain.to_string(),
                recipients: 1,
                action,
                enforced: action,
            }],
            size: 10,
            sender_domain: None,
            reasons: vec![],
            scanned: true,
            subject: None,
            message_key: None,
        }
    }

    fn store() -> (tempfile::TempDir, SqliteStore) {
        let dir = tempfile::tempdir().expect("temp dir");
        let store =
            SqliteStore::open(&dir.path().join("s.sqlite"), StoreOptions::default()).expect("open");
        (dir, store)
    }

    /// SQLite's own account of how it runs `sql` (`EXPLAIN QUERY PLAN`), one line per step.
    fn plan(store: &SqliteStore, sql: &str, args: usize) -> Vec<String> {
        let explain = format!("EXPLAIN QUERY PLAN {sql}");
        store
            .read("explain", |tx| {
                let mut stmt = tx.prepare(&explain)?;
                let values: Vec<rusqlite::types::Value> = (0..args)
                    .map(|_| rusqlite::types::Value::Integer(0))
                    .collect();
                let rows = stmt.query_map(rusqlite::params_from_iter(values), |r| {
                    r.get::<_, String>(3)
                })?;
                Ok(rows.collect::<rusqlite::Result<Vec<_>>>()?)
            })
            .expect("explain")
    }

    /// Source: SQLite's "EXPLAIN QUERY PLAN" documentation: `SCAN t` without an index is a
    /// full table scan; `SEARCH t USING ... INDEX i (a=? AND b>?)` is a range search.
    #[test]
    fn every_page_query_searches_an_index_instead_of_scanning_a_table() {
        let (_dir, store) = store();
        let cases: [(&str, usize, &[&str]); 5] = [
            (
                VOLUME_ONE,
                4,
                &[
                    "SEARCH d USING COVERING INDEX journal_domain_by_domain (domain=? AND at>? AND at<?)",
                ],
            ),
            (
                VOLUME_ALL,
                3,
                &[
                    "SEARCH j USING COVERING INDEX journal_by_time (at>? AND at<?)",
                    "SEARCH d USING PRIMARY KEY (journal_id=?)",
                ],
            ),
            (
                REPORTED_MARGINS,
                2,
                &[
                    "SEARCH r USING INDEX report_by_journal (journal_id>?)",
                    "SEARCH d USING PRIMARY KEY (journal_id=?)",
                    "SEARCH j USING INTEGER PRIMARY KEY (rowid=?)",
                ],
            ),
            (
                HELD_BY_DOMAIN,
                2,
                &[
                    "SEARCH h USING INDEX held_by_state (state=?)",
                    "SEARCH d USING PRIMARY KEY (journal_id=?)",
                ],
            ),
            (
                HELD_CONTENT,
                1,
                &["SEARCH j USING COVERING INDEX sqlite_autoindex_journal_1 (verdict_id=?)"],
            ),
        ];
        for (sql, args, expected) in cases {
            let steps = plan(&store, sql, args);
            for want in expected {
                assert!(
                    steps.iter().any(|s| s.starts_with(want)),
                    "{sql}\nwanted step {want:?} in {steps:#?}"
                );
            }
            for step in &steps {
                let full_scan = step.starts_with("SCAN ") && !step.contains(" USING ");
                assert!(!full_scan, "{sql}\nfull table scan: {step}");
            }
        }
    }

    /// Runs `sql` to the end and returns SQLite's count of virtual-machine steps, a
    /// measure of the rows visited (`sqlite3_stmt_status`, SQLITE_STMTSTATUS_VM_STEP).
    fn steps(store: &SqliteStore, sql: &str, args: &[rusqlite::types::Value]) -> i32 {
        store
            .read("count steps", |tx| {
                let mut stmt = tx.prepare(sql)?;
                let mut rows = stmt.query(rusqlite::params_from_iter(args.iter()))?;
                while rows.next()?.is_some() {}
                drop(rows);
                Ok(stmt.get_status(StatementStatus::VmStep))
            })
            .expect("query")
    }

    #[test]
    fn a_small_domain_or_window_costs_its_own_rows_not_the_journal() {
        use rusqlite::types::Value;
        let (_dir, store) = store();
        // 20,000 verdicts for a big domain over 20,000 s, 50 for a small one at the end.
        let big: Vec<JournalEntry> = (0..20_000)
            .map(|i| entry(i, i as i64, "big.test", Action::Accept))
            .collect();
        store.record(&big).expect("record");
        let small: Vec<JournalEntry> = (0..50)
            .map(|i| entry(100_000 + i, 19_950 + i as i64, "small.test", Action::Tag))
            .collect();
        store.record(&small).expect("record");
        let one = |domain: &str, since: i64| {
            steps(
                &store,
                VOLUME_ONE,
                &[
                    Value::Integer(since),
                    Value::Integer(30_000),
                    Value::Integer(1000),
                    Value::Text(domain.to_string()),
                ],
            )
        };
        let small_steps = one("small.test", 0);
        let big_steps = one("big.test", 0);
        assert!(
            big_steps > 20_000 && small_steps < 2_000,
            "big {big_steps}, small {small_steps}"
        );
        // All domains over the last 100 s: about 150 entries, not 20,050.
        let all = steps(
            &store,
            VOLUME_ALL,
            &[
                Value::Integer(19_900),
                Value::Integer(30_000),
                Value::Integer(10),
            ],
        );
        assert!(all < 5_000, "{all}");
        let (dir2, empty) = self::store();
        let empty_steps = steps(
            &empty,
            VOLUME_ALL,
            &[
                Value::Integer(19_900),
                Value::Integer(30_000),
                Value::Integer(10),
            ],
        );
        assert!(all > empty_steps, "{all} vs {empty_steps}");
        drop(dir2);
    }

    #[test]
    fn volume_and_margins_and_held_counts_agree_with_what_was_written() {
        let (_dir, store) = store();
        let mut entries = Vec::new();
        for i in 0..30 {
            let action = match i % 3 {
                0 => Action::Accept,
                1 => Action::Tag,
                _ => Action::Quarantine,
            };
            entries.push(entry(i, 1000 + i as i64 * 100, "a.test", action));
        }
        // Tag-only: would have been held.
        let mut would = entry(99, 1050, "a.test", Action::Tag);
        would.outcomes[0].enforced = Action::Quarantine;
        entries.push(would);
        // Another domain, never in a.test's figures.
        entries.push(entry(98, 1100, "b.test", Action::Accept));
        let held: Vec<&JournalEntry> = entries.iter().filter(|e| e.holds()).collect();
        for e in &held {
            let rcpt = vec!["x@a.test".to_string()];
            store
                .hold(
                    e,
                    &Hold {
                        sender: "s@example.net",
                        recipients: &rcpt,
                        message: format!("Subject: {}\r\n\r\nbody", e.verdict_id).as_bytes(),
                    },
                )
                .expect("hold");
        }
        let others: Vec<JournalEntry> = entries.iter().filter(|e| !e.holds()).cloned().collect();
        store.record(&others).expect("record");

        let buckets = Buckets::ending(4000, 1000, 3).expect("valid");
        let volume = store.volume(Some("a.test"), &buckets).expect("volume");
        let counts: Vec<(u64, u64, u64, u64)> = volume
            .iter()
            .map(|b| {
                (
                    b.by_action.accept,
                    b.by_action.tag,
                    b.by_action.quarantine,
                    b.would_quarantine,
                )
            })
            .collect();
        // Verdicts at 1000..=3900 every 100 s: 10 per bucket, cycling accept/tag/quarantine
        // from i = 0, 10, 20; plus the would-be hold at 1050 in the first.
        assert_eq!(counts, vec![(4, 4, 3, 1), (3, 4, 3, 0), (3, 3, 4, 0)]);
        let all = store.volume(None, &buckets).expect("volume");
        assert_eq!(all[0].by_action.accept, 5, "b.test's accept at 1100 counts");

        // Reports: one held message released (legitimate), one reported junk twice then
        // not junk (latest wins), one accepted message reported junk by a user of b.test
        // (does not apply to a.test).
        let report = |id: &str, kind, source, domain: Option<&str>| NewReport {
            verdict_id: id.to_string(),
            kind,
            source,
            domain: domain.map(str::to_string),
            at: 5000,
            features: None,
        };
        store
            .report(&report(
                "V00000002",
                ReportKind::NotJunk,
                ReportSource::Operator,
                None,
            ))
            .expect("report");
        store
            .report(&report(
                "V00000005",
                ReportKind::Junk,
                ReportSource::User,
                Some("a.test"),
            ))
            .expect("report");
        store
            .report(&report(
                "V00000005",
                ReportKind::NotJunk,
                ReportSource::Audit,
                None,
            ))
            .expect("report");
        store
            .report(&report(
                "V00000003",
                ReportKind::Junk,
                ReportSource::User,
                Some("a.test"),
            ))
            .expect("report");
        store
            .report(&report(
                "V00000098",
                ReportKind::Junk,
                ReportSource::User,
                Some("b.test"),
            ))
            .expect("report");
        let bins = MarginBins::new(-1.0, 0.0, 4).expect("bins");
        let h = store.reported_margins("a.test", 0, &bins).expect("margins");
        // Margins: V2 → -0.998, V5 → -0.995 (both legitimate), V3 → -0.997 (junk).
        assert_eq!(h.legitimate, vec![2, 0, 0, 0]);
        assert_eq!(h.junk, vec![1, 0, 0, 0]);
        let h = store
            .reported_margins("a.test", 1600, &bins)
            .expect("margins");
        assert_eq!(h.total(), 0, "verdicts before the window are left out");

        let per_domain = store.held_by_domain().expect("held");
        assert_eq!(
            per_domain,
            vec![DomainHeld {
                domain: "a.test".to_string(),
                messages: 10,
                bytes: per_domain.first().map_or(0, |d| d.bytes),
            }]
        );
        let head = store.held_head("V00000002", 9).expect("head");
        assert_eq!(head.as_deref(), Some(&b"Subject: "[..]));
        assert_eq!(store.held_head("V00000001", 9).expect("head"), None);
    }
}
