//! Folder sources through the real daemon, in process: partially written files, renames,
//! symlink escapes, many files at once (taken in as-of order), and a restart with files
//! already ingested. Each test runs `daemon::run` on a temporary store and drives polls with
//! nudges, waiting for the daemon's poll events.

use std::collections::HashMap;
use std::fs;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

use tidemark::app::daemon::{self, Hooks, PollEvent};
use tidemark::config::Config;
use tidemark::store::Reader;
use tokio::sync::{Notify, mpsc};
use tokio::task::JoinHandle;
use tokio_util::sync::CancellationToken;

const SOURCE: &str = "county";

/// A daemon running on a temporary store with one folder source.
struct Running {
    dir: PathBuf,
    inbox: PathBuf,
    events: mpsc::UnboundedReceiver<PollEvent>,
    nudge: Arc<Notify>,
    shutdown: CancellationToken,
    task: JoinHandle<anyhow::Result<()>>,
}

fn config(dir: &Path, extra: &str) -> Arc<Config> {
    let text = format!(
        "[store]\npath = \"data/t.db\"\narchive = \"data/archive\"\n\
         [[source]]\nname = \"{SOURCE}\"\nkind = \"folder\"\npath = \"inbox\"\npattern = \"*.csv\"\n\
         schedule = \"0 0 0 1 1 *\"\nsettle = \"150ms\"\nas_of = \"name:%Y-%m-%d\"\nkey = \"id\"\n{extra}\n\
         [source.fields]\nonset_date = \"onset\"\n"
    );
    Arc::new(Config::parse(&text, &dir.join("t.toml")).unwrap())
}

fn start(dir: &Path, extra: &str) -> Running {
    let inbox = dir.join("inbox");
    fs::create_dir_all(&inbox).unwrap();
    let (tx, events) = mpsc::unbounded_channel();
    let nudge = Arc::new(Notify::new());
    let hooks = Hooks {
        events: Some(tx),
        nudges: HashMap::from([(SOURCE.to_string(), nudge.clone())]),
        analysed: None,
        analysis_gate: None,
    };
    let shutdown = CancellationToken::new();
    let task = tokio::spawn(daemon::run(config(dir, extra), shutdown.clone(), hooks, None));
    Running { dir: dir.to_path_buf(), inbox, events, nudge, shutdown, task }
}

impl Running {
    /// Asks for a poll and waits for one that started after the request. Snapshots taken
    /// by polls that were already under way are added to the result.
    async fn poll(&mut self) -> PollEvent {
        let mark = Instant::now();
        self.nudge.notify_one();
        let mut earlier = Vec::new();
        loop {
            let mut event =
                tokio::time::timeout(Duration::from_secs(20), self.events.recv()).await.unwrap().unwrap();
            if event.started >= mark {
                earlier.append(&mut event.snapshots);
                event.snapshots = earlier;
                return event;
            }
            earlier.append(&mut event.snapshots);
        }
    }

    async fn stop(self) {
        self.shutdown.cancel();
        self.task.await.unwrap().unwrap();
    }

    /// (seq, as_of, rows_total) of every snapshot of the source.
    fn snapshots(&self) -> Vec<(i64, String, i64)> {
        let reader = Reader::open(&self.dir.join("data/t.db")).unwrap();
        reader.snapshots(Some(SOURCE)).unwrap().into_iter().map(|s| (s.seq, s.as_of, s.rows_total)).collect()
    }
}

fn extract(rows: usize) -> String {
    let mut text = String::from("id,onset\n");
    for idx in 0..rows {
        text.push_str(&format!("C-{idx:05},2026-02-{:02}\n", 1 + idx % 28));
    }
    text
}

#[tokio::test(flavor = "multi_thread")]
async fn a_file_still_being_written_is_not_taken_until_it_is_complete() {
    let dir = tempfile::tempdir().unwrap();
    let mut daemon = start(dir.path(), "");
    daemon.poll().await;
    let path = daemon.inbox.join("county-2026-03-01.csv");
    let writer_path = path.clone();
    // An exporter that appends a row every 20 ms for about a second.
    let writer = std::thread::spawn(move || {
        let mut file = fs::File::create(&writer_path).unwrap();
        file.write_all(b"id,onset\n").unwrap();
        for idx in 0..50 {
            writeln!(file, "C-{idx:05},2026-02-01").unwrap();
            file.flush().unwrap();
            std::thread::sleep(Duration::from_millis(20));
        }
    });
    for _ in 0..3 {
        let event = daemon.poll().await;
        assert!(event.snapshots.is_empty(), "a growing file was taken: {event:?}");
    }
    writer.join().unwrap();
    let event = daemon.poll().await;
    assert_eq!(event.snapshots.len(), 1, "{event:?}");
    assert_eq!(daemon.snapshots()[0].2, 50, "the whole file, every row");
    daemon.stop().await;
}

