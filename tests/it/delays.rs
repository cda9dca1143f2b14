//! Delay observations read from the store: the one-scan counts the post-snapshot fits use
//! agree with the per-pair query behind `tidemark delays`, first-seen days included.

use tidemark::model::{Field, SnapshotId};
use tidemark::store::Reader;

use crate::support::{Env, csv, day};

/// Three delta snapshots: records arrive, one gains an onset later (its first-seen day stays
/// the day it first arrived), one is corrected, and one has a report before its onset (a
/// negative delay, counted like any other). For every snapshot and pair, the
/// counts from one scan equal those of one grouped query per pair.
#[test]
fn one_scan_delay_counts_equal_the_per_pair_query_at_every_snapshot() {
    compare_pairs_over("delta", &delta_days());
}

/// The same with full extracts, where a record can be removed and come back: it keeps the
/// day it first appeared (`case_version.first_seen`), not the day it returned.
#[test]
fn a_record_that_returns_keeps_its_first_seen_day() {
    let filler: Vec<String> = (1..=8).map(|k| format!("B{k},South,2026-03-01,2026-03-02,30,F,")).collect();
    let with = |rows: &[&str]| -> Vec<String> {
        rows.iter().map(|r| r.to_string()).chain(filler.iter().cloned()).collect()
    };
    let days = [
        with(&["A1,North,2026-03-01,2026-03-04,40,F,", "A2,North,2026-03-02,2026-03-05,50,M,"]),
        with(&["A2,North,2026-03-02,2026-03-05,50,M,"]),
        with(&["A1,North,2026-03-01,2026-03-06,40,F,", "A2,North,2026-03-02,2026-03-05,50,M,"]),
    ];
    let (env, snapshots) = compare_pairs_over("full", &days);
    let reader = Reader::open(&env.store_path()).unwrap();
    let source_id = reader.source_id("full").unwrap().unwrap();
    let last = *snapshots.last().unwrap();
    let first_seen = &reader.delay_rows_of_pairs(source_id, last, &[(Field::OnsetDate, None)]).unwrap()[0];
    assert!(
        first_seen.iter().all(|r| r.to == day(6).date_naive()),
        "every record, A1 included, was first seen on the first day: {first_seen:?}"
    );
}

fn delta_days() -> Vec<Vec<String>> {
    [
        vec![
            "A1,North,2026-03-01,2026-03-04,40,F,",
            "A2,North,,2026-03-05,50,M,",
            "A3,South,2026-03-02,2026-03-02,,F,",
        ],
        vec![
            "A1,North,2026-03-01,2026-03-04,40,F,",
            "A2,North,2026-03-03,2026-03-05,50,M,",
            "A3,South,2026-03-02,2026-03-03,,F,",
            "A4,South,2026-03-06,2026-03-05,30,F,",
        ],
        vec![
            "A2,North,2026-03-03,2026-03-05,50,M,",
            "A3,South,2026-03-02,2026-03-03,,F,",
            "A4,South,2026-03-06,2026-03-05,30,F,",
            "A5,North,2026-03-07,,30,F,",
        ],
    ]
    .iter()
    .map(|rows| rows.iter().map(|r| r.to_string()).collect())
    .collect()
}

