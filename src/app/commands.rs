//! The bodies of the CLI commands: each takes parsed arguments and the config, does its work
//! through `store`, `extract` and `demo`, and returns the text to print. `main` parses the
//! command line and chooses the exit code.

use std::fs::Permissions;
use std::io::Write as _;
use std::os::unix::fs::{OpenOptionsExt, PermissionsExt};
use std::path::{Path, PathBuf};

use anyhow::{Context, Result, bail};
use chrono::NaiveDate;

use super::ingest::{self, IngestOutcome};
use super::pipeline;
use crate::config::{self, Config, SourceConfig};
use crate::model::{SnapshotId, SnapshotStatus};
use crate::store::{Reader, Store};
use crate::table::{Cell, OutputFormat, Table};
use crate::text::escape_path;

use super::errors::usage;
pub use super::errors::{NotFound, UsageError, not_found};
use super::queries::source;
pub use super::queries::{
    Answer, CurveArgs, DelaysArgs, NOWCAST_CAUTION, NowcastArgs, QueryError, Question, ScoresArgs, answer,
    parse_field_arg, parse_time_arg,
};

/// Mode of the folders `init` creates: owner only (they will hold extracts and the store).
const PRIVATE_DIR: u32 = 0o700;

/// Mode of the config `init` writes: owner only (it will name hosts and secrets' variables).
const PRIVATE_FILE: u32 = 0o600;

/// `tidemark init [DIR]`: folders 0700 and the config 0600, whatever the umask; folders that
/// exist already keep their mode.
pub fn init(dir: &Path) -> Result<String> {
    create_private_folders(dir)?;
    let path = dir.join("tidemark.toml");
    if path.exists() {
        bail!("{} already exists; not overwriting it", escape_path(&path));
    }
    write_private_new(&path, config::EXAMPLE).with_context(|| format!("writing {}", escape_path(&path)))?;
    let config = Config::load(&path)?;
    for source in &config.sources {
        if let config::Location::Folder(folder) = &source.location {
            create_private_folders(&folder.path)?;
        }
    }
    create_private_folders(config.store.path.parent().unwrap_or(Path::new(".")))?;
    Store::open(&config.store.path)?;
    Ok(format!(
        "wrote {}\ncreated store {}\nedit the [[source]] tables, then: tidemark --config {} check-config\n",
        escape_path(&path),
        escape_path(&config.store.path),
        escape_path(&path)
    ))
}

/// Creates `path` and its missing parents, each set to 0700 (the umask could have opened or
/// narrowed them); the folders that already existed are left as they are.
fn create_private_folders(path: &Path) -> Result<()> {
    let missing: Vec<&Path> = path.ancestors().filter(|p| !p.as_os_str().is_empty() && !p.exists()).collect();
    let creating = || format!("creating {}", escape_path(path));
    crate::store::create_private_dir(path).with_context(creating)?;
    for folder in missing {
        std::fs::set_permissions(folder, Permissions::from_mode(PRIVATE_DIR)).with_context(creating)?;
    }
    Ok(())
}

/// Writes a new file (refusing an existing one) with mode 0600 whatever the umask.
fn write_private_new(path: &Path, text: &str) -> std::io::Result<()> {
    let mut file = std::fs::OpenOptions::new().write(true).create_new(true).mode(PRIVATE_FILE).open(path)?;
    file.set_permissions(Permissions::from_mode(PRIVATE_FILE))?;
    file.write_all(text.as_bytes())?;
    file.sync_all()
}

/// `tidemark check-config`
pub fn check_config(config: &Config) -> String {
    format!("{}config ok\n", config.describe())
}

/// What `tidemark ingest` did: the commit, then (unless `--no-analysis`) the post-snapshot
/// pipeline over everything the source owes.
#[derive(Debug)]
pub struct IngestReport {
    pub outcome: IngestOutcome,
    /// Why the analysis failed or did not run; `None` when it succeeded or was not asked for.
    pub analysis_failure: Option<String>,
}

