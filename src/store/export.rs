//! The tables `tidemark export` writes, read as of one snapshot: the line list (the versions
//! valid then), the nowcasts and the delay fits computed from that snapshot. Each table's
//! columns and their types are declared once here, and the SQL is built from them, so the
//! CSV and Parquet writers and the SQL cannot disagree. Rows are streamed to a sink, so a
//! large line list is never held in memory whole.

use super::read::cell;
use super::{Reader, StoreError};
use crate::model::{SnapshotId, SourceId};
use crate::table::Cell;

/// Which table to export.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ExportTable {
    LineList,
    Nowcast,
    Delays,
}

/// The type of an exported column; every column may be empty (missing).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ColumnKind {
    Text,
    /// ISO 8601 date text in the store.
    Date,
    Int,
    Real,
    /// 1 / 0 in the store.
    Bool,
}

use ColumnKind::{Bool, Date, Int, Real, Text};

const LINE_LIST: &[(&str, ColumnKind)] = &[
    ("case_key", Text),
    ("jurisdiction", Text),
    ("onset_date", Date),
    ("specimen_date", Date),
    ("result_date", Date),
    ("report_date", Date),
    ("admit_date", Date),
    ("death_date", Date),
    ("outcome", Text),
    ("age_lo", Real),
    ("age_hi", Real),
    ("sex", Text),
    ("hospitalised", Bool),
    ("symptoms", Text),
    ("conditions", Text),
    ("invalid", Text),
    ("extra_json", Text),
];

const NOWCAST: &[(&str, ColumnKind)] = &[
    ("snapshot_id", Int),
    ("ref_field", Text),
    ("stratum_kind", Text),
    ("stratum", Text),
    ("method", Text),
    ("ref_date", Date),
    ("horizon", Int),
    ("observed", Real),
    ("median", Real),
    ("mean", Real),
    ("lower50", Real),
    ("upper50", Real),
    ("lower90", Real),
    ("upper90", Real),
    ("lower95", Real),
    ("upper95", Real),
    ("completeness", Real),
];

const DELAYS: &[(&str, ColumnKind)] = &[
    ("snapshot_id", Int),
    ("from_field", Text),
    ("to_field", Text),
    ("stratum_kind", Text),
    ("stratum", Text),
    ("family", Text),
    ("rank", Int),
    ("n", Int),
    ("param1", Real),
    ("param2", Real),
    ("log_likelihood", Real),
    ("aic", Real),
    ("mean", Real),
    ("mean_lo", Real),
    ("mean_hi", Real),
    ("median", Real),
    ("median_lo", Real),
    ("median_hi", Real),
    ("p95", Real),
    ("p95_lo", Real),
    ("p95_hi", Real),
    ("identifiable", Bool),
    ("warnings", Text),
];

impl ExportTable {
    /// The table's columns, in file order, with their types.
    pub fn columns(self) -> &'static [(&'static str, ColumnKind)] {
        match self {
            ExportTable::LineList => LINE_LIST,
            ExportTable::Nowcast => NOWCAST,
            ExportTable::Delays => DELAYS,
        }
    }

    pub fn name(self) -> &'static str {
        match self {
            ExportTable::LineList => "line-list",
            ExportTable::Nowcast => "nowcast",
            ExportTable::Delays => "delays",
        }
    }

    pub fn parse(text: &str) -> Option<ExportTable> {
        [ExportTable::LineList, ExportTable::Nowcast, ExportTable::Delays]
            .into_iter()
            .find(|t| t.name() == text || t.name().replace('-', "_") == text)
    }

    fn sql(self) -> String {
        let names: Vec<&str> = self.columns().iter().map(|(name, _)| *name).collect();
        let columns = names.join(", ");
        match self {
            ExportTable::LineList => format!(
                "SELECT {columns} FROM case_version
                 WHERE source_id = ?1 AND valid_from <= ?2 AND (valid_to IS NULL OR valid_to > ?2)
                 ORDER BY case_key"
            ),
            ExportTable::Nowcast => format!(
                "SELECT {columns} FROM nowcast WHERE source_id = ?1 AND snapshot_id = ?2
                 ORDER BY ref_field, stratum_kind, stratum, method, ref_date"
            ),
            ExportTable::Delays => format!(
                "SELECT {columns} FROM delay_fit WHERE source_id = ?1 AND snapshot_id = ?2
                 ORDER BY from_field, to_field, stratum_kind, stratum, rank"
            ),
        }
    }
}

impl Reader {
    /// Streams the rows of `table` as of `snapshot_id` to `sink`, one `Vec<Cell>` per row in
    /// the order of [`ExportTable::columns`]; returns how many rows were sent.
    pub fn export_rows<E: From<StoreError>>(
        &self,
        table: ExportTable,
        source_id: SourceId,
        snapshot_id: SnapshotId,
        mut sink: impl FnMut(Vec<Cell>) -> Result<(), E>,
    ) -> Result<u64, E> {
        let mut stmt = self.conn.prepare(&table.sql()).map_err(StoreError::from)?;
        let width = table.columns().len();
        let mut rows = stmt.query((source_id, snapshot_id)).map_err(StoreError::from)?;
        let mut sent = 0;
        while let Some(row) = rows.next().map_err(StoreError::from)? {
            let cells: Vec<Cell> = (0..width)
                .map(|idx| cell(row.get_ref(idx)))
                .collect::<Result<_, _>>()
                .map_err(StoreError::from)?;
            sink(cells)?;
            sent += 1;
        }
        Ok(sent)
    }
}
