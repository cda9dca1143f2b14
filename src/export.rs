//! Export files: typed rows (as the store streams them, see `store::ExportTable`) written as
//! CSV or Parquet. Parquet is written with the parquet crate's low-level writer: the schema
//! is parsed from a message type built from the table's columns (text as `BYTE_ARRAY
//! (UTF8)`, dates as `INT32 (DATE)`, integers as `INT64`, reals as `DOUBLE`, flags as
//! `BOOLEAN`, every column `OPTIONAL` because any may be missing), rows are buffered into row
//! groups, and each column is written with its definition levels (0 = missing).
//!
//! Files hold patient-level data: they are created with mode 0600, written under a temporary
//! name next to the target and renamed into place when complete, so a failed export leaves
//! no partial file.
//!
//! CSV text cells that a spreadsheet would run as a formula get a leading apostrophe
//! (`table::spreadsheet_safe`); `ExportFormat::CsvRaw` (`--raw`) writes them exactly.
//! Parquet is typed and always exact.

use std::fs::{self, File, OpenOptions};
use std::io::{BufWriter, Write};
use std::os::unix::fs::{OpenOptionsExt, PermissionsExt};
use std::path::{Path, PathBuf};
use std::sync::Arc;

use chrono::NaiveDate;
use parquet::data_type::{BoolType, ByteArray, ByteArrayType, DoubleType, Int32Type, Int64Type};
use parquet::file::properties::WriterProperties;
use parquet::file::writer::{SerializedColumnWriter, SerializedFileWriter};

use crate::store::{ColumnKind, StoreError};
use crate::table::{Cell, spreadsheet_safe};

/// Rows per Parquet row group: large enough for efficient columns, small enough that a
/// million-row line list is never buffered whole.
const ROW_GROUP_ROWS: usize = 65_536;

/// File format of an export.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum ExportFormat {
    /// CSV with text cells made safe for spreadsheets.
    Csv,
    Parquet,
    /// CSV with every cell exactly as stored: `--format csv --raw`, not a `--format` value.
    #[value(skip)]
    CsvRaw,
}

impl ExportFormat {
    /// The format `--raw` asks for: CSV becomes exact CSV; Parquet is exact already.
    pub fn with_raw(self, raw: bool) -> ExportFormat {
        match self {
            ExportFormat::Csv if raw => ExportFormat::CsvRaw,
            other => other,
        }
    }
}

#[derive(Debug, thiserror::Error)]
pub enum ExportError {
    #[error("writing {path}: {source}")]
    Io { path: PathBuf, source: std::io::Error },
    #[error("writing {path}: {message}")]
    Parquet { path: PathBuf, message: String },
    #[error("column {column}: {message}")]
    Value { column: String, message: String },
    #[error(transparent)]
    Store(#[from] StoreError),
}

/// An export being written: rows go in with [`ExportWriter::push`], [`ExportWriter::finish`]
/// moves the complete file into place.
pub struct ExportWriter {
    target: PathBuf,
    temp: PathBuf,
    columns: &'static [(&'static str, ColumnKind)],
    inner: Inner,
}

impl std::fmt::Debug for ExportWriter {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("ExportWriter").field("target", &self.target).finish()
    }
}

/// The writer of each format; CSV's `exact`: cells as stored (`--raw`), else text cells made
/// safe for spreadsheets.
enum Inner {
    Csv { writer: csv::Writer<BufWriter<File>>, exact: bool },
    Parquet { writer: SerializedFileWriter<File>, buffer: Vec<Vec<Cell>> },
}

