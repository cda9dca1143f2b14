//! The SQLite store: the only module that names rusqlite or writes SQL. `open` creates the
//! file (mode 0600, folder 0700) and applies the numbered migrations in order; `writer` turns
//! one extract into one transaction; `read` answers as-of questions on read-only
//! connections; `archive` keeps every extract's bytes, compressed and content-addressed.

pub mod alerts;
pub mod archive;
pub mod backup;
mod dashboard;
mod export;
pub mod lock;
mod owed;
pub mod quality;
mod read;
mod results;
mod scores;
mod sources;
pub mod sql;
mod tokens;
mod triangle;
mod vocabulary;
mod writer;

use std::fs;
use std::os::unix::fs::{DirBuilderExt, OpenOptionsExt};
use std::path::{Path, PathBuf};
use std::time::Duration;

use rusqlite::{Connection, OpenFlags};

pub use self::dashboard::{
    FirstSeenLag, MISSINGNESS_FIELDS, SnapshotMissing, SourceOverview, StoredDelayFit,
};
pub use self::export::{ColumnKind, ExportTable};
pub use self::owed::{OwedAnalysis, OwedState};
pub use self::read::{AGE_BAND_EDGES, CurveRow, Reader, SnapshotRow, VersionRow};
pub use self::results::{AlertLine, ProblemLine};
pub use self::scores::{MaturedNowcast, SeriesKey};
pub use self::sources::{FileRecord, PollRecord, SourceStatus};
pub use self::sql::{SqlLimits, run_sql};
pub use self::tokens::{TokenRow, TokenScope, create_token, revoke_token};
pub use self::triangle::{DelayRow, MISSING_STRATUM, NowcastKey, TriangleSpec};
pub use self::writer::{Ingest, LastApplied, Plan, Store};

/// Migrations, applied in order; the number is the schema version after applying it.
const MIGRATIONS: &[(i64, &str)] = &[
    (1, include_str!("../../migrations/0001_line_list.sql")),
    (2, include_str!("../../migrations/0002_daemon.sql")),
    (3, include_str!("../../migrations/0003_analysis.sql")),
    (4, include_str!("../../migrations/0004_quality_alerts.sql")),
    (5, include_str!("../../migrations/0005_access.sql")),
    (6, include_str!("../../migrations/0006_ingest_speed.sql")),
    (7, include_str!("../../migrations/0007_analysis_owed.sql")),
    (8, include_str!("../../migrations/0008_nowcast_scores.sql")),
    (9, include_str!("../../migrations/0009_alert_data_dates.sql")),
    (10, include_str!("../../migrations/0010_digest_schedule.sql")),
];

/// The schema version this build writes and understands.
pub const SCHEMA_VERSION: i64 = MIGRATIONS[MIGRATIONS.len() - 1].0;

/// How long a connection waits for another one's write lock before giving up. Long enough
/// for a large ingest's commit, short enough that a stuck peer is reported.
const BUSY_TIMEOUT: Duration = Duration::from_secs(30);

#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    #[error("store {path}: {source}")]
    Sqlite { path: PathBuf, source: rusqlite::Error },
    #[error(
        "store {path} has schema version {found}, newer than this tidemark understands ({supported}); upgrade tidemark"
    )]
    TooNew { path: PathBuf, found: i64, supported: i64 },
    #[error("cannot create {path}: {source}")]
    Create { path: PathBuf, source: std::io::Error },
    #[error("{0}")]
    Refused(String),
    #[error("{0}")]
    Locked(String),
    #[error("cancelled; nothing of this extract was applied")]
    Cancelled,
    #[error("database error: {0}")]
    Sql(#[from] rusqlite::Error),
}

/// Creates the store if needed and brings its schema up to date; returns a writer connection.
fn open_writer(path: &Path) -> Result<Connection, StoreError> {
    create_private_file(path)?;
    let sqlite = |source| StoreError::Sqlite { path: path.to_path_buf(), source };
    let mut conn = Connection::open(path).map_err(sqlite)?;
    conn.busy_timeout(BUSY_TIMEOUT).map_err(sqlite)?;
    conn.pragma_update(None, "journal_mode", "WAL").map_err(sqlite)?;
    conn.pragma_update(None, "foreign_keys", "ON").map_err(sqlite)?;
    conn.pragma_update(None, "synchronous", "FULL").map_err(sqlite)?;
    // 64 MiB of page cache speeds up staging and index builds of large extracts.
    conn.pragma_update(None, "cache_size", -65536).map_err(sqlite)?;
    migrate(&mut conn, path)?;
    Ok(conn)
}

