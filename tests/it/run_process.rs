//! The real `tidemark run` process: extracts dropped into its folder are ingested; `/healthz`
//! and `/metrics` answer; a second `run` and an `ingest` on the same store are refused while
//! it runs; SIGTERM during a large ingest exits 0 within 10 s and leaves a consistent store;
//! an unreadable file (tried as an unprivileged user) is reported without stopping the poll.

use std::fs;
use std::net::TcpListener;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use rusqlite::Connection;

use crate::support::get;

fn free_port() -> u16 {
    TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port()
}

fn write_config(dir: &Path, port: u16) -> PathBuf {
    let path = dir.join("tidemark.toml");
    let text = format!(
        "[store]\npath = \"data/t.db\"\narchive = \"data/archive\"\n\
         [[source]]\nname = \"county\"\nkind = \"folder\"\npath = \"inbox\"\npattern = \"*.csv\"\n\
         schedule = \"* * * * * *\"\nsettle = \"100ms\"\nas_of = \"name:%Y-%m-%d\"\nkey = \"id\"\n\
         [source.fields]\nonset_date = \"onset\"\njurisdiction = \"district\"\n\
         [serve]\nbind = \"127.0.0.1:{port}\"\n"
    );
    fs::create_dir_all(dir.join("inbox")).unwrap();
    fs::write(&path, text).unwrap();
    path
}

fn tidemark(config: &Path) -> Command {
    let mut cmd = Command::new(assert_cmd::cargo::cargo_bin!("tidemark"));
    cmd.arg("--config").arg(config);
    cmd
}

fn spawn_run(config: &Path, ops: bool) -> Child {
    let mut cmd = tidemark(config);
    cmd.arg("run");
    if !ops {
        cmd.arg("--no-ops");
    }
    cmd.stdout(Stdio::null()).stderr(Stdio::piped()).spawn().unwrap()
}

fn extract(rows: usize) -> String {
    let mut text = String::from("id,onset,district\n");
    for idx in 0..rows {
        text.push_str(&format!("C-{idx:06},2026-02-{:02},Amberlee\n", 1 + idx % 28));
    }
    text
}

fn wait_for(what: &str, timeout: Duration, mut ready: impl FnMut() -> bool) {
    let started = Instant::now();
    while !ready() {
        assert!(started.elapsed() < timeout, "timed out waiting for {what}");
        std::thread::sleep(Duration::from_millis(50));
    }
}

fn applied(db: &Path) -> i64 {
    let Ok(conn) = Connection::open(db) else { return 0 };
    conn.query_row("SELECT count(*) FROM snapshot WHERE status = 'applied'", [], |r| r.get(0)).unwrap_or(0)
}

fn sigterm(child: &Child) {
    let status = Command::new("kill").args(["-TERM", &child.id().to_string()]).status().unwrap();
    assert!(status.success());
}

fn wait_exit(child: &mut Child, within: Duration) -> std::process::ExitStatus {
    let started = Instant::now();
    loop {
        if let Some(status) = child.try_wait().unwrap() {
            return status;
        }
        assert!(started.elapsed() < within, "tidemark run did not exit within {within:?}");
        std::thread::sleep(Duration::from_millis(20));
    }
}

#[test]
fn run_ingests_dropped_files_serves_ops_and_refuses_a_second_writer() {
    let dir = tempfile::tempdir().unwrap();
    let port = free_port();
    let config = write_config(dir.path(), port);
    let db = dir.path().join("data/t.db");
    let mut daemon = spawn_run(&config, true);
    wait_for("/healthz", Duration::from_secs(20), || get(port, "/healthz").is_some_and(|(s, _)| s == 200));

    fs::write(dir.path().join("inbox/county-2026-03-01.csv"), extract(20)).unwrap();
    fs::write(dir.path().join("inbox/county-2026-03-02.csv"), extract(25)).unwrap();
    wait_for("two snapshots", Duration::from_secs(20), || applied(&db) == 2);
    // The counters move when the poll ends, just after its snapshots are committed.
    let counted = "tidemark_ingests_total{source=\"county\",status=\"applied\"} 2";
    wait_for("the metrics", Duration::from_secs(20), || {
        get(port, "/metrics").is_some_and(|(_, m)| m.contains(counted))
    });
    let (status, metrics) = get(port, "/metrics").unwrap();
    assert_eq!(status, 200);
    assert!(metrics.contains("tidemark_ingests_total{source=\"county\",status=\"applied\"} 2"), "{metrics}");
    assert!(metrics.contains("tidemark_rows_total{source=\"county\"} 45"), "{metrics}");
    assert!(metrics.contains("tidemark_seconds_since_last_success{source=\"county\"}"), "{metrics}");

    let second = tidemark(&config).arg("run").output().unwrap();
    assert!(!second.status.success());
    let message = String::from_utf8_lossy(&second.stderr);
    assert!(message.contains(&format!("another tidemark process (pid {})", daemon.id())), "{message}");

    fs::write(dir.path().join("manual.csv"), extract(3)).unwrap();
    let ingest = tidemark(&config)
        .args(["ingest", "--source", "county", "--as-of", "2026-03-05"])
        .arg(dir.path().join("manual.csv"))
        .output()
        .unwrap();
    assert!(!ingest.status.success(), "an ingest beside the daemon must be refused");
    assert!(String::from_utf8_lossy(&ingest.stderr).contains("is writing to"));

    let status = tidemark(&config).arg("status").output().unwrap();
    let text = String::from_utf8_lossy(&status.stdout);
    assert!(text.contains(&format!("daemon: running (pid {})", daemon.id())), "{text}");
    assert!(text.contains("county") && text.contains("folder"), "{text}");

    sigterm(&daemon);
    assert!(wait_exit(&mut daemon, Duration::from_secs(10)).success());
    let text =
        String::from_utf8_lossy(&tidemark(&config).arg("status").output().unwrap().stdout).into_owned();
    assert!(text.contains("daemon: not running"), "{text}");
}