impl ExportWriter {
    /// Starts an export of `columns` to `target` in `format`.
    pub fn create(
        target: &Path,
        format: ExportFormat,
        table_name: &str,
        columns: &'static [(&'static str, ColumnKind)],
    ) -> Result<ExportWriter, ExportError> {
        let temp = temp_path(target);
        let file = create_private(&temp)?;
        let inner = match format {
            ExportFormat::Csv | ExportFormat::CsvRaw => {
                let mut writer = csv::Writer::from_writer(BufWriter::new(file));
                writer
                    .write_record(columns.iter().map(|(name, _)| *name))
                    .map_err(|e| io_error(&temp, e.into()))?;
                Inner::Csv { writer, exact: format == ExportFormat::CsvRaw }
            }
            ExportFormat::Parquet => {
                let schema = parquet::schema::parser::parse_message_type(&message_type(table_name, columns))
                    .map_err(|e| parquet_error(&temp, e))?;
                let properties =
                    Arc::new(WriterProperties::builder().set_created_by("tidemark".into()).build());
                let writer = SerializedFileWriter::new(file, Arc::new(schema), properties)
                    .map_err(|e| parquet_error(&temp, e))?;
                Inner::Parquet { writer, buffer: Vec::new() }
            }
        };
        Ok(ExportWriter { target: target.to_path_buf(), temp, columns, inner })
    }

    /// Adds one row, its cells in column order.
    pub fn push(&mut self, row: Vec<Cell>) -> Result<(), ExportError> {
        match &mut self.inner {
            Inner::Csv { writer, exact } => {
                let cells = row.iter().map(|cell| csv_cell(cell, *exact));
                writer.write_record(cells).map_err(|e| io_error(&self.temp, e.into()))
            }
            Inner::Parquet { writer, buffer } => {
                buffer.push(row);
                if buffer.len() >= ROW_GROUP_ROWS {
                    write_row_group(writer, self.columns, buffer, &self.temp)?;
                }
                Ok(())
            }
        }
    }

    /// Completes the file and renames it into place (mode 0600).
    pub fn finish(self) -> Result<PathBuf, ExportError> {
        let ExportWriter { target, temp, columns, inner } = self;
        let done = (|| match inner {
            Inner::Csv { writer, .. } => {
                let mut out = writer.into_inner().map_err(|e| io_error(&temp, e.into_error()))?;
                out.flush().map_err(|e| io_error(&temp, e))?;
                out.get_ref().sync_all().map_err(|e| io_error(&temp, e))
            }
            Inner::Parquet { mut writer, mut buffer } => {
                if !buffer.is_empty() {
                    write_row_group(&mut writer, columns, &mut buffer, &temp)?;
                }
                let file = writer.into_inner().map_err(|e| parquet_error(&temp, e))?;
                file.sync_all().map_err(|e| io_error(&temp, e))
            }
        })();
        if let Err(err) = done {
            let _ = fs::remove_file(&temp);
            return Err(err);
        }
        fs::rename(&temp, &target).map_err(|e| io_error(&target, e))?;
        Ok(target)
    }

    /// Removes the unfinished file (after an error).
    pub fn abandon(self) {
        let _ = fs::remove_file(&self.temp);
    }
}

/// The Parquet message type of a table's columns.
pub fn message_type(table_name: &str, columns: &[(&str, ColumnKind)]) -> String {
    let mut text = format!("message {} {{\n", table_name.replace('-', "_"));
    for (name, kind) in columns {
        let physical = match kind {
            ColumnKind::Text => "BYTE_ARRAY",
            ColumnKind::Date => "INT32",
            ColumnKind::Int => "INT64",
            ColumnKind::Real => "DOUBLE",
            ColumnKind::Bool => "BOOLEAN",
        };
        let logical = match kind {
            ColumnKind::Text => " (UTF8)",
            ColumnKind::Date => " (DATE)",
            _ => "",
        };
        text.push_str(&format!("  OPTIONAL {physical} {name}{logical};\n"));
    }
    text.push('}');
    text
}

/// Days since 1970-01-01, Parquet's DATE.
pub fn date_days(date: NaiveDate) -> i32 {
    (date - NaiveDate::from_ymd_opt(1970, 1, 1).unwrap_or_default()).num_days() as i32
}

fn write_row_group(
    writer: &mut SerializedFileWriter<File>,
    columns: &[(&str, ColumnKind)],
    buffer: &mut Vec<Vec<Cell>>,
    path: &Path,
) -> Result<(), ExportError> {
    let mut group = writer.next_row_group().map_err(|e| parquet_error(path, e))?;
    for (idx, (name, kind)) in columns.iter().enumerate() {
        let mut column = group.next_column().map_err(|e| parquet_error(path, e))?.ok_or_else(|| {
            ExportError::Parquet { path: path.to_path_buf(), message: format!("schema has no column {name}") }
        })?;
        let cells = buffer.iter().map(|row| &row[idx]);
        write_column(&mut column, *kind, name, cells, path)?;
        column.close().map_err(|e| parquet_error(path, e))?;
    }
    group.close().map_err(|e| parquet_error(path, e))?;
    buffer.clear();
    Ok(())
}

