//! The post-snapshot pipeline: in the daemon it runs per source off the writer thread, so a
//! source whose analysis is held does not hold up another source's commits, and snapshots
//! that commit while it is held are analysed once, as the latest (the earlier ones marked
//! superseded); an analysis owed at start is run at start; `tidemark ingest --no-analysis`
//! leaves it owed and a later ingest runs it; a failed analysis exits 3 and stays owed.

use std::collections::HashMap;
use std::fs;
use std::path::Path;
use std::sync::{Arc, Condvar, Mutex};
use std::time::{Duration, Instant};

use tidemark::app::daemon::{self, AnalysisGate, Hooks, PollEvent};
use tidemark::app::ingest::commit_file;
use tidemark::app::pipeline::Analysed;
use tidemark::config::Config;
use tidemark::model::{SnapshotId, SnapshotStatus};
use tidemark::store::{OwedState, Reader};
use tokio::sync::{Notify, mpsc};

use crate::support::{count, open_store, run, tidemark};

const SLOW: &str = "slow";
const QUICK: &str = "quick";

fn source_toml(name: &str) -> String {
    format!(
        "[[source]]\nname = \"{name}\"\nkind = \"folder\"\npath = \"inbox/{name}\"\npattern = \"*.csv\"\n\
         schedule = \"0 0 0 1 1 *\"\nsettle = \"50ms\"\nas_of = \"name:%Y-%m-%d\"\nkey = \"id\"\n\
         [source.fields]\njurisdiction = \"district\"\nonset_date = \"onset\"\nreport_date = \"reported\"\n"
    )
}

fn write_config(dir: &Path) -> (std::path::PathBuf, Arc<Config>) {
    let text = format!(
        "[store]\npath = \"data/t.db\"\narchive = \"data/archive\"\n{}{}",
        source_toml(SLOW),
        source_toml(QUICK)
    );
    let path = dir.join("t.toml");
    fs::write(&path, &text).unwrap();
    for name in [SLOW, QUICK] {
        fs::create_dir_all(dir.join("inbox").join(name)).unwrap();
    }
    (path.clone(), Arc::new(Config::parse(&text, &path).unwrap()))
}

/// An extract of `rows` records reported on `day` (March 2026).
fn extract(rows: usize, day: u32) -> String {
    let mut text = String::from("id,district,onset,reported\n");
    for idx in 0..rows {
        let district = if idx % 2 == 0 { "North" } else { "South" };
        text.push_str(&format!("C-{idx:04},{district},2026-02-{:02},2026-03-{day:02}\n", 1 + idx % 28));
    }
    text
}

fn drop_extract(dir: &Path, source: &str, day: u32, rows: usize) {
    let name = format!("{source}-2026-03-{day:02}.csv");
    let hidden = dir.join("inbox").join(source).join(format!(".{name}.part"));
    fs::write(&hidden, extract(rows, day)).unwrap();
    fs::rename(&hidden, dir.join("inbox").join(source).join(name)).unwrap();
}

/// A gate that holds one source's analysis until it is opened.
#[derive(Clone, Default)]
struct Gate(Arc<(Mutex<bool>, Condvar)>);

impl Gate {
    fn hook(&self, held: &'static str) -> AnalysisGate {
        let gate = self.0.clone();
        AnalysisGate(Arc::new(move |source: &str| {
            if source == held {
                let (open, wake) = &*gate;
                let mut open = open.lock().unwrap();
                while !*open {
                    open = wake.wait(open).unwrap();
                }
            }
        }))
    }

    fn open(&self) {
        *self.0.0.lock().unwrap() = true;
        self.0.1.notify_all();
    }
}

/// Opens the gate when the test ends, also when it fails: a held analysis thread would
/// otherwise keep the runtime (and the test binary) waiting for ever.
struct OpenAtEnd(Gate);

impl Drop for OpenAtEnd {
    fn drop(&mut self) {
        self.0.open();
    }
}

struct Daemon {
    events: mpsc::UnboundedReceiver<PollEvent>,
    analysed: mpsc::UnboundedReceiver<Analysed>,
    nudges: HashMap<String, Arc<Notify>>,
    /// Snapshots other sources' polls committed while one source's poll was awaited: a
    /// poll may run unasked (a nudge left over from start), and what it took is not lost.
    elsewhere: HashMap<String, Vec<(SnapshotId, SnapshotStatus)>>,
    shutdown: tokio_util::sync::CancellationToken,
    task: tokio::task::JoinHandle<anyhow::Result<()>>,
}

fn start(config: Arc<Config>, gate: Option<AnalysisGate>) -> Daemon {
    let (events_tx, events) = mpsc::unbounded_channel();
    let (analysed_tx, analysed) = mpsc::unbounded_channel();
    let nudges: HashMap<String, Arc<Notify>> =
        [SLOW, QUICK].iter().map(|s| (s.to_string(), Arc::new(Notify::new()))).collect();
    let hooks = Hooks {
        events: Some(events_tx),
        nudges: nudges.clone(),
        analysed: Some(analysed_tx),
        analysis_gate: gate,
    };
    let shutdown = tokio_util::sync::CancellationToken::new();
    let task = tokio::spawn(daemon::run(config, shutdown.clone(), hooks, None));
    Daemon { events, analysed, nudges, elsewhere: HashMap::new(), shutdown, task }
}