#[test]
fn sigterm_during_a_large_ingest_exits_zero_and_leaves_a_consistent_store() {
    let dir = tempfile::tempdir().unwrap();
    let config = write_config(dir.path(), free_port());
    let db = dir.path().join("data/t.db");
    let mut daemon = spawn_run(&config, false);
    fs::write(dir.path().join("inbox/county-2026-03-01.csv"), extract(300)).unwrap();
    wait_for("the first snapshot", Duration::from_secs(20), || applied(&db) == 1);
    let stderr = daemon.stderr.take().unwrap();
    let (lines_tx, lines) = std::sync::mpsc::channel::<String>();
    std::thread::spawn(move || {
        for line in std::io::BufRead::lines(std::io::BufReader::new(stderr)) {
            let _ = lines_tx.send(line.unwrap_or_default());
        }
    });
    fs::write(dir.path().join("inbox/county-2026-03-02.csv"), extract(400_000)).unwrap();
    // Wait until the ingest is under way (its first progress line), then stop the daemon.
    let mut log = Vec::new();
    while !log.iter().any(|l: &String| l.contains("staging rows")) {
        log.push(lines.recv_timeout(Duration::from_secs(120)).expect("no progress line from the ingest"));
    }
    sigterm(&daemon);
    let status = wait_exit(&mut daemon, Duration::from_secs(10));
    assert!(status.success(), "{status:?}");
    log.extend(lines.try_iter());
    let conn = Connection::open(&db).unwrap();
    let integrity: String = conn.query_row("PRAGMA integrity_check", [], |r| r.get(0)).unwrap();
    assert_eq!(integrity, "ok");
    let (snapshots, versions): (i64, i64) = conn
        .query_row("SELECT (SELECT count(*) FROM snapshot), (SELECT count(*) FROM case_version)", [], |r| {
            Ok((r.get(0)?, r.get(1)?))
        })
        .unwrap();
    assert_eq!((snapshots, versions), (1, 300), "the interrupted ingest must roll back entirely");
    let log = log.join("\n");
    assert!(log.contains("stopping"), "{log}");
    assert!(!log.contains("C-0"), "a log line carried a case key");
    // After a restart the file is taken again and applied whole.
    let mut daemon = spawn_run(&config, false);
    wait_for("the big snapshot", Duration::from_secs(120), || applied(&db) == 2);
    sigterm(&daemon);
    assert!(wait_exit(&mut daemon, Duration::from_secs(10)).success());
}

/// Root reads any file, so the permission test runs the daemon as `nobody` with setpriv.
#[test]
fn an_unreadable_file_is_reported_and_the_others_are_ingested() {
    if Command::new("setpriv").arg("--version").output().is_err() {
        panic!("setpriv (util-linux) is needed to run this test as an unprivileged user");
    }
    let dir = tempfile::tempdir().unwrap();
    let config = write_config(dir.path(), free_port());
    fs::write(dir.path().join("inbox/county-2026-03-01.csv"), extract(5)).unwrap();
    fs::write(dir.path().join("inbox/county-2026-03-02.csv"), extract(6)).unwrap();
    let locked = dir.path().join("inbox/county-2026-03-02.csv");
    Command::new("chmod").arg("000").arg(&locked).status().unwrap();
    // The build folder may not be reachable by `nobody` (a clone under a 0700 folder), so
    // the unprivileged daemon runs from a copy of the binary inside the test folder.
    let binary = dir.path().join("tidemark");
    fs::copy(assert_cmd::cargo::cargo_bin!("tidemark"), &binary).unwrap();
    Command::new("chown").args(["-R", "65534:65534"]).arg(dir.path()).status().unwrap();
    Command::new("chown").arg("0:0").arg(&locked).status().unwrap();
    let mut daemon = Command::new("setpriv")
        .args(["--reuid=65534", "--regid=65534", "--clear-groups"])
        .arg(&binary)
        .arg("--config")
        .arg(&config)
        .args(["run", "--no-ops"])
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let db = dir.path().join("data/t.db");
    wait_for("the readable file", Duration::from_secs(20), || applied(&db) == 1);
    let error = || -> Option<String> {
        let conn = Connection::open(&db).ok()?;
        conn.query_row("SELECT last_error FROM source_health", [], |r| r.get(0)).ok()?
    };
    wait_for("the error report", Duration::from_secs(20), || error().is_some());
    assert!(error().unwrap().contains("county-2026-03-02.csv: cannot be read"), "{:?}", error());
    sigterm(&daemon);
    assert!(wait_exit(&mut daemon, Duration::from_secs(10)).success());
}
