//! What the daemon records about its sources: poll health (last poll, last success,
//! consecutive failures, last error, last snapshot, HTTP validators), the fingerprints of
//! files already taken from folders, and the daemon's own state for `tidemark status`.

use std::collections::{BTreeMap, HashSet};

use chrono::{DateTime, Utc};
use rusqlite::{OptionalExtension, params};

use super::{Reader, Store, StoreError, time_text};
use crate::model::{SnapshotId, SourceId};

/// A file a folder source has taken (or refused to take again).
#[derive(Debug, Clone)]
pub struct FileRecord {
    pub path: String,
    pub size: u64,
    pub mtime_ns: i64,
    pub sha256: String,
    pub snapshot_id: Option<SnapshotId>,
}

/// The end of one poll.
#[derive(Debug, Clone)]
pub struct PollRecord {
    pub at: DateTime<Utc>,
    /// `None` on success.
    pub error: Option<String>,
    pub snapshot_id: Option<SnapshotId>,
    /// New HTTP validators after a 200, if any.
    pub validators: Option<(Option<String>, Option<String>)>,
}

/// One line of `tidemark status`.
#[derive(Debug, Clone, PartialEq)]
pub struct SourceStatus {
    pub name: String,
    pub kind: String,
    pub last_poll: Option<String>,
    pub last_success: Option<String>,
    pub consecutive_failures: i64,
    pub last_error: Option<String>,
    pub last_snapshot_id: Option<SnapshotId>,
    pub last_applied_as_of: Option<String>,
}

impl Store {
    pub fn record_file(&mut self, source_id: SourceId, file: &FileRecord) -> Result<(), StoreError> {
        self.conn.execute(
            "INSERT OR IGNORE INTO source_file (source_id, path, size, mtime_ns, sha256, snapshot_id, seen_at)
             VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)",
            params![
                source_id,
                file.path,
                file.size as i64,
                file.mtime_ns,
                file.sha256,
                file.snapshot_id,
                time_text(Utc::now())
            ],
        )?;
        Ok(())
    }

    pub fn record_poll(&mut self, source_id: SourceId, poll: &PollRecord) -> Result<(), StoreError> {
        let at = time_text(poll.at);
        self.conn.execute("INSERT OR IGNORE INTO source_health (source_id) VALUES (?1)", [source_id])?;
        match &poll.error {
            None => self.conn.execute(
                "UPDATE source_health SET last_poll = ?2, last_success = ?2, consecutive_failures = 0,
                     last_snapshot_id = coalesce(?3, last_snapshot_id)
                 WHERE source_id = ?1",
                params![source_id, at, poll.snapshot_id],
            )?,
            Some(error) => self.conn.execute(
                "UPDATE source_health SET last_poll = ?2, consecutive_failures = consecutive_failures + 1,
                     last_error = ?3, last_snapshot_id = coalesce(?4, last_snapshot_id)
                 WHERE source_id = ?1",
                params![source_id, at, error, poll.snapshot_id],
            )?,
        };
        if let Some((etag, last_modified)) = &poll.validators {
            self.conn.execute(
                "UPDATE source_health SET etag = ?2, last_modified = ?3 WHERE source_id = ?1",
                params![source_id, etag, last_modified],
            )?;
        }
        Ok(())
    }

    pub fn set_daemon_state(&mut self, entries: &[(&str, String)]) -> Result<(), StoreError> {
        for (key, value) in entries {
            self.conn.execute(
                "INSERT INTO daemon_state (key, value) VALUES (?1, ?2)
                 ON CONFLICT(key) DO UPDATE SET value = excluded.value",
                (key, value),
            )?;
        }
        Ok(())
    }

    /// Remembers the HTTP validators of a body that was taken, without touching the poll's
    /// health (the poll's outcome is recorded once, by `record_poll`).
    pub fn remember_validators(
        &mut self,
        source_id: SourceId,
        etag: Option<&str>,
        last_modified: Option<&str>,
    ) -> Result<(), StoreError> {
        self.conn.execute("INSERT OR IGNORE INTO source_health (source_id) VALUES (?1)", [source_id])?;
        self.conn.execute(
            "UPDATE source_health SET etag = ?2, last_modified = ?3 WHERE source_id = ?1",
            params![source_id, etag, last_modified],
        )?;
        Ok(())
    }
}

impl Reader {
    /// Fingerprints (path, size, mtime) of every file a folder source has taken.
    pub fn known_files(&self, source_id: SourceId) -> Result<HashSet<(String, u64, i64)>, StoreError> {
        let mut stmt =
            self.conn.prepare("SELECT path, size, mtime_ns FROM source_file WHERE source_id = ?1")?;
        let rows = stmt.query_map([source_id], |r| Ok((r.get(0)?, r.get::<_, i64>(1)? as u64, r.get(2)?)))?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// The HTTP validators remembered for a URL source.
    pub fn validators(&self, source_id: SourceId) -> Result<(Option<String>, Option<String>), StoreError> {
        Ok(self
            .conn
            .query_row(
                "SELECT etag, last_modified FROM source_health WHERE source_id = ?1",
                [source_id],
                |r| Ok((r.get(0)?, r.get(1)?)),
            )
            .optional()?
            .unwrap_or((None, None)))
    }

    pub fn source_statuses(&self) -> Result<Vec<SourceStatus>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT s.name, s.kind, h.last_poll, h.last_success, coalesce(h.consecutive_failures, 0),
                    h.last_error, h.last_snapshot_id,
                    (SELECT max(as_of) FROM snapshot n WHERE n.source_id = s.source_id AND n.status = 'applied')
             FROM source s LEFT JOIN source_health h USING (source_id) ORDER BY s.name",
        )?;
        let rows = stmt.query_map([], |r| {
            Ok(SourceStatus {
                name: r.get(0)?,
                kind: r.get(1)?,
                last_poll: r.get(2)?,
                last_success: r.get(3)?,
                consecutive_failures: r.get(4)?,
                last_error: r.get(5)?,
                last_snapshot_id: r.get(6)?,
                last_applied_as_of: r.get(7)?,
            })
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    pub fn daemon_state(&self) -> Result<BTreeMap<String, String>, StoreError> {
        let mut stmt = self.conn.prepare("SELECT key, value FROM daemon_state")?;
        let rows = stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?)))?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// A trivial query, to prove the store opens and answers.
    pub fn ping(&self) -> Result<(), StoreError> {
        self.conn.query_row("SELECT count(*) FROM schema_version", [], |r| r.get::<_, i64>(0))?;
        Ok(())
    }
}
