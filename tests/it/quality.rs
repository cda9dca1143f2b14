//! Quality measures stored after an applied snapshot: the reporting-lag histograms.

use crate::support::{Env, count, csv, day};

/// Records of two jurisdictions with the same lag fall in one bin of the whole-source
/// histogram (a regression: the second jurisdiction's bin used to fail the insert, and with
/// it every quality measure of the snapshot).
#[test]
fn the_whole_source_lag_histogram_adds_up_jurisdictions_with_the_same_lag() {
    let mut env = Env::new();
    let as_of = day(10);
    let onset = (as_of - chrono::Duration::days(3)).date_naive();
    let rows: Vec<String> = [("A1", "North"), ("B1", "South"), ("B2", "South")]
        .iter()
        .map(|(key, district)| format!("{key},{district},{onset},{onset},40,F,"))
        .collect();
    let refs: Vec<&str> = rows.iter().map(String::as_str).collect();
    env.ingest("full", &csv(&refs), as_of);
    let db = env.db();
    assert_eq!(count(&db, "SELECT n FROM quality_lag_hist WHERE stratum_kind = 'all' AND lag_days = 3"), 3);
    assert_eq!(count(&db, "SELECT count(*) FROM quality_lag WHERE stratum_kind = 'jurisdiction'"), 2);
    assert!(count(&db, "SELECT count(*) FROM quality") > 0, "the field measures were stored too");
}

/// `tidemark quality` lists the fields a feed does not map as `not_captured`, with no
/// missing count, while the mapped ones are measured (a blank onset is missing).
#[test]
fn fields_a_feed_does_not_map_are_not_captured_rather_than_missing() {
    let mut env = Env::new();
    let as_of = day(10);
    let onset = (as_of - chrono::Duration::days(3)).date_naive();
    let rows = [format!("A1,North,{onset},{onset},40,F,"), format!("A2,North,,{onset},41,M,")];
    let refs: Vec<&str> = rows.iter().map(String::as_str).collect();
    env.ingest("full", &csv(&refs), as_of);
    let text = tidemark::app::quality::quality(&env.config, "full", None, tidemark::table::OutputFormat::Csv)
        .unwrap();
    let line = |scope: &str, field: &str| {
        text.lines().find(|l| l.starts_with(&format!("field,{scope},(all),{field},"))).map(str::to_string)
    };
    assert_eq!(
        line("not_captured", "death_date").as_deref(),
        Some("field,not_captured,(all),death_date,,,,,,,")
    );
    assert!(line("not_captured", "specimen_date").is_some(), "{text}");
    assert!(line("not_captured", "onset_date").is_none() && line("not_captured", "case_key").is_none());
    assert!(line("current", "onset_date").is_some_and(|l| l.contains(",2,1,0.5,")), "{text}");
}

/// One stored quality cell: (scope, stratum kind, stratum, field, records, missing, invalid).
type QualityCell = (String, String, String, String, i64, i64, i64);

fn quality_cells(db: &rusqlite::Connection, snapshot_id: i64) -> Vec<QualityCell> {
    let mut stmt = db
        .prepare(
            "SELECT scope, stratum_kind, stratum, field, records, missing, invalid FROM quality
             WHERE snapshot_id = ?1 ORDER BY scope, stratum_kind, stratum, field",
        )
        .unwrap();
    let rows = stmt.query_map([snapshot_id], |r| {
        Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?, r.get(5)?, r.get(6)?))
    });
    rows.unwrap().collect::<Result<_, _>>().unwrap()
}

