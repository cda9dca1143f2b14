//! Shared helpers for the integration tests: a small config with the invented test feed's
//! column mapping, writing extracts into a temporary folder, running the real `tidemark`
//! binary, and read-only SQL checks of the store. Everything is invented: keys like `C-0001`,
//! jurisdictions like "Amberlee" and "Brackwater".

#![allow(dead_code)]

use std::path::{Path, PathBuf};

use chrono::{DateTime, NaiveDate, Utc};
use rusqlite::{Connection, OpenFlags};

use tidemark::app::ingest::{IngestOutcome, end_of_day};
use tidemark::app::pipeline::ingest_file;
use tidemark::config::Config;
use tidemark::store::{Store, StoreError};

pub type TestResult = Result<(), Box<dyn std::error::Error>>;

/// The header of the invented test feed.
pub const HEADER: &str = "case_id,district,onset,reported,age,sex,symptoms";

/// The as-of date the bad corpus is ingested with: dates after it are impossible.
pub const CORPUS_AS_OF: &str = "2026-03-10";

/// The folder of committed fixtures.
pub fn data_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests").join("data")
}

/// The end of day `offset` days after 2026-03-01 (UTC), the as-of time of a test extract.
pub fn day(offset: i64) -> DateTime<Utc> {
    let start = NaiveDate::from_ymd_opt(2026, 3, 1).unwrap();
    end_of_day(start + chrono::Duration::days(offset))
}

/// The end of the corpus as-of day.
pub fn corpus_as_of() -> DateTime<Utc> {
    end_of_day(CORPUS_AS_OF.parse().unwrap())
}

/// One `[[source]]` table mapping the test feed's columns. `extra` is appended to the table
/// (before its sub-tables), e.g. `hold_fraction = 0.5`.
pub fn source_toml(name: &str, format: &str, extract: &str, extra: &str) -> String {
    format!(
        r#"
[[source]]
name = "{name}"
kind = "folder"
path = "incoming/{name}"
format = "{format}"
extract = "{extract}"
key = "case_id"
{extra}

[source.fields]
jurisdiction = "district"
onset_date = "onset"
report_date = "reported"
age = "age"
sex = "sex"
symptoms = "symptoms"

[source.values.sex]
F = "female"
M = "male"
"#
    )
}

/// A whole config: the store in `store/` next to the config file, then the sources.
pub fn config_toml(sources: &[String]) -> String {
    let mut text = String::from("[store]\npath = \"store/tidemark.db\"\narchive = \"store/archive\"\n");
    for source in sources {
        text.push_str(source);
    }
    text
}

/// Writes `text` as `dir/tidemark.toml` and loads it.
pub fn write_config(dir: &Path, text: &str) -> (PathBuf, Config) {
    let path = dir.join("tidemark.toml");
    std::fs::write(&path, text).unwrap();
    let config = Config::load(&path).unwrap_or_else(|err| panic!("test config is invalid: {err}"));
    (path, config)
}

/// A CSV extract of the test feed: the header and these rows.
pub fn csv(rows: &[&str]) -> String {
    let mut text = format!("{HEADER}\n");
    for row in rows {
        text.push_str(row);
        text.push('\n');
    }
    text
}

/// A temporary folder with a config and a store, for library-level tests.
pub struct Env {
    pub dir: tempfile::TempDir,
    pub config_path: PathBuf,
    pub config: Config,
    extracts: u32,
}

impl Env {
    /// Sources `full` (CSV, full extracts) and `delta` (CSV, delta extracts).
    pub fn new() -> Env {
        Env::with_sources(&[source_toml("full", "csv", "full", ""), source_toml("delta", "csv", "delta", "")])
    }

    pub fn with_sources(sources: &[String]) -> Env {
        let dir = tempfile::tempdir().unwrap();
        let (config_path, config) = write_config(dir.path(), &config_toml(sources));
        Env { dir, config_path, config, extracts: 0 }
    }

    pub fn store_path(&self) -> PathBuf {
        self.config.store.path.clone()
    }

    /// Writes `text` to a new file in the extracts folder and returns its path.
    pub fn write_extract(&mut self, name: &str, text: &[u8]) -> PathBuf {
        self.extracts += 1;
        let folder = self.dir.path().join("extracts");
        std::fs::create_dir_all(&folder).unwrap();
        let path = folder.join(format!("{:03}-{name}", self.extracts));
        std::fs::write(&path, text).unwrap();
        path
    }

    /// Ingests `text` for `source` with the given as-of time, through the library API.
    pub fn ingest(&mut self, source: &str, text: &str, as_of: DateTime<Utc>) -> IngestOutcome {
        let path = self.write_extract(&format!("{source}.csv"), text.as_bytes());
        self.ingest_path(source, &path, as_of)
    }

    pub fn ingest_path(&self, source: &str, path: &Path, as_of: DateTime<Utc>) -> IngestOutcome {
        let source = self.config.source(source).expect("source in the test config");
        let mut store = open_store(&self.config.store.path);
        ingest_file(&mut store, &self.config, source, path, Some(as_of)).unwrap()
    }

    pub fn db(&self) -> Connection {
        open_ro(&self.config.store.path)
    }
}

/// How long a test waits for the writer lock (see `open_store`).
const LOCK_WAIT: std::time::Duration = std::time::Duration::from_secs(10);

/// Whether an error is the store's writer lock being held.
fn is_locked(err: &anyhow::Error) -> bool {
    err.chain().any(|cause| matches!(cause.downcast_ref::<StoreError>(), Some(StoreError::Locked(_))))
}