/// `tidemark ingest FILE --source NAME [--as-of TIME] [--no-analysis]`; the report decides
/// the exit code (`ingest_exit_code`).
pub fn ingest(
    config: &Config,
    file: &Path,
    source_name: &str,
    as_of: Option<&str>,
    analyse: bool,
) -> Result<IngestReport> {
    let source = source(config, source_name)?;
    let as_of = as_of.map(parse_time_arg).transpose()?;
    let mut store = Store::open(&config.store.path)?;
    ingest::remove_archive_orphans(config);
    let outcome = ingest::commit_file(&mut store, config, source, file, as_of)?;
    let analysis_failure = if analyse { analyse_owed(&mut store, config, source) } else { None };
    Ok(IngestReport { outcome, analysis_failure })
}

/// Runs the pipeline over what `source` owes; why it failed, if it did.
fn analyse_owed(store: &mut Store, config: &Config, source: &SourceConfig) -> Option<String> {
    match pipeline::run_owed(store, config, source, &pipeline::unobserved, &|| false) {
        Ok(analysed) => {
            analysed.iter().find_map(|a| a.failure().map(|f| format!("snapshot {}: {f}", a.snapshot_id)))
        }
        Err(err) => Some(format!("{err:#}")),
    }
}

/// Up to `max` problems of a snapshot, for printing after an ingest.
pub fn problem_lines(config: &Config, snapshot_id: SnapshotId, max: usize) -> Result<Vec<String>> {
    let reader = Reader::open(&config.store.path)?;
    Ok(reader
        .problem_lines(snapshot_id, max)?
        .into_iter()
        .map(|p| match p.field {
            Some(field) => format!("line {}, field {field}: {} ({})", p.line, p.reason, p.kind),
            None => format!("line {}: {} ({})", p.line, p.reason, p.kind),
        })
        .collect())
}

/// `tidemark snapshots [--source NAME]`
pub fn snapshots(config: &Config, source_name: Option<&str>, format: OutputFormat) -> Result<String> {
    if let Some(name) = source_name {
        source(config, name)?;
    }
    let reader = Reader::open(&config.store.path)?;
    Ok(answer(config, &reader, &Question::Snapshots { source: source_name })?.table.render(format))
}

/// `tidemark snapshots release ID`
pub fn release(config: &Config, snapshot_id: SnapshotId) -> Result<ReleaseReport> {
    let mut store = Store::open(&config.store.path)?;
    let outcome = ingest::release(&mut store, config, snapshot_id)?;
    let (name, _, _) = store.snapshot_origin(snapshot_id)?;
    let text = format!("{}\n", outcome.summary(&name));
    let analysis_failure = config.source(&name).and_then(|source| analyse_owed(&mut store, config, source));
    Ok(ReleaseReport { text, analysis_failure })
}

/// What `tidemark snapshots release` did: the line to print, and why the released snapshot's
/// analysis failed if it did (the snapshot stays released and its analysis owed; exit 3).
#[derive(Debug)]
pub struct ReleaseReport {
    pub text: String,
    pub analysis_failure: Option<String>,
}

/// `tidemark snapshots reject ID`
pub fn reject(config: &Config, snapshot_id: SnapshotId, note: Option<&str>) -> Result<String> {
    let mut store = Store::open(&config.store.path)?;
    store.reject_held(snapshot_id, note.unwrap_or("rejected by operator"))?;
    Ok(format!("snapshot {snapshot_id}: rejected; nothing of it was applied\n"))
}

/// `tidemark history KEY --source NAME`: every version of one record.
pub fn history(config: &Config, case_key: &str, source_name: &str, format: OutputFormat) -> Result<String> {
    let reader = Reader::open(&config.store.path)?;
    let question = Question::History { source: source_name, case_key };
    Ok(answer(config, &reader, &question)?.table.render(format))
}

/// `tidemark curve --source NAME --by FIELD [--as-of TIME] [--stratify FIELD]`
pub fn curve(config: &Config, args: &CurveArgs<'_>) -> Result<String> {
    let reader = Reader::open(&config.store.path)?;
    Ok(answer(config, &reader, &Question::Curve(args.clone()))?.table.render(args.format))
}