#[tokio::test(flavor = "multi_thread")]
async fn a_ready_marker_gates_files() {
    let dir = tempfile::tempdir().unwrap();
    let mut daemon = start(dir.path(), "ready_marker = \".done\"");
    fs::write(daemon.inbox.join("county-2026-03-01.csv"), extract(5)).unwrap();
    assert!(daemon.poll().await.snapshots.is_empty());
    fs::write(daemon.inbox.join("county-2026-03-01.csv.done"), "").unwrap();
    assert_eq!(daemon.poll().await.snapshots.len(), 1);
    daemon.stop().await;
}

#[tokio::test(flavor = "multi_thread")]
async fn a_renamed_file_is_not_ingested_again() {
    let dir = tempfile::tempdir().unwrap();
    let mut daemon = start(dir.path(), "");
    fs::write(daemon.inbox.join("county-2026-03-01.csv"), extract(5)).unwrap();
    assert_eq!(daemon.poll().await.snapshots.len(), 1);
    fs::rename(daemon.inbox.join("county-2026-03-01.csv"), daemon.inbox.join("county-2026-03-01-copy.csv"))
        .unwrap();
    let event = daemon.poll().await;
    assert!(event.snapshots.is_empty() && event.error.is_none(), "{event:?}");
    assert_eq!(daemon.snapshots().len(), 1);
    daemon.stop().await;
}

#[tokio::test(flavor = "multi_thread")]
async fn a_symlink_out_of_the_folder_is_refused_and_reported() {
    let dir = tempfile::tempdir().unwrap();
    let mut daemon = start(dir.path(), "");
    fs::write(dir.path().join("secret-2026-03-01.csv"), extract(3)).unwrap();
    std::os::unix::fs::symlink(
        dir.path().join("secret-2026-03-01.csv"),
        daemon.inbox.join("link-2026-03-01.csv"),
    )
    .unwrap();
    let event = daemon.poll().await;
    assert!(event.snapshots.is_empty());
    let error = event.error.unwrap_or_default();
    assert!(error.contains("link-2026-03-01.csv: refused"), "{error}");
    assert!(daemon.snapshots().is_empty());
    daemon.stop().await;
    let reader = Reader::open(&dir.path().join("data/t.db")).unwrap();
    let status = &reader.source_statuses().unwrap()[0];
    assert!(status.consecutive_failures >= 1);
    assert!(status.last_error.as_deref().unwrap_or_default().contains("refused"));
}

#[tokio::test(flavor = "multi_thread")]
async fn many_files_at_once_are_taken_in_as_of_order_and_a_restart_takes_only_new_ones() {
    let dir = tempfile::tempdir().unwrap();
    let inbox = dir.path().join("inbox");
    fs::create_dir_all(&inbox).unwrap();
    // Written newest first, so neither name order on disk nor creation order is as-of order.
    for day in (1..=9).rev() {
        fs::write(inbox.join(format!("county-2026-03-{day:02}.csv")), extract(10 + day)).unwrap();
    }
    let mut daemon = start(dir.path(), "");
    let event = daemon.poll().await;
    assert_eq!(event.snapshots.len(), 9, "{event:?}");
    let snapshots = daemon.snapshots();
    let as_of: Vec<&str> = snapshots.iter().map(|s| s.1.as_str()).collect();
    let mut sorted = as_of.clone();
    sorted.sort();
    assert_eq!(as_of, sorted, "snapshots in as-of order");
    assert_eq!(snapshots.iter().map(|s| s.2).collect::<Vec<_>>(), (11..=19).collect::<Vec<i64>>());
    daemon.stop().await;

    let mut daemon = start(dir.path(), "");
    assert!(daemon.poll().await.snapshots.is_empty(), "nothing is taken twice after a restart");
    fs::write(inbox.join("county-2026-03-10.csv"), extract(30)).unwrap();
    assert_eq!(daemon.poll().await.snapshots.len(), 1);
    assert_eq!(daemon.snapshots().len(), 10);
    daemon.stop().await;
}

