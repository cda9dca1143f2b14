//! Crash safety: a real `tidemark ingest` process is SIGKILLed at 20 different moments of a
//! large ingest, and at 6 more late in it, where the post-snapshot analysis runs. Afterwards
//! the store must pass `PRAGMA integrity_check`, every snapshot must be all or nothing, and
//! ingesting the same file again must converge to the state of an uninterrupted run, with
//! no analysis lost: the latest applied snapshot's quality measures, nowcasts and delay fits
//! are stored and nothing is left owed.

use std::fs;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use rusqlite::Connection;

const KILLS: usize = 20;
/// Kills between 80% and 110% of an uninterrupted run: in the commit's last moments and
/// in the analysis after it.
const LATE_KILLS: usize = 6;
const ROWS: usize = 40_000;

fn write_config(dir: &Path) -> PathBuf {
    let path = dir.join("tidemark.toml");
    let text = "[store]\npath = \"data/t.db\"\narchive = \"data/archive\"\n\
        [[source]]\nname = \"feed\"\nkind = \"folder\"\npath = \"in\"\nkey = \"id\"\n\
        [source.fields]\nonset_date = \"onset\"\njurisdiction = \"district\"\nage = \"age\"\nsymptoms = \"symptoms\"\n";
    fs::write(&path, text).unwrap();
    path
}

/// A full extract; `day` shifts a share of onsets and adds rows so the second one changes a lot.
fn extract(day: usize) -> String {
    let mut out = String::from("id,onset,district,age,symptoms\n");
    for idx in 0..ROWS + day * 500 {
        let onset = 1 + (idx * 7 + if idx % 3 == 0 { day } else { 0 }) % 28;
        let district = ["Amberlee", "Brackwater", "Dunhollow"][idx % 3];
        out.push_str(&format!(
            "C-{idx:06},2026-02-{onset:02},{district},{},cough;38.{} C\n",
            idx % 90,
            idx % 10
        ));
    }
    out
}

fn tidemark(config: &Path) -> Command {
    let mut cmd = Command::new(assert_cmd::cargo::cargo_bin!("tidemark"));
    cmd.arg("--config").arg(config).stdout(Stdio::null()).stderr(Stdio::null());
    cmd
}

fn ingest(config: &Path, file: &Path, as_of: &str) -> Command {
    let mut cmd = tidemark(config);
    cmd.args(["ingest", "--source", "feed", "--as-of", as_of]).arg(file);
    cmd
}

/// (key, onset) of every current record, and (status, new, changed) of every snapshot.
type StoreState = (Vec<(String, Option<String>)>, Vec<(String, i64, i64)>);

fn state(db: &Path) -> StoreState {
    let conn = Connection::open(db).unwrap();
    let mut stmt = conn
        .prepare("SELECT case_key, onset_date FROM case_version WHERE valid_to IS NULL ORDER BY case_key")
        .unwrap();
    let current = stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?))).unwrap().map(Result::unwrap).collect();
    let mut stmt = conn
        .prepare("SELECT status, rows_new, rows_changed FROM snapshot WHERE status = 'applied' ORDER BY snapshot_id")
        .unwrap();
    let snapshots =
        stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?))).unwrap().map(Result::unwrap).collect();
    (current, snapshots)
}

/// Integrity, and every snapshot all or nothing: an applied snapshot wrote exactly the versions
/// its counts say, and any other snapshot wrote none.
fn check_consistent(db: &Path) {
    let conn = Connection::open(db).unwrap();
    let integrity: String = conn.query_row("PRAGMA integrity_check", [], |r| r.get(0)).unwrap();
    assert_eq!(integrity, "ok");
    let mut stmt = conn
        .prepare(
            "SELECT n.snapshot_id, n.status, n.rows_new + n.rows_changed, n.rows_changed + n.rows_removed,
                    (SELECT count(*) FROM case_version v WHERE v.valid_from = n.snapshot_id),
                    (SELECT count(*) FROM case_version v WHERE v.valid_to = n.snapshot_id)
             FROM snapshot n",
        )
        .unwrap();
    let rows = stmt
        .query_map([], |r| {
            Ok((r.get::<_, i64>(0)?, r.get::<_, String>(1)?, r.get(2)?, r.get(3)?, r.get(4)?, r.get(5)?))
        })
        .unwrap();
    for row in rows {
        let (id, status, written, closed, opened_found, closed_found): (i64, String, i64, i64, i64, i64) =
            row.unwrap();
        if status == "applied" {
            assert_eq!((opened_found, closed_found), (written, closed), "snapshot {id} is partial");
        } else {
            assert_eq!((opened_found, closed_found), (0, 0), "{status} snapshot {id} wrote versions");
        }
    }
}

