//! The bodies of the CLI commands: each takes parsed arguments and the config, does its work
//! through `store`, `extract` and `demo`, and returns the text to print. `main` parses the
//! command line and chooses the exit code.

use std::fs::Permissions;
use std::io::Write as _;
use std::os::unix::fs::{OpenOptionsExt, PermissionsExt};
use std::path::{Path, PathBuf};

use anyhow::{Context, Result, bail};
use chrono::{DateTime, NaiveDate, Utc};

use super::ingest::{self, IngestOutcome, end_of_day};
use super::pipeline;
use crate::analysis::delay::FamilyChoice;
use crate::config::{self, Config, SourceConfig};
use crate::model::{Field, MethodChoice, SnapshotStatus};
use crate::store::{Reader, Store};
use crate::table::{Cell, OutputFormat, Table};
use crate::text::escape_path;

use super::errors::usage;
pub use super::errors::{NotFound, UsageError, not_found};

/// Parses TIME: RFC 3339, or a plain date meaning the end of that day (UTC).
pub fn parse_time_arg(text: &str) -> Result<DateTime<Utc>> {
    if let Ok(time) = DateTime::parse_from_rfc3339(text) {
        return Ok(time.with_timezone(&Utc));
    }
    match NaiveDate::parse_from_str(text, "%Y-%m-%d") {
        Ok(date) => Ok(end_of_day(date)),
        Err(_) => Err(usage(format!("{text:?} is not an RFC 3339 time or a YYYY-MM-DD date"))),
    }
}

/// Parses FIELD: a canonical name or short form.
pub fn parse_field_arg(text: &str) -> Result<Field> {
    Field::parse(text).ok_or_else(|| {
        let names: Vec<&str> = Field::ALL.iter().map(|f| f.name()).collect();
        usage(format!("{text:?} is not a field; use one of {}", names.join(", ")))
    })
}

fn source<'c>(config: &'c Config, name: &str) -> Result<&'c SourceConfig> {
    config.source(name).ok_or_else(|| {
        let names: Vec<&str> = config.sources.iter().map(|s| s.name.as_str()).collect();
        usage(format!(
            "no source named {name:?} in {} (sources: {})",
            config.file.display(),
            names.join(", ")
        ))
    })
}

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
pub fn problem_lines(config: &Config, snapshot_id: i64, max: usize) -> Result<Vec<String>> {
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
    Ok(snapshots_table(&reader, source_name)?.render(format))
}

/// The listing behind `tidemark snapshots` (and the API's `snapshots`).
pub fn snapshots_table(reader: &Reader, source_name: Option<&str>) -> Result<Table> {
    let mut table = Table::new(&[
        "snapshot_id",
        "source",
        "seq",
        "as_of",
        "status",
        "rows",
        "accepted",
        "rejected",
        "new",
        "changed",
        "removed",
        "note",
    ]);
    for s in reader.snapshots(source_name)? {
        table.push(vec![
            s.snapshot_id.into(),
            s.source.into(),
            s.seq.into(),
            s.as_of.into(),
            s.status.name().into(),
            s.rows_total.into(),
            s.rows_accepted.into(),
            s.rows_rejected.into(),
            s.rows_new.into(),
            s.rows_changed.into(),
            s.rows_removed.into(),
            s.note.into(),
        ]);
    }
    Ok(table)
}

/// `tidemark snapshots release ID`
pub fn release(config: &Config, snapshot_id: i64) -> Result<String> {
    let mut store = Store::open(&config.store.path)?;
    let outcome = ingest::release(&mut store, config, snapshot_id)?;
    let (name, _, _) = store.snapshot_origin(snapshot_id)?;
    let mut text = format!("{}\n", outcome.summary(&name));
    if let Some(failure) = config.source(&name).and_then(|source| analyse_owed(&mut store, config, source)) {
        text.push_str(&format!("the analysis of snapshot {snapshot_id} failed and stays owed: {failure}\n"));
    }
    Ok(text)
}

