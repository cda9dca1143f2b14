//! Property test of the temporal store: random sequences of edits (add, change, remove,
//! reorder rows, change onset) over 30 full extracts. After ingesting them all, the line list
//! reconstructed as of every past snapshot must be exactly that snapshot's accepted rows.

use std::collections::BTreeMap;
use std::path::Path;

use chrono::{Days, NaiveDate};
use proptest::prelude::*;
use tidemark::app::ingest::end_of_day;
use tidemark::app::pipeline::ingest_file;
use tidemark::config::Config;
use tidemark::model::{Field, SnapshotStatus};
use tidemark::store::{Reader, Store};

const SNAPSHOTS: usize = 30;
const JURISDICTIONS: [&str; 3] = ["Amberlee", "Brackwater", "Dunhollow"];

/// One row of the generated line list: onset as a day offset (or blank), jurisdiction, age.
#[derive(Debug, Clone, PartialEq)]
struct Row {
    onset: Option<u8>,
    jurisdiction: usize,
    age: u8,
}

#[derive(Debug, Clone)]
enum Edit {
    Add(u16, Row),
    Change(usize, Row),
    ChangeOnset(usize, Option<u8>),
    Remove(usize),
    Reorder(u64),
}

fn row() -> impl Strategy<Value = Row> {
    (proptest::option::weighted(0.8, 0u8..40), 0..JURISDICTIONS.len(), 0u8..100)
        .prop_map(|(onset, jurisdiction, age)| Row { onset, jurisdiction, age })
}

fn edit() -> impl Strategy<Value = Edit> {
    prop_oneof![
        3 => (0u16..500, row()).prop_map(|(k, r)| Edit::Add(k, r)),
        2 => (any::<usize>(), row()).prop_map(|(i, r)| Edit::Change(i, r)),
        2 => (any::<usize>(), proptest::option::of(0u8..40)).prop_map(|(i, o)| Edit::ChangeOnset(i, o)),
        1 => any::<usize>().prop_map(Edit::Remove),
        1 => any::<u64>().prop_map(Edit::Reorder),
    ]
}

fn apply(state: &mut BTreeMap<String, Row>, order: &mut u64, edit: &Edit) {
    let pick =
        |state: &BTreeMap<String, Row>, idx: usize| state.keys().nth(idx % state.len().max(1)).cloned();
    match edit {
        Edit::Add(key, row) => {
            state.insert(format!("C-{key:04}"), row.clone());
        }
        Edit::Change(idx, row) => {
            if let Some(key) = pick(state, *idx) {
                state.insert(key, row.clone());
            }
        }
        Edit::ChangeOnset(idx, onset) => {
            if let Some(key) = pick(state, *idx) {
                state.get_mut(&key).unwrap().onset = *onset;
            }
        }
        // Keep at least two records so a removal never empties the feed.
        Edit::Remove(idx) if state.len() > 2 => {
            if let Some(key) = pick(state, *idx) {
                state.remove(&key);
            }
        }
        Edit::Remove(_) => {}
        Edit::Reorder(seed) => *order = *seed,
    }
}

fn start() -> NaiveDate {
    NaiveDate::from_ymd_opt(2026, 1, 1).unwrap()
}

fn csv(state: &BTreeMap<String, Row>, order: u64) -> String {
    let mut rows: Vec<(&String, &Row)> = state.iter().collect();
    // A cheap deterministic shuffle: rows arrive in an order unrelated to their keys.
    rows.sort_by_key(|(key, _)| key.bytes().fold(order, |h, b| h.wrapping_mul(31).wrapping_add(b as u64)));
    let mut out = String::from("id,onset,district,age\n");
    for (key, row) in rows {
        let onset = row.onset.map(|d| (start() + Days::new(d as u64)).to_string()).unwrap_or_default();
        out.push_str(&format!("{key},{onset},{},{}\n", JURISDICTIONS[row.jurisdiction], row.age));
    }
    out
}

fn config(dir: &Path) -> Config {
    let text = "[store]\npath = \"t.db\"\narchive = \"archive\"\n\
        [[source]]\nname = \"feed\"\nkind = \"folder\"\npath = \"in\"\nkey = \"id\"\nhold_fraction = 0.99\n\
        [source.fields]\nonset_date = \"onset\"\njurisdiction = \"district\"\nage = \"age\"\n";
    Config::parse(text, &dir.join("t.toml")).unwrap()
}

fn check_history(initial: Vec<(u16, Row)>, edits: Vec<Vec<Edit>>) -> Result<(), TestCaseError> {
    let dir = tempfile::tempdir().unwrap();
    let config = config(dir.path());
    let source = config.source("feed").unwrap();
    let mut store = Store::open(&config.store.path).unwrap();
    let mut state: BTreeMap<String, Row> = BTreeMap::new();
    let mut order = 0u64;
    for (key, row) in initial {
        apply(&mut state, &mut order, &Edit::Add(key, row));
    }
    let mut expected = Vec::new();
    for (idx, day_edits) in edits.iter().enumerate() {
        for edit in day_edits {
            apply(&mut state, &mut order, edit);
        }
        let path = dir.path().join(format!("extract-{idx:02}.csv"));
        // The trailing index makes every extract's bytes unique, so none is a duplicate.
        std::fs::write(&path, format!("{}# {idx}\n", csv(&state, order))).unwrap();
        let as_of = end_of_day(start() + Days::new(40 + idx as u64));
        let outcome = ingest_file(&mut store, &config, source, &path, Some(as_of)).unwrap();
        prop_assert_eq!(outcome.status, SnapshotStatus::Applied, "{:?}", outcome.note);
        expected.push((outcome.snapshot_id, state.clone()));
    }
    drop(store);
    let reader = Reader::open(&config.store.path).unwrap();
    let source_id = reader.source_id("feed").unwrap().unwrap();
    for (snapshot_id, state) in expected {
        let records = reader.line_list(source_id, snapshot_id).unwrap();
        let got: BTreeMap<String, Row> = records
            .into_iter()
            .map(|r| {
                let onset = r.date(Field::OnsetDate).map(|d| (d - start()).num_days() as u8);
                let jurisdiction =
                    JURISDICTIONS.iter().position(|j| Some(*j) == r.jurisdiction.as_deref()).unwrap();
                let age = r.age.unwrap().lo as u8;
                (r.case_key, Row { onset, jurisdiction, age })
            })
            .collect();
        prop_assert_eq!(&got, &state, "line list as of snapshot {} differs", snapshot_id);
    }
    Ok(())
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 12, ..ProptestConfig::default() })]

    #[test]
    fn every_past_snapshot_reconstructs_exactly(
        initial in proptest::collection::vec((0u16..500, row()), 2..40),
        edits in proptest::collection::vec(proptest::collection::vec(edit(), 0..8), SNAPSHOTS),
    ) {
        check_history(initial, edits)?;
    }
}