/// No analysis lost: nothing owed, and the latest applied snapshot's results are stored.
fn check_analysed(db: &Path, after: &str) {
    let conn = Connection::open(db).unwrap();
    let count = |sql: &str| -> i64 { conn.query_row(sql, [], |r| r.get(0)).unwrap() };
    let owed = count("SELECT count(*) FROM analysis_owed WHERE state IN ('pending', 'failed')");
    assert_eq!(owed, 0, "analyses still owed {after}");
    let latest = "(SELECT max(snapshot_id) FROM snapshot WHERE status = 'applied')";
    for table in ["quality", "nowcast", "delay_fit"] {
        let rows = count(&format!("SELECT count(*) FROM {table} WHERE snapshot_id = {latest}"));
        assert!(rows > 0, "no {table} rows for the latest applied snapshot {after}");
    }
}

fn copy_dir(from: &Path, to: &Path) {
    fs::create_dir_all(to).unwrap();
    for entry in fs::read_dir(from).unwrap() {
        let entry = entry.unwrap();
        let target = to.join(entry.file_name());
        if entry.file_type().unwrap().is_dir() {
            copy_dir(&entry.path(), &target);
        } else {
            fs::copy(entry.path(), target).unwrap();
        }
    }
}

#[test]
fn sigkill_during_ingest_leaves_a_consistent_store_that_converges() {
    let root = tempfile::tempdir().unwrap();
    let base = root.path().join("base");
    fs::create_dir_all(&base).unwrap();
    let config = write_config(&base);
    let first = root.path().join("day1.csv");
    let second = root.path().join("day2.csv");
    fs::write(&first, extract(1)).unwrap();
    fs::write(&second, extract(2)).unwrap();
    assert!(ingest(&config, &first, "2026-03-01").status().unwrap().success());

    // The uninterrupted run, timed, gives the state to converge to.
    let reference = root.path().join("reference");
    copy_dir(&base, &reference);
    let started = Instant::now();
    assert!(ingest(&write_config(&reference), &second, "2026-03-02").status().unwrap().success());
    let full_time = started.elapsed();
    let want = state(&reference.join("data/t.db"));

    check_analysed(&reference.join("data/t.db"), "after an uninterrupted run");

    // The pace of a run changes with the machine's load (the other tests run beside this one),
    // so the schedule follows it: a kill that found the ingest already finished shortens the
    // pace, and an interrupted ingest's full re-run measures it afresh.
    let mut pace = full_time;
    let mut interrupted = 0;
    for kill in 0..KILLS + LATE_KILLS {
        let dir = root.path().join(format!("kill-{kill:02}"));
        copy_dir(&base, &dir);
        let config = write_config(&dir);
        // Over the first 80% of the run, where the ingest itself runs; then later, into the
        // analyses after the commit.
        let share = if kill < KILLS {
            kill as f64 / KILLS as f64 * 0.8
        } else {
            0.8 + (kill - KILLS + 1) as f64 / LATE_KILLS as f64 * 0.3
        };
        let delay = pace.mul_f64(share);
        let mut child = ingest(&config, &second, "2026-03-02").spawn().unwrap();
        std::thread::sleep(delay.max(Duration::from_millis(5)));
        let _ = child.kill(); // SIGKILL on Unix
        let _ = child.wait();
        let db = dir.join("data/t.db");
        check_consistent(&db);
        let was_interrupted = state(&db).1.len() < want.1.len();
        let rerun = Instant::now();
        assert!(
            ingest(&config, &second, "2026-03-02").status().unwrap().success(),
            "re-ingest after kill {kill}"
        );
        if was_interrupted {
            interrupted += 1;
            pace = pace.min(rerun.elapsed());
        } else if kill < KILLS {
            pace = pace.mul_f64(0.8);
        }
        check_consistent(&db);
        let got = state(&db);
        assert_eq!(got.0, want.0, "current records differ after kill {kill} ({delay:?})");
        assert_eq!(got.1, want.1, "applied snapshots differ after kill {kill} ({delay:?})");
        check_analysed(&db, &format!("after kill {kill} ({delay:?}) and a re-ingest"));
    }
    // The kills must really land inside the ingest, not only after it finished.
    assert!(interrupted >= KILLS / 2, "only {interrupted} of {KILLS} kills interrupted the ingest");
}
