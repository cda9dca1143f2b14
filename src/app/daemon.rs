//! `tidemark run`: the unattended daemon. One task per source polls on the source's cron
//! schedule (once at start, never overlapping itself, never waiting for another source),
//! hands new extracts to the one writer thread, and records health and metrics. A second
//! task per source runs the post-snapshot pipeline on a blocking thread of its own: at
//! start for whatever the store owes, then after every commit, coalescing (snapshots that
//! commit while it runs are analysed once, as the latest), so one source's analysis never
//! holds up another source's commits; only its short writes go through the writer. The same
//! listener serves the API (`/api/v1`), `/healthz` and `/metrics`. Shutdown is a `CancellationToken`: polls stop,
//! an ingest in progress rolls back, and `run` returns once every task has ended.

use std::collections::{HashMap, HashSet};
use std::path::Path;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

use anyhow::{Context, Result};
use chrono::{DateTime, Utc};
use tokio::net::TcpListener;
use tokio::sync::{Notify, mpsc};
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;

use super::ingest::{IngestOutcome, as_of_for_file, commit_archived, date_in_name, end_of_day};
use super::pipeline::{self, Analysed};
use super::writer::{self, Writer};
use crate::config::{AsOfRule, Config, FolderSettings, Location, SourceConfig, UrlSettings};
use crate::metrics::Metrics;
use crate::model::{ExtractMeta, SnapshotId, SnapshotStatus, SourceId};
use crate::serve::{self, ops};
use crate::source::folder::{self, SeenFile};
use crate::source::http::{self, Fetched, Validators};
use crate::store::{FileRecord, PollRecord, Reader, Store, archive, time_text};
use crate::text::{escape_outside, escape_path};

/// How often the daemon writes its heartbeat for `tidemark status`.
const HEARTBEAT_EVERY: Duration = Duration::from_secs(30);

/// What one poll of one source did, for the demo and tests.
#[derive(Debug, Clone)]
pub struct PollEvent {
    pub source: String,
    pub started: Instant,
    pub snapshots: Vec<(SnapshotId, SnapshotStatus)>,
    pub error: Option<String>,
}

/// Optional hooks into a running daemon (the demo drives its scenario through them).
#[derive(Debug, Default)]
pub struct Hooks {
    /// Receives an event after every poll.
    pub events: Option<mpsc::UnboundedSender<PollEvent>>,
    /// Per source name: notify to poll now instead of waiting for the schedule.
    pub nudges: HashMap<String, Arc<Notify>>,
    /// Receives every finished post-snapshot analysis.
    pub analysed: Option<mpsc::UnboundedSender<Analysed>>,
    /// Called on a source's analysis thread before each run of its pipeline.
    pub analysis_gate: Option<AnalysisGate>,
}

/// A function the analysis thread calls, with the source's name, before it runs the
/// source's pipeline; it may block (tests hold one source's analysis to show that the other
/// sources' commits go on).
#[derive(Clone)]
pub struct AnalysisGate(pub Arc<dyn Fn(&str) + Send + Sync>);

impl std::fmt::Debug for AnalysisGate {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("AnalysisGate")
    }
}

/// Everything the source tasks share.
struct Shared {
    config: Arc<Config>,
    writer: Writer,
    metrics: Arc<Metrics>,
    shutdown: CancellationToken,
    /// Set on shutdown so an ingest in progress rolls back instead of finishing.
    cancel_ingest: Arc<AtomicBool>,
    events: Option<mpsc::UnboundedSender<PollEvent>>,
    analysed: Option<mpsc::UnboundedSender<Analysed>>,
    analysis_gate: Option<AnalysisGate>,
    /// When this daemon started watching (the staleness rule's origin without snapshots).
    started: DateTime<Utc>,
}

/// `tidemark run`: the daemon, until SIGTERM or SIGINT.
pub fn run_until_signal(config: Config, serve_ops: bool) -> Result<()> {
    // Say so before binding ports if another process already writes to this store.
    if let Some(pid) = crate::store::lock::holder(&config.store.path) {
        anyhow::bail!(
            "another tidemark process (pid {pid}) is writing to {}; stop it or wait for it to finish",
            config.store.path.display()
        );
    }
    let runtime = tokio::runtime::Builder::new_multi_thread().enable_all().build()?;
    runtime.block_on(async move {
        let shutdown = CancellationToken::new();
        let ops = if serve_ops {
            let listener = TcpListener::bind(config.bind)
                .await
                .with_context(|| format!("binding the API and ops endpoints to {}", config.bind))?;
            tracing::info!(address = %config.bind, "serving /api/v1, /healthz, /metrics");
            Some(listener)
        } else {
            None
        };
        tokio::spawn(super::signals::stop_on_signal(shutdown.clone()));
        run(Arc::new(config), shutdown, Default::default(), ops).await
    })
}