/// `tidemark snapshots reject ID`
pub fn reject(config: &Config, snapshot_id: i64, note: Option<&str>) -> Result<String> {
    let mut store = Store::open(&config.store.path)?;
    store.reject_held(snapshot_id, note.unwrap_or("rejected by operator"))?;
    Ok(format!("snapshot {snapshot_id}: rejected; nothing of it was applied\n"))
}

/// `tidemark history CASE_KEY --source NAME`
pub fn history(config: &Config, case_key: &str, source_name: &str, format: OutputFormat) -> Result<String> {
    source(config, source_name)?;
    let reader = Reader::open(&config.store.path)?;
    let Some(source_id) = reader.source_id(source_name)? else {
        return Err(not_found(format!("source {source_name:?} has no snapshots yet")));
    };
    let versions = reader.history(source_id, case_key)?;
    if versions.is_empty() {
        bail!("no record with that key in source {source_name:?}");
    }
    let mut columns = vec!["version_id", "valid_from", "valid_to", "from_as_of"];
    columns.extend(Field::ALL.iter().skip(1).map(|f| f.name()));
    columns.push("invalid");
    let mut table = Table::new(&columns);
    for v in versions {
        let mut row: Vec<Cell> =
            vec![v.version_id.into(), v.valid_from.into(), v.valid_to.into(), v.from_as_of.into()];
        row.extend(record_cells(&v.record));
        table.push(row);
    }
    Ok(table.render(format))
}

/// The canonical fields of a record (without the key) as cells, plus its invalid fields.
pub fn record_cells(r: &crate::model::CaseRecord) -> Vec<Cell> {
    let list = |items: &Option<Vec<String>>| Cell::from(items.as_ref().map(|i| i.join(";")));
    let mut cells: Vec<Cell> = vec![r.jurisdiction.clone().into()];
    cells.extend(Field::DATES.iter().map(|f| Cell::from(r.date(*f).map(|d| d.to_string()))));
    cells.push(r.outcome.clone().into());
    cells.push(Cell::from(
        r.age.map(|a| if a.lo == a.hi { format!("{}", a.lo) } else { format!("[{}, {})", a.lo, a.hi) }),
    ));
    cells.push(r.sex.clone().into());
    cells.push(Cell::from(r.hospitalised.map(|h| if h { "yes" } else { "no" })));
    cells.push(list(&r.symptoms));
    cells.push(list(&r.conditions));
    let invalid: Vec<&str> = r.invalid.iter().map(|f| f.name()).collect();
    cells.push(Cell::from((!invalid.is_empty()).then(|| invalid.join(","))));
    cells
}

/// Arguments of `tidemark curve`.
#[derive(Debug, Clone)]
pub struct CurveArgs<'a> {
    pub source: &'a str,
    pub by: &'a str,
    pub as_of: Option<&'a str>,
    pub stratify: Option<&'a str>,
    pub format: OutputFormat,
}

/// `tidemark curve --source NAME --by FIELD [--as-of TIME] [--stratify FIELD]`
pub fn curve(config: &Config, args: &CurveArgs<'_>) -> Result<String> {
    let reader = Reader::open(&config.store.path)?;
    Ok(curve_table(config, &reader, args)?.render(args.format))
}

