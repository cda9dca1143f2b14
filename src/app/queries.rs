//! The analysts' questions, answered once for the CLI and the HTTP API: sources, snapshots,
//! the epidemic curve, nowcasts, delays, quality measures and alerts, each as of a snapshot.
//! A [`Question`] is the typed request (the CLI's parsed arguments and the API's query
//! parameters both become one); [`answer`] returns an [`Answer`] (a table and the note
//! printed under it) or a [`QueryError`] whose kind decides the CLI's exit code and the
//! API's status code, never its message text. The CLI and the API only parse their input
//! into a question and render the answer.

use anyhow::Result;
use chrono::{DateTime, NaiveDate, Utc};

use super::errors::{NotFound, UsageError, not_found, usage};
use super::ingest::end_of_day;
use crate::analysis::delay::FamilyChoice;
use crate::config::{Config, SourceConfig};
use crate::model::{Field, MethodChoice, SnapshotId, SnapshotStatus, SourceId};
use crate::store::Reader;
use crate::table::{Cell, OutputFormat, Table};

/// One of the analysts' questions.
#[derive(Debug, Clone)]
pub enum Question<'a> {
    /// One row per configured source: kind, snapshots, the latest applied one.
    Sources,
    /// The snapshots of one source, or of all.
    Snapshots { source: Option<&'a str> },
    /// Counts per day of a date field as of a snapshot.
    Curve(CurveArgs<'a>),
    /// Backfill-corrected counts with prediction intervals.
    Nowcast(NowcastArgs<'a>),
    /// The rolling scores of the stored nowcasts whose truth has matured.
    Scores(ScoresArgs<'a>),
    /// A delay's summary and fits.
    Delays(DelaysArgs<'a>),
    /// The quality measures of the snapshot current at `as_of` (RFC 3339 or a date).
    Quality { source: Option<&'a str>, as_of: Option<&'a str> },
    /// The alerts as of `as_of`.
    Alerts { source: Option<&'a str>, as_of: Option<&'a str> },
    /// Every version of one record.
    History { source: &'a str, case_key: &'a str },
}

/// What a question gets: the listing, and the note printed under it as text (how `auto`
/// chose a method, a delay comparison), empty when there is none.
#[derive(Debug, Clone)]
pub struct Answer {
    pub table: Table,
    pub note: String,
}

/// Why a question has no answer, by kind: the CLI exits 2 for `BadRequest` and 1 otherwise;
/// the API answers 400, 404, 503 or 500. Messages name sources, fields and times, never a
/// cell value.
#[derive(Debug, thiserror::Error)]
pub enum QueryError {
    /// The question is malformed: an unknown source, field or method, a bad time.
    #[error("{0}")]
    BadRequest(String),
    /// What was asked for is not there (yet): no snapshots, no applied snapshot at that time.
    #[error("{0}")]
    NotFound(String),
    /// This store cannot answer it (the tables it needs are missing).
    #[error("{0}")]
    Unavailable(String),
    /// Anything else: the store failed, a computation failed.
    #[error(transparent)]
    Failed(anyhow::Error),
}

impl From<anyhow::Error> for QueryError {
    /// Sorts an error raised on the way by the type it carries in its chain.
    fn from(err: anyhow::Error) -> QueryError {
        if err.chain().any(|c| c.is::<UsageError>()) {
            QueryError::BadRequest(err.to_string())
        } else if err.chain().any(|c| c.is::<NotFound>()) {
            QueryError::NotFound(err.to_string())
        } else {
            QueryError::Failed(err)
        }
    }
}

impl From<crate::store::StoreError> for QueryError {
    fn from(err: crate::store::StoreError) -> QueryError {
        QueryError::Failed(err.into())
    }
}

/// Answers one question on a read-only connection.
pub fn answer(config: &Config, reader: &Reader, question: &Question<'_>) -> Result<Answer, QueryError> {
    let listing = |table: Table| Answer { table, note: String::new() };
    Ok(match question {
        Question::Sources => listing(sources_table(config, reader)?),
        Question::Snapshots { source: name } => {
            if let Some(name) = name {
                source(config, name)?;
            }
            listing(snapshots_table(reader, *name)?)
        }
        Question::Curve(args) => listing(curve_table(config, reader, args)?),
        Question::Nowcast(args) => {
            let (table, note) = nowcast_table(config, reader, args)?;
            Answer { table, note }
        }
        Question::Scores(args) => {
            let (table, note) = scores_table(config, reader, args)?;
            Answer { table, note }
        }
        Question::Delays(args) => {
            let (table, note) = delays_table(config, reader, args)?;
            Answer { table, note }
        }
        Question::History { source: name, case_key } => {
            listing(history_table(config, reader, name, case_key)?)
        }
        Question::Quality { source: name, as_of } | Question::Alerts { source: name, as_of } => {
            if let Some(name) = name {
                source(config, name)?;
            }
            let as_of = as_of.map(parse_time_arg).transpose()?;
            let (what, table) = match question {
                Question::Quality { .. } => ("quality", reader.quality(*name, as_of)?),
                _ => ("alerts", reader.alerts_table(*name, as_of)?),
            };
            listing(table.ok_or_else(|| {
                QueryError::Unavailable(format!(
                    "{what} not available in this store (the quality and alerts tables are missing)"
                ))
            })?)
        }
    })
}

/// Every version of one record of one source, oldest first.
fn history_table(config: &Config, reader: &Reader, source_name: &str, case_key: &str) -> Result<Table> {
    source(config, source_name)?;
    let Some(source_id) = reader.source_id(source_name)? else {
        return Err(not_found(format!("source {source_name:?} has no snapshots yet")));
    };
    let versions = reader.history(source_id, case_key)?;
    if versions.is_empty() {
        return Err(not_found(format!("no record with that key in source {source_name:?}")));
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
    Ok(table)
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

/// One row per configured source: kind, snapshots, and the latest applied snapshot.
fn sources_table(config: &Config, reader: &Reader) -> Result<Table> {
    let mut table =
        Table::new(&["source", "kind", "snapshots", "applied", "latest_snapshot_id", "latest_as_of"]);
    let snapshots = reader.snapshots(None)?;
    for source in &config.sources {
        let own: Vec<_> = snapshots.iter().filter(|s| s.source == source.name).collect();
        let applied: Vec<_> = own.iter().filter(|s| s.status == SnapshotStatus::Applied).collect();
        let latest = applied.last();
        table.push(vec![
            source.name.clone().into(),
            source.kind_name().into(),
            (own.len() as i64).into(),
            (applied.len() as i64).into(),
            latest.map(|s| s.snapshot_id).into(),
            latest.map(|s| s.as_of.clone()).into(),
        ]);
    }
    Ok(table)
}

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

/// The configured source called `name`; an unknown name is a usage error listing the
/// configured ones (not the config file's path: the API answers with this message too).
pub(crate) fn source<'c>(config: &'c Config, name: &str) -> Result<&'c SourceConfig> {
    config.source(name).ok_or_else(|| {
        let names: Vec<&str> = config.sources.iter().map(|s| s.name.as_str()).collect();
        usage(format!("no source named {name:?} (configured sources: {})", names.join(", ")))
    })
}

/// The listing behind `tidemark snapshots` (and the API's `snapshots`).
fn snapshots_table(reader: &Reader, source_name: Option<&str>) -> Result<Table> {
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

/// Arguments of `tidemark curve`.
#[derive(Debug, Clone)]
pub struct CurveArgs<'a> {
    pub source: &'a str,
    pub by: &'a str,
    pub as_of: Option<&'a str>,
    pub stratify: Option<&'a str>,
    pub format: OutputFormat,
}

/// The listing behind `tidemark curve` (and the API's `curve`); `args.format` is not used.
fn curve_table(config: &Config, reader: &Reader, args: &CurveArgs<'_>) -> Result<Table> {
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

/// The listing behind `tidemark nowcast` (and the API's `nowcast`), with the note saying how
/// `auto` chose; `args.format` is not used.
fn nowcast_table(config: &Config, reader: &Reader, args: &NowcastArgs<'_>) -> Result<(Table, String)> {
    use super::analyse::{self, TriangleKey};
    use crate::analysis::scoring;
    let (field, source_id, snapshot_id) = nowcast_scope(config, reader, args.source, args.by, args.as_of)?;
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
        "information",
        "method",
        "method_choice",
        "warning",
        "snapshot_id",
    ]);
    let mut notes: Vec<String> = Vec::new();
    for key in &strata {
        let choice = analyse::resolve_method(reader, config, source_id, snapshot_id, key, args.method)?;
        let method = choice.method;
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
        let label = if key.kind == "all" { String::new() } else { format!("{} {}: ", key.kind, key.stratum) };
        for line in [&choice.reason, choice.warning.as_ref().unwrap_or(&String::new())] {
            if !line.is_empty() && !notes.iter().any(|n| n.ends_with(line.as_str())) {
                notes.push(format!("{label}{line}"));
            }
        }
        let low = rows.iter().any(|r| r.horizon <= config.analysis.max_delay && scoring::low_information(r));
        if low && !notes.iter().any(|n| n.starts_with(LOW_INFORMATION_NOTE)) {
            notes.push(LOW_INFORMATION_NOTE.to_string());
        }
        for r in rows.iter().filter(|r| r.horizon <= config.analysis.max_delay) {
            let information = if scoring::low_information(r) { "low" } else { "adequate" };
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
                information.into(),
                method.name().into(),
                choice.reason.clone().into(),
                choice.warning.clone().unwrap_or_default().into(),
                snapshot_id.into(),
            ]);
        }
    }
    let note = notes.join("\n");
    Ok((table, note))
}

/// The reference field, source and snapshot (current at `as_of`) of a nowcast or score
/// question; a field without a kept triangle is a usage error.
fn nowcast_scope(
    config: &Config,
    reader: &Reader,
    name: &str,
    by: &str,
    as_of: Option<&str>,
) -> Result<(Field, SourceId, SnapshotId)> {
    source(config, name)?;
    let field = parse_field_arg(by)?;
    if !config.analysis.reference_fields.contains(&field) {
        return Err(usage(format!("--by {field}: not in analysis.reference_fields, so no triangle is kept")));
    }
    let as_of = as_of.map(parse_time_arg).transpose()?;
    let source_id = reader.source_id(name)?.ok_or_else(|| not_found("the source has no snapshots yet"))?;
    let snapshot_id = reader
        .snapshot_as_of(source_id, as_of)?
        .ok_or_else(|| not_found("the source has no applied snapshot at that time"))?;
    Ok((field, source_id, snapshot_id))
}

/// Arguments of `tidemark scores`.
#[derive(Debug, Clone)]
pub struct ScoresArgs<'a> {
    pub source: &'a str,
    pub by: &'a str,
    pub as_of: Option<&'a str>,
}