/// Ingests `days` into `source` and compares, at every snapshot, the one-scan counts with
/// the per-pair query; returns the store and the snapshot ids.
fn compare_pairs_over(source: &str, days: &[Vec<String>]) -> (Env, Vec<SnapshotId>) {
    let mut env = Env::new();
    let mut snapshots = Vec::new();
    for (d, rows) in days.iter().enumerate() {
        let refs: Vec<&str> = rows.iter().map(String::as_str).collect();
        let outcome = env.ingest(source, &csv(&refs), day(6 + d as i64));
        assert_eq!(outcome.status.name(), "applied", "day {d}: {:?}", outcome.note);
        snapshots.push(outcome.snapshot_id);
    }
    let pairs = [
        (Field::OnsetDate, Some(Field::ReportDate)),
        (Field::OnsetDate, None),
        (Field::ReportDate, Some(Field::OnsetDate)),
    ];
    let reader = Reader::open(&env.store_path()).unwrap();
    let source_id = reader.source_id(source).unwrap().unwrap();
    let mut compared = 0;
    for &snapshot_id in &snapshots {
        let scanned = reader.delay_rows_of_pairs(source_id, snapshot_id, &pairs).unwrap();
        for (&(from, to), rows) in pairs.iter().zip(scanned) {
            let mut grouped = reader.delay_rows(source_id, snapshot_id, from, to, None, &[]).unwrap();
            grouped.sort_by_key(|r| (r.from, r.to));
            assert_eq!(rows, grouped, "snapshot {snapshot_id}, {from} -> {to:?}");
            compared += rows.iter().map(|r| r.count).sum::<u64>();
        }
    }
    assert!(compared >= 20, "only {compared} records compared");
    if source == "delta" {
        // A2 first arrived with the first snapshot; its onset came with the second.
        let last = *snapshots.last().unwrap();
        let first_seen = &reader.delay_rows_of_pairs(source_id, last, &pairs[1..2]).unwrap()[0];
        let a2 = first_seen.iter().find(|r| r.from.to_string() == "2026-03-03").unwrap();
        assert_eq!(a2.to, day(6).date_naive(), "first seen on the first snapshot's day");
    }
    drop(reader);
    (env, snapshots)
}

/// Migration 6 fills `first_seen` in for the versions a store already holds: a store written
/// by this build, taken back to schema 5 (column dropped, index restored, later tables
/// dropped), reopens with the
/// same values the writer set.
#[test]
fn migration_6_fills_first_seen_for_stored_versions() {
    let filler: Vec<String> = (1..=8).map(|k| format!("B{k},South,2026-03-01,2026-03-02,30,F,")).collect();
    let mut days: Vec<Vec<String>> = vec![filler.clone(), filler.clone(), filler];
    days[0].push("A1,North,2026-03-01,2026-03-04,40,F,".into());
    days[1][0] = "B1,South,2026-03-01,2026-03-03,30,F,".into();
    days[2].push("A1,North,2026-03-01,2026-03-05,40,F,".into());
    let (env, _) = compare_pairs_over("full", &days);
    let first_seen = |db: &rusqlite::Connection| -> Vec<(i64, Option<i64>)> {
        let mut stmt =
            db.prepare("SELECT version_id, first_seen FROM case_version ORDER BY version_id").unwrap();
        stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?))).unwrap().collect::<Result<_, _>>().unwrap()
    };
    let written = first_seen(&env.db());
    assert_eq!(
        written.iter().filter(|(_, f)| f.is_some()).count(),
        3,
        "B1 changed twice (and back) and A1 returned: {written:?}"
    );
    let db = rusqlite::Connection::open(env.store_path()).unwrap();
    db.execute_batch(
        "ALTER TABLE case_version DROP COLUMN first_seen;
         CREATE INDEX case_attr_value ON case_attr(kind, value);
         DROP TABLE analysis_owed;
         DROP VIEW alert_open;
         DROP INDEX alert_opened_as_of;
         ALTER TABLE alert DROP COLUMN opened_as_of;
         ALTER TABLE alert DROP COLUMN last_seen_as_of;
         ALTER TABLE alert DROP COLUMN resolved_as_of;
         ALTER TABLE alert DROP COLUMN data_day;
         DROP TABLE rule_status;
         DROP TABLE digest_wait;
         DROP INDEX alert_event_held;
         ALTER TABLE alert_event DROP COLUMN held;
         ALTER TABLE alert_event DROP COLUMN digest_event_id;
         DELETE FROM schema_version WHERE version >= 6;",
    )
    .unwrap();
    drop(db);
    drop(crate::support::open_store(&env.store_path()));
    assert_eq!(first_seen(&env.db()), written);
    let index =
        crate::support::count(&env.db(), "SELECT count(*) FROM sqlite_master WHERE name = 'case_attr_value'");
    assert_eq!(index, 0, "the attribute index is dropped");
}