/// `tidemark query SQL` on a read-only connection that refuses anything but reading, within
/// `serve.query_max_rows` and `serve.query_timeout` (or the overrides given).
pub fn query(
    config: &Config,
    sql: &str,
    limits: crate::store::SqlLimits,
    format: OutputFormat,
) -> Result<String> {
    Ok(crate::store::run_sql(&config.store.path, sql, &limits)?.render(format))
}

/// Where the config comes from: `--config`, `$TIDEMARK_CONFIG`, or `./tidemark.toml`.
pub fn config_path(flag: Option<&Path>) -> Result<PathBuf> {
    if let Some(path) = flag {
        return Ok(path.to_path_buf());
    }
    if let Some(path) = std::env::var_os("TIDEMARK_CONFIG") {
        return Ok(PathBuf::from(path));
    }
    let default = PathBuf::from("tidemark.toml");
    if default.exists() {
        Ok(default)
    } else {
        Err(usage("no config: pass --config FILE, set TIDEMARK_CONFIG, or run `tidemark init` here"))
    }
}

/// The exit code an ingest outcome deserves: a failed extract is an error.
pub fn ingest_exit_code(report: &IngestReport) -> i32 {
    match (report.outcome.status, &report.analysis_failure) {
        (SnapshotStatus::Failed, _) => 1,
        (_, Some(_)) => EXIT_ANALYSIS_FAILED,
        _ => 0,
    }
}

/// `tidemark ingest`'s exit code when the snapshot committed but its analysis failed: the
/// data is safe and the analysis stays owed (the next ingest or the daemon's start runs it).
pub const EXIT_ANALYSIS_FAILED: i32 = 3;

/// "" when no analysis is owed; else the snapshots owed, and whether the last try failed.
fn owed_summary(owed: &[crate::store::OwedAnalysis]) -> String {
    let ids: Vec<String> = owed.iter().map(|o| o.snapshot_id.to_string()).collect();
    match owed.last() {
        None => String::new(),
        Some(last) if last.error.is_some() => format!("{} (failed {}x)", ids.join(","), last.attempts),
        Some(_) => ids.join(","),
    }
}

/// `tidemark status`
pub fn status(config: &Config, format: OutputFormat) -> Result<String> {
    let reader = Reader::open(&config.store.path)?;
    let state = reader.daemon_state()?;
    let daemon = match crate::store::lock::holder(&config.store.path) {
        Some(pid) => format!(
            "daemon: running (pid {pid}) since {}, heartbeat {}",
            state.get("started_at").map(String::as_str).unwrap_or("?"),
            state.get("heartbeat").map(String::as_str).unwrap_or("?")
        ),
        None => format!(
            "daemon: not running (last stopped {})",
            state.get("stopped_at").map(String::as_str).unwrap_or("never")
        ),
    };
    let mut table = Table::new(&[
        "source",
        "kind",
        "last_poll",
        "last_success",
        "failures",
        "last_snapshot",
        "last_as_of",
        "last_error",
        "analysis_owed",
    ]);
    for s in reader.source_statuses()? {
        let owed = match reader.source_id(&s.name)? {
            Some(id) => owed_summary(&reader.owed_analyses(id)?),
            None => String::new(),
        };
        table.push(vec![
            s.name.into(),
            s.kind.into(),
            s.last_poll.into(),
            s.last_success.into(),
            s.consecutive_failures.into(),
            s.last_snapshot_id.into(),
            s.last_applied_as_of.into(),
            s.last_error.into(),
            owed.into(),
        ]);
    }
    Ok(match format {
        OutputFormat::Table => format!("{daemon}\n{}", table.to_text()),
        other => table.render(other),
    })
}

