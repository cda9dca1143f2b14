//! Analysts' SQL (`tidemark query` and the API's `POST /api/v1/query`): one statement on a
//! fresh connection that cannot write, in three independent layers — read-only open flags
//! and `query_only` (from `open_reader`), and an authorizer that refuses at prepare time
//! anything but reading: writes, schema changes, ATTACH/DETACH, transactions, PRAGMAs other
//! than a short list of schema-describing ones, and the `load_extension` function. A row
//! limit and a time limit (a progress handler) stop runaway queries. Memory is bounded per
//! query, on the connection: SQLite refuses any string or blob longer than the value limit
//! (`SQLITE_LIMIT_LENGTH`), the page cache (which also bounds the sorter before it spills to
//! a temporary file) is small, and the answer stops growing at the answer limit, counted as
//! rows are collected. There is deliberately no process-wide heap limit
//! (`sqlite3_hard_heap_limit64`): it would also fail the ingest writer that shares the
//! process in `tidemark run`, and the per-connection limits (with the API's cap on
//! concurrent queries) already bound what analysts' SQL can take. Errors say what was
//! refused and why, never a cell value.

use std::path::Path;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Instant;

use rusqlite::ErrorCode;
use rusqlite::hooks::{AuthAction, AuthContext, Authorization};
use rusqlite::limits::Limit;

use super::read::cell;
use super::{StoreError, open_reader};
pub use crate::config::query::{
    DEFAULT_MAX_ANSWER_BYTES, DEFAULT_MAX_ROWS, DEFAULT_MAX_VALUE_BYTES, DEFAULT_SQLITE_HEAP_BYTES,
    DEFAULT_TIMEOUT, MAX_VALUE_BYTES_CEILING, SqlLimits,
};
use crate::table::{Cell, Table};

/// The analysts' connection's page cache, in KiB (negative `cache_size`: kibibytes). It also
/// bounds the sorter's memory before it spills to a temporary file; 2 MiB is SQLite's own
/// default, set here explicitly so a change to the readers' defaults does not reach analysts.
const CACHE_KIB: i64 = 2 * 1024;

/// What one cell costs in an answer beyond its text: the cell itself, its JSON value and the
/// object entry it sits in (measured order of magnitude, not exact), so that a million tiny
/// cells count as the memory they take.
const CELL_OVERHEAD_BYTES: usize = 64;

/// How many SQLite virtual-machine steps pass between checks of the clock: cheap enough to
/// be invisible, frequent enough to stop within milliseconds of the limit.
const PROGRESS_STEPS: i32 = 10_000;

/// PRAGMAs that only describe the schema; their argument, if any, is an object name, so they
/// cannot change a setting. Every other PRAGMA is refused, read or write: `PRAGMA
/// journal_mode` with no value only reads, but `PRAGMA query_only = 0` or `PRAGMA
/// writable_schema = 1` must never get through, and a short allow-list is easier to trust
/// than a deny-list.
const SCHEMA_PRAGMAS: &[&str] = &[
    "table_info",
    "table_xinfo",
    "table_list",
    "index_list",
    "index_info",
    "index_xinfo",
    "foreign_key_list",
];

/// Functions refused even though they only "read": `load_extension` would run native code
/// (rusqlite's bundled SQLite leaves extension loading off, and this is a second lock), and
/// `fts3_tokenizer` can hand SQLite a function pointer.
const REFUSED_FUNCTIONS: &[&str] = &["load_extension", "fts3_tokenizer"];

