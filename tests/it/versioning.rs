//! Record-level versioning through the library API (`Config::parse`, `Store`, `Reader`,
//! `ingest_file`): the same bytes twice are a `duplicate`; a changed record gets a new version
//! whose `valid_from`/`valid_to` chain to the old one, an unchanged record writes nothing; full
//! extracts remove missing records, deltas never do; duplicate keys keep the last row; the
//! truncated-feed guard holds, `release` applies and `reject` discards; an out-of-order as-of
//! time fails; as-of reads (`line_list`, `curve`, `history`) give what each snapshot
//! contained; and every extract is archived, with the archive and the store private (0600).

use std::collections::BTreeMap;
use std::convert::Infallible;
use std::io::Read;

use chrono::NaiveDate;

use tidemark::app::commands;
use tidemark::extract::{self, Row};
use tidemark::model::{CaseRecord, Field, SnapshotId, SnapshotStatus, SourceId};
use tidemark::store::{Reader, SnapshotRow, archive};

use crate::support::{
    Env, TestResult, count, csv, day, integrity_check, mode, open_store, retry_locked, source_toml,
};

fn snapshot(env: &Env, snapshot_id: SnapshotId) -> SnapshotRow {
    let reader = Reader::open(&env.store_path()).unwrap();
    reader.snapshots(None).unwrap().into_iter().find(|s| s.snapshot_id == snapshot_id).unwrap()
}

fn source_id(env: &Env, name: &str) -> SourceId {
    Reader::open(&env.store_path()).unwrap().source_id(name).unwrap().unwrap()
}

fn current_keys(env: &Env, source: &str) -> Vec<String> {
    let reader = Reader::open(&env.store_path()).unwrap();
    let id = reader.source_id(source).unwrap().unwrap();
    let latest = reader.snapshot_as_of(id, None).unwrap().unwrap();
    reader.line_list(id, latest).unwrap().into_iter().map(|r| r.case_key).collect()
}

/// What the parser makes of an extract, duplicate keys resolved (the last row wins), by key:
/// the independent expectation for as-of reads.
fn parsed(env: &Env, source: &str, text: &str, as_of: NaiveDate) -> BTreeMap<String, CaseRecord> {
    let source = env.config.source(source).unwrap();
    let mut out = BTreeMap::new();
    extract::parse(text.as_bytes(), source.format, &source.mapping, as_of, |row| {
        if let Row::Accepted { record, .. } = row {
            out.insert(record.case_key.clone(), record);
        }
        Ok::<(), Infallible>(())
    })
    .unwrap();
    out
}

/// Ten records C-0001..C-0010 (onsets 1 to 10 February), with `changed` keys given a report
/// date. Every date is before the as-of times used, so none is a future-date problem.
fn ten_rows(changed: &[&str]) -> Vec<String> {
    (1..=10)
        .map(|n| {
            let key = format!("C-{n:04}");
            let reported = if changed.contains(&key.as_str()) { "2026-03-02" } else { "" };
            let district = if n % 2 == 0 { "Amberlee" } else { "Brackwater" };
            format!("{key},{district},2026-02-{n:02},{reported},{},F,cough", 20 + n)
        })
        .collect()
}

fn csv_of(rows: &[String]) -> String {
    csv(&rows.iter().map(String::as_str).collect::<Vec<_>>())
}

#[test]
fn the_same_bytes_twice_are_a_duplicate_and_write_no_versions() -> TestResult {
    let mut env = Env::new();
    let text = csv(&[
        "C-0001,Amberlee,2026-03-01,2026-03-03,34,F,cough",
        "C-0002,Amberlee,2026-03-02,2026-03-04,40,M,fever",
        "C-0003,Brackwater,2026-03-02,,51,M,",
    ]);
    let first = env.ingest("full", &text, day(3));
    assert_eq!(first.status, SnapshotStatus::Applied);
    assert_eq!((first.counts.accepted, first.counts.new), (3, 3));
    let versions = count(&env.db(), "SELECT count(*) FROM case_version");
    assert_eq!(versions, 3);

    // The same bytes under another file name and a later as-of time: still the same extract.
    let second = env.ingest("full", &text, day(4));
    assert_eq!(second.status, SnapshotStatus::Duplicate);
    assert!(
        second.note.as_deref().unwrap().contains(&format!("same bytes as snapshot {}", first.snapshot_id))
    );
    assert_eq!(second.counts, Default::default());
    let db = env.db();
    assert_eq!(count(&db, "SELECT count(*) FROM case_version"), versions);
    assert_eq!(count(&db, "SELECT count(*) FROM case_version WHERE valid_to IS NOT NULL"), 0);
    assert_eq!(snapshot(&env, second.snapshot_id).status.name(), "duplicate");
    // The duplicate is not the source's latest applied snapshot.
    let reader = Reader::open(&env.store_path())?;
    assert_eq!(reader.snapshot_as_of(source_id(&env, "full"), None)?, Some(first.snapshot_id));
    Ok(())
}

