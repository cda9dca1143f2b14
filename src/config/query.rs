//! The analysts' SQL budget as configured: the limits of one query and their defaults.
//! Plain settings; `store::sql` enforces them.

use std::time::Duration;

/// Default row limit: enough for any listing a person reads or a spreadsheet holds, small
/// enough that a forgotten WHERE does not stream the whole line list into memory.
pub const DEFAULT_MAX_ROWS: usize = 10_000;

/// Default time limit: an aggregate over a million versions takes well under a second here,
/// so ten seconds only stops queries that would run for much longer (runaway recursion,
/// cross joins).
pub const DEFAULT_TIMEOUT: Duration = Duration::from_secs(10);

/// Default largest value (string or blob) a query may build: far above any real cell of a
/// line list (free-text notes are kilobytes), far below what hurts the server. SQLite's own
/// default is 1,000,000,000 bytes, so `zeroblob(1e9)` would take a gigabyte.
pub const DEFAULT_MAX_VALUE_BYTES: usize = 16 * 1024 * 1024;

/// Default largest answer, counted as rows are collected (see `cell_bytes`): a 10,000-row
/// listing of the line list is a few megabytes, and the JSON answer is about this size, so a
/// few of them at once stay well within the server's memory.
pub const DEFAULT_MAX_ANSWER_BYTES: usize = 32 * 1024 * 1024;

/// Default cap on the memory SQLite allocates in the whole process (every connection: the
/// ingest writer's 64 MiB cache and its statements, the pooled readers, analysts' queries).
/// Ordinary work stays far below it (measured: 89 MiB at most while ingesting a
/// 1,000,000-row extract twice, the second time held); it exists for statements that hold many values at the
/// value limit at once (each distinct constant expression keeps its own copy), which the
/// per-connection limits cannot see, so that such a query fails instead of the machine
/// running out of memory.
pub const DEFAULT_SQLITE_HEAP_BYTES: usize = 512 * 1024 * 1024;

/// The largest value limit accepted: SQLite's compile-time maximum (`SQLITE_MAX_LENGTH`).
pub const MAX_VALUE_BYTES_CEILING: usize = 1_000_000_000;

/// The limits of one query.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct SqlLimits {
    pub max_rows: usize,
    pub timeout: Duration,
    /// The longest string or blob the query may build (`SQLITE_LIMIT_LENGTH`).
    pub max_value_bytes: usize,
    /// The largest answer (see `cell_bytes`).
    pub max_answer_bytes: usize,
    /// The cap on SQLite's memory in the whole process (see `limit_sqlite_heap`); 0: none.
    pub sqlite_heap_bytes: usize,
}

impl Default for SqlLimits {
    fn default() -> SqlLimits {
        SqlLimits {
            max_rows: DEFAULT_MAX_ROWS,
            timeout: DEFAULT_TIMEOUT,
            max_value_bytes: DEFAULT_MAX_VALUE_BYTES,
            max_answer_bytes: DEFAULT_MAX_ANSWER_BYTES,
            sqlite_heap_bytes: DEFAULT_SQLITE_HEAP_BYTES,
        }
    }
}
