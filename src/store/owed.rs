//! What the post-snapshot analysis owes (`analysis_owed`): the commit of an applied or held
//! snapshot enters it as pending in its own transaction; the pipeline reads what is owed,
//! marks earlier snapshots superseded by the one it analyses, and records done or failed.
//! Nothing here decides what to analyse: that is the pipeline's business.

use chrono::Utc;
use rusqlite::{OptionalExtension, Transaction, params};

use super::{Reader, Store, StoreError, time_text};
use crate::model::{SnapshotId, SnapshotStatus, SourceId};

pub use crate::model::OwedState;

/// One snapshot's entry, with the snapshot's counts the alert rules read.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct OwedAnalysis {
    pub snapshot_id: SnapshotId,
    pub source_id: SourceId,
    /// The snapshot's status now (a held snapshot may have been released since).
    pub status: SnapshotStatus,
    pub rows_accepted: u64,
    pub rows_new: u64,
    pub state: OwedState,
    pub attempts: i64,
    pub error: Option<String>,
    pub superseded_by: Option<SnapshotId>,
}

const OWED_SELECT: &str = "SELECT o.snapshot_id, o.source_id, n.status, n.rows_accepted, n.rows_new, o.state,
        o.attempts, o.error, o.superseded_by
     FROM analysis_owed o JOIN snapshot n ON n.snapshot_id = o.snapshot_id";

fn owed_row(row: &rusqlite::Row<'_>) -> rusqlite::Result<OwedAnalysis> {
    Ok(OwedAnalysis {
        snapshot_id: row.get(0)?,
        source_id: row.get(1)?,
        status: row.get(2)?,
        rows_accepted: row.get::<_, i64>(3)?.max(0) as u64,
        rows_new: row.get::<_, i64>(4)?.max(0) as u64,
        state: row.get(5)?,
        attempts: row.get(6)?,
        error: row.get(7)?,
        superseded_by: row.get(8)?,
    })
}

/// Enters `snapshot_id` as owed, inside the transaction that commits it (again pending if it
/// was entered before: a held snapshot that is released).
pub(super) fn mark_pending(
    tx: &Transaction<'_>,
    source_id: SourceId,
    snapshot_id: SnapshotId,
) -> Result<(), StoreError> {
    tx.execute(
        "INSERT INTO analysis_owed (snapshot_id, source_id, state, updated_at) VALUES (?1, ?2, 'pending', ?3)
         ON CONFLICT (snapshot_id) DO UPDATE SET state = 'pending', error = NULL, superseded_by = NULL,
             updated_at = excluded.updated_at",
        params![snapshot_id, source_id, time_text(Utc::now())],
    )?;
    Ok(())
}

impl Reader {
    /// The snapshots of a source whose analysis is still owed (pending or failed), oldest
    /// first.
    pub fn owed_analyses(&self, source_id: SourceId) -> Result<Vec<OwedAnalysis>, StoreError> {
        let mut stmt = self.conn.prepare(&format!(
            "{OWED_SELECT} WHERE o.source_id = ?1 AND o.state IN ('pending', 'failed') ORDER BY o.snapshot_id"
        ))?;
        let rows = stmt.query_map([source_id], owed_row)?.collect::<Result<Vec<_>, _>>()?;
        Ok(rows)
    }

    /// Where one snapshot's analysis stands; `None` for a snapshot that owes none (failed,
    /// duplicate, or analysed before the store recorded this).
    pub fn analysis_of(&self, snapshot_id: SnapshotId) -> Result<Option<OwedAnalysis>, StoreError> {
        let sql = format!("{OWED_SELECT} WHERE o.snapshot_id = ?1");
        Ok(self.conn.query_row(&sql, [snapshot_id], owed_row).optional()?)
    }
}

impl Store {
    /// Marks `snapshots` superseded by `by`, whose analysis covers them.
    pub fn supersede_analyses(&mut self, snapshots: &[SnapshotId], by: SnapshotId) -> Result<(), StoreError> {
        let tx = self.conn.transaction()?;
        {
            let mut stmt = tx.prepare(
                "UPDATE analysis_owed SET state = 'superseded', superseded_by = ?2, updated_at = ?3
                 WHERE snapshot_id = ?1 AND state IN ('pending', 'failed')",
            )?;
            let now = time_text(Utc::now());
            for id in snapshots {
                stmt.execute(params![id, by, now])?;
            }
        }
        tx.commit()?;
        Ok(())
    }

    /// Records the end of a snapshot's analysis: done, or failed with the reason (an error
    /// text, never a cell value) and one more attempt counted.
    pub fn finish_analysis(
        &mut self,
        snapshot_id: SnapshotId,
        error: Option<&str>,
    ) -> Result<(), StoreError> {
        let state = if error.is_some() { OwedState::Failed } else { OwedState::Done };
        self.conn.execute(
            "UPDATE analysis_owed SET state = ?2, error = ?3, attempts = attempts + 1, updated_at = ?4
             WHERE snapshot_id = ?1",
            params![snapshot_id, state.name(), error, time_text(Utc::now())],
        )?;
        Ok(())
    }
}