#[test]
fn a_changed_record_gets_a_chained_version_and_unchanged_records_write_nothing() -> TestResult {
    let mut env = Env::new();
    let s1 = env.ingest(
        "full",
        &csv(&[
            "C-0001,Amberlee,,2026-03-03,34,F,cough",
            "C-0002,Amberlee,2026-03-02,2026-03-04,40,M,fever",
            "C-0003,Brackwater,2026-03-02,2026-03-04,51,M,",
        ]),
        day(3),
    );
    // C-0001's onset is filled in late; the rows also arrive in another order.
    let s2 = env.ingest(
        "full",
        &csv(&[
            "C-0003,Brackwater,2026-03-02,2026-03-04,51,M,",
            "C-0001,Amberlee,2026-02-27,2026-03-03,34,F,cough",
            "C-0002,Amberlee,2026-03-02,2026-03-04,40,M,fever",
        ]),
        day(4),
    );
    assert_eq!(s2.status, SnapshotStatus::Applied);
    let c = s2.counts;
    assert_eq!((c.accepted, c.new, c.changed, c.removed), (3, 0, 1, 0));
    assert_eq!(count(&env.db(), "SELECT count(*) FROM case_version"), 4);

    let reader = Reader::open(&env.store_path())?;
    let id = source_id(&env, "full");
    let history = reader.history(id, "C-0001")?;
    assert_eq!(history.len(), 2);
    assert_eq!((history[0].valid_from, history[0].valid_to), (s1.snapshot_id, Some(s2.snapshot_id)));
    assert_eq!((history[1].valid_from, history[1].valid_to), (s2.snapshot_id, None));
    assert_eq!(history[0].record.date(Field::OnsetDate), None, "a blank onset is missing");
    assert_eq!(history[1].record.date(Field::OnsetDate), NaiveDate::from_ymd_opt(2026, 2, 27));
    let unchanged = reader.history(id, "C-0002")?;
    assert_eq!(unchanged.len(), 1);
    assert_eq!((unchanged[0].valid_from, unchanged[0].valid_to), (s1.snapshot_id, None));

    // Same content, different bytes (CRLF line ends, quoted cells): applied, nothing written.
    let s3 = env.ingest(
        "full",
        "case_id,district,onset,reported,age,sex,symptoms\r\n\
         \"C-0001\",Amberlee,2026-02-27,2026-03-03,34,F,cough\r\n\
         C-0002,\"Amberlee\",2026-03-02,2026-03-04,40,M,fever\r\n\
         C-0003,Brackwater,2026-03-02,2026-03-04,51,M,\r\n",
        day(5),
    );
    assert_eq!(s3.status, SnapshotStatus::Applied);
    let c = s3.counts;
    assert_eq!((c.accepted, c.new, c.changed, c.removed), (3, 0, 0, 0));
    assert_eq!(count(&env.db(), "SELECT count(*) FROM case_version"), 4);
    assert_eq!(
        count(&env.db(), &format!("SELECT count(*) FROM case_version WHERE valid_from = {}", s3.snapshot_id)),
        0
    );
    Ok(())
}

#[test]
fn a_full_extract_removes_missing_records_and_a_delta_never_removes() -> TestResult {
    let mut env = Env::new();
    let five = [
        "C-0001,Amberlee,2026-03-01,,34,F,",
        "C-0002,Amberlee,2026-03-02,,40,M,",
        "C-0003,Brackwater,2026-03-02,,51,M,",
        "C-0004,Brackwater,2026-03-03,,8,F,",
        "C-0005,Brackwater,2026-03-03,,70,M,",
    ];
    let full1 = env.ingest("full", &csv(&five), day(3));
    // C-0005 withdrawn: one of five (20%, not more) so the guard lets it through.
    let full2 = env.ingest("full", &csv(&five[..4]), day(4));
    assert_eq!(full2.status, SnapshotStatus::Applied, "{:?}", full2.note);
    assert_eq!((full2.counts.removed, full2.counts.new, full2.counts.changed), (1, 0, 0));
    assert_eq!(current_keys(&env, "full"), ["C-0001", "C-0002", "C-0003", "C-0004"]);
    let reader = Reader::open(&env.store_path())?;
    let id = source_id(&env, "full");
    let gone = reader.history(id, "C-0005")?;
    assert_eq!(gone.len(), 1);
    assert_eq!(gone[0].valid_to, Some(full2.snapshot_id), "removed as of the extract that lacked it");
    assert_eq!(reader.line_list(id, full1.snapshot_id)?.len(), 5, "the past is unchanged");
    // It comes back (with a report date, so these are not the bytes of the first extract):
    // a new version, valid from the extract that has it again.
    let mut back_again = five.to_vec();
    back_again[4] = "C-0005,Brackwater,2026-03-03,2026-03-05,70,M,";
    let full3 = env.ingest("full", &csv(&back_again), day(5));
    assert_eq!((full3.counts.new, full3.counts.removed), (1, 0));
    let back = reader.history(id, "C-0005")?;
    assert_eq!(back.len(), 2);
    assert_eq!((back[1].valid_from, back[1].valid_to), (full3.snapshot_id, None));
    assert_eq!(reader.line_list(id, full2.snapshot_id)?.len(), 4);

    let delta1 = env.ingest("delta", &csv(&five), day(3));
    assert_eq!(delta1.counts.new, 5);
    // A delta with one changed record and one new one: nothing is removed.
    let delta2 = env.ingest(
        "delta",
        &csv(&["C-0002,Amberlee,2026-03-02,2026-03-05,40,M,", "C-0006,Amberlee,2026-03-04,,12,F,"]),
        day(4),
    );
    assert_eq!(delta2.status, SnapshotStatus::Applied, "a small delta is never held");
    let c = delta2.counts;
    assert_eq!((c.accepted, c.new, c.changed, c.removed), (2, 1, 1, 0));
    assert_eq!(current_keys(&env, "delta"), ["C-0001", "C-0002", "C-0003", "C-0004", "C-0005", "C-0006"]);
    // An empty delta (header only) changes nothing either.
    let delta3 = env.ingest("delta", &csv(&[]), day(5));
    assert_eq!((delta3.status, delta3.counts.removed), (SnapshotStatus::Applied, 0));
    assert_eq!(current_keys(&env, "delta").len(), 6);
    Ok(())
}