/// Runs one statement that only reads on a fresh read-only connection to the store at
/// `path`, within `limits`.
pub fn run_sql(path: &Path, sql: &str, limits: &SqlLimits) -> Result<Table, StoreError> {
    limit_sqlite_heap(limits.sqlite_heap_bytes);
    let mut conn = open_reader(path)?;
    bound_memory(&conn, limits)?;
    let refusal: Arc<std::sync::Mutex<Option<String>>> = Arc::default();
    let seen = refusal.clone();
    conn.authorizer(Some(move |ctx: AuthContext<'_>| {
        let verdict = authorize(&ctx.action);
        if let Err(why) = &verdict {
            seen.lock().unwrap_or_else(|p| p.into_inner()).get_or_insert_with(|| why.clone());
        }
        if verdict.is_ok() { Authorization::Allow } else { Authorization::Deny }
    }))?;
    let deadline = Instant::now() + limits.timeout;
    let timed_out = Arc::new(AtomicBool::new(false));
    let flag = timed_out.clone();
    conn.progress_handler(
        PROGRESS_STEPS,
        Some(move || {
            let over = Instant::now() >= deadline;
            if over {
                flag.store(true, Ordering::SeqCst);
            }
            over
        }),
    )?;
    let explain = |err: rusqlite::Error| {
        if let Some(why) = refusal.lock().unwrap_or_else(|p| p.into_inner()).take() {
            return StoreError::Refused(format!(
                "query refused: {why}; only statements that read are allowed"
            ));
        }
        if timed_out.load(Ordering::SeqCst) {
            return StoreError::Refused(format!(
                "query stopped: it ran longer than the time limit of {} s",
                limits.timeout.as_secs_f64()
            ));
        }
        if let Some(why) = memory_refusal(&err, limits) {
            return StoreError::Refused(why);
        }
        StoreError::Refused(format!("query failed: {err}"))
    };
    let table = collect(&conn, sql, limits).map_err(|err| match err {
        Collect::Sql(err) => explain(err),
        Collect::Other(err) => err,
    });
    // Drop the hooks before the connection closes (they hold nothing that needs it, but a
    // connection without them is the ordinary state).
    let _ = conn.progress_handler(0, None::<fn() -> bool>);
    let _ = conn.authorizer(None::<fn(AuthContext<'_>) -> Authorization>);
    table
}

/// Caps the memory SQLite may allocate in this whole process (`sqlite3_hard_heap_limit64`;
/// 0 lifts the cap). Over the cap an allocation fails and its statement ends with "out of
/// memory": an analyst's query, or, if it comes to that, an ingest, which then rolls back
/// whole and is tried again at the next poll. The API sets it when it starts (so it holds
/// from the first request in `tidemark run`), and every analysts' query sets it again.
#[allow(unsafe_code)]
pub fn limit_sqlite_heap(bytes: usize) {
    let bytes = i64::try_from(bytes).unwrap_or(i64::MAX);
    // SAFETY: the function takes a plain integer and only updates SQLite's global memory
    // accounting under SQLite's own mutex (the bundled build is thread-safe); SQLite
    // documents it as callable at any time, from any thread, with connections open.
    unsafe {
        rusqlite::ffi::sqlite3_hard_heap_limit64(bytes);
    }
}

/// Sets the analysts' connection's own memory limits: the longest value and a small cache.
fn bound_memory(conn: &rusqlite::Connection, limits: &SqlLimits) -> Result<(), StoreError> {
    let longest = limits.max_value_bytes.clamp(1, MAX_VALUE_BYTES_CEILING);
    conn.set_limit(Limit::SQLITE_LIMIT_LENGTH, i32::try_from(longest).unwrap_or(i32::MAX))?;
    conn.pragma_update(None, "cache_size", -CACHE_KIB)?;
    Ok(())
}

/// The message for a query SQLite stopped for lack of memory, if it was that.
fn memory_refusal(err: &rusqlite::Error, limits: &SqlLimits) -> Option<String> {
    match err.sqlite_error_code()? {
        ErrorCode::TooBig => Some(format!(
            "query stopped: it would build a value larger than the value limit of {}",
            size_text(limits.max_value_bytes)
        )),
        ErrorCode::OutOfMemory => {
            Some("query stopped: SQLite reached its memory limit; select less at once".into())
        }
        _ => None,
    }
}

/// A byte count as people read it: whole MiB or KiB when it is one, else bytes.
fn size_text(bytes: usize) -> String {
    const KIB: usize = 1024;
    const MIB: usize = 1024 * 1024;
    match bytes {
        0 => "0 bytes".into(),
        b if b % MIB == 0 => format!("{} MiB", b / MIB),
        b if b % KIB == 0 => format!("{} KiB", b / KIB),
        b => format!("{b} bytes"),
    }
}

enum Collect {
    Sql(rusqlite::Error),
    Other(StoreError),
}

impl From<rusqlite::Error> for Collect {
    fn from(err: rusqlite::Error) -> Collect {
        Collect::Sql(err)
    }
}

fn collect(conn: &rusqlite::Connection, sql: &str, limits: &SqlLimits) -> Result<Table, Collect> {
    if sql.trim().is_empty() {
        return Err(Collect::Other(StoreError::Refused("query: the SQL is empty".into())));
    }
    let mut stmt = conn.prepare(sql)?;
    // A statement the authorizer let through that still counts as writing (none is known;
    // `VACUUM INTO` once was) is refused before it runs.
    if !stmt.readonly() {
        return Err(Collect::Other(StoreError::Refused(
            "query refused: only statements that read are allowed (SELECT, WITH, EXPLAIN, schema PRAGMAs)"
                .into(),
        )));
    }
    let columns: Vec<String> = stmt.column_names().map(|c| c.to_string()).collect();
    let width = columns.len();
    let mut answer = Answer { used: 0, limit: limits.max_answer_bytes };
    let mut rows_out = Vec::new();
    let mut rows = stmt.query([])?;
    while let Some(row) = rows.next()? {
        if rows_out.len() >= limits.max_rows {
            return Err(Collect::Other(StoreError::Refused(format!(
                "query stopped: it returns more than the row limit of {}; add a LIMIT or aggregate",
                limits.max_rows
            ))));
        }
        let mut cells = Vec::with_capacity(width);
        for (idx, column) in columns.iter().enumerate() {
            let value = cell(row.get_ref(idx))?;
            answer.spend(column, &value)?;
            cells.push(value);
        }
        rows_out.push(cells);
    }
    Ok(Table { columns, rows: rows_out })
}

/// The size of the answer so far, against its limit.
struct Answer {
    used: usize,
    limit: usize,
}

impl Answer {
    /// Adds one cell; past the limit the query stops (before the rest is even read).
    fn spend(&mut self, column: &str, value: &Cell) -> Result<(), Collect> {
        self.used = self.used.saturating_add(cell_bytes(column, value));
        if self.used <= self.limit {
            return Ok(());
        }
        Err(Collect::Other(StoreError::Refused(format!(
            "query stopped: its answer is larger than the answer limit of {}; select fewer or shorter columns, add a LIMIT or aggregate",
            size_text(self.limit)
        ))))
    }
}

/// What one cell adds to an answer: its text as JSON writes it (escapes included), its
/// column's name (a JSON answer repeats it in every row) and a fixed cost for the cell.
fn cell_bytes(column: &str, value: &Cell) -> usize {
    let text = match value {
        Cell::Text(text) => json_len(text),
        // The longest integer or real as text, or `null`.
        _ => 24,
    };
    text + json_len(column) + CELL_OVERHEAD_BYTES
}

/// The length of `text` as a JSON string's contents: quotes and backslashes take two bytes,
/// control characters up to six (`\u0001`).
fn json_len(text: &str) -> usize {
    text.bytes()
        .map(|b| match b {
            b'"' | b'\\' => 2,
            0..=0x1f => 6,
            _ => 1,
        })
        .sum()
}

/// Whether an action may run in an analyst's query; the error says why not.
fn authorize(action: &AuthAction<'_>) -> Result<(), String> {
    match action {
        // Token hashes cannot be turned back into tokens, but they are nobody's business.
        AuthAction::Read { table_name, .. } if table_name.eq_ignore_ascii_case("api_token") => {
            Err("reading api_token is not allowed".into())
        }
        AuthAction::Select | AuthAction::Read { .. } | AuthAction::Recursive => Ok(()),
        AuthAction::Function { function_name } => {
            let name = function_name.to_ascii_lowercase();
            if REFUSED_FUNCTIONS.contains(&name.as_str()) {
                Err(format!("the function {name}() is not allowed"))
            } else {
                Ok(())
            }
        }
        AuthAction::Pragma { pragma_name, .. } => {
            let name = pragma_name.to_ascii_lowercase();
            if SCHEMA_PRAGMAS.contains(&name.as_str()) {
                Ok(())
            } else {
                Err(format!("PRAGMA {name} is not allowed (allowed: {})", SCHEMA_PRAGMAS.join(", ")))
            }
        }
        // DROP asks first to delete its entry from the schema table, and is refused there.
        AuthAction::Insert { table_name }
        | AuthAction::Update { table_name, .. }
        | AuthAction::Delete { table_name }
            if table_name.starts_with("sqlite_") =>
        {
            Err("changing the schema or its statistics (CREATE, DROP, ALTER, ANALYZE) is not allowed".into())
        }
        AuthAction::Attach { .. } => Err("ATTACH is not allowed".into()),
        AuthAction::Detach { .. } => Err("DETACH is not allowed".into()),
        AuthAction::Insert { table_name } => Err(format!("INSERT into {table_name} is not allowed")),
        AuthAction::Update { table_name, .. } => Err(format!("UPDATE of {table_name} is not allowed")),
        AuthAction::Delete { table_name } => Err(format!("DELETE from {table_name} is not allowed")),
        AuthAction::Transaction { .. } | AuthAction::Savepoint { .. } => {
            Err("transaction statements are not allowed".into())
        }
        other => Err(format!("{} is not allowed", action_name(other))),
    }
}

/// A short name of a schema-changing action, for the refusal message.
fn action_name(action: &AuthAction<'_>) -> &'static str {
    match action {
        AuthAction::CreateIndex { .. }
        | AuthAction::CreateTable { .. }
        | AuthAction::CreateTempIndex { .. }
        | AuthAction::CreateTempTable { .. }
        | AuthAction::CreateTempTrigger { .. }
        | AuthAction::CreateTempView { .. }
        | AuthAction::CreateTrigger { .. }
        | AuthAction::CreateView { .. }
        | AuthAction::CreateVtable { .. } => "CREATE",
        AuthAction::DropIndex { .. }
        | AuthAction::DropTable { .. }
        | AuthAction::DropTempIndex { .. }
        | AuthAction::DropTempTable { .. }
        | AuthAction::DropTempTrigger { .. }
        | AuthAction::DropTempView { .. }
        | AuthAction::DropTrigger { .. }
        | AuthAction::DropView { .. }
        | AuthAction::DropVtable { .. } => "DROP",
        AuthAction::AlterTable { .. } => "ALTER TABLE",
        AuthAction::Reindex { .. } => "REINDEX",
        AuthAction::Analyze { .. } => "ANALYZE",
        _ => "this statement",
    }
}

#[cfg(test)]
mod tests {
    use std::time::Duration;

    use super::*;

    fn store() -> (tempfile::TempDir, std::path::PathBuf) {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("t.db");
        drop(super::super::open_writer(&path).unwrap());
        (dir, path)
    }

    fn refused(path: &Path, sql: &str) -> String {
        match run_sql(path, sql, &SqlLimits::default()) {
            Ok(table) => panic!("{sql:?} was allowed: {table:?}"),
            Err(err) => err.to_string(),
        }
    }

    #[test]
    fn reads_are_allowed() {
        let (_dir, path) = store();
        for sql in [
            "SELECT count(*) AS n FROM case_version",
            "WITH RECURSIVE c(x) AS (SELECT 1 UNION ALL SELECT x + 1 FROM c WHERE x < 5) SELECT sum(x) FROM c",
            "PRAGMA table_info(case_version)",
            "SELECT * FROM pragma_table_info('snapshot')",
            "EXPLAIN QUERY PLAN SELECT * FROM case_version WHERE case_key = 'C-1'",
        ] {
            run_sql(&path, sql, &SqlLimits::default()).unwrap_or_else(|err| panic!("{sql:?}: {err}"));
        }
        let table = run_sql(&path, "SELECT 1 + 1 AS two", &SqlLimits::default()).unwrap();
        assert_eq!(table.columns, ["two"]);
        assert_eq!(table.rows, [[Cell::Int(2)]]);
    }

    #[test]
    fn every_kind_of_write_is_refused_with_the_reason() {
        let (dir, path) = store();
        let attach = format!("ATTACH DATABASE '{}' AS evil", dir.path().join("evil.db").display());
        for (sql, reason) in [
            (
                "INSERT INTO source (name, kind, config_hash) VALUES ('x', 'folder', 'x')",
                "INSERT into source",
            ),
            ("UPDATE case_version SET onset_date = NULL", "UPDATE of case_version"),
            ("DELETE FROM snapshot", "DELETE from snapshot"),
            ("DROP TABLE case_version", "changing the schema"),
            ("DROP VIEW current_case", "changing the schema"),
            ("CREATE TABLE scratch (x)", "CREATE"),
            ("CREATE TEMP VIEW v AS SELECT 1", "CREATE"),
            (attach.as_str(), "ATTACH"),
            ("DETACH DATABASE main", "DETACH"),
            ("PRAGMA journal_mode = DELETE", "PRAGMA journal_mode"),
            ("PRAGMA query_only = 0", "PRAGMA query_only"),
            ("PRAGMA writable_schema = 1", "PRAGMA writable_schema"),
            ("SELECT load_extension('/tmp/x.so')", "load_extension()"),
            ("SELECT * FROM case_version WHERE load_extension('x') IS NULL", "load_extension()"),
            ("BEGIN IMMEDIATE", "transaction"),
            ("ALTER TABLE reject ADD COLUMN y", "ALTER TABLE"),
            ("ANALYZE", "ANALYZE"),
            ("REINDEX", "REINDEX"),
            ("SELECT sha256 FROM api_token", "api_token"),
        ] {
            let message = refused(&path, sql);
            assert!(message.contains(reason), "{sql:?}: {message}");
            assert!(message.starts_with("query refused"), "{sql:?}: {message}");
        }
        assert!(!dir.path().join("evil.db").exists());
    }

    #[test]
    fn runaway_queries_are_stopped() {
        let (_dir, path) = store();
        let forever =
            "WITH RECURSIVE c(x) AS (SELECT 1 UNION ALL SELECT x + 1 FROM c) SELECT count(*) FROM c";
        let limits = SqlLimits { max_rows: 100, timeout: Duration::from_millis(300), ..SqlLimits::default() };
        let started = Instant::now();
        let err = run_sql(&path, forever, &limits).unwrap_err().to_string();
        assert!(err.contains("time limit of 0.3 s"), "{err}");
        assert!(started.elapsed() < Duration::from_secs(5), "took {:?}", started.elapsed());
        let many = "WITH RECURSIVE c(x) AS (SELECT 1 UNION ALL SELECT x + 1 FROM c) SELECT x FROM c";
        let err = run_sql(&path, many, &limits).unwrap_err().to_string();
        assert!(err.contains("row limit of 100"), "{err}");
    }

    #[test]
    fn huge_values_are_refused_at_the_value_limit() {
        let (_dir, path) = store();
        for sql in [
            "SELECT zeroblob(1000000000) AS b",
            "SELECT length(zeroblob(1000000000)) AS n",
            "SELECT printf('%.*c', 200000000, 'x') AS s",
            "WITH RECURSIVE c(x) AS (SELECT 1 UNION ALL SELECT x + 1 FROM c LIMIT 20)
             SELECT length(group_concat(printf('%.*c', 1000000, 'x'))) FROM c",
        ] {
            let message = refused(&path, sql);
            assert!(message.contains("value limit of 16 MiB"), "{sql}: {message}");
        }
        let small = SqlLimits { max_value_bytes: 1000, ..SqlLimits::default() };
        let message = run_sql(&path, "SELECT printf('%.*c', 1001, 'x')", &small).unwrap_err().to_string();
        assert_eq!(
            message,
            "query stopped: it would build a value larger than the value limit of 1000 bytes"
        );
        let fits = run_sql(&path, "SELECT length(printf('%.*c', 1000, 'x')) AS n", &small).unwrap();
        assert_eq!(fits.rows, [[Cell::Int(1000)]]);
    }

    #[test]
    fn answers_stop_at_the_answer_limit() {
        let (_dir, path) = store();
        let limits = SqlLimits { max_answer_bytes: 16 * 1024, ..SqlLimits::default() };
        let many = "WITH RECURSIVE c(x) AS (SELECT 1 UNION ALL SELECT x + 1 FROM c LIMIT 1000)
                    SELECT printf('%.*c', 100, 'x') AS s FROM c";
        let message = run_sql(&path, many, &limits).unwrap_err().to_string();
        assert!(
            message.starts_with("query stopped: its answer is larger than the answer limit of 16 KiB"),
            "{message}"
        );
        // A wide row of tiny cells counts as the memory it takes, not as its few bytes of text.
        let wide: Vec<String> = (0..300).map(|i| format!("{i} AS c{i}")).collect();
        let message =
            run_sql(&path, &format!("SELECT {}", wide.join(", ")), &limits).unwrap_err().to_string();
        assert!(message.contains("answer limit"), "{message}");
        let fine = run_sql(&path, &many.replace("LIMIT 1000", "LIMIT 50"), &limits).unwrap();
        assert_eq!(fine.rows.len(), 50);
    }

    #[test]
    fn cells_cost_their_json_text_their_column_and_a_fixed_overhead() {
        let check = |column: &str, value: Cell, expected: usize| {
            assert_eq!(cell_bytes(column, &value), expected + CELL_OVERHEAD_BYTES, "{column} {value:?}");
        };
        check("n", Cell::Int(7), 24 + 1);
        check("n", Cell::Null, 24 + 1);
        check("name", Cell::Text("Amberlee".into()), 8 + 4);
        check("q", Cell::Text("say \"hi\"\\".into()), 12 + 1);
        check("c", Cell::Text("\u{1}\n".into()), 12 + 1);
        check("é", Cell::Text("ü".into()), 2 + 2);
        assert_eq!(size_text(16 * 1024 * 1024), "16 MiB");
        assert_eq!(size_text(64 * 1024), "64 KiB");
        assert_eq!(size_text(1000), "1000 bytes");
    }

    #[test]
    fn syntax_errors_and_empty_sql_are_clear() {
        let (_dir, path) = store();
        assert!(refused(&path, "SELEC 1").starts_with("query failed: "));
        assert_eq!(refused(&path, "  "), "query: the SQL is empty");
    }
}
