//! `tidemark demo`: generates the invented scenario, ingests every day's extracts in order
//! through the same path as `tidemark ingest`, and summarises what the store now knows
//! against the scenario's truth.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::PathBuf;

use anyhow::{Context, Result};
use chrono::NaiveDate;

use super::ingest::{end_of_day, ingest_file};
use crate::config::Config;
use crate::demo::{self, COUNTY_SOURCE, LAB_SOURCE, Scenario};
use crate::model::Field;
use crate::store::{Reader, Store};

/// What `tidemark demo` was asked to do.
#[derive(Debug, Clone)]
pub struct DemoOptions {
    pub dir: PathBuf,
    pub seed: u64,
    pub days: u32,
}

/// What the demo found, for its summary.
#[derive(Debug, Clone)]
pub struct DemoReport {
    pub dir: PathBuf,
    pub config: PathBuf,
    pub true_cases: usize,
    /// Per source: (name, statuses with counts, versions, current records, rejects by kind).
    pub sources: Vec<SourceSummary>,
    /// (onset date, count known on the last day, true count), by day.
    pub onset_curve: Vec<(NaiveDate, i64, u32)>,
    pub onset_missing: i64,
}

#[derive(Debug, Clone)]
pub struct SourceSummary {
    pub name: String,
    pub statuses: BTreeMap<String, usize>,
    pub versions: i64,
    pub current: i64,
    pub rejects: Vec<(String, i64)>,
}

/// Runs the demo; `progress` receives a line now and then.
pub fn run(options: &DemoOptions, progress: &mut dyn FnMut(&str)) -> Result<DemoReport> {
    progress(&format!(
        "generating the scenario (seed {}, {} days) in {}",
        options.seed,
        options.days,
        options.dir.display()
    ));
    let scenario = Scenario::generate(options.seed, options.days);
    let files = demo::write(&options.dir, &scenario).context("writing the demo scenario")?;
    let config = Config::load(&files.config)?;
    let mut store = Store::open(&config.store.path)?;
    for (day, county, lab) in &files.extracts {
        let as_of = end_of_day(scenario.date(*day));
        for (name, path) in [(COUNTY_SOURCE, county), (LAB_SOURCE, lab)] {
            let source = config.source(name).context("demo source missing from its config")?;
            let outcome = ingest_file(&mut store, &config, source, path, Some(as_of))?;
            if (*day + 1) % 20 == 0 || *day + 1 == options.days as i32 {
                progress(&format!("  {}: {}", scenario.date(*day), outcome.summary(name)));
            }
        }
    }
    drop(store);
    summarise(&config, &scenario, files.dir)
}

fn summarise(config: &Config, scenario: &Scenario, dir: PathBuf) -> Result<DemoReport> {
    let reader = Reader::open(&config.store.path)?;
    let mut sources = Vec::new();
    for name in [COUNTY_SOURCE, LAB_SOURCE] {
        let source_id = reader.source_id(name)?.context("demo source has no snapshots")?;
        let mut statuses = BTreeMap::new();
        for snapshot in reader.snapshots(Some(name))? {
            *statuses.entry(snapshot.status).or_insert(0) += 1;
        }
        let (versions, current) = reader.version_counts(source_id)?;
        let rejects = reader.reject_kinds(source_id)?;
        sources.push(SourceSummary { name: name.to_string(), statuses, versions, current, rejects });
    }
    let county_id = reader.source_id(COUNTY_SOURCE)?.context("county source missing")?;
    let last = reader.snapshot_as_of(county_id, None)?.context("no applied county snapshot")?;
    let curve = reader.curve(county_id, last, Field::OnsetDate, None)?;
    let truth = scenario.true_onsets();
    let mut onset_curve = Vec::new();
    let mut onset_missing = 0;
    for row in curve {
        match row.date {
            Some(date) => {
                let day = (date - scenario.start).num_days();
                let true_count = usize::try_from(day).ok().and_then(|d| truth.get(d)).copied().unwrap_or(0);
                onset_curve.push((date, row.count, true_count));
            }
            None => onset_missing = row.count,
        }
    }
    Ok(DemoReport {
        dir,
        config: config.file.clone(),
        true_cases: scenario.cases.len(),
        sources,
        onset_curve,
        onset_missing,
    })
}

impl DemoReport {
    /// The summary a person reads.
    pub fn report(&self) -> String {
        let mut out = String::new();
        let _ = writeln!(out, "\nDemo scenario: {} true cases in 4 invented jurisdictions.", self.true_cases);
        for s in &self.sources {
            let statuses: Vec<String> = s.statuses.iter().map(|(k, v)| format!("{v} {k}")).collect();
            let _ = writeln!(
                out,
                "\n{}: snapshots {}; {} record versions, {} current records",
                s.name,
                statuses.join(", "),
                s.versions,
                s.current
            );
            let rejects: Vec<String> = s.rejects.iter().map(|(k, v)| format!("{k} {v}")).collect();
            let _ = writeln!(
                out,
                "  rejected rows by reason (all snapshots): {}",
                if rejects.is_empty() { "none".into() } else { rejects.join(", ") }
            );
        }
        let _ = writeln!(out, "\nCases by onset week, as known on the last day, against the truth:");
        let _ = writeln!(out, "  week of      known   true  known/true");
        for week in self.onset_curve.chunks(7) {
            let known: i64 = week.iter().map(|w| w.1).sum();
            let truth: u32 = week.iter().map(|w| w.2).sum();
            let ratio = if truth > 0 { format!("{:.2}", known as f64 / truth as f64) } else { "-".into() };
            let _ = writeln!(out, "  {}  {known:>6} {truth:>6}  {ratio:>10}", week[0].0);
        }
        let _ = writeln!(
            out,
            "  ({} records have no onset date; they are missing, not imputed)",
            self.onset_missing
        );
        let _ =
            writeln!(out, "\nThe last 14 days by onset (recent days look low: reports are still arriving):");
        let _ = writeln!(out, "  onset_date   known   true");
        for (date, known, truth) in self.onset_curve.iter().rev().take(14).rev() {
            let _ = writeln!(out, "  {date}  {known:>6} {truth:>6}");
        }
        let _ = writeln!(out, "\nStore and files: {}", self.dir.display());
        let _ = writeln!(
            out,
            "Try: tidemark --config {} snapshots --source {COUNTY_SOURCE}",
            self.config.display()
        );
        let _ = writeln!(
            out,
            "     tidemark --config {} curve --source {COUNTY_SOURCE} --by onset --as-of 2026-02-20",
            self.config.display()
        );
        let _ = writeln!(
            out,
            "\nCounts are as reported, not corrected for reporting delay; treat recent days as incomplete."
        );
        out
    }
}