/// Writes one column's values and definition levels (1 present, 0 missing).
fn write_column<'c>(
    column: &mut SerializedColumnWriter<'_>,
    kind: ColumnKind,
    name: &str,
    cells: impl Iterator<Item = &'c Cell>,
    path: &Path,
) -> Result<(), ExportError> {
    let mut levels = Vec::new();
    let fail = |message: String| ExportError::Value { column: name.to_string(), message };
    let cells: Vec<&Cell> = cells.collect();
    for cell in &cells {
        levels.push(i16::from(!matches!(cell, Cell::Null)));
    }
    let present = cells.iter().filter(|c| !matches!(c, Cell::Null));
    let written = match kind {
        ColumnKind::Text => {
            let values: Vec<ByteArray> = present.map(|c| ByteArray::from(csv_text(c).into_bytes())).collect();
            column.typed::<ByteArrayType>().write_batch(&values, Some(&levels), None)
        }
        ColumnKind::Date => {
            let values = present
                .map(|c| match c {
                    Cell::Text(t) => t
                        .parse::<NaiveDate>()
                        .map(date_days)
                        .map_err(|_| fail(format!("{t:?} is not a date"))),
                    other => Err(fail(format!("{other:?} is not a date"))),
                })
                .collect::<Result<Vec<i32>, _>>()?;
            column.typed::<Int32Type>().write_batch(&values, Some(&levels), None)
        }
        ColumnKind::Int => {
            let values = present
                .map(|c| match c {
                    Cell::Int(n) => Ok(*n),
                    other => Err(fail(format!("{other:?} is not an integer"))),
                })
                .collect::<Result<Vec<i64>, _>>()?;
            column.typed::<Int64Type>().write_batch(&values, Some(&levels), None)
        }
        ColumnKind::Real => {
            let values = present
                .map(|c| match c {
                    Cell::Real(x) => Ok(*x),
                    Cell::Int(n) => Ok(*n as f64),
                    other => Err(fail(format!("{other:?} is not a number"))),
                })
                .collect::<Result<Vec<f64>, _>>()?;
            column.typed::<DoubleType>().write_batch(&values, Some(&levels), None)
        }
        ColumnKind::Bool => {
            let values = present
                .map(|c| match c {
                    Cell::Int(n) => Ok(*n != 0),
                    other => Err(fail(format!("{other:?} is not 1 or 0"))),
                })
                .collect::<Result<Vec<bool>, _>>()?;
            column.typed::<BoolType>().write_batch(&values, Some(&levels), None)
        }
    };
    written.map(|_| ()).map_err(|e| parquet_error(path, e))
}

/// A cell of a CSV export: its text, made safe for spreadsheets unless `exact`.
fn csv_cell(cell: &Cell, exact: bool) -> String {
    match cell {
        Cell::Text(t) if !exact => spreadsheet_safe(t).into_owned(),
        other => csv_text(other),
    }
}

/// A cell as text, exactly: empty when missing; reals in full precision.
fn csv_text(cell: &Cell) -> String {
    match cell {
        Cell::Null => String::new(),
        Cell::Int(n) => n.to_string(),
        Cell::Real(x) => x.to_string(),
        Cell::Text(t) => t.clone(),
    }
}

fn temp_path(target: &Path) -> PathBuf {
    let name = target.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
    target.with_file_name(format!(".{name}.tmp-{}", std::process::id()))
}

/// Creates (or truncates) a file readable only by its owner.
fn create_private(path: &Path) -> Result<File, ExportError> {
    let file = OpenOptions::new()
        .write(true)
        .create(true)
        .truncate(true)
        .mode(0o600)
        .open(path)
        .map_err(|e| io_error(path, e))?;
    file.set_permissions(fs::Permissions::from_mode(0o600)).map_err(|e| io_error(path, e))?;
    Ok(file)
}

fn io_error(path: &Path, source: std::io::Error) -> ExportError {
    ExportError::Io { path: path.to_path_buf(), source }
}

fn parquet_error(path: &Path, err: parquet::errors::ParquetError) -> ExportError {
    ExportError::Parquet { path: path.to_path_buf(), message: err.to_string() }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn message_types_map_column_kinds_to_parquet_types() {
        let text = message_type(
            "line-list",
            &[("key", ColumnKind::Text), ("onset", ColumnKind::Date), ("n", ColumnKind::Int)],
        );
        assert_eq!(
            text,
            "message line_list {\n  OPTIONAL BYTE_ARRAY key (UTF8);\n  OPTIONAL INT32 onset (DATE);\n  OPTIONAL INT64 n;\n}"
        );
        assert!(parquet::schema::parser::parse_message_type(&text).is_ok());
    }

    #[test]
    fn csv_cells_are_safe_for_spreadsheets_unless_exact() {
        let formula = Cell::Text("=cmd|' /C calc'!A0".into());
        assert_eq!(csv_cell(&formula, false), "'=cmd|' /C calc'!A0");
        assert_eq!(csv_cell(&formula, true), "=cmd|' /C calc'!A0");
        assert_eq!(csv_cell(&Cell::Int(-3), false), "-3");
        assert_eq!(csv_cell(&Cell::Real(-0.5), false), "-0.5");
        assert_eq!(csv_cell(&Cell::Null, false), "");
        assert_eq!(ExportFormat::Csv.with_raw(true), ExportFormat::CsvRaw);
        assert_eq!(ExportFormat::Parquet.with_raw(true), ExportFormat::Parquet);
    }

    #[test]
    fn dates_count_days_from_the_unix_epoch() {
        assert_eq!(date_days(NaiveDate::from_ymd_opt(1970, 1, 2).unwrap()), 1);
        // 2026-03-01 is 20,513 days after 1970-01-01 (56 years with 14 leap days, plus Jan and Feb).
        assert_eq!(date_days(NaiveDate::from_ymd_opt(2026, 3, 1).unwrap()), 56 * 365 + 14 + 31 + 28);
    }
}
