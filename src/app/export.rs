//! `tidemark export`: one table (the line list, the nowcasts or the delay fits) as of a
//! snapshot, written as CSV or Parquet to a file with mode 0600. The store streams the rows;
//! `crate::export` writes them (CSV text cells safe for spreadsheets unless `--raw`).

use super::errors::not_found;
use std::path::{Path, PathBuf};

use anyhow::Result;

use super::commands::{UsageError, parse_time_arg};
use crate::config::Config;
use crate::export::{ExportFormat, ExportWriter};
use crate::model::SnapshotId;
use crate::store::{ExportTable, Reader, time_text};
use crate::text::escape_path;

/// What `tidemark export` was asked to do.
#[derive(Debug, Clone)]
pub struct ExportArgs<'a> {
    pub source: &'a str,
    pub as_of: Option<&'a str>,
    pub table: &'a str,
    /// With `--raw` applied (`ExportFormat::with_raw`).
    pub format: ExportFormat,
    pub out: &'a Path,
}

/// What an export wrote.
#[derive(Debug, Clone, PartialEq)]
pub struct ExportOutcome {
    pub path: PathBuf,
    pub rows: u64,
    pub snapshot_id: SnapshotId,
    pub as_of: String,
    pub table: ExportTable,
}

impl ExportOutcome {
    pub fn summary(&self) -> String {
        let mut text = format!(
            "wrote {} rows of {} as of snapshot {} ({}) to {} (mode 0600)\n",
            self.rows,
            self.table.name(),
            self.snapshot_id,
            self.as_of,
            escape_path(&self.path)
        );
        if self.table == ExportTable::LineList {
            text.push_str("the file holds patient-level data: keep it on the department's systems and follow local data-protection rules\n");
        }
        text
    }
}

/// Writes the export; nothing is left at `--out` if it fails.
pub fn export(config: &Config, args: &ExportArgs<'_>) -> Result<ExportOutcome> {
    if config.source(args.source).is_none() {
        return Err(usage(format!("--source {}: no such source in the config", args.source)));
    }
    let table = ExportTable::parse(args.table)
        .ok_or_else(|| usage(format!("--table {}: choose line-list, nowcast or delays", args.table)))?;
    let as_of = args.as_of.map(parse_time_arg).transpose()?;
    let reader = Reader::open(&config.store.path)?;
    let source_id =
        reader.source_id(args.source)?.ok_or_else(|| not_found("the source has no snapshots yet"))?;
    let snapshot_id = reader
        .snapshot_as_of(source_id, as_of)?
        .ok_or_else(|| not_found("the source has no applied snapshot at that time"))?;
    let snapshot_as_of = reader
        .applied_snapshots(source_id)?
        .into_iter()
        .find(|(id, _)| *id == snapshot_id)
        .map(|(_, t)| time_text(t))
        .unwrap_or_default();
    let mut writer = ExportWriter::create(args.out, args.format, table.name(), table.columns())?;
    let sent = reader.export_rows(table, source_id, snapshot_id, |row| writer.push(row));
    let rows = match sent {
        Ok(rows) => rows,
        Err(err) => {
            writer.abandon();
            return Err(err.into());
        }
    };
    let path = writer.finish()?;
    Ok(ExportOutcome { path, rows, snapshot_id, as_of: snapshot_as_of, table })
}

fn usage(message: String) -> anyhow::Error {
    UsageError(message).into()
}