impl Daemon {
    /// Polls `source` now and returns the snapshots its polls committed since the last call
    /// (including unasked polls seen while another source's poll was awaited).
    async fn poll(&mut self, source: &str) -> Vec<(SnapshotId, SnapshotStatus)> {
        let mark = Instant::now();
        self.nudges[source].notify_one();
        let mut snapshots = self.elsewhere.remove(source).unwrap_or_default();
        loop {
            let event =
                tokio::time::timeout(Duration::from_secs(20), self.events.recv()).await.unwrap().unwrap();
            if let Some(error) = &event.error {
                eprintln!("poll of {} reported: {error}", event.source);
            }
            if event.source != source {
                self.elsewhere.entry(event.source).or_default().extend(event.snapshots);
                continue;
            }
            snapshots.extend(event.snapshots);
            if event.started >= mark {
                return snapshots;
            }
        }
    }

    /// Waits for the next finished analysis of `source` (others' are dropped).
    async fn analysed(&mut self, source: &str) -> Analysed {
        loop {
            let analysis =
                tokio::time::timeout(Duration::from_secs(30), self.analysed.recv()).await.unwrap().unwrap();
            if analysis.source == source {
                return analysis;
            }
        }
    }

    async fn stop(self) {
        self.shutdown.cancel();
        self.task.await.unwrap().unwrap();
    }
}

fn state(config: &Config, snapshot_id: SnapshotId) -> (OwedState, Option<SnapshotId>) {
    let analysis = Reader::open(&config.store.path).unwrap().analysis_of(snapshot_id).unwrap().unwrap();
    (analysis.state, analysis.superseded_by)
}

fn quality_rows(config: &Config, snapshot_id: SnapshotId) -> i64 {
    let db = rusqlite::Connection::open(&config.store.path).unwrap();
    count(&db, &format!("SELECT count(*) FROM quality WHERE snapshot_id = {snapshot_id}"))
}

fn applied(snapshots: &[(SnapshotId, SnapshotStatus)]) -> Vec<SnapshotId> {
    snapshots.iter().filter(|(_, s)| *s == SnapshotStatus::Applied).map(|(id, _)| *id).collect()
}

#[tokio::test(flavor = "multi_thread")]
async fn a_held_analysis_does_not_hold_up_another_sources_commits_and_is_coalesced() {
    let dir = tempfile::tempdir().unwrap();
    let (_, config) = write_config(dir.path());
    let gate = Gate::default();
    let _open_at_end = OpenAtEnd(gate.clone());
    let mut daemon = start(config.clone(), Some(gate.hook(SLOW)));
    daemon.poll(SLOW).await;
    daemon.poll(QUICK).await;

    // Day 1 and day 2 for both: the slow source's analysis is held from the start.
    let mut slow = Vec::new();
    for day in [1, 2] {
        drop_extract(dir.path(), SLOW, day, 40);
        drop_extract(dir.path(), QUICK, day, 30);
        slow.extend(applied(&daemon.poll(SLOW).await));
        let quick = applied(&daemon.poll(QUICK).await);
        assert_eq!(quick.len(), 1, "day {day}: the quick source committed");
        let analysis = daemon.analysed(QUICK).await;
        assert_eq!((analysis.snapshot_id, analysis.failure()), (quick[0], None));
        assert_eq!(state(&config, quick[0]).0, OwedState::Done);
        assert!(quality_rows(&config, quick[0]) > 0, "the quick source's quality measures are stored");
    }
    assert_eq!(slow.len(), 2, "the slow source committed both days while its analysis was held");
    for id in &slow {
        assert_eq!(state(&config, *id), (OwedState::Pending, None));
        assert_eq!(quality_rows(&config, *id), 0);
    }

    // Opened: one analysis, of the latest snapshot, standing for the earlier one.
    gate.open();
    let analysis = daemon.analysed(SLOW).await;
    assert_eq!(
        (analysis.snapshot_id, analysis.superseded.clone(), analysis.failure()),
        (slow[1], vec![slow[0]], None)
    );
    let steps: Vec<&str> = analysis.steps.iter().map(|r| r.step.name()).collect();
    assert_eq!(steps, ["nowcasts", "delay_fits", "scoring", "quality", "alert_rules"]);
    assert_eq!(state(&config, slow[1]).0, OwedState::Done);
    assert_eq!(state(&config, slow[0]), (OwedState::Superseded, Some(slow[1])));
    assert!(quality_rows(&config, slow[1]) > 0);
    daemon.stop().await;
}

