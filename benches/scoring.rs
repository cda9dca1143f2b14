//! Scoring benchmark (the performance targets of the scoring step, which scores the stored
//! nowcasts whose truth has matured after each applied snapshot): at most 0.2 s on the demo
//! store, and at most 1 s for a source with 10 strata, 2 reference fields and 120 days.
//! The large case is an invented feed: a first full extract with 110 days of history, then
//! one full extract a day, `backtest_lag` 7, so the later snapshots each score a week-old
//! set of nowcasts. Wall times on this machine; the step times come from the pipeline's
//! own per-step reports. Run with `cargo bench --bench scoring`.

use std::fmt::Write as _;
use std::path::Path;
use std::sync::Mutex;
use std::time::Duration;

use chrono::NaiveDate;
use tidemark::app::demo::{self, DemoOptions};
use tidemark::app::ingest::{commit_file, end_of_day};
use tidemark::app::pipeline::{Step, StepReport, run_owed};
use tidemark::config::Config;
use tidemark::store::{Reader, Store};

#[path = "support/machine.rs"]
mod machine;

/// Jurisdictions (strata) of the invented feed.
const STRATA: usize = 10;
/// Days of history in the first extract.
const HISTORY: i64 = 110;
/// Daily extracts after the first.
const DAILY: i64 = 14;

const CONFIG: &str = r#"
[store]
path = "store/bench.db"
archive = "store/archive"

[[source]]
name = "feed"
kind = "folder"
path = "inbox"
format = "csv"
extract = "full"
key = "case_id"

[source.fields]
jurisdiction = "district"
onset_date = "onset"
report_date = "reported"

[analysis]
reference_fields = ["onset_date", "report_date"]
strata = ["jurisdiction"]
backtest_lag = 7
draws = 200
delays = []
"#;

/// Day `t` of the invented feed (day 0 is 2026-01-01).
fn day(t: i64) -> NaiveDate {
    NaiveDate::from_ymd_opt(2026, 1, 1).expect("valid date") + chrono::Duration::days(t)
}

/// The full extract on day `s`: every case reported by then. Stratum j has 8 + 2j cases
/// a day, with delays 0 to 3 + j days spread evenly (deterministic).
fn extract(s: i64) -> String {
    let mut text = String::from("case_id,district,onset,reported\n");
    for t in 0..=s {
        for j in 0..STRATA as i64 {
            for k in 0..(8 + 2 * j) {
                let delay = (t * 7 + k * 3) % (4 + j);
                if t + delay > s {
                    continue;
                }
                let onset = day(t);
                let reported = onset + chrono::Duration::days(delay);
                let _ = writeln!(text, "C-{t:03}-{j:02}-{k:02},District {j},{onset},{reported}");
            }
        }
    }
    text
}

fn summary(label: &str, times: &[Duration], target: f64) {
    let mut secs: Vec<f64> = times.iter().map(Duration::as_secs_f64).collect();
    secs.sort_by(f64::total_cmp);
    let median = secs.get(secs.len() / 2).copied().unwrap_or(f64::NAN);
    let max = secs.last().copied().unwrap_or(f64::NAN);
    println!(
        "{label}: scoring step over {} snapshots, median {median:.3} s, max {max:.3} s (target <= {target} s)",
        secs.len()
    );
}

/// The scoring step's times per snapshot, and the rolling-score rows (series x method x
/// horizon) readable at the end, per reference field.
fn large_feed(dir: &Path) -> (Vec<Duration>, Vec<(String, usize)>) {
    let config_path = dir.join("bench.toml");
    std::fs::write(&config_path, CONFIG).expect("config written");
    std::fs::create_dir_all(dir.join("inbox")).expect("inbox");
    let config = Config::load(&config_path).expect("bench config");
    let source = config.source("feed").expect("the bench source");
    let mut store = Store::open(&config.store.path).expect("store");
    let scoring = Mutex::new(Vec::new());
    let observe = |_: &str, report: &StepReport| {
        if report.step == Step::Scoring {
            scoring.lock().expect("not poisoned").push(report.took);
        }
    };
    let mut last = None;
    for s in HISTORY..=HISTORY + DAILY {
        let path = dir.join("inbox").join(format!("feed-{s:03}.csv"));
        std::fs::write(&path, extract(s)).expect("extract written");
        let as_of = end_of_day(day(s));
        last = Some(
            commit_file(&mut store, &config, source, &path, Some(as_of)).expect("committed").snapshot_id,
        );
        let analysed = run_owed(&mut store, &config, source, &observe, &|| false).expect("analysed");
        if let Some(failure) = analysed.iter().find_map(|a| a.failure()) {
            panic!("the analysis of day {s} failed: {failure}");
        }
        eprintln!("  day {s} analysed");
    }
    let reader = Reader::open(&config.store.path).expect("reader");
    let source_id = reader.source_id("feed").expect("source read").expect("the source");
    let last = last.expect("at least one snapshot");
    let scored = ["onset_date", "report_date"]
        .iter()
        .map(|field| {
            let table = reader.score_table(source_id, field, last, 28, 7).expect("scores read");
            (field.to_string(), table.rows.len())
        })
        .collect();
    (scoring.into_inner().expect("not poisoned"), scored)
}

fn main() {
    println!("machine: {} cores, {}", machine::cores(), machine::cpu_model().unwrap_or_default());
    let dir = tempfile::tempdir().expect("temporary directory");
    let (times, scored) = large_feed(dir.path());
    for (field, rows) in &scored {
        assert!(*rows > 0, "nothing was scored by {field}");
        println!("scored by {field}: {rows} rolling-score rows (series x method x horizon)");
    }
    summary(&format!("{STRATA} strata x 2 reference fields x {} days", HISTORY + DAILY), &times, 1.0);

    let demo_dir = tempfile::tempdir().expect("temporary directory");
    let options =
        DemoOptions { dir: demo_dir.path().to_path_buf(), seed: 7, days: tidemark::demo::DEFAULT_DAYS };
    let report = demo::run(&options, &mut |line| eprintln!("  {line}")).expect("demo ran");
    let demo_times: Vec<Duration> =
        report.steps.iter().filter(|r| r.step == Step::Scoring).map(|r| r.took).collect();
    summary("demo store (default scenario, 2 sources)", &demo_times, 0.2);
}
