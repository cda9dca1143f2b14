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