#[tokio::test(flavor = "multi_thread")]
async fn an_analysis_owed_at_start_is_run_at_start() {
    let dir = tempfile::tempdir().unwrap();
    let (_, config) = write_config(dir.path());
    // Committed without its analysis, as a crash right after the commit leaves it.
    let path = dir.path().join("slow-2026-03-01.csv");
    fs::write(&path, extract(40, 1)).unwrap();
    let outcome = {
        let mut store = open_store(&config.store.path);
        commit_file(&mut store, &config, config.source(SLOW).unwrap(), &path, None).unwrap()
    };
    assert_eq!(outcome.status, SnapshotStatus::Applied);
    assert_eq!(state(&config, outcome.snapshot_id), (OwedState::Pending, None));

    let mut daemon = start(config.clone(), None);
    let analysis = daemon.analysed(SLOW).await;
    assert_eq!((analysis.snapshot_id, analysis.failure()), (outcome.snapshot_id, None));
    assert_eq!(state(&config, outcome.snapshot_id).0, OwedState::Done);
    assert!(quality_rows(&config, outcome.snapshot_id) > 0);
    daemon.stop().await;
}

#[test]
fn ingest_without_analysis_leaves_it_owed_and_a_failed_analysis_exits_3() {
    let dir = tempfile::tempdir().unwrap();
    let (config_path, config) = write_config(dir.path());
    let file = |day: u32| {
        let path = dir.path().join(format!("slow-2026-03-{day:02}.csv"));
        fs::write(&path, extract(40, day)).unwrap();
        path
    };
    let ingest = |path: &Path, extra: &[&str]| {
        run(tidemark()
            .arg("--config")
            .arg(&config_path)
            .args(["ingest", "--source", SLOW])
            .args(extra)
            .arg(path))
    };

    let (code, stdout, stderr) = ingest(&file(1), &["--no-analysis"]);
    assert_eq!(code, 0, "{stdout}{stderr}");
    let reader = Reader::open(&config.store.path).unwrap();
    let first = reader.snapshots(Some(SLOW)).unwrap()[0].snapshot_id;
    assert_eq!(state(&config, first), (OwedState::Pending, None));
    let (code, _, stderr) =
        run(tidemark().arg("--config").arg(&config_path).args(["quality", "--source", SLOW]));
    assert_eq!(code, 1);
    assert!(stderr.contains("owed"), "{stderr}");

    // The next ingest runs what is owed: its own snapshot, standing for the first.
    let (code, stdout, stderr) = ingest(&file(2), &[]);
    assert_eq!(code, 0, "{stdout}{stderr}");
    let second = reader.snapshots(Some(SLOW)).unwrap().iter().map(|s| s.snapshot_id).max().unwrap();
    assert_eq!(state(&config, second).0, OwedState::Done);
    assert_eq!(state(&config, first), (OwedState::Superseded, Some(second)));
    let (code, _, stderr) = run(tidemark()
        .arg("--config")
        .arg(&config_path)
        .args(["quality", "--source", SLOW, "--snapshot"])
        .arg(first.to_string()));
    assert_eq!(code, 1);
    assert!(stderr.contains(&format!("superseded by snapshot {second}")), "{stderr}");

    // A damaged results table: the snapshot commits, its analysis fails, exit 3, still owed.
    let db = rusqlite::Connection::open(&config.store.path).unwrap();
    db.execute_batch("DROP VIEW IF EXISTS quality_latest; DROP TABLE quality_lag;").unwrap();
    drop(db);
    let (code, stdout, stderr) = ingest(&file(3), &[]);
    assert_eq!(code, 3, "{stdout}{stderr}");
    assert!(stdout.contains("applied"), "{stdout}");
    assert!(stderr.contains("analysis failed") && stderr.contains("quality"), "{stderr}");
    let third = reader.snapshots(Some(SLOW)).unwrap().iter().map(|s| s.snapshot_id).max().unwrap();
    let analysis = reader.analysis_of(third).unwrap().unwrap();
    assert_eq!((analysis.state, analysis.attempts), (OwedState::Failed, 1));
    assert!(analysis.error.as_deref().unwrap_or("").starts_with("quality:"), "{:?}", analysis.error);
    let (code, stdout, _) =
        run(tidemark().arg("--config").arg(&config_path).args(["status", "--format", "csv"]));
    assert_eq!(code, 0);
    assert!(stdout.contains(&format!("{third} (failed 1x)")), "status shows the owed analysis: {stdout}");

    // A held snapshot released while the table is still damaged: released, and exit 3.
    let short = dir.path().join("slow-2026-03-04.csv");
    fs::write(&short, extract(5, 4)).unwrap();
    let (code, stdout, stderr) = ingest(&short, &["--no-analysis"]);
    assert_eq!(code, 0, "{stdout}{stderr}");
    assert!(stdout.contains("held"), "35 of 40 records removed: held; {stdout}");
    let held = reader.snapshots(Some(SLOW)).unwrap().iter().map(|s| s.snapshot_id).max().unwrap();
    let (code, stdout, stderr) = run(tidemark()
        .arg("--config")
        .arg(&config_path)
        .args(["snapshots", "release"])
        .arg(held.to_string()));
    assert_eq!(code, 3, "{stdout}{stderr}");
    assert!(stdout.contains("applied") && stderr.contains("analysis failed"), "{stdout}{stderr}");
    assert_eq!(reader.snapshots(Some(SLOW)).unwrap().last().unwrap().status, SnapshotStatus::Applied);
}