#[test]
fn duplicate_keys_in_one_extract_keep_the_last_row_and_reject_the_others_with_their_raw_line() -> TestResult {
    let mut env = Env::new();
    let outcome = env.ingest(
        "delta",
        &csv(&[
            "C-0001,Amberlee,2026-03-01,,34,F,cough",
            "C-0002,Amberlee,2026-03-02,,40,M,",
            "C-0001,Amberlee,2026-03-01,2026-03-04,34,F,\"cough, sore throat\"",
            "C-0003,Brackwater,2026-03-02,,51,M,",
            "C-0001,Brackwater,2026-02-28,2026-03-04,34,F,cough",
        ]),
        day(4),
    );
    assert_eq!(outcome.status, SnapshotStatus::Applied);
    let c = outcome.counts;
    assert_eq!((c.total, c.accepted, c.rejected, c.new), (5, 3, 2, 3));
    let db = env.db();
    let mut stmt =
        db.prepare("SELECT line, field, kind, reason, raw FROM reject WHERE snapshot_id = ?1 ORDER BY line")?;
    let rejects: Vec<(i64, String, String, String, String)> = stmt
        .query_map([outcome.snapshot_id], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?)))?
        .collect::<Result<_, _>>()?;
    let lines: Vec<(i64, &str, &str)> = rejects.iter().map(|r| (r.0, r.1.as_str(), r.2.as_str())).collect();
    assert_eq!(lines, [(2, "case_key", "duplicate_key"), (4, "case_key", "duplicate_key")]);
    assert_eq!(rejects[0].4, "C-0001,Amberlee,2026-03-01,,34,F,cough");
    assert_eq!(rejects[1].4, "C-0001,Amberlee,2026-03-01,2026-03-04,34,F,\"cough, sore throat\"");
    for reject in &rejects {
        assert!(reject.3.contains("column \"case_id\"") && reject.3.contains("line 6"), "{}", reject.3);
    }
    let reader = Reader::open(&env.store_path())?;
    let kept = reader.history(source_id(&env, "delta"), "C-0001")?;
    assert_eq!(kept.len(), 1);
    assert_eq!(kept[0].record.jurisdiction.as_deref(), Some("Brackwater"));
    assert_eq!(kept[0].record.date(Field::OnsetDate), NaiveDate::from_ymd_opt(2026, 2, 28));
    assert_eq!(count(&db, "SELECT line FROM case_version WHERE case_key = 'C-0001'"), 6);
    Ok(())
}

/// `n` records K-00000.. with onsets in February and the symptom `cough`.
fn many_rows(n: usize) -> Vec<String> {
    (0..n).map(|i| format!("K-{i:05},Amberlee,2026-02-{:02},,30,F,cough", 1 + i % 28)).collect()
}