/// `tidemark backup DEST`
pub fn backup(config: &Config, dest: &Path) -> Result<String> {
    let summary = crate::store::backup::backup(&config.store.path, dest)?;
    Ok(format!(
        "wrote {} ({} bytes, schema version {}, mode 0600); back up {} as well to keep every extract's bytes\n",
        escape_path(dest),
        summary.bytes,
        summary.schema_version,
        escape_path(&config.store.archive)
    ))
}

/// `tidemark restore BACKUP`
pub fn restore(config: &Config, from: &Path) -> Result<String> {
    let summary = crate::store::backup::restore(from, &config.store.path)?;
    Ok(format!(
        "restored {} from {} ({} bytes, schema version {}, mode 0600); migrations run at the next open\n",
        escape_path(&config.store.path),
        escape_path(from),
        summary.bytes,
        summary.schema_version
    ))
}

/// `tidemark nowcast`: the stored nowcast of the snapshot current at `--as-of` (computed now
/// if it was not stored), one row per reference date, with 50/90/95% prediction intervals.
pub fn nowcast(config: &Config, args: &NowcastArgs<'_>) -> Result<String> {
    let reader = Reader::open(&config.store.path)?;
    let Answer { table, note } = answer(config, &reader, &Question::Nowcast(args.clone()))?;
    let mut out = table.render(args.format);
    if args.format == OutputFormat::Table {
        if !note.is_empty() {
            out.push_str(&format!("{note}\n"));
        }
        out.push_str(NOWCAST_CAUTION);
    }
    Ok(out)
}

/// `tidemark scores`: the rolling scores of the stored nowcasts whose truth has matured.
pub fn scores(config: &Config, args: &ScoresArgs<'_>, format: OutputFormat) -> Result<String> {
    let reader = Reader::open(&config.store.path)?;
    let Answer { table, note } = answer(config, &reader, &Question::Scores(args.clone()))?;
    let mut out = table.render(format);
    if format == OutputFormat::Table {
        out.push_str(&note);
    }
    Ok(out)
}

/// Arguments of `tidemark backtest`.
#[derive(Debug, Clone)]
pub struct BacktestArgs<'a> {
    pub source: &'a str,
    pub by: &'a str,
    pub from: Option<&'a str>,
    pub to: Option<&'a str>,
    pub lag: Option<usize>,
    pub format: OutputFormat,
}

/// `tidemark backtest`: nowcast each past day with what was known then, score against the
/// count known `lag` days later, store (with its range and lag) and print the scores by
/// method and horizon. An ad hoc backtest never changes what `auto` chooses: that reads the
/// rolling scores of the stored nowcasts.
pub fn backtest(config: &Config, args: &BacktestArgs<'_>) -> Result<String> {
    use super::analyse::{self, BacktestRequest};
    let source = source(config, args.source)?;
    let field = parse_field_arg(args.by)?;
    if !config.analysis.reference_fields.contains(&field) {
        return Err(usage(format!("--by {field}: not in analysis.reference_fields, so no triangle is kept")));
    }
    let day = |text: Option<&str>| -> Result<Option<NaiveDate>> {
        text.map(|t| {
            NaiveDate::parse_from_str(t, "%Y-%m-%d").map_err(|_| usage(format!("{t:?} is not YYYY-MM-DD")))
        })
        .transpose()
    };
    let (from, to) = (day(args.from)?, day(args.to)?);
    if let (Some(from), Some(to)) = (from, to)
        && from > to
    {
        return Err(usage(format!("--from {from} is after --to {to}: the range is empty")));
    }
    let request = BacktestRequest {
        field,
        from,
        to,
        lag: args.lag.unwrap_or(config.analysis.backtest_lag),
        max_horizon: 14,
        methods: config::analysis::NOWCAST_METHODS.to_vec(),
    };
    let mut store = Store::open(&config.store.path)?;
    let (snapshot_id, cells, from, to) = analyse::backtest(&mut store, config, source, &request)?;
    let mut table = Table::new(&[
        "method",
        "horizon",
        "n",
        "coverage50",
        "coverage90",
        "coverage95",
        "wis",
        "rel_error",
        "snapshot_id",
    ]);
    for c in &cells {
        table.push(vec![
            c.method.clone().into(),
            (c.horizon as i64).into(),
            (c.n as i64).into(),
            c.coverage50.into(),
            c.coverage90.into(),
            c.coverage95.into(),
            c.wis.into(),
            Cell::from(c.rel_error.is_finite().then_some(c.rel_error)),
            snapshot_id.into(),
        ]);
    }
    let mut out = table.render(args.format);
    if args.format == OutputFormat::Table {
        out.push_str(&format!(
            "nowcasts made on each day {from}..{to}, scored against the count known {} days later\n",
            request.lag
        ));
        out.push_str(&backtest_summary(&cells));
    }
    Ok(out)
}