/// Runs the daemon until `shutdown` fires. `ops` is the listener for the API (`/api/v1`),
/// `/healthz` and `/metrics` (none in tests that do not need it).
pub async fn run(
    config: Arc<Config>,
    shutdown: CancellationToken,
    hooks: Hooks,
    ops: Option<TcpListener>,
) -> Result<()> {
    let store = Store::open(&config.store.path)?;
    super::ingest::remove_archive_orphans(&config);
    let (writer, writer_thread) = writer::start(store)?;
    let source_ids = register_sources(&writer, &config).await?;
    let metrics = Arc::new(Metrics::default());
    let running = Arc::new(AtomicBool::new(false));
    let shared = Arc::new(Shared {
        config: config.clone(),
        writer,
        metrics: metrics.clone(),
        shutdown: shutdown.clone(),
        cancel_ingest: Arc::new(AtomicBool::new(false)),
        events: hooks.events,
        analysed: hooks.analysed,
        analysis_gate: hooks.analysis_gate,
        started: Utc::now(),
    });
    let tracker = TaskTracker::new();
    if let Some(listener) = ops {
        let state =
            ops::OpsState { metrics, scheduler_running: running.clone(), store: config.store.path.clone() };
        let (token, config) = (shutdown.clone(), config.clone());
        tracker.spawn(async move {
            let router = super::access::app_router(&config, Some(state));
            if let Err(err) = serve::serve(listener, router, token).await {
                tracing::error!(error = %err, "API and ops endpoints stopped");
            }
        });
    }
    for (source, source_id) in config.sources.iter().zip(source_ids) {
        let nudge = hooks.nudges.get(&source.name).cloned().unwrap_or_default();
        let committed = Arc::new(Notify::new());
        tracker.spawn(analysis_loop(shared.clone(), source.clone(), committed.clone()));
        tracker.spawn(source_loop(shared.clone(), source.clone(), source_id, nudge, committed));
    }
    tracker.spawn(heartbeat(shared.clone()));
    tracker.spawn(deliver_outbox(shared.clone()));
    running.store(true, Ordering::SeqCst);
    tracing::info!(sources = config.sources.len(), store = %escape_path(&config.store.path), "daemon started");
    shutdown.cancelled().await;
    running.store(false, Ordering::SeqCst);
    shared.cancel_ingest.store(true, Ordering::SeqCst);
    tracker.close();
    tracker.wait().await;
    let stopped = time_text(Utc::now());
    let _ = shared.writer.run(move |store| store.set_daemon_state(&[("stopped_at", stopped)])).await;
    drop(shared);
    writer_thread.join();
    tracing::info!("daemon stopped");
    Ok(())
}

async fn register_sources(writer: &Writer, config: &Arc<Config>) -> Result<Vec<SourceId>> {
    let config = config.clone();
    writer
        .run(move |store| -> Result<Vec<SourceId>> {
            let ids = config
                .sources
                .iter()
                .map(|s| store.source_id(&s.name, s.kind_name(), &s.config_hash))
                .collect::<Result<Vec<_>, _>>()?;
            store.set_daemon_state(&[
                ("pid", std::process::id().to_string()),
                ("started_at", time_text(Utc::now())),
                ("heartbeat", time_text(Utc::now())),
            ])?;
            Ok(ids)
        })
        .await?
}

/// Delivers due outbox rows every tick until shutdown. A row is marked only after its
/// channel answered, so a crash between the two re-sends it (at-least-once; the event id is
/// the receiver's idempotency key).
async fn deliver_outbox(shared: Arc<Shared>) {
    let client = super::alerting::delivery_client(&shared.config);
    loop {
        if let Err(err) = super::alerting::deliver_due(&shared.writer, &shared.config, &client).await {
            tracing::warn!(error = %format!("{err:#}"), "outbox not read");
        }
        tokio::select! {
            () = tokio::time::sleep(super::alerting::DELIVERY_TICK) => {}
            () = shared.shutdown.cancelled() => return,
        }
    }
}

