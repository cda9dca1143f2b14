//! Data-quality measures: the post-snapshot step that asks the store to compute and keep
//! them (`measure_snapshot`), and `tidemark quality`, which lists the volume, reporting lag
//! and per-field missing and invalid shares of one snapshot. The SQL is in
//! `store::quality`; this file only chooses what to measure and lays the rows out.

use super::errors::not_found;
use anyhow::Result;

use crate::config::{Config, SourceConfig};
use crate::model::{Field, SnapshotId, SnapshotStatus, SourceId};
use crate::store::quality::{LagRow, QualityRow, QualitySpec, VolumeRow};
use crate::store::{OwedAnalysis, OwedState, Reader, Store};
use crate::table::{Cell, OutputFormat, Table};

/// What is measured for a source: its mapped fields, and the configured lag reference.
pub fn spec_for(config: &Config, source: &SourceConfig) -> QualitySpec {
    let fields = Field::ALL
        .into_iter()
        .filter(|f| *f != Field::CaseKey && source.mapping.columns.contains_key(f))
        .collect();
    let lag_from =
        config.quality.lag_from.iter().copied().filter(|f| source.mapping.columns.contains_key(f)).collect();
    QualitySpec { fields, lag_from }
}

/// Computes and stores the quality measures of an applied snapshot; returns the row count.
pub fn measure_snapshot(
    store: &mut Store,
    config: &Config,
    source: &SourceConfig,
    snapshot_id: SnapshotId,
) -> Result<usize> {
    let source_id = store.source_id(&source.name, source.kind_name(), &source.config_hash)?;
    Ok(store.write_quality(source_id, snapshot_id, &spec_for(config, source))?)
}

/// Why a snapshot has no quality measures, from where its analysis stands.
fn unmeasured(reader: &Reader, snapshot_id: SnapshotId) -> Result<String> {
    let why = match reader.analysis_of(snapshot_id)? {
        Some(OwedAnalysis { state: OwedState::Superseded, superseded_by: Some(by), .. }) => {
            format!("its analysis was superseded by snapshot {by}, analysed in its place")
        }
        Some(owed @ OwedAnalysis { state: OwedState::Pending | OwedState::Failed, .. }) => owed_text(&owed),
        Some(OwedAnalysis { status: SnapshotStatus::Held | SnapshotStatus::Rejected, .. }) => {
            "it is not applied (only applied snapshots are measured)".into()
        }
        _ => "only applied snapshots are measured".into(),
    };
    Ok(format!("snapshot {snapshot_id} has no quality measures: {why}"))
}

/// "; the analysis of snapshot N is owed ..." when the source's latest owed analysis has not
/// run, else nothing.
fn owed_note(reader: &Reader, source_id: SourceId) -> Result<String> {
    Ok(match reader.owed_analyses(source_id)?.last() {
        Some(owed) => format!(
            "; the analysis of snapshot {} {}",
            owed.snapshot_id,
            owed_text(owed).trim_start_matches("its analysis ")
        ),
        None => String::new(),
    })
}

fn owed_text(owed: &OwedAnalysis) -> String {
    match &owed.error {
        Some(error) => format!(
            "its analysis is owed: it failed ({error}); it runs again at the next ingest or daemon start"
        ),
        None => {
            "its analysis is owed; it runs at the next ingest (without --no-analysis) or daemon start".into()
        }
    }
}