/// A re-ingest's quality cells are the previous snapshot's cells plus the versions opened
/// and minus the versions closed since. Oracle: the same snapshot measured again by one
/// whole scan of its current versions (forced by removing the previous snapshot's cells).
/// The edits cover new, changed and removed records, values turning missing and invalid and
/// back, a jurisdiction that appears, one that empties and records without a jurisdiction.
#[test]
fn incremental_quality_cells_equal_a_whole_scan_of_every_snapshot() {
    let mut env = Env::new();
    let districts = ["Amberlee", "Brackwater", "Dunhollow", "", "Eastmere"];
    let onsets = ["2026-03-02", "", "2026-02-30", "2026-03-04"];
    let ages = ["40", "", "-3", "80+", "30-39"];
    // A small linear congruential generator: deterministic, no seed to manage.
    let mut state = 0x2545_f491_4f6c_dd1du64;
    let mut next = move |n: usize| {
        state = state.wrapping_mul(6_364_136_223_846_793_005).wrapping_add(1_442_695_040_888_963_407);
        ((state >> 33) % n as u64) as usize
    };
    let mut records: std::collections::BTreeMap<u32, (usize, usize, usize)> =
        (0..60).map(|k| (k, (k as usize % 3, k as usize % 4, k as usize % 5))).collect();
    let mut next_key = 60;
    let days = 8;
    for d in 0..days {
        if d > 0 {
            for _ in 0..6 {
                let key = *records.keys().nth(next(records.len())).unwrap();
                records.remove(&key);
            }
            for _ in 0..8 {
                let key = *records.keys().nth(next(records.len())).unwrap();
                let district = if d >= 4 { next(districts.len()) } else { next(4) };
                records.insert(key, (district, next(onsets.len()), next(ages.len())));
            }
            for _ in 0..7 {
                records.insert(next_key, (next(4), next(onsets.len()), next(ages.len())));
                next_key += 1;
            }
        }
        if d == 5 {
            // Dunhollow empties: every one of its records moves elsewhere.
            for value in records.values_mut().filter(|v| v.0 == 2) {
                value.0 = 1;
            }
        }
        let rows: Vec<String> = records
            .iter()
            .filter(|(_, v)| d < 5 || v.0 != 2)
            .map(|(k, (district, onset, age))| {
                format!("C-{k:04},{},{},2026-03-05,{},F,", districts[*district], onsets[*onset], ages[*age])
            })
            .collect();
        let refs: Vec<&str> = rows.iter().map(String::as_str).collect();
        let outcome = env.ingest("full", &csv(&refs), day(5 + d));
        assert_eq!(outcome.status.name(), "applied", "day {d}: {:?}", outcome.note);
    }
    let source = env.config.source("full").unwrap().clone();
    let writable = rusqlite::Connection::open(env.store_path()).unwrap();
    let measured: Vec<Vec<QualityCell>> = (0..=days).map(|id| quality_cells(&env.db(), id)).collect();
    let mut checked = 0;
    for snapshot_id in 2..=days {
        let incremental = &measured[snapshot_id as usize];
        assert!(!incremental.is_empty(), "snapshot {snapshot_id} was measured at ingest");
        writable.execute("DELETE FROM quality WHERE snapshot_id = ?1", [snapshot_id - 1]).unwrap();
        let mut store = crate::support::open_store(&env.store_path());
        tidemark::app::quality::measure_snapshot(
            &mut store,
            &env.config,
            &source,
            tidemark::model::SnapshotId(snapshot_id),
        )
        .unwrap();
        drop(store);
        assert_eq!(incremental, &quality_cells(&env.db(), snapshot_id), "snapshot {snapshot_id}");
        checked += incremental.len();
    }
    assert!(checked > 100, "only {checked} cells compared");
    let emptied =
        quality_cells(&env.db(), days).into_iter().filter(|c| c.0 == "current" && c.2 == "Dunhollow").count();
    assert_eq!(emptied, 0, "a jurisdiction without records has no cells");
}

/// A source that maps only its key column has no field to measure: the quality step still
/// succeeds, storing no field cells (a regression: its scan was `SELECT ..., invalid, FROM`,
/// a syntax error, and every snapshot of such a source went unmeasured).
#[test]
fn a_source_that_maps_only_its_key_is_measured_without_error() {
    let dir = tempfile::tempdir().unwrap();
    let text = "[store]\npath = \"store/t.db\"\narchive = \"store/archive\"\n\
        [[source]]\nname = \"keys\"\nkind = \"folder\"\npath = \"in\"\nkey = \"id\"\n";
    let config = tidemark::config::Config::parse(text, &dir.path().join("t.toml")).unwrap();
    let source = config.source("keys").unwrap();
    let path = dir.path().join("keys.csv");
    std::fs::write(&path, "id,other\nK-1,x\nK-2,y\n").unwrap();
    let mut store = tidemark::store::Store::open(&config.store.path).unwrap();
    let outcome =
        tidemark::app::pipeline::ingest_file(&mut store, &config, source, &path, Some(day(1))).unwrap();
    assert_eq!(outcome.counts.accepted, 2);
    let spec = tidemark::app::quality::spec_for(&config, source);
    assert!(spec.fields.is_empty() && spec.lag_from.is_empty(), "{spec:?}");
    let rows = tidemark::app::quality::measure_snapshot(&mut store, &config, source, outcome.snapshot_id);
    assert_eq!(rows.unwrap(), 0);
}