/// Opens the store for writing, waiting while the writer lock is held. Within this test
/// process the lock is only ever held briefly by a child of *another* test: a child spawned
/// between fork and exec shares the parent's open lock file (`flock` belongs to the open file
/// description), so a test that closes and reopens its store can find it locked for a moment.
pub fn open_store(path: &Path) -> Store {
    retry_locked(|| Ok(Store::open(path)?)).unwrap()
}

/// Runs `f`, again while it fails only because the writer lock is held (see `open_store`).
pub fn retry_locked<T>(mut f: impl FnMut() -> anyhow::Result<T>) -> anyhow::Result<T> {
    let start = std::time::Instant::now();
    loop {
        match f() {
            Err(err) if is_locked(&err) && start.elapsed() < LOCK_WAIT => {
                std::thread::sleep(std::time::Duration::from_millis(20));
            }
            other => return other,
        }
    }
}

/// A read-only connection for checks (never the product's code path).
pub fn open_ro(path: &Path) -> Connection {
    Connection::open_with_flags(path, OpenFlags::SQLITE_OPEN_READ_ONLY).unwrap()
}

/// The first column of the first row of `sql`, as an integer.
pub fn count(conn: &Connection, sql: &str) -> i64 {
    conn.query_row(sql, [], |row| row.get(0)).unwrap_or_else(|err| panic!("{sql}: {err}"))
}

/// `PRAGMA integrity_check` of the store at `path`: "ok" when intact.
pub fn integrity_check(path: &Path) -> String {
    let conn = open_ro(path);
    conn.query_row("PRAGMA integrity_check", [], |row| row.get(0)).unwrap()
}

/// The real binary, without any config from the environment of whoever runs the tests.
pub fn tidemark() -> assert_cmd::Command {
    let mut cmd = assert_cmd::Command::cargo_bin("tidemark").unwrap();
    cmd.env_remove("TIDEMARK_CONFIG").env_remove("TIDEMARK_LOG");
    cmd.timeout(std::time::Duration::from_secs(120));
    cmd
}

/// Runs a command and returns (exit code, stdout, stderr), asserting it did not panic.
pub fn run(cmd: &mut assert_cmd::Command) -> (i32, String, String) {
    let output = cmd.output().unwrap();
    let stdout = String::from_utf8_lossy(&output.stdout).into_owned();
    let stderr = String::from_utf8_lossy(&output.stderr).into_owned();
    assert!(
        !stdout.contains("panicked") && !stderr.contains("panicked"),
        "the command panicked:\nstdout: {stdout}\nstderr: {stderr}"
    );
    let code = output.status.code().expect("the command was killed by a signal");
    (code, stdout, stderr)
}

/// Unix permission bits of a file.
pub fn mode(path: &Path) -> u32 {
    use std::os::unix::fs::PermissionsExt;
    std::fs::metadata(path).unwrap_or_else(|err| panic!("{}: {err}", path.display())).permissions().mode()
        & 0o777
}

/// A plain HTTP/1.1 GET on loopback: (status, body).
pub fn get(port: u16, path: &str) -> Option<(u16, String)> {
    use std::io::{Read, Write};
    let mut stream = std::net::TcpStream::connect(("127.0.0.1", port)).ok()?;
    stream.set_read_timeout(Some(std::time::Duration::from_secs(5))).ok()?;
    write!(stream, "GET {path} HTTP/1.1\r\nHost: localhost\r\nConnection: close\r\n\r\n").ok()?;
    let mut response = String::new();
    stream.read_to_string(&mut response).ok()?;
    let status = response.split(' ').nth(1)?.parse().ok()?;
    let body = response.split_once("\r\n\r\n").map(|(_, b)| b.to_string()).unwrap_or_default();
    Some((status, body))
}

/// A line of `/proc/PID/status` in KiB (e.g. `VmHWM`, the peak resident set), while the
/// process is alive.
pub fn proc_status_kib(pid: u32, key: &str) -> Option<u64> {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).ok()?;
    let line = status.lines().find(|l| l.strip_prefix(key).is_some_and(|rest| rest.starts_with(':')))?;
    line.split_whitespace().nth(1)?.parse().ok()
}

/// A real SMTP server's handler (mailin-embedded) that keeps every message it receives.
#[derive(Clone, Default)]
pub struct Mailbox {
    current: std::sync::Arc<std::sync::Mutex<Vec<u8>>>,
    pub messages: std::sync::Arc<std::sync::Mutex<Vec<String>>>,
}

impl Mailbox {
    /// Serves SMTP on `listener` in a thread of its own; the mailbox keeps what arrives.
    pub fn serve(listener: std::net::TcpListener) -> Mailbox {
        let mailbox = Mailbox::default();
        let mut server = mailin_embedded::Server::new(mailbox.clone());
        server.with_name("it.invalid").with_tcp_listener(listener);
        std::thread::spawn(move || {
            let _ = server.serve();
        });
        mailbox
    }
}

impl mailin_embedded::Handler for Mailbox {
    fn data(&mut self, buf: &[u8]) -> std::io::Result<()> {
        self.current.lock().unwrap().extend_from_slice(buf);
        Ok(())
    }

    fn data_end(&mut self) -> mailin_embedded::Response {
        let bytes = std::mem::take(&mut *self.current.lock().unwrap());
        self.messages.lock().unwrap().push(String::from_utf8_lossy(&bytes).into_owned());
        mailin_embedded::response::OK
    }
}