/// `tidemark quality --source NAME [--snapshot ID]`: one listing with a `section` column
/// (`volume`, `lag`, `field`), so that CSV and JSON carry everything the table shows.
pub fn quality(
    config: &Config,
    source_name: &str,
    snapshot: Option<SnapshotId>,
    format: OutputFormat,
) -> Result<String> {
    let reader = Reader::open(&config.store.path)?;
    let source_id = reader
        .source_id(source_name)?
        .ok_or_else(|| not_found(format!("source {source_name:?} has no snapshots yet")))?;
    let snapshot_id = match snapshot {
        Some(id) => id,
        None => match reader.latest_quality_snapshot(source_id)? {
            Some(id) => id,
            None => anyhow::bail!("no quality measures stored yet{}", owed_note(&reader, source_id)?),
        },
    };
    let rows = reader.quality_rows(snapshot_id)?;
    if rows.is_empty() {
        anyhow::bail!("{}", unmeasured(&reader, snapshot_id)?);
    }
    let volume = reader.volumes(source_id, snapshot_id)?.into_iter().find(|v| v.snapshot_id == snapshot_id);
    let lag = reader.lag_rows(source_id, snapshot_id, false)?;
    let mut table = Table::new(&[
        "section",
        "scope",
        "stratum",
        "field",
        "records",
        "missing",
        "share_missing",
        "invalid",
        "share_invalid",
        "median_days",
        "p90_days",
    ]);
    if let Some(volume) = volume {
        volume_rows(&mut table, &volume);
    }
    lag_rows(&mut table, &lag);
    field_rows(&mut table, &rows);
    if let Some(source) = config.sources.iter().find(|s| s.name == source_name) {
        not_captured_rows(&mut table, source);
    }
    let mut text = table.render(format);
    if format == OutputFormat::Table {
        text = format!(
            "quality of snapshot {snapshot_id} ({source_name}); shares are of `records`; scope `not_captured`: \
             the feed does not send the field (not missing, not measured); lag = days from {} to first appearance\n{text}",
            lag.first().map(|l| l.ref_fields.replace(',', " (else) ")).unwrap_or_else(|| "-".into())
        );
    }
    Ok(text)
}

fn volume_rows(table: &mut Table, v: &VolumeRow) {
    let items = [
        ("rows", v.rows_total),
        ("accepted", v.rows_accepted),
        ("new", v.rows_new),
        ("changed", v.rows_changed),
        ("removed", v.rows_removed),
        ("rejected", v.rows_rejected),
    ];
    for (name, n) in items {
        let mut row = vec![Cell::from("volume"), "".into(), "".into(), name.into(), n.into()];
        row.extend(std::iter::repeat_n(Cell::Null, 6));
        table.push(row);
    }
}

fn lag_rows(table: &mut Table, lag: &[LagRow]) {
    for l in lag {
        let mut row = vec![
            Cell::from("lag"),
            "new".into(),
            stratum_label(&l.stratum_kind, &l.stratum).into(),
            l.ref_fields.clone().into(),
            l.new_records.into(),
            (l.new_records - l.n).into(),
            share(l.new_records - l.n, l.new_records),
        ];
        row.extend([Cell::Null, Cell::Null, l.median_days.into(), l.p90_days.into()]);
        table.push(row);
    }
}

fn field_rows(table: &mut Table, rows: &[QualityRow]) {
    for r in rows {
        table.push(vec![
            "field".into(),
            r.scope.clone().into(),
            stratum_label(&r.stratum_kind, &r.stratum).into(),
            r.field.clone().into(),
            r.records.into(),
            r.missing.into(),
            r.share_missing.map(round4).into(),
            r.invalid.into(),
            r.share_invalid.map(round4).into(),
            Cell::Null,
            Cell::Null,
        ]);
    }
}

/// One row per canonical field the source does not map: not captured by this feed, which is
/// not the same as missing (the missingness rule never measures it).
fn not_captured_rows(table: &mut Table, source: &SourceConfig) {
    for field in
        Field::ALL.into_iter().filter(|f| *f != Field::CaseKey && !source.mapping.columns.contains_key(f))
    {
        let mut row = vec![Cell::from("field"), "not_captured".into(), "(all)".into(), field.name().into()];
        row.extend(std::iter::repeat_n(Cell::Null, 7));
        table.push(row);
    }
}

fn share(n: i64, of: i64) -> Cell {
    if of > 0 { Cell::Real(round4(n as f64 / of as f64)) } else { Cell::Null }
}

fn round4(x: f64) -> f64 {
    (x * 10_000.0).round() / 10_000.0
}

fn stratum_label(kind: &str, stratum: &str) -> String {
    if kind == "all" { "(all)".into() } else { stratum.to_string() }
}