async fn heartbeat(shared: Arc<Shared>) {
    loop {
        tokio::select! {
            () = tokio::time::sleep(HEARTBEAT_EVERY) => {}
            () = shared.shutdown.cancelled() => return,
        }
        let now = time_text(Utc::now());
        if let Err(err) = shared.writer.run(move |store| store.set_daemon_state(&[("heartbeat", now)])).await
        {
            tracing::warn!(error = %err, "heartbeat not written");
        }
    }
}

/// A source's memory between polls.
enum PollState {
    Folder { known: HashSet<(String, u64, i64)> },
    Url { client: reqwest::Client, validators: Validators, failed: Option<FailedBody> },
}

/// The post-snapshot pipeline of one source: what the store owes at start, then after every
/// commit (`committed`). A commit while an analysis runs leaves one wake-up behind, so the
/// next run takes everything committed meanwhile at once.
async fn analysis_loop(shared: Arc<Shared>, source: SourceConfig, committed: Arc<Notify>) {
    loop {
        if shared.shutdown.is_cancelled() {
            return;
        }
        let (job_shared, job_source) = (shared.clone(), source.clone());
        let run = tokio::task::spawn_blocking(move || analyse_owed(&job_shared, &job_source)).await;
        if let Err(err) = run {
            tracing::error!(source = %source.name, error = %err, "the analysis task stopped; it runs again after the next commit");
        }
        tokio::select! {
            () = committed.notified() => {}
            () = shared.shutdown.cancelled() => return,
        }
    }
}

/// Runs the pipeline over what `source` owes, on this blocking thread; each step is counted
/// in `/metrics`, and each analysis sent to the hooks.
fn analyse_owed(shared: &Shared, source: &SourceConfig) {
    if let Some(AnalysisGate(gate)) = &shared.analysis_gate {
        gate(&source.name);
    }
    let metrics = shared.metrics.clone();
    let observe = move |name: &str, report: &pipeline::StepReport| {
        metrics.step_finished(name, report.step.name(), report.took, report.error.is_none());
    };
    let cancel = shared.cancel_ingest.clone();
    let mut writer = shared.writer.clone();
    match pipeline::run_owed(&mut writer, &shared.config, source, &observe, &|| cancel.load(Ordering::SeqCst))
    {
        Ok(analysed) => {
            for analysis in analysed {
                if let Some(events) = &shared.analysed {
                    let _ = events.send(analysis);
                }
            }
        }
        Err(err) => {
            tracing::warn!(source = %source.name, error = %format!("{err:#}"), "owed analyses not run; retried after the next commit")
        }
    }
}

async fn source_loop(
    shared: Arc<Shared>,
    source: SourceConfig,
    source_id: SourceId,
    nudge: Arc<Notify>,
    committed: Arc<Notify>,
) {
    let mut state = match initial_state(&shared.config, &source, source_id).await {
        Ok(state) => state,
        Err(err) => {
            tracing::error!(source = %source.name, error = %format!("{err:#}"), "source cannot start");
            return;
        }
    };
    loop {
        let started = Instant::now();
        let (snapshots, error) = poll(&shared, &source, source_id, &mut state).await;
        if snapshots.iter().any(|o| matches!(o.status, SnapshotStatus::Applied | SnapshotStatus::Held)) {
            committed.notify_one();
        }
        finish_poll(&shared, &source, source_id, started, snapshots, error).await;
        let wait = until_next(&source);
        tokio::select! {
            () = tokio::time::sleep(wait) => {}
            () = nudge.notified() => {}
            () = shared.shutdown.cancelled() => return,
        }
    }
}

async fn initial_state(config: &Config, source: &SourceConfig, source_id: SourceId) -> Result<PollState> {
    let path = config.store.path.clone();
    match &source.location {
        Location::Folder(_) => {
            let known =
                tokio::task::spawn_blocking(move || Reader::open(&path)?.known_files(source_id)).await??;
            Ok(PollState::Folder { known })
        }
        Location::Url(settings) => {
            let (etag, last_modified) =
                tokio::task::spawn_blocking(move || Reader::open(&path)?.validators(source_id)).await??;
            let client = http::client(settings)?;
            Ok(PollState::Url { client, validators: Validators { etag, last_modified }, failed: None })
        }
    }
}

fn until_next(source: &SourceConfig) -> Duration {
    source
        .schedule
        .upcoming(Utc)
        .next()
        .and_then(|next| (next - Utc::now()).to_std().ok())
        .unwrap_or(Duration::from_secs(60))
}

type PollResult = (Vec<IngestOutcome>, Option<String>);