/// One line per method: mean coverage and WIS over horizons 0..7, and the ratio to naive.
pub fn backtest_summary(cells: &[crate::analysis::backtest::BacktestCell]) -> String {
    use crate::analysis::backtest::{NAIVE, mean_wis};
    let naive = mean_wis(cells, NAIVE, 7);
    let mut methods: Vec<&str> = cells.iter().map(|c| c.method.as_str()).collect();
    methods.dedup();
    methods.sort();
    methods.dedup();
    let mut out = String::new();
    for method in methods {
        let chosen: Vec<_> =
            cells.iter().filter(|c| c.method == method && c.horizon <= 7 && c.n > 0).collect();
        let n: usize = chosen.iter().map(|c| c.n).sum();
        let cover = |f: fn(&crate::analysis::backtest::BacktestCell) -> f64| {
            chosen.iter().map(|c| f(c) * c.n as f64).sum::<f64>() / n.max(1) as f64
        };
        let wis = mean_wis(cells, method, 7).unwrap_or(f64::NAN);
        let ratio = naive.map(|w| format!("{:.2}", wis / w)).unwrap_or_else(|| "-".into());
        out.push_str(&format!(
            "  {method:<7} horizons 0-7: 90% coverage {:.0}%, 50% {:.0}%, mean WIS {wis:.2} ({ratio} of naive)\n",
            cover(|c| c.coverage90) * 100.0,
            cover(|c| c.coverage50) * 100.0,
        ));
        if method != NAIVE {
            out.push_str(&under_coverage_warning(method, &chosen));
        }
    }
    out
}

/// 90% coverage under which a backtest names the horizons that fell short (the intervals
/// are too narrow there).
const BACKTEST_COVERAGE_FLOOR: f64 = 0.85;

/// A warning line naming the horizons whose 90% coverage fell under the floor, or nothing.
fn under_coverage_warning(method: &str, cells: &[&crate::analysis::backtest::BacktestCell]) -> String {
    let short: Vec<_> = cells.iter().filter(|c| c.coverage90 < BACKTEST_COVERAGE_FLOOR).collect();
    if short.is_empty() {
        return String::new();
    }
    let horizons: Vec<String> = short.iter().map(|c| c.horizon.to_string()).collect();
    let low = short.iter().map(|c| c.coverage90).fold(f64::INFINITY, f64::min);
    let high = short.iter().map(|c| c.coverage90).fold(0.0, f64::max);
    format!(
        "  WARNING: {method}'s 90% intervals covered the truth less than {:.0}% of the time at horizons {} \
         ({low:.2}-{high:.2}): they are too narrow there\n",
        BACKTEST_COVERAGE_FLOOR * 100.0,
        horizons.join(", ")
    )
}

/// `tidemark delays`: the delay between two date fields (or to the day a record first
/// appeared in the store), summarised and fitted with daily censoring and right truncation.
pub fn delays(config: &Config, args: &DelaysArgs<'_>) -> Result<String> {
    let reader = Reader::open(&config.store.path)?;
    let Answer { table, note: footer } = answer(config, &reader, &Question::Delays(args.clone()))?;
    let mut out = table.render(args.format);
    if args.format == OutputFormat::Table {
        out.push_str(&footer);
    }
    Ok(out)
}
