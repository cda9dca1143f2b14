//! Ingest benchmark: generates a realistic full line-list extract
//! (1,000,000 rows, 16 columns, mixed date and age formats, sex codes, symptom lists with
//! temperature readings, an ignored and an unmapped column, a few bad dates and duplicate
//! keys), commits it into a fresh store (`tidemark::app::ingest::commit_file`) and runs the
//! post-snapshot pipeline (`tidemark::app::pipeline::run_owed`), timed as two calls, then
//! ingests the next day's extract with 1% of the rows changed and 0.5% added. The same two
//! extracts are also stored the naive way (the whole extract appended as a new table per
//! snapshot, parsed by the same `tidemark::extract::parse`), so the ratios show. Each phase
//! runs in a child process of this binary, so its peak RSS (VmHWM) is its own.
//!
//! Run: `cargo bench --bench ingest` (add `-- --rows 100000` for a quick run, `--keep` to keep
//! the work folder, `--dir PATH` to put it elsewhere, `--seed N` for other data). Everything
//! generated is invented: keys, districts and units are synthetic codes.

use std::fmt::Write as _;
use std::fs;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};
use std::process::{Command, ExitCode};
use std::time::Instant;

use anyhow::{Context, Result, bail};
use chrono::{Duration, NaiveDate};
use rusqlite::Connection;
use tidemark::app::ingest::commit_file;
use tidemark::app::pipeline;
use tidemark::config::Config;
use tidemark::extract::{self, Row};
use tidemark::model::{CaseRecord, Field, Format};
use tidemark::store::Store;

mod generator;
mod harness;
mod phase;
mod report;

use generator::*;
use harness::*;
use phase::*;
use report::*;

/// The allocator of the `tidemark` binary (src/main.rs), so the bench measures what ships.
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

/// Rows of the first extract unless `--rows` says otherwise (the size the performance target is set for).
pub(crate) const DEFAULT_ROWS: u64 = 1_000_000;

/// Seed of the generator unless `--seed` says otherwise; any value gives the same shape.
pub(crate) const DEFAULT_SEED: u64 = 20_260_301;

/// One row in this many is changed in the next day's extract (1%, a busy day's revisions).
pub(crate) const CHANGE_EVERY: u64 = 100;

/// The next day's extract adds this many new rows per thousand existing ones (0.5%).
pub(crate) const ADDED_PER_MILLE: u64 = 5;

/// One row in this many carries an impossible date (a field problem, row kept): real feeds
/// have a trickle of them and they exercise the field-problem path.
pub(crate) const BAD_DATE_EVERY: u64 = 10_000;

/// After one row in this many, an earlier row's key appears again (duplicate keys, last wins,
/// the other rejected): exercises the duplicate path at a realistic rate.
pub(crate) const DUPLICATE_EVERY: u64 = 20_000;

/// Targets for this 2-core machine.
pub(crate) const TARGET_FIRST_SECS: f64 = 20.0;
pub(crate) const TARGET_REINGEST_SECS: f64 = 8.0;
pub(crate) const TARGET_REINGEST_RSS_MB: f64 = 400.0;
pub(crate) const TARGET_GROWTH_PERCENT: f64 = 3.0;

/// The source name used in the bench config.
pub(crate) const SOURCE: &str = "county-reports";

/// As-of date of the first extract; the second is the day after.
pub(crate) fn first_day() -> NaiveDate {
    NaiveDate::from_ymd_opt(2026, 3, 1).unwrap()
}

/// The bench config: config/example.toml's source mapping, with a folder and store of its own.
pub(crate) const CONFIG: &str = r#"
[store]
path = "store/tidemark.db"
archive = "store/archive"

[[source]]
name = "county-reports"
kind = "folder"
path = "incoming"
pattern = "*.csv"
extract = "full"
format = "csv"
as_of = "name:%Y-%m-%d"
key = "case_id"
hold_fraction = 0.2
missing = ["", "NA", "N/A", "unknown", "not known"]
date_formats = ["%Y-%m-%d", "%d/%m/%Y"]
list_separator = ";"
ignore = ["exported_at"]

[source.fields]
jurisdiction = "district"
onset_date = "symptom_onset"
specimen_date = "specimen_collected"
result_date = "result_released"
report_date = "reported_on"
admit_date = "admitted_on"
death_date = "died_on"
outcome = "outcome"
age = "age"
sex = "sex"
hospitalised = "hospitalised"
symptoms = "symptoms"
conditions = "conditions"

[source.values.sex]
F = "female"
M = "male"
X = "other"
U = ""

[source.values.hospitalised]
Y = "yes"
N = "no"
"#;

/// The extract's columns; `reporting_unit` is unmapped (goes to `extra_json`), `exported_at`
/// is ignored by the config.
pub(crate) const HEADER: &str = "case_id,district,symptom_onset,specimen_collected,result_released,reported_on,\
admitted_on,died_on,outcome,age,sex,hospitalised,symptoms,conditions,exported_at,reporting_unit";

#[derive(Debug, Clone)]
pub(crate) struct Args {
    pub(crate) rows: u64,
    pub(crate) seed: u64,
    pub(crate) dir: Option<PathBuf>,
    pub(crate) keep: bool,
    /// Internal: run one phase (`tidemark` or `naive`) on `file` and print its result line.
    pub(crate) phase: Option<String>,
    pub(crate) file: Option<PathBuf>,
}

pub(crate) fn parse_args() -> Result<Args> {
    let mut args =
        Args { rows: DEFAULT_ROWS, seed: DEFAULT_SEED, dir: None, keep: false, phase: None, file: None };
    let mut it = std::env::args().skip(1);
    while let Some(arg) = it.next() {
        let mut value = || it.next().with_context(|| format!("{arg} needs a value"));
        match arg.as_str() {
            "--rows" => args.rows = value()?.replace('_', "").parse().context("--rows")?,
            "--seed" => args.seed = value()?.parse().context("--seed")?,
            "--dir" => args.dir = Some(PathBuf::from(value()?)),
            "--keep" => args.keep = true,
            "--phase" => args.phase = Some(value()?),
            "--file" => args.file = Some(PathBuf::from(value()?)),
            // `cargo bench` passes `--bench`; filters and other harness flags mean nothing here.
            "--bench" => {}
            other if other.starts_with('-') => bail!("unknown option {other}"),
            _ => {}
        }
    }
    if args.rows == 0 {
        bail!("--rows must be at least 1");
    }
    Ok(args)
}

fn main() -> ExitCode {
    let result = parse_args().and_then(|args| match args.phase.as_deref() {
        Some(phase) => run_phase(phase, &args),
        None => run_bench(&args),
    });
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(err) => {
            eprintln!("ingest bench: {err:#}");
            ExitCode::FAILURE
        }
    }
}