async fn poll(
    shared: &Arc<Shared>,
    source: &SourceConfig,
    source_id: SourceId,
    state: &mut PollState,
) -> PollResult {
    match (&source.location, state) {
        (Location::Folder(folder), PollState::Folder { known }) => {
            poll_folder(shared, source, source_id, folder, known).await
        }
        (Location::Url(settings), PollState::Url { client, validators, failed }) => {
            match poll_url(shared, source, source_id, settings, client, validators, failed).await {
                Ok(outcomes) => (outcomes, None),
                Err(err) => (Vec::new(), Some(format!("{err:#}"))),
            }
        }
        _ => (Vec::new(), Some("internal: poll state does not match the source kind".into())),
    }
}

async fn finish_poll(
    shared: &Arc<Shared>,
    source: &SourceConfig,
    source_id: SourceId,
    started: Instant,
    outcomes: Vec<IngestOutcome>,
    error: Option<String>,
) {
    let took = started.elapsed();
    // A poll cut short by shutdown says nothing about the source's health: not recorded.
    if error.is_some() && outcomes.is_empty() && shared.shutdown.is_cancelled() {
        return;
    }
    let error = with_failed_extracts(error, &outcomes);
    shared.metrics.poll_finished(&source.name, took, error.is_none());
    shared.metrics.update(&source.name, |c| {
        for outcome in &outcomes {
            *c.ingests.entry(outcome.status.name()).or_default() += 1;
            c.rows += outcome.counts.total;
            c.rejects += outcome.counts.rejected;
        }
    });
    if let Some(err) = &error {
        tracing::warn!(source = %source.name, error = %err, "poll failed");
    }
    let snapshot_id = outcomes.last().map(|o| o.snapshot_id);
    let record = PollRecord { at: Utc::now(), error: error.clone(), snapshot_id, validators: None };
    if let Err(err) = shared.writer.run(move |store| store.record_poll(source_id, &record)).await {
        tracing::warn!(source = %source.name, error = %err, "poll health not recorded");
    }
    if shared.shutdown.is_cancelled() {
        tracing::debug!(source = %source.name, "shutdown asked; staleness rules skipped until the next poll");
    } else {
        check_staleness(shared, source).await;
    }
    if let Some(events) = &shared.events {
        let snapshots = outcomes.iter().map(|o| (o.snapshot_id, o.status)).collect();
        let _ = events.send(PollEvent { source: source.name.clone(), started, snapshots, error });
    }
}

/// A poll whose extract failed (parse, mapping, limit, truncation, out of order) failed,
/// whatever the transfer did: the error names each failed snapshot and its reason.
fn with_failed_extracts(error: Option<String>, outcomes: &[IngestOutcome]) -> Option<String> {
    let failed: Vec<String> = outcomes
        .iter()
        .filter(|o| o.status == SnapshotStatus::Failed)
        .map(|o| {
            format!("snapshot {} failed: {}", o.snapshot_id, o.note.as_deref().unwrap_or("no reason given"))
        })
        .collect();
    if failed.is_empty() {
        return error;
    }
    let mut parts: Vec<String> = error.into_iter().collect();
    parts.extend(failed);
    Some(parts.join("; "))
}

/// Runs the staleness rules on the writer after a poll; logged, not returned.
async fn check_staleness(shared: &Arc<Shared>, source: &SourceConfig) {
    let (config, job_source, started_at) = (shared.config.clone(), source.clone(), shared.started);
    let checked = shared
        .writer
        .run(move |store| super::alerting::after_poll(store, &config, &job_source, started_at, Utc::now()))
        .await;
    match checked {
        Ok(Ok(_)) => {}
        Ok(Err(err)) => {
            tracing::warn!(source = %source.name, error = %format!("{err:#}"), "staleness rules not evaluated")
        }
        Err(err) => tracing::warn!(source = %source.name, error = %err, "staleness rules not evaluated"),
    }
}