/// The listing behind `tidemark curve` (and the API's `curve`); `args.format` is not used.
pub fn curve_table(config: &Config, reader: &Reader, args: &CurveArgs<'_>) -> Result<Table> {
    source(config, args.source)?;
    let by = parse_field_arg(args.by)?;
    if !by.is_date() {
        return Err(usage(format!("--by {by}: a curve needs a date field")));
    }
    let stratify = args.stratify.map(parse_field_arg).transpose()?;
    if let Some(field) =
        stratify.filter(|f| f.is_date() || matches!(f, Field::CaseKey | Field::Symptoms | Field::Conditions))
    {
        return Err(usage(format!(
            "--stratify {field}: choose jurisdiction, age, sex, outcome or hospitalised"
        )));
    }
    let as_of = args.as_of.map(parse_time_arg).transpose()?;
    let snapshot = reader
        .source_id(args.source)?
        .map(|id| Ok::<_, anyhow::Error>((id, reader.snapshot_as_of(id, as_of)?)))
        .transpose()?;
    let Some((source_id, Some(snapshot_id))) = snapshot else {
        return Err(not_found(format!("source {:?} has no applied snapshot at that time", args.source)));
    };
    let mut columns = vec![by.name()];
    if let Some(field) = stratify {
        columns.push(field.name());
    }
    columns.extend(["count", "snapshot_id"]);
    let mut table = Table::new(&columns);
    for row in reader.curve(source_id, snapshot_id, by, stratify)? {
        let mut cells = vec![Cell::from(row.date.map(|d| d.to_string()))];
        if stratify.is_some() {
            cells.push(row.stratum.into());
        }
        cells.extend([row.count.into(), snapshot_id.into()]);
        table.push(cells);
    }
    Ok(table)
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

/// Arguments of `tidemark nowcast`.
#[derive(Debug, Clone)]
pub struct NowcastArgs<'a> {
    pub source: &'a str,
    pub by: &'a str,
    pub as_of: Option<&'a str>,
    pub method: MethodChoice,
    pub stratify: Option<&'a str>,
    pub format: OutputFormat,
}

/// `tidemark nowcast`: the stored nowcast of the snapshot current at `--as-of` (computed now
/// if it was not stored), one row per reference date, with 50/90/95% prediction intervals.
pub fn nowcast(config: &Config, args: &NowcastArgs<'_>) -> Result<String> {
    let reader = Reader::open(&config.store.path)?;
    let (table, note) = nowcast_table(config, &reader, args)?;
    let mut out = table.render(args.format);
    if args.format == OutputFormat::Table {
        if !note.is_empty() {
            out.push_str(&format!("{note}\n"));
        }
        out.push_str(NOWCAST_CAUTION);
    }
    Ok(out)
}

/// The listing behind `tidemark nowcast` (and the API's `nowcast`), with the note saying how
/// `auto` chose; `args.format` is not used.
pub fn nowcast_table(config: &Config, reader: &Reader, args: &NowcastArgs<'_>) -> Result<(Table, String)> {
    use super::analyse::{self, TriangleKey};
    source(config, args.source)?;
    let field = parse_field_arg(args.by)?;
    if !config.analysis.reference_fields.contains(&field) {
        return Err(usage(format!("--by {field}: not in analysis.reference_fields, so no triangle is kept")));
    }
    let as_of = args.as_of.map(parse_time_arg).transpose()?;
    let source_id =
        reader.source_id(args.source)?.ok_or_else(|| not_found("the source has no snapshots yet"))?;
    let snapshot_id = reader
        .snapshot_as_of(source_id, as_of)?
        .ok_or_else(|| not_found("the source has no applied snapshot at that time"))?;
    let (method, note) = analyse::resolve_method(reader, source_id, field, args.method)?;
    let mut strata = vec![TriangleKey::all(field)];
    if let Some(text) = args.stratify {
        let stratum_field = parse_field_arg(text)?;
        if !config.analysis.strata.contains(&stratum_field) {
            return Err(usage(format!("--stratify {stratum_field}: not in analysis.strata")));
        }
        strata = reader
            .triangle_strata(source_id, field, stratum_field.name())?
            .into_iter()
            .map(|stratum| TriangleKey { field, kind: stratum_field.name().to_string(), stratum })
            .collect();
    }
    let mut table = Table::new(&[
        "ref_date",
        "stratum",
        "horizon",
        "observed",
        "median",
        "lower50",
        "upper50",
        "lower90",
        "upper90",
        "lower95",
        "upper95",
        "completeness",
        "method",
        "snapshot_id",
    ]);
    for key in &strata {
        let stored = reader.nowcast(snapshot_id, (field.name(), &key.kind, &key.stratum, method.name()))?;
        let rows = if stored.is_empty() {
            let tri = analyse::load_triangle(reader, source_id, snapshot_id, key, &config.analysis, 0)?;
            analyse::run_method(
                method,
                &tri,
                &config.analysis,
                analyse::seed_for(snapshot_id, key, method.name()),
            )
            .rows
        } else {
            stored
        };
        for r in rows.iter().filter(|r| r.horizon <= config.analysis.max_delay) {
            table.push(vec![
                r.date.to_string().into(),
                key.stratum.clone().into(),
                (r.horizon as i64).into(),
                r.observed.into(),
                r.median.into(),
                r.lower50.into(),
                r.upper50.into(),
                r.lower90.into(),
                r.upper90.into(),
                r.lower95.into(),
                r.upper95.into(),
                r.completeness.into(),
                method.name().into(),
                snapshot_id.into(),
            ]);
        }
    }
    Ok((table, note))
}