/// The listing behind `tidemark scores` (and the API's `scores`): per stratum, method and
/// horizon, the scores matured by the snapshot current at `as_of`, over the last
/// `analysis.score_window` forecast days; the note says what `auto` chooses from them.
fn scores_table(config: &Config, reader: &Reader, args: &ScoresArgs<'_>) -> Result<(Table, String)> {
    use super::analyse::{self, TriangleKey};
    let (field, source_id, snapshot_id) = nowcast_scope(config, reader, args.source, args.by, args.as_of)?;
    let analysis = &config.analysis;
    let table = reader.score_table(
        source_id,
        field.name(),
        snapshot_id,
        analysis.score_window,
        analysis.max_delay,
    )?;
    let choice = analyse::resolve_method(
        reader,
        config,
        source_id,
        snapshot_id,
        &TriangleKey::all(field),
        MethodChoice::Auto,
    )?;
    let mut note = format!(
        "Scores of nowcasts made at least {} days before snapshot {snapshot_id} against the count known then \
         (last {} forecast days; naive_wis is the score of the count observed so far).\n{}\n",
        analysis.backtest_lag, analysis.score_window, choice.reason
    );
    if table.rows.is_empty() {
        note.push_str(
            "No stored nowcast has matured yet: scoring starts once a nowcast is backtest_lag days old.\n",
        );
    }
    if let Some(warning) = choice.warning {
        note.push_str(&warning);
        note.push('\n');
    }
    Ok((table, note))
}

/// Said under a nowcast with a reference date whose estimate rests mostly on the model.
pub const LOW_INFORMATION_NOTE: &str = "Rows marked information=low have an expected completeness under 10%: \
their estimate rests mostly on the model, not on reports (the dashboard shades them).";

/// Printed under every nowcast table.
pub const NOWCAST_CAUTION: &str = "Nowcasts are estimates: the intervals are prediction intervals for the count that will \
eventually be reported, assuming the recent reporting delay holds.\n";

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

/// The listing behind `tidemark delays` (and the API's `delays`) and the line printed under
/// it as text; `args.format` is not used.
fn delays_table(config: &Config, reader: &Reader, args: &DelaysArgs<'_>) -> Result<(Table, String)> {
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