async fn poll_folder(
    shared: &Arc<Shared>,
    source: &SourceConfig,
    source_id: SourceId,
    folder: &FolderSettings,
    known: &mut HashSet<(String, u64, i64)>,
) -> PollResult {
    let first = match look(folder).await {
        Ok(listing) => listing,
        Err(err) => return (Vec::new(), Some(err)),
    };
    let mut problems = first.problems.clone();
    let is_new = |f: &SeenFile| !known.contains(&fingerprint(f));
    if !first.files.iter().any(is_new) {
        return (Vec::new(), (!problems.is_empty()).then(|| problems.join("; ")));
    }
    let candidates = if folder.ready_marker.is_some() {
        first.files.clone()
    } else {
        tokio::select! {
            () = tokio::time::sleep(folder.settle) => {}
            () = shared.shutdown.cancelled() => return (Vec::new(), None),
        }
        match look(folder).await {
            Ok(second) => folder::stable(&first, &second),
            Err(err) => return (Vec::new(), Some(err)),
        }
    };
    let mut pending: Vec<(DateTime<Utc>, SeenFile)> = Vec::new();
    for file in candidates.into_iter().filter(|f| is_new(f)) {
        match as_of_for_file(&source.as_of, &file.path) {
            Ok(as_of) => pending.push((as_of, file)),
            Err(err) => problems.push(format!("{}: {err:#}", escape_outside(&file.name))),
        }
    }
    // Catch-up after downtime: everything pending, oldest as-of first.
    pending.sort_by(|a, b| (a.0, &a.1.name).cmp(&(b.0, &b.1.name)));
    let mut outcomes = Vec::new();
    for (as_of, file) in pending {
        if shared.shutdown.is_cancelled() {
            break;
        }
        match take_file(shared, source, source_id, &file, as_of).await {
            Ok(Taken::Ingested(outcome)) => {
                known.insert(fingerprint(&file));
                outcomes.push(outcome);
            }
            Ok(Taken::Unchanged) => {
                known.insert(fingerprint(&file));
            }
            Ok(Taken::Unsettled) => {}
            Err(err) => problems.push(format!("{}: {err:#}", escape_outside(&file.name))),
        }
    }
    (outcomes, (!problems.is_empty()).then(|| problems.join("; ")))
}

async fn look(folder: &FolderSettings) -> Result<folder::Listing, String> {
    let (path, pattern, marker) = (folder.path.clone(), folder.pattern.clone(), folder.ready_marker.clone());
    tokio::task::spawn_blocking(move || folder::look(&path, &pattern, marker.as_deref()))
        .await
        .map_err(|err| err.to_string())?
        .map_err(|err| format!("cannot list {}: {err}", escape_path(&folder.path)))
}

fn fingerprint(file: &SeenFile) -> (String, u64, i64) {
    (file.path.display().to_string(), file.size, file.mtime_ns)
}

/// What became of one file a folder poll looked at.
enum Taken {
    /// Ingested: a new snapshot (applied, held or failed).
    Ingested(IngestOutcome),
    /// The same bytes as the source's latest applied snapshot (a copy or a rename): nothing new.
    Unchanged,
    /// The file changed while it was read: not taken, looked at again on the next poll.
    Unsettled,
}

/// A file's size and modification time now, as the folder listing records them.
fn stat(path: &Path) -> Option<(u64, i64)> {
    std::fs::metadata(path).ok().map(|meta| folder::size_and_mtime(&meta))
}

/// Archives one file and ingests it unless its bytes are those of the source's latest
/// applied snapshot. The file must be the one the listing saw, and must not change while
/// it is read: its size and mtime are checked immediately before and after reading, and the
/// bytes read must equal its size. Bytes of an *older* snapshot are a new observation and
/// are ingested like any other.
async fn take_file(
    shared: &Arc<Shared>,
    source: &SourceConfig,
    source_id: SourceId,
    file: &SeenFile,
    as_of: DateTime<Utc>,
) -> Result<Taken> {
    let (archive_dir, path) = (shared.config.store.archive.clone(), file.path.clone());
    let listed = (file.size, file.mtime_ns);
    let read = tokio::task::spawn_blocking(move || -> Result<Option<archive::Archived>> {
        if stat(&path) != Some(listed) {
            return Ok(None);
        }
        let reader = std::fs::File::open(&path).with_context(|| format!("opening {}", escape_path(&path)))?;
        let archived = archive::store(&archive_dir, std::io::BufReader::new(reader)).context("archiving")?;
        let settled = stat(&path) == Some(listed) && archived.bytes == listed.0;
        Ok(settled.then_some(archived))
    })
    .await??;
    let Some(archived) = read else {
        tracing::info!(source = %source.name, file = %escape_outside(&file.name), "file changed while it was read; looked at again on the next poll");
        return Ok(Taken::Unsettled);
    };
    let meta = ExtractMeta {
        as_of,
        received_at: Utc::now(),
        origin: file.path.display().to_string(),
        sha256: archived.sha256.clone(),
        bytes: archived.bytes,
        kind: source.extract,
    };
    let mut record = FileRecord {
        path: file.path.display().to_string(),
        size: file.size,
        mtime_ns: file.mtime_ns,
        sha256: archived.sha256,
        snapshot_id: None,
    };
    let (config, source, cancel) = (shared.config.clone(), source.clone(), shared.cancel_ingest.clone());
    shared
        .writer
        .run(move |store| -> Result<Taken> {
            if store.duplicate_of(source_id, &record.sha256)?.is_some() {
                store.record_file(source_id, &record)?;
                return Ok(Taken::Unchanged);
            }
            let outcome = commit_archived(store, &config, &source, &meta, &|| cancel.load(Ordering::SeqCst))?;
            record.snapshot_id = Some(outcome.snapshot_id);
            store.record_file(source_id, &record)?;
            Ok(Taken::Ingested(outcome))
        })
        .await?
}