#[test]
fn duplicate_keys_far_apart_rewrite_or_undo_the_earlier_version_exactly() -> TestResult {
    // Far apart: more rows between a key's two rows than the writer decides at a time, so the
    // first row's version is already written when the second arrives (the path that rewrites
    // it in place, or deletes it when the last row matches the current version).
    const N: usize = 3000;
    let mut env = Env::new();
    let first = env.ingest("full", &csv_of(&many_rows(N)), day(3));
    assert_eq!((first.status, first.counts.new), (SnapshotStatus::Applied, N as u64));

    let mut rows = many_rows(N);
    rows[0] = "K-00000,Amberlee,2026-02-01,,30,F,fever".into(); // changed, then changed again
    rows[2] = "K-00002,Amberlee,2026-02-03,,30,F,fever".into(); // changed, then back as it was
    rows.push("K-09999,Brackwater,2026-02-10,,41,M,".into()); // new, then new again
    rows.extend(many_rows(1500).into_iter().map(|row| row.replace("K-", "L-")));
    let lines = rows.len() + 1;
    rows.push("K-00000,Brackwater,2026-02-01,2026-03-04,30,F,\"headache; cough\"".into());
    rows.push("K-00001,Amberlee,2026-02-02,2026-03-04,30,F,cough".into()); // unchanged, then changed
    rows.push(many_rows(3)[2].clone());
    rows.push("K-09999,Brackwater,2026-02-10,2026-03-04,41,M,fever".into());
    let second = env.ingest("full", &csv_of(&rows), day(4));
    assert_eq!(second.status, SnapshotStatus::Applied);
    let c = second.counts;
    assert_eq!((c.rejected, c.new, c.changed, c.removed), (4, 1501, 2, 0), "{c:?}");

    let db = env.db();
    let sid = second.snapshot_id;
    let current = |key: &str| {
        db.query_row(
            "SELECT version_id, valid_from, line, jurisdiction, symptoms, row_hash FROM case_version
             WHERE case_key = ?1 AND valid_to IS NULL",
            [key],
            |r| {
                Ok((
                    r.get::<_, i64>(0)?,
                    r.get::<_, SnapshotId>(1)?,
                    r.get::<_, i64>(2)?,
                    r.get::<_, String>(3)?,
                    r.get::<_, String>(4)?,
                    r.get::<_, i64>(5)?,
                ))
            },
        )
        .unwrap()
    };
    let versions =
        |key: &str| count(&db, &format!("SELECT count(*) FROM case_version WHERE case_key = '{key}'"));
    let attrs = |version: i64| -> Vec<String> {
        let mut stmt =
            db.prepare("SELECT value FROM case_attr WHERE version_id = ?1 ORDER BY value").unwrap();
        stmt.query_map([version], |r| r.get(0)).unwrap().collect::<Result<_, _>>().unwrap()
    };
    // Changed twice: one new version, with the last row's content, line and attributes.
    let k0 = current("K-00000");
    assert_eq!(
        (k0.1, k0.2, k0.3.as_str(), k0.4.as_str()),
        (sid, lines as i64 + 1, "Brackwater", r#"["headache","cough"]"#)
    );
    assert_eq!(attrs(k0.0), ["cough", "headache"]);
    assert_eq!(versions("K-00000"), 2);
    // Changed, then back as it was: the earlier version stands, reopened, nothing written.
    let k2 = current("K-00002");
    assert_eq!((k2.1, k2.2), (first.snapshot_id, 4));
    assert_eq!(versions("K-00002"), 1);
    // New twice: one version, the last row's.
    let new = current("K-09999");
    assert_eq!((new.1, new.2, new.4.as_str()), (sid, lines as i64 + 4, r#"["fever"]"#));
    assert_eq!(versions("K-09999"), 1);
    assert_eq!(attrs(new.0), ["fever"]);
    assert_eq!(
        count(
            &db,
            "SELECT count(*) FROM case_attr WHERE version_id NOT IN (SELECT version_id FROM case_version)"
        ),
        0
    );
    assert_eq!(integrity_check(&env.store_path()), "ok");

    // The rewritten versions carry their rows' hashes: the same records again, each once and
    // in another order, change nothing.
    let mut again: Vec<String> = rows[lines - 1..].to_vec();
    again.extend(
        rows[..lines - 1]
            .iter()
            .filter(|row| {
                !row.starts_with("K-00000,")
                    && !row.starts_with("K-00001,")
                    && !row.starts_with("K-00002,")
                    && !row.starts_with("K-09999,")
            })
            .cloned(),
    );
    let third = env.ingest("full", &csv_of(&again), day(5));
    let c = third.counts;
    assert_eq!(
        (third.status, c.rejected, c.new, c.changed, c.removed),
        (SnapshotStatus::Applied, 0, 0, 0, 0),
        "{c:?}"
    );
    Ok(())
}

#[test]
fn a_full_extract_with_far_fewer_rows_is_held_and_applies_nothing() -> TestResult {
    let mut env = Env::new();
    let s1 = env.ingest("full", &csv_of(&ten_rows(&[])), day(3));
    assert_eq!(s1.counts.accepted, 10);
    // Seven of ten rows (30% fewer, more than the default 20%), one of them changed.
    let short: Vec<String> = ten_rows(&["C-0001"])[..7].to_vec();
    let held = env.ingest("full", &csv_of(&short), day(4));
    assert_eq!(held.status, SnapshotStatus::Held);
    let note = held.note.clone().unwrap();
    assert!(note.contains("7 rows accepted against 10") && note.contains("drop of more than 20%"), "{note}");
    let row = snapshot(&env, held.snapshot_id);
    assert_eq!((row.status.name(), row.rows_accepted, row.rows_removed), ("held", 7, 3));
    let db = env.db();
    assert_eq!(
        count(&db, &format!("SELECT count(*) FROM case_version WHERE valid_from = {}", held.snapshot_id)),
        0
    );
    assert_eq!(
        count(&db, &format!("SELECT count(*) FROM case_version WHERE valid_to = {}", held.snapshot_id)),
        0
    );
    assert_eq!(current_keys(&env, "full").len(), 10);
    let reader = Reader::open(&env.store_path())?;
    assert_eq!(reader.snapshot_as_of(source_id(&env, "full"), None)?, Some(s1.snapshot_id));

    // As many rows, but three of the ten current records replaced: removing 30% is held too.
    let mut swapped = ten_rows(&[]);
    for (n, row) in swapped.iter_mut().enumerate().take(3) {
        *row = format!("C-{:04},Amberlee,2026-03-0{},,30,M,", 101 + n, n + 1);
    }
    let held2 = env.ingest("full", &csv_of(&swapped), day(5));
    assert_eq!(held2.status, SnapshotStatus::Held);
    assert!(held2.note.as_deref().unwrap().contains("would remove 3 of 10"), "{:?}", held2.note);
    assert_eq!(current_keys(&env, "full").len(), 10);

    // A delta extract is never held, however small.
    env.ingest("delta", &csv_of(&ten_rows(&[])), day(3));
    let small = env.ingest("delta", &csv_of(&ten_rows(&["C-0001"])[..1]), day(4));
    assert_eq!(small.status, SnapshotStatus::Applied);
    Ok(())
}

#[test]
fn a_stricter_hold_fraction_from_the_config_is_used() {
    let mut env = Env::with_sources(&[source_toml("full", "csv", "full", "hold_fraction = 0.05")]);
    env.ingest("full", &csv_of(&ten_rows(&[])), day(3));
    let nine = env.ingest("full", &csv_of(&ten_rows(&[])[..9]), day(4));
    assert_eq!(nine.status, SnapshotStatus::Held, "10% fewer rows is more than 5%");
    assert!(nine.note.as_deref().unwrap().contains("more than 5%"), "{:?}", nine.note);
}

#[test]
fn releasing_a_held_snapshot_applies_it_and_rejecting_discards_it() -> TestResult {
    let mut env = Env::new();
    let s1 = env.ingest("full", &csv_of(&ten_rows(&[])), day(3));
    // Seven good rows and a ragged one: held, its reject kept for the operator to see.
    let mut short_rows = ten_rows(&["C-0001"])[..7].to_vec();
    short_rows.push("C-0099,Amberlee".into());
    let held = env.ingest("full", &csv_of(&short_rows), day(4));
    assert_eq!(held.status, SnapshotStatus::Held);
    let rejects_of =
        |id: SnapshotId| count(&env.db(), &format!("SELECT count(*) FROM reject WHERE snapshot_id = {id}"));
    assert_eq!(rejects_of(held.snapshot_id), 1);

    let text = retry_locked(|| commands::release(&env.config, held.snapshot_id))?.text;
    assert!(text.contains(&format!("snapshot {} of full: applied", held.snapshot_id)), "{text}");
    let row = snapshot(&env, held.snapshot_id);
    assert_eq!(row.status.name(), "applied");
    assert_eq!((row.rows_accepted, row.rows_changed, row.rows_removed), (7, 1, 3));
    assert_eq!(row.note.as_deref(), Some("released by operator"));
    assert_eq!((row.rows_total, row.rows_rejected), (8, 1));
    assert_eq!(rejects_of(held.snapshot_id), 1, "re-parsing on release does not repeat its rejects");
    assert_eq!(current_keys(&env, "full").len(), 7);
    let reader = Reader::open(&env.store_path())?;
    let id = source_id(&env, "full");
    assert_eq!(reader.snapshot_as_of(id, None)?, Some(held.snapshot_id));
    assert_eq!(reader.line_list(id, s1.snapshot_id)?.len(), 10, "the past is unchanged");
    let c1 = reader.history(id, "C-0001")?;
    assert_eq!((c1.len(), c1[0].valid_to), (2, Some(held.snapshot_id)));
    // Releasing twice is refused: it is no longer held.
    let again = retry_locked(|| commands::release(&env.config, held.snapshot_id)).unwrap_err();
    assert!(format!("{again:#}").contains("not held"), "{again:#}");

    // A second truncated extract, rejected by the operator.
    let held2 = env.ingest("full", &csv_of(&ten_rows(&[])[..2]), day(5));
    assert_eq!(held2.status, SnapshotStatus::Held);
    let versions = count(&env.db(), "SELECT count(*) FROM case_version");
    let text = retry_locked(|| commands::reject(&env.config, held2.snapshot_id, None))?;
    assert!(text.contains("rejected"), "{text}");
    let row = snapshot(&env, held2.snapshot_id);
    assert_eq!(row.status.name(), "rejected");
    assert!(row.note.as_deref().unwrap().contains("rejected by operator"), "{:?}", row.note);
    assert_eq!(count(&env.db(), "SELECT count(*) FROM case_version"), versions);
    assert_eq!(current_keys(&env, "full").len(), 7);
    // A rejected snapshot can be neither released nor rejected again.
    assert!(
        format!("{:#}", retry_locked(|| commands::release(&env.config, held2.snapshot_id)).unwrap_err())
            .contains("not held")
    );
    assert!(
        format!("{:#}", retry_locked(|| commands::reject(&env.config, held2.snapshot_id, None)).unwrap_err())
            .contains("not held")
    );
    // An applied snapshot cannot be rejected, and an unknown one is named.
    assert!(
        format!("{:#}", retry_locked(|| commands::reject(&env.config, s1.snapshot_id, None)).unwrap_err())
            .contains("not held")
    );
    assert!(
        format!("{:#}", retry_locked(|| commands::release(&env.config, SnapshotId(999))).unwrap_err())
            .contains("no snapshot 999")
    );
    // The same bytes as the rejected extract come again: a duplicate, still not applied.
    let resent = env.ingest("full", &csv_of(&ten_rows(&[])[..2]), day(6));
    assert_eq!(resent.status, SnapshotStatus::Duplicate);
    assert_eq!(current_keys(&env, "full").len(), 7);
    assert_eq!(integrity_check(&env.store_path()), "ok");
    Ok(())
}

#[test]
fn releasing_a_held_snapshot_after_a_newer_one_was_applied_is_refused() -> TestResult {
    let mut env = Env::new();
    env.ingest("full", &csv_of(&ten_rows(&[])), day(3));
    let held = env.ingest("full", &csv_of(&ten_rows(&[])[..5]), day(4));
    assert_eq!(held.status, SnapshotStatus::Held);
    let newer = env.ingest("full", &csv_of(&ten_rows(&["C-0002"])), day(5));
    assert_eq!(newer.status, SnapshotStatus::Applied);
    let versions = count(&env.db(), "SELECT count(*) FROM case_version");

    let err = retry_locked(|| commands::release(&env.config, held.snapshot_id)).unwrap_err();
    let message = format!("{err:#}");
    assert!(message.contains(&format!("older than applied snapshot {}", newer.snapshot_id)), "{message}");
    assert_eq!(snapshot(&env, held.snapshot_id).status.name(), "held", "still waiting for a decision");
    assert_eq!(count(&env.db(), "SELECT count(*) FROM case_version"), versions);
    assert_eq!(current_keys(&env, "full").len(), 10);
    // Rejecting it is still possible.
    retry_locked(|| commands::reject(&env.config, held.snapshot_id, Some("superseded")))?;
    assert_eq!(snapshot(&env, held.snapshot_id).status.name(), "rejected");
    Ok(())
}

#[test]
fn an_extract_older_than_the_last_applied_one_is_failed() -> TestResult {
    let mut env = Env::new();
    let s1 = env.ingest("full", &csv(&["C-0001,Amberlee,2026-03-01,,34,F,"]), day(5));
    let late = env.ingest("full", &csv(&["C-0001,Amberlee,2026-03-02,,34,F,"]), day(3));
    assert_eq!(late.status, SnapshotStatus::Failed);
    let note = late.note.unwrap();
    assert!(
        note.contains("earlier than applied snapshot") && note.contains("2026-03-04T23:59:59Z"),
        "{note}"
    );
    let db = env.db();
    assert_eq!(
        count(&db, &format!("SELECT count(*) FROM case_version WHERE valid_from = {}", late.snapshot_id)),
        0
    );
    assert_eq!(count(&db, "SELECT count(*) FROM case_version"), 1);
    // The same as-of time as the last applied one is in order, and so is a later one.
    let same =
        env.ingest("full", &csv(&["C-0001,Amberlee,2026-03-02,,34,F,", "C-0002,Amberlee,,,,,"]), day(5));
    assert_eq!(same.status, SnapshotStatus::Applied);
    let reader = Reader::open(&env.store_path())?;
    assert_eq!(reader.history(source_id(&env, "full"), "C-0001")?[0].valid_from, s1.snapshot_id);
    Ok(())
}

#[test]
fn as_of_reads_give_what_each_snapshot_contained() -> TestResult {
    let mut env = Env::new();
    let extracts: Vec<String> = vec![
        csv(&[
            "C-0001,Amberlee,,2026-03-01,34,F,cough",
            "C-0002,Amberlee,2026-03-01,2026-03-01,40,M,fever;38.5 C",
            "C-0003,Brackwater,2026-03-01,2026-03-01,51,M,",
            "C-0004,Brackwater,2026-03-01,2026-03-01,80+,F,",
            "C-0005,Brackwater,2026-02-28,2026-03-01,6 months,F,",
        ]),
        // Day 1: C-0001's onset filled in, C-0003's age corrected, C-0006 arrives.
        csv(&[
            "C-0001,Amberlee,2026-02-27,2026-03-01,34,F,cough",
            "C-0002,Amberlee,2026-03-01,2026-03-01,40,M,fever;38.5 C",
            "C-0003,Brackwater,2026-03-01,2026-03-01,30-39,M,",
            "C-0004,Brackwater,2026-03-01,2026-03-01,80+,F,",
            "C-0005,Brackwater,2026-02-28,2026-03-01,6 months,F,",
            "C-0006,Amberlee,2026-03-02,2026-03-02,3 weeks,M,cough",
        ]),
        // Day 2: C-0002 withdrawn, C-0006's onset corrected, two new, an invalid date.
        csv(&[
            "C-0001,Amberlee,2026-02-27,2026-03-01,34,F,cough",
            "C-0003,Brackwater,2026-03-01,2026-03-01,30-39,M,",
            "C-0004,Brackwater,2026-03-01,2026-03-01,80+,F,",
            "C-0005,Brackwater,2026-02-28,2026-03-01,6 months,F,",
            "C-0006,Amberlee,2026-03-01,2026-03-02,3 weeks,M,cough",
            "C-0007,Amberlee,2026-03-02,2026-03-03,61,F,",
            "C-0008,Brackwater,2026-02-30,2026-03-03,17,M,",
        ]),
        // Day 3: C-0002 back, rows reordered, C-0004 gains a symptom.
        csv(&[
            "C-0008,Brackwater,2026-02-30,2026-03-03,17,M,",
            "C-0007,Amberlee,2026-03-02,2026-03-03,61,F,",
            "C-0006,Amberlee,2026-03-01,2026-03-02,3 weeks,M,cough",
            "C-0005,Brackwater,2026-02-28,2026-03-01,6 months,F,",
            "C-0004,Brackwater,2026-03-01,2026-03-01,80+,F,cough",
            "C-0003,Brackwater,2026-03-01,2026-03-01,30-39,M,",
            "C-0002,Amberlee,2026-03-01,2026-03-01,40,M,fever;38.5 C",
            "C-0001,Amberlee,2026-02-27,2026-03-01,34,F,cough",
        ]),
    ];
    let mut snapshots = Vec::new();
    for (n, text) in extracts.iter().enumerate() {
        let outcome = env.ingest("full", text, day(n as i64));
        assert_eq!(outcome.status, SnapshotStatus::Applied, "day {n}: {:?}", outcome.note);
        snapshots.push(outcome.snapshot_id);
    }
    let reader = Reader::open(&env.store_path())?;
    let id = source_id(&env, "full");
    for (n, (text, &snapshot_id)) in extracts.iter().zip(&snapshots).enumerate() {
        let want: Vec<CaseRecord> =
            parsed(&env, "full", text, day(n as i64).date_naive()).into_values().collect();
        assert_eq!(reader.line_list(id, snapshot_id)?, want, "line list as of day {n}");
        // The snapshot current at the end of that day is that day's extract.
        assert_eq!(reader.snapshot_as_of(id, Some(day(n as i64)))?, Some(snapshot_id));
    }
    assert_eq!(reader.snapshot_as_of(id, Some(day(-1)))?, None, "nothing was known before the first");

    // The onset curve as of day 0 gives day 0's counts, not today's.
    let curve =
        |snapshot_id: SnapshotId, stratify: Option<Field>| -> Vec<(Option<String>, Option<String>, i64)> {
            reader
                .curve(id, snapshot_id, Field::OnsetDate, stratify)
                .unwrap()
                .into_iter()
                .map(|r| (r.date.map(|d| d.to_string()), r.stratum, r.count))
                .collect()
        };
    let d = |date: &str| Some(date.to_string());
    assert_eq!(
        curve(snapshots[0], None),
        [(d("2026-02-28"), None, 1), (d("2026-03-01"), None, 3), (None, None, 1)]
    );
    assert_eq!(
        curve(snapshots[3], None),
        [
            (d("2026-02-27"), None, 1),
            (d("2026-02-28"), None, 1),
            (d("2026-03-01"), None, 4),
            (d("2026-03-02"), None, 1),
            (None, None, 1), // C-0008's impossible onset is missing, not a date
        ]
    );
    let a = d("Amberlee");
    let b = d("Brackwater");
    assert_eq!(
        curve(snapshots[1], Some(Field::Jurisdiction)),
        [
            (d("2026-02-27"), a.clone(), 1),
            (d("2026-02-27"), b.clone(), 0),
            (d("2026-02-28"), a.clone(), 0),
            (d("2026-02-28"), b.clone(), 1),
            (d("2026-03-01"), a.clone(), 1),
            (d("2026-03-01"), b.clone(), 2),
            (d("2026-03-02"), a.clone(), 1),
            (d("2026-03-02"), b.clone(), 0),
        ]
    );

    // History lists every version, each closing where the next opens.
    let history = reader.history(id, "C-0002")?;
    let spans: Vec<(SnapshotId, Option<SnapshotId>)> =
        history.iter().map(|v| (v.valid_from, v.valid_to)).collect();
    assert_eq!(spans, [(snapshots[0], Some(snapshots[2])), (snapshots[3], None)]);
    let history = reader.history(id, "C-0006")?;
    let spans: Vec<(SnapshotId, Option<SnapshotId>)> =
        history.iter().map(|v| (v.valid_from, v.valid_to)).collect();
    assert_eq!(spans, [(snapshots[1], Some(snapshots[2])), (snapshots[2], None)]);
    assert_eq!(history[0].from_as_of, "2026-03-02T23:59:59Z");
    for key in ["C-0001", "C-0003", "C-0004", "C-0006"] {
        let versions = reader.history(id, key)?;
        assert_eq!(versions.len(), 2, "{key}");
        assert_eq!(versions[0].valid_to, Some(versions[1].valid_from), "{key}: versions chain");
    }
    // Counts agree with the tables: one version per new or changed record.
    let rows = reader.snapshots(Some("full"))?;
    let written: i64 = rows.iter().map(|s| s.rows_new + s.rows_changed).sum();
    assert_eq!(reader.version_counts(id)?, (written, 8));
    Ok(())
}

#[test]
fn every_extract_is_archived_and_the_store_and_archive_are_private() -> TestResult {
    let mut env = Env::new();
    let texts = [
        csv(&["C-0001,Amberlee,2026-03-01,,34,F,"]),
        csv(&["C-0001,Amberlee,2026-03-01,,35,F,"]),
        String::new(),                               // failed: empty
        csv(&["C-0001,Amberlee,2026-03-01,,35,F,"]), // duplicate
    ];
    let mut originals = Vec::new();
    for (n, text) in texts.iter().enumerate() {
        env.ingest("full", text, day(n as i64));
        originals.push(text.clone());
    }
    let db = env.db();
    let mut stmt = db.prepare("SELECT status, sha256, bytes FROM snapshot ORDER BY snapshot_id")?;
    let rows: Vec<(String, String, i64)> =
        stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))?.collect::<Result<_, _>>()?;
    let statuses: Vec<&str> = rows.iter().map(|r| r.0.as_str()).collect();
    assert_eq!(statuses, ["applied", "applied", "failed", "duplicate"]);
    let archive_dir = &env.config.store.archive;
    for ((_, sha, bytes), original) in rows.iter().zip(&originals) {
        let path = archive::path_of(archive_dir, sha);
        assert!(path.exists(), "no archive file for {sha}");
        assert_eq!(mode(&path), 0o600, "{}", path.display());
        assert_eq!(mode(path.parent().unwrap()), 0o700);
        let mut back = Vec::new();
        archive::open(archive_dir, sha)?.read_to_end(&mut back)?;
        assert_eq!(back, original.as_bytes(), "archived bytes are the extract's bytes");
        assert_eq!(*bytes as usize, original.len());
    }
    assert_eq!(mode(archive_dir), 0o700);
    let store = env.store_path();
    assert_eq!(mode(&store), 0o600);
    for suffix in ["-wal", "-shm"] {
        let side = store.with_file_name(format!("tidemark.db{suffix}"));
        if side.exists() {
            assert_eq!(mode(&side), 0o600, "{}", side.display());
        }
    }
    assert_eq!(mode(store.parent().unwrap()), 0o700);
    Ok(())
}

#[test]
fn a_store_is_created_on_first_use_by_a_reader_or_a_writer() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("nested").join("tidemark.db");
    let reader = Reader::open(&path).unwrap();
    assert_eq!(reader.snapshots(None).unwrap(), []);
    drop(reader);
    assert_eq!(mode(&path), 0o600);
    drop(open_store(&path));
    assert_eq!(integrity_check(&path), "ok");
}

#[test]
fn a_full_extract_that_restores_an_earlier_state_is_applied() {
    let mut env = Env::new();
    let five = csv(&[
        "C-0001,Amberlee,2026-03-01,,34,F,",
        "C-0002,Amberlee,2026-03-02,,40,M,",
        "C-0003,Brackwater,2026-03-02,,51,M,",
        "C-0004,Brackwater,2026-03-03,,8,F,",
        "C-0005,Brackwater,2026-03-03,,70,M,",
    ]);
    let four = csv(&[
        "C-0001,Amberlee,2026-03-01,,34,F,",
        "C-0002,Amberlee,2026-03-02,,40,M,",
        "C-0003,Brackwater,2026-03-02,,51,M,",
        "C-0004,Brackwater,2026-03-03,,8,F,",
    ]);
    env.ingest("full", &five, day(3));
    env.ingest("full", &four, day(4));
    // Day 5: C-0005's withdrawal is undone; the feed's whole extract is again exactly day 3's.
    let restored = env.ingest("full", &five, day(5));
    assert_eq!(restored.status, SnapshotStatus::Applied, "{:?}", restored.note);
    assert_eq!(current_keys(&env, "full").len(), 5, "the latest full extract has five records");
}