/// Printed under every nowcast table.
pub const NOWCAST_CAUTION: &str = "Nowcasts are estimates: the intervals are prediction intervals for the count that will \
eventually be reported, assuming the recent reporting delay holds.\n";

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
/// count known `lag` days later, store and print the scores by method and horizon.
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
    let request = BacktestRequest {
        field,
        from: day(args.from)?,
        to: day(args.to)?,
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
    }
    out
}

/// Arguments of `tidemark delays`.
#[derive(Debug, Clone)]
pub struct DelaysArgs<'a> {
    pub source: &'a str,
    pub from: &'a str,
    pub to: &'a str,
    pub family: FamilyChoice,
    pub as_of: Option<&'a str>,
    pub stratify: Option<&'a str>,
    pub by_week: bool,
    pub compare_by: Option<&'a str>,
    pub format: OutputFormat,
}

/// `tidemark delays`: the delay between two date fields (or to the day a record first
/// appeared in the store), summarised and fitted with daily censoring and right truncation.
pub fn delays(config: &Config, args: &DelaysArgs<'_>) -> Result<String> {
    let reader = Reader::open(&config.store.path)?;
    let (table, footer) = delays_table(config, &reader, args)?;
    let mut out = table.render(args.format);
    if args.format == OutputFormat::Table {
        out.push_str(&footer);
    }
    Ok(out)
}

/// The listing behind `tidemark delays` (and the API's `delays`) and the line printed under
/// it as text; `args.format` is not used.
pub fn delays_table(config: &Config, reader: &Reader, args: &DelaysArgs<'_>) -> Result<(Table, String)> {
    use super::analyse;
    use crate::config::DelayEnd;
    source(config, args.source)?;
    let from = parse_field_arg(args.from)?;
    let to = DelayEnd::parse(args.to)
        .ok_or_else(|| usage(format!("--to {}: a date field or first_seen", args.to)))?;
    if !from.is_date() {
        return Err(usage(format!("--from {from}: a delay starts at a date field")));
    }
    let family = args.family.family();
    let stratify = args.stratify.map(parse_field_arg).transpose()?;
    let compare_by = args.compare_by.map(parse_field_arg).transpose()?;
    let as_of = args.as_of.map(parse_time_arg).transpose()?;
    let source_id =
        reader.source_id(args.source)?.ok_or_else(|| not_found("the source has no snapshots yet"))?;
    let snapshot_id = reader
        .snapshot_as_of(source_id, as_of)?
        .ok_or_else(|| not_found("the source has no applied snapshot at that time"))?;
    let grouping = compare_by.or(stratify);
    let obs = analyse::delay_observations(
        reader,
        source_id,
        snapshot_id,
        (from, to),
        grouping,
        &config.analysis.age_bands,
    )?;
    if let Some(field) = compare_by {
        return Ok(compare_groups(&obs, field));
    }
    let mut groups: std::collections::BTreeMap<String, Vec<crate::analysis::delay::DelayObs>> =
        Default::default();
    for (stratum, start, o) in obs {
        let label = if args.by_week { week_of(start) } else { stratum };
        groups.entry(label).or_default().push(o);
    }
    let mut table = Table::new(&[
        "stratum",
        "n",
        "mean_observed",
        "median_observed",
        "p90_observed",
        "p95_observed",
        "share_negative",
        "share_zero",
        "family",
        "rank",
        "mean",
        "mean_lo",
        "mean_hi",
        "median",
        "median_lo",
        "median_hi",
        "p95",
        "p95_lo",
        "p95_hi",
        "aic",
        "identifiable",
        "warnings",
    ]);
    let bootstrap = if args.by_week { 0 } else { config.analysis.bootstrap };
    for (label, group) in &groups {
        let seed = analyse::seed_for(snapshot_id, &analyse::TriangleKey::all(from), label);
        let (summary, fits) = analyse::fit_delays(group, bootstrap, seed);
        let chosen: Vec<_> = match family {
            Some(f) => fits.iter().enumerate().filter(|(_, fit)| fit.family == f).collect(),
            None => fits.iter().enumerate().take(1).collect(),
        };
        for (rank, fit) in chosen {
            table.push(delay_row(label, &summary, fit, rank + 1));
        }
    }
    let footer = format!(
        "delays {from} -> {} as of snapshot {snapshot_id}; fits use daily interval censoring and right truncation at each record's horizon; negative delays are counted and left out of fits\n",
        to.name()
    );
    Ok((table, footer))
}