/// A read-only connection: read-only open flags and `query_only`, so nothing can write.
fn open_reader(path: &Path) -> Result<Connection, StoreError> {
    if !path.exists() {
        drop(open_writer(path)?);
    }
    let sqlite = |source| StoreError::Sqlite { path: path.to_path_buf(), source };
    let flags = OpenFlags::SQLITE_OPEN_READ_ONLY | OpenFlags::SQLITE_OPEN_NO_MUTEX;
    let conn = Connection::open_with_flags(path, flags).map_err(sqlite)?;
    conn.busy_timeout(BUSY_TIMEOUT).map_err(sqlite)?;
    conn.pragma_update(None, "query_only", "ON").map_err(sqlite)?;
    let found = schema_version(&conn).map_err(sqlite)?;
    if found > SCHEMA_VERSION {
        return Err(StoreError::TooNew { path: path.to_path_buf(), found, supported: SCHEMA_VERSION });
    }
    if found < SCHEMA_VERSION {
        drop(conn);
        drop(open_writer(path)?);
        return open_reader(path);
    }
    Ok(conn)
}

fn migrate(conn: &mut Connection, path: &Path) -> Result<(), StoreError> {
    conn.execute_batch(
        "CREATE TABLE IF NOT EXISTS schema_version (
             version INTEGER PRIMARY KEY, applied_at TEXT NOT NULL)",
    )?;
    let found = schema_version(conn)?;
    if found > SCHEMA_VERSION {
        return Err(StoreError::TooNew { path: path.to_path_buf(), found, supported: SCHEMA_VERSION });
    }
    for (version, sql) in MIGRATIONS.iter().filter(|(v, _)| *v > found) {
        let tx = conn.transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)?;
        // Another process may have migrated while we waited for the lock.
        if schema_version(&tx)? >= *version {
            continue;
        }
        tx.execute_batch(sql)?;
        tx.execute(
            "INSERT INTO schema_version (version, applied_at) VALUES (?1, ?2)",
            (version, now_text()),
        )?;
        tx.commit()?;
    }
    Ok(())
}

fn schema_version(conn: &Connection) -> rusqlite::Result<i64> {
    let exists: bool = conn.query_row(
        "SELECT count(*) > 0 FROM sqlite_master WHERE type = 'table' AND name = 'schema_version'",
        [],
        |row| row.get(0),
    )?;
    if !exists {
        return Ok(0);
    }
    conn.query_row("SELECT coalesce(max(version), 0) FROM schema_version", [], |row| row.get(0))
}

/// Creates `path` empty with mode 0600 (and its folder with 0700) unless it exists, so the
/// store is never world-readable, not even for a moment. SQLite gives its -wal and -shm
/// files the database file's mode.
fn create_private_file(path: &Path) -> Result<(), StoreError> {
    let create = |source| StoreError::Create { path: path.to_path_buf(), source };
    if let Some(parent) = path.parent().filter(|p| !p.as_os_str().is_empty()) {
        create_private_dir(parent).map_err(create)?;
    }
    match fs::OpenOptions::new().write(true).create_new(true).mode(0o600).open(path) {
        Ok(_) => Ok(()),
        Err(err) if err.kind() == std::io::ErrorKind::AlreadyExists => Ok(()),
        Err(err) => Err(create(err)),
    }
}

/// Creates a folder (and missing parents) with mode 0700.
pub fn create_private_dir(path: &Path) -> std::io::Result<()> {
    fs::DirBuilder::new().recursive(true).mode(0o700).create(path)
}

fn now_text() -> String {
    time_text(chrono::Utc::now())
}

/// The store's time format: RFC 3339, UTC, whole seconds (sorts as text).
pub fn time_text(time: chrono::DateTime<chrono::Utc>) -> String {
    time.format("%Y-%m-%dT%H:%M:%SZ").to_string()
}

/// Parses a time written by `time_text`.
pub fn parse_time(text: &str) -> Option<chrono::DateTime<chrono::Utc>> {
    chrono::DateTime::parse_from_rfc3339(text).ok().map(|t| t.with_timezone(&chrono::Utc))
}

#[cfg(test)]
mod tests;
