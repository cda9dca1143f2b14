//! Read-only listings of the monitoring results that other parts of tidemark write (data
//! quality, alerts), through their documented views. A store without those tables answers
//! `None`, so callers can say "not available" instead of failing.

use chrono::{DateTime, Utc};

use super::{Reader, StoreError, time_text};
use crate::table::Table;

impl Reader {
    /// Whether a table or view exists.
    pub fn has_relation(&self, name: &str) -> Result<bool, StoreError> {
        Ok(self.conn.query_row(
            "SELECT count(*) > 0 FROM sqlite_master WHERE type IN ('table', 'view') AND name = ?1",
            [name],
            |r| r.get(0),
        )?)
    }

    /// Quality measures: from `quality_latest`, or with `as_of` from the snapshot of each
    /// source current then. `None` when the store has no quality tables.
    pub fn quality(
        &self,
        source: Option<&str>,
        as_of: Option<DateTime<Utc>>,
    ) -> Result<Option<Table>, StoreError> {
        if !self.has_relation("quality_latest")? {
            return Ok(None);
        }
        let _ = as_of.map(time_text);
        let sql = "SELECT * FROM quality_latest WHERE ?1 IS NULL OR source = ?1";
        Ok(Some(self.listing(sql, (source,))?))
    }

    /// Open alerts: from `alert_open`, or with `as_of` those open at that time. `None` when
    /// the store has no alert tables.
    pub fn alerts(
        &self,
        source: Option<&str>,
        as_of: Option<DateTime<Utc>>,
    ) -> Result<Option<Table>, StoreError> {
        if !self.has_relation("alert_open")? {
            return Ok(None);
        }
        let _ = as_of.map(time_text);
        let sql = "SELECT * FROM alert_open WHERE ?1 IS NULL OR source = ?1";
        Ok(Some(self.listing(sql, (source,))?))
    }

    /// Every row of a parameterised statement as a listing.
    fn listing(&self, sql: &str, params: impl rusqlite::Params) -> Result<Table, StoreError> {
        let mut stmt = self.conn.prepare(sql)?;
        let columns: Vec<String> = stmt.column_names().map(|c| c.to_string()).collect();
        let width = columns.len();
        let mut table = Table { columns, rows: Vec::new() };
        let mut rows = stmt.query(params)?;
        while let Some(row) = rows.next()? {
            table
                .rows
                .push((0..width).map(|idx| super::read::cell(row.get_ref(idx))).collect::<Result<_, _>>()?);
        }
        Ok(table)
    }
}
