//! Analysts' SQL (`tidemark query` and the API's `POST /api/v1/query`): one statement on a
//! fresh connection that cannot write, in three independent layers — read-only open flags
//! and `query_only` (from `open_reader`), and an authorizer that refuses at prepare time
//! anything but reading: writes, schema changes, ATTACH/DETACH, transactions, PRAGMAs other
//! than a short list of schema-describing ones, and the `load_extension` function. A row
//! limit and a time limit (a progress handler) stop runaway queries. Errors say what was
//! refused and why, never a cell value.

use std::path::Path;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

use rusqlite::hooks::{AuthAction, AuthContext, Authorization};

use super::read::cell;
use super::{StoreError, open_reader};
use crate::table::Table;

/// Default row limit: enough for any listing a person reads or a spreadsheet holds, small
/// enough that a forgotten WHERE does not stream the whole line list into memory.
pub const DEFAULT_MAX_ROWS: usize = 10_000;

/// Default time limit: an aggregate over a million versions takes well under a second here,
/// so ten seconds only stops queries that would run for much longer (runaway recursion,
/// cross joins).
pub const DEFAULT_TIMEOUT: Duration = Duration::from_secs(10);

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

/// The limits of one query.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct SqlLimits {
    pub max_rows: usize,
    pub timeout: Duration,
}

impl Default for SqlLimits {
    fn default() -> SqlLimits {
        SqlLimits { max_rows: DEFAULT_MAX_ROWS, timeout: DEFAULT_TIMEOUT }
    }
}

/// Runs one statement that only reads on a fresh read-only connection to the store at
/// `path`, within `limits`.
pub fn run_sql(path: &Path, sql: &str, limits: &SqlLimits) -> Result<Table, StoreError> {
    let mut conn = open_reader(path)?;
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
        StoreError::Refused(format!("query failed: {err}"))
    };
    let table = collect(&conn, sql, limits.max_rows).map_err(|err| match err {
        Collect::Sql(err) => explain(err),
        Collect::Other(err) => err,
    });
    // Drop the hooks before the connection closes (they hold nothing that needs it, but a
    // connection without them is the ordinary state).
    let _ = conn.progress_handler(0, None::<fn() -> bool>);
    let _ = conn.authorizer(None::<fn(AuthContext<'_>) -> Authorization>);
    table
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

fn collect(conn: &rusqlite::Connection, sql: &str, max_rows: usize) -> Result<Table, Collect> {
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
    let mut table = Table { columns, rows: Vec::new() };
    let mut rows = stmt.query([])?;
    while let Some(row) = rows.next()? {
        if table.rows.len() >= max_rows {
            return Err(Collect::Other(StoreError::Refused(format!(
                "query stopped: it returns more than the row limit of {max_rows}; add a LIMIT or aggregate"
            ))));
        }
        table.rows.push((0..width).map(|idx| cell(row.get_ref(idx))).collect::<Result<_, _>>()?);
    }
    Ok(table)
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
        assert_eq!(table.rows, [[crate::table::Cell::Int(2)]]);
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
        let limits = SqlLimits { max_rows: 100, timeout: Duration::from_millis(300) };
        let started = Instant::now();
        let err = run_sql(&path, forever, &limits).unwrap_err().to_string();
        assert!(err.contains("time limit of 0.3 s"), "{err}");
        assert!(started.elapsed() < Duration::from_secs(5), "took {:?}", started.elapsed());
        let many = "WITH RECURSIVE c(x) AS (SELECT 1 UNION ALL SELECT x + 1 FROM c) SELECT x FROM c";
        let err = run_sql(&path, many, &limits).unwrap_err().to_string();
        assert!(err.contains("row limit of 100"), "{err}");
    }

    #[test]
    fn syntax_errors_and_empty_sql_are_clear() {
        let (_dir, path) = store();
        assert!(refused(&path, "SELEC 1").starts_with("query failed: "));
        assert_eq!(refused(&path, "  "), "query: the SQL is empty");
    }
}