fn current_records(dir: &Path) -> i64 {
    let db = crate::support::open_ro(&dir.join("data/t.db"));
    crate::support::count(&db, "SELECT count(*) FROM case_version WHERE valid_to IS NULL")
}

/// A (3,000 records), B (the first 2,900), A again under a new name: the line list follows
/// the latest file, so the third is applied although its bytes were seen before.
#[tokio::test(flavor = "multi_thread")]
async fn an_older_extract_seen_again_is_applied_a_b_a() {
    let dir = tempfile::tempdir().unwrap();
    let mut daemon = start(dir.path(), "");
    let a = extract(3000);
    let b: String = a.lines().take(2901).map(|l| format!("{l}\n")).collect();
    for (day, text) in [(1, &a), (2, &b), (3, &a)] {
        fs::write(daemon.inbox.join(format!("county-2026-03-{day:02}.csv")), text).unwrap();
        let event = daemon.poll().await;
        assert!(
            matches!(event.snapshots[..], [(_, tidemark::model::SnapshotStatus::Applied)]),
            "day {day}: {event:?}"
        );
    }
    assert_eq!(current_records(dir.path()), 3000);
    // The latest file copied under another name adds nothing.
    fs::write(daemon.inbox.join("county-2026-03-04.csv"), &a).unwrap();
    let event = daemon.poll().await;
    assert!(event.snapshots.is_empty() && event.error.is_none(), "{event:?}");
    daemon.stop().await;
}

/// An exporter that writes 92% of the file, pauses 3.5 s (longer than the settle time, so
/// the file looks complete) and then writes the rest. Cut mid-row, the partial file fails as
/// truncated; cut at a row boundary it is held by the removal guard (8% removed). Either
/// way no record is removed, and the complete file is then applied.
#[tokio::test(flavor = "multi_thread")]
async fn a_writer_that_pauses_never_removes_records() {
    let dir = tempfile::tempdir().unwrap();
    let mut daemon = start(dir.path(), "");
    let full = extract(3000);
    fs::write(daemon.inbox.join("county-2026-03-01.csv"), &full).unwrap();
    assert_eq!(daemon.poll().await.snapshots.len(), 1);
    let row_boundary = full.match_indices('\n').nth(2760).unwrap().0 + 1;
    // About 92% of the file, cut inside a row's key (so the row has too few fields) or
    // exactly at a row's end. (A cut inside a row's last field leaves a row that parses: only
    // the removal guard can tell, and it holds the file, as at a row's end.)
    for (day, cut, want) in [(2, row_boundary - 15, "failed"), (3, row_boundary, "held")] {
        let path = daemon.inbox.join(format!("county-2026-03-{day:02}.csv"));
        let bytes = full.clone().into_bytes();
        let writer = std::thread::spawn(move || {
            let mut file = fs::File::create(&path).unwrap();
            file.write_all(&bytes[..cut]).unwrap();
            file.flush().unwrap();
            std::thread::sleep(Duration::from_millis(3500));
            file.write_all(&bytes[cut..]).unwrap();
        });
        std::thread::sleep(Duration::from_millis(400));
        let during = daemon.poll().await;
        let statuses: Vec<&str> = during.snapshots.iter().map(|(_, status)| status.name()).collect();
        assert_eq!(statuses, [want], "day {day}: {during:?}");
        assert_eq!(current_records(dir.path()), 3000, "day {day}: nothing removed");
        writer.join().unwrap();
        // The completed file has a new size and mtime: it is taken, and equals the
        // current line list, so it adds nothing or is applied without removing anything.
        let after = daemon.poll().await;
        assert!(after.error.is_none(), "day {day}: {after:?}");
        assert_eq!(current_records(dir.path()), 3000, "day {day}");
    }
    let db = crate::support::open_ro(&dir.path().join("data/t.db"));
    assert_eq!(
        crate::support::count(
            &db,
            "SELECT coalesce(sum(rows_removed), 0) FROM snapshot WHERE status = 'applied'"
        ),
        0
    );
    daemon.stop().await;
}