/// Bytes of a URL source's last failed snapshot, so the same failing body is not parsed
/// again on every poll (each such poll still counts as failed).
#[derive(Debug, Clone)]
struct FailedBody {
    sha256: String,
    snapshot_id: SnapshotId,
    note: String,
}

async fn poll_url(
    shared: &Arc<Shared>,
    source: &SourceConfig,
    source_id: SourceId,
    settings: &UrlSettings,
    client: &reqwest::Client,
    validators: &mut Validators,
    failed: &mut Option<FailedBody>,
) -> Result<Vec<IngestOutcome>> {
    let fetched = http::fetch(client, settings, validators, &shared.shutdown).await?;
    let Fetched::Body { bytes, validators: new_validators, headers, attempts } = fetched else {
        return Ok(Vec::new());
    };
    let as_of = url_as_of(&source.as_of, &settings.url, &headers);
    let archive_dir = shared.config.store.archive.clone();
    let size = bytes.len();
    let archived = tokio::task::spawn_blocking(move || archive::store(&archive_dir, &bytes[..])).await??;
    tracing::info!(source = %source.name, bytes = size, attempts, "fetched");
    if let Some(earlier) = failed.as_ref().filter(|f| f.sha256 == archived.sha256) {
        anyhow::bail!(
            "the same bytes as failed snapshot {} again, not parsed again ({})",
            earlier.snapshot_id,
            earlier.note
        );
    }
    let meta = ExtractMeta {
        as_of,
        received_at: Utc::now(),
        origin: crate::config::redact_url(&settings.url),
        sha256: archived.sha256,
        bytes: archived.bytes,
        kind: source.extract,
    };
    let (config, job_source, cancel) = (shared.config.clone(), source.clone(), shared.cancel_ingest.clone());
    let sha256 = meta.sha256.clone();
    let outcome = shared
        .writer
        .run(move |store| -> Result<Option<IngestOutcome>> {
            if store.duplicate_of(source_id, &meta.sha256)?.is_some() {
                return Ok(None);
            }
            Ok(Some(commit_archived(store, &config, &job_source, &meta, &|| cancel.load(Ordering::SeqCst))?))
        })
        .await??;
    match outcome.as_ref().filter(|o| o.status == SnapshotStatus::Failed) {
        // A failed body's validators are not kept: the next poll fetches the body again
        // (and, if it is the same, counts as failed without parsing it).
        Some(bad) => {
            *failed = Some(FailedBody {
                sha256,
                snapshot_id: bad.snapshot_id,
                note: bad.note.clone().unwrap_or_default(),
            });
        }
        None => {
            *failed = None;
            let remembered = new_validators.clone();
            shared
                .writer
                .run(move |store| {
                    store.remember_validators(
                        source_id,
                        remembered.etag.as_deref(),
                        remembered.last_modified.as_deref(),
                    )
                })
                .await??;
            *validators = new_validators;
        }
    }
    Ok(outcome.into_iter().collect())
}

/// The as-of time of a fetched extract: a response header, a date in the URL, or now.
fn url_as_of(rule: &AsOfRule, url: &str, headers: &reqwest::header::HeaderMap) -> DateTime<Utc> {
    let header = |name: &str| headers.get(name).and_then(|v| v.to_str().ok()).and_then(http::parse_http_date);
    let found = match rule {
        AsOfRule::Header(name) => header(name),
        AsOfRule::NameDate(format) => {
            let name = Path::new(url.split('?').next().unwrap_or(url)).file_name();
            name.and_then(|n| date_in_name(&n.to_string_lossy(), format)).map(end_of_day)
        }
        AsOfRule::FileMtime => header("last-modified"),
    };
    found.unwrap_or_else(Utc::now)
}