fn delay_row(
    label: &str,
    s: &crate::analysis::delay::DelaySummary,
    f: &crate::analysis::delay::DelayFit,
    rank: usize,
) -> Vec<Cell> {
    let real = |x: f64| Cell::from(x.is_finite().then_some(x));
    let bound = |i: &Option<crate::analysis::delay::Interval>, upper: bool| {
        real(i.as_ref().map(|i| if upper { i.upper } else { i.lower }).unwrap_or(f64::NAN))
    };
    vec![
        label.to_string().into(),
        (s.n as i64).into(),
        real(s.mean),
        real(s.median),
        real(s.p90),
        real(s.p95),
        real(s.share_negative),
        real(s.share_zero),
        f.family.name().into(),
        (rank as i64).into(),
        real(f.mean),
        bound(&f.mean_interval, false),
        bound(&f.mean_interval, true),
        real(f.median),
        bound(&f.median_interval, false),
        bound(&f.median_interval, true),
        real(f.p95),
        bound(&f.p95_interval, false),
        bound(&f.p95_interval, true),
        real(f.aic),
        (if f.identifiable { "yes" } else { "no" }).into(),
        Cell::from((!f.warnings.is_empty()).then(|| f.warnings.join("; "))),
    ]
}

/// The Monday of the ISO week of a date, as the label of a weekly group.
fn week_of(date: NaiveDate) -> String {
    use chrono::Datelike;
    let monday = date - chrono::Days::new(date.weekday().num_days_from_monday() as u64);
    format!("week of {monday}")
}

/// Mann-Whitney U between every pair of groups of the non-negative delays.
fn compare_groups(
    obs: &[(String, NaiveDate, crate::analysis::delay::DelayObs)],
    field: Field,
) -> (Table, String) {
    let mut groups: std::collections::BTreeMap<&str, Vec<f64>> = Default::default();
    for (stratum, _, o) in obs.iter().filter(|(_, _, o)| o.delay >= 0) {
        groups.entry(stratum.as_str()).or_default().push(o.delay as f64);
    }
    let names: Vec<&str> = groups.keys().copied().collect();
    let mut table =
        Table::new(&["group", "other", "n_group", "n_other", "u_group", "u_other", "p_value", "method"]);
    for (i, a) in names.iter().enumerate() {
        for b in &names[i + 1..] {
            let (x, y) = (&groups[a], &groups[b]);
            if x.is_empty() || y.is_empty() {
                continue;
            }
            let test = crate::analysis::mannwhitney::mann_whitney(x, y);
            table.push(vec![
                a.to_string().into(),
                b.to_string().into(),
                (x.len() as i64).into(),
                (y.len() as i64).into(),
                test.u1.into(),
                test.u2.into(),
                test.p_value.into(),
                test.method.name().into(),
            ]);
        }
    }
    let footer = format!(
        "two-sided Mann-Whitney U of delays by {field}: exact for small samples without ties, otherwise the normal approximation with tie and continuity corrections; delays are truncated at the snapshot, so compare groups with similar reporting windows\n"
    );
    (table, footer)
}
