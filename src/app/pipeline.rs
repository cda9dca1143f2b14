//! The post-snapshot pipeline: what runs after a commit, as named steps (nowcasts, scoring
//! of the nowcasts whose truth has matured, delay fits, quality measures, alert rules), each timed and reported. The commit enters every
//! applied or held snapshot as owed (`store::OwedAnalysis`) in its own transaction; this
//! stage reads what a source owes, analyses the latest applied snapshot (and a later held
//! one) once, marks the earlier ones superseded, and records done or failed. A crash, a
//! shutdown or a full disk leaves the analysis owed, and the next run does it: none is lost.
//!
//! The steps read on read-only connections and compute on this thread (the delay fits on a
//! second one); only their writes go through `Writes`: directly to the `Store` for the CLI,
//! through the writer thread in the daemon, so one source's analysis never holds up another
//! source's commits. A later step slots in here without touching ingest.

use std::path::Path;
use std::time::{Duration, Instant};

use anyhow::{Context, Result, bail};
use chrono::{DateTime, Utc};

use super::ingest::{IngestOutcome, commit_file};
use super::writer::Writer;
use super::{alerting, analyse, quality};
use crate::config::{Config, SourceConfig};
use crate::model::{SnapshotId, SnapshotStatus};
use crate::store::{OwedAnalysis, Reader, Store};

/// Where the pipeline's writes go: each job is one short write on the writer connection.
pub trait Writes {
    fn write<T: Send + 'static>(
        &mut self,
        job: impl FnOnce(&mut Store) -> Result<T> + Send + 'static,
    ) -> Result<T>;

    /// Whether the writes come from the unattended daemon, whose alert messages are held for
    /// one digest while it catches up on a backlog; a command a person runs pages as it goes.
    fn unattended(&self) -> bool {
        false
    }
}

/// The CLI's and the tests' way: the store is at hand.
impl Writes for Store {
    fn write<T: Send + 'static>(
        &mut self,
        job: impl FnOnce(&mut Store) -> Result<T> + Send + 'static,
    ) -> Result<T> {
        job(self)
    }
}

/// The daemon's way: each write is a job on the writer thread, between other sources'
/// commits.
impl Writes for Writer {
    fn write<T: Send + 'static>(
        &mut self,
        job: impl FnOnce(&mut Store) -> Result<T> + Send + 'static,
    ) -> Result<T> {
        self.run_blocking(job)?
    }

    fn unattended(&self) -> bool {
        true
    }
}

/// One step of the pipeline.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Step {
    Nowcasts,
    Scoring,
    DelayFits,
    Quality,
    AlertRules,
}

impl Step {
    pub const ALL: [Step; 5] =
        [Step::Nowcasts, Step::Scoring, Step::DelayFits, Step::Quality, Step::AlertRules];

    /// The step's name in logs and `/metrics`.
    pub fn name(self) -> &'static str {
        match self {
            Step::Nowcasts => "nowcasts",
            Step::Scoring => "scoring",
            Step::DelayFits => "delay_fits",
            Step::Quality => "quality",
            Step::AlertRules => "alert_rules",
        }
    }

    /// The steps a snapshot of this status owes: an applied snapshot all of them; a held one
    /// only the alert rules (it changed no record); any other (a held snapshot rejected
    /// since) none.
    fn owed_by(status: SnapshotStatus) -> &'static [Step] {
        match status {
            SnapshotStatus::Applied => &Step::ALL,
            SnapshotStatus::Held => &[Step::AlertRules],
            _ => &[],
        }
    }
}

/// What one step did.
#[derive(Debug, Clone)]
pub struct StepReport {
    pub step: Step,
    pub took: Duration,
    /// Why it failed (an error text: names and counts, never a cell value).
    pub error: Option<String>,
}

/// The analysis of one snapshot.
#[derive(Debug, Clone)]
pub struct Analysed {
    pub source: String,
    pub snapshot_id: SnapshotId,
    /// Earlier owed snapshots of the source this analysis stands for (not analysed).
    pub superseded: Vec<SnapshotId>,
    pub steps: Vec<StepReport>,
}

impl Analysed {
    /// The failed steps and their reasons, or `None` when every step succeeded.
    pub fn failure(&self) -> Option<String> {
        let failed: Vec<String> = self
            .steps
            .iter()
            .filter_map(|r| r.error.as_ref().map(|e| format!("{}: {e}", r.step.name())))
            .collect();
        (!failed.is_empty()).then(|| failed.join("; "))
    }
}

/// What the caller hears about each step as it ends (the daemon counts them in `/metrics`).
pub type StepObserver<'a> = &'a (dyn Fn(&str, &StepReport) + Sync);

/// Runs everything a source owes, oldest kept snapshot first. Returns the snapshots
/// analysed; a snapshot interrupted by `cancelled` stays owed and is not in the list.
pub fn run_owed<W: Writes>(
    writes: &mut W,
    config: &Config,
    source: &SourceConfig,
    observe: StepObserver<'_>,
    cancelled: &dyn Fn() -> bool,
) -> Result<Vec<Analysed>> {
    let reader = Reader::open(&config.store.path)?;
    let Some(source_id) = reader.source_id(&source.name)? else { return Ok(Vec::new()) };
    let owed = reader.owed_analyses(source_id)?;
    let mut done = Vec::new();
    for (kept, superseded) in coalesce(owed) {
        if cancelled() {
            break;
        }
        if !superseded.is_empty() {
            let (ids, by) = (superseded.clone(), kept.snapshot_id);
            writes.write(move |store| Ok(store.supersede_analyses(&ids, by)?))?;
            tracing::info!(
                source = %source.name, snapshot_id = kept.snapshot_id.0, superseded = ?superseded,
                "earlier snapshots' analysis superseded by a later snapshot's"
            );
        }
        let Some(steps) = analyse(writes, &reader, config, source, &kept, observe, cancelled)? else { break };
        let analysed =
            Analysed { source: source.name.clone(), snapshot_id: kept.snapshot_id, superseded, steps };
        let error = analysed.failure();
        let id = kept.snapshot_id;
        writes.write(move |store| Ok(store.finish_analysis(id, error.as_deref())?))?;
        done.push(analysed);
    }
    Ok(done)
}

/// Which owed snapshots to analyse, each with the earlier ones it stands for: the latest
/// applied snapshot, and after it the latest held one if that came later. Everything else
/// owed is superseded: a later applied snapshot's nowcasts, fits, quality and alert rules
/// describe the source as it is now, and a later snapshot's alert rules re-decide every
/// alert the earlier ones would have raised or resolved.
fn coalesce(owed: Vec<OwedAnalysis>) -> Vec<(OwedAnalysis, Vec<SnapshotId>)> {
    let last_applied = owed.iter().rposition(|o| o.status == SnapshotStatus::Applied);
    let last = owed.len().checked_sub(1);
    let mut kept: Vec<(OwedAnalysis, Vec<SnapshotId>)> = Vec::new();
    let mut pending_superseded = Vec::new();
    for (at, entry) in owed.into_iter().enumerate() {
        if Some(at) == last_applied || (Some(at) == last && last_applied.is_none_or(|a| at > a)) {
            kept.push((entry, std::mem::take(&mut pending_superseded)));
        } else {
            pending_superseded.push(entry.snapshot_id);
        }
    }
    if let Some((_, superseded)) = kept.last_mut() {
        superseded.extend(pending_superseded);
    }
    kept
}

/// Runs the steps `snapshot` owes. `None` when shutdown was asked before the last step
/// ended (the snapshot stays owed).
fn analyse<W: Writes>(
    writes: &mut W,
    reader: &Reader,
    config: &Config,
    source: &SourceConfig,
    snapshot: &OwedAnalysis,
    observe: StepObserver<'_>,
    cancelled: &dyn Fn() -> bool,
) -> Result<Option<Vec<StepReport>>> {
    let steps = Step::owed_by(snapshot.status);
    let mut reports = Vec::new();
    if steps.contains(&Step::Nowcasts) {
        if cancelled() {
            return Ok(None);
        }
        reports.extend(nowcasts_and_fits(writes, reader, config, snapshot));
        reports.iter().for_each(|r| observe(&source.name, r));
    }
    for &step in steps.iter().filter(|s| matches!(s, Step::Scoring | Step::Quality | Step::AlertRules)) {
        if cancelled() {
            return Ok(None);
        }
        let started = Instant::now();
        let result = match step {
            Step::Scoring => score(writes, reader, config, snapshot),
            Step::Quality => measure(writes, config, source, snapshot),
            _ => evaluate_alerts(writes, config, source, snapshot, Utc::now()),
        };
        let report = report(step, started, result);
        observe(&source.name, &report);
        reports.push(report);
    }
    for report in &reports {
        log_step(&source.name, snapshot.snapshot_id, report);
    }
    Ok(Some(reports))
}

/// The nowcasts on this thread while the delay fits are read and fitted on another (the two
/// longest steps, on different read-only connections); each result is then written.
fn nowcasts_and_fits<W: Writes>(
    writes: &mut W,
    reader: &Reader,
    config: &Config,
    snapshot: &OwedAnalysis,
) -> [StepReport; 2] {
    let (source_id, snapshot_id) = (snapshot.source_id, snapshot.snapshot_id);
    std::thread::scope(|scope| {
        let fitting = scope.spawn(|| {
            let started = Instant::now();
            let fits = Reader::open(&config.store.path)
                .map_err(anyhow::Error::from)
                .and_then(|reader| analyse::delay_fits(&reader, config, source_id, snapshot_id));
            (started, fits)
        });
        let started = Instant::now();
        let nowcasts =
            analyse::nowcast_snapshot(reader, config, source_id, snapshot_id).and_then(|results| {
                writes.write(move |store| Ok(store.write_nowcasts(snapshot_id, source_id, &results)?))
            });
        let nowcasts = report(Step::Nowcasts, started, nowcasts);
        let (started, fits) = fitting.join().unwrap_or_else(|panic| std::panic::resume_unwind(panic));
        let fits = fits.and_then(|fits| {
            writes.write(move |store| analyse::write_delay_fits(store, source_id, snapshot_id, &fits))
        });
        [nowcasts, report(Step::DelayFits, started, fits)]
    })
}

/// Scores the stored nowcasts whose truth has matured by this snapshot.
fn score<W: Writes>(writes: &mut W, reader: &Reader, config: &Config, snapshot: &OwedAnalysis) -> Result<()> {
    let (source_id, snapshot_id) = (snapshot.source_id, snapshot.snapshot_id);
    let (day, scored) = analyse::score_matured(reader, config, source_id, snapshot_id)?;
    let written =
        writes.write(move |store| Ok(store.write_scores(source_id, (snapshot_id, day), &scored)?))?;
    tracing::debug!(snapshot_id = snapshot_id.0, written, "matured nowcasts scored");
    Ok(())
}

fn measure<W: Writes>(
    writes: &mut W,
    config: &Config,
    source: &SourceConfig,
    snapshot: &OwedAnalysis,
) -> Result<()> {
    let spec = quality::spec_for(config, source);
    let (source_id, snapshot_id) = (snapshot.source_id, snapshot.snapshot_id);
    writes.write(move |store| Ok(store.write_quality(source_id, snapshot_id, &spec)?))?;
    Ok(())
}

fn evaluate_alerts<W: Writes>(
    writes: &mut W,
    config: &Config,
    source: &SourceConfig,
    snapshot: &OwedAnalysis,
    now: DateTime<Utc>,
) -> Result<()> {
    let pass = alerting::snapshot_pass(config, source, snapshot, writes.unattended())?;
    let config = config.clone();
    writes.write(move |store| alerting::apply_pass(store, &config, &pass, now))?;
    Ok(())
}

fn report(step: Step, started: Instant, result: Result<impl Sized>) -> StepReport {
    StepReport { step, took: started.elapsed(), error: result.err().map(|err| format!("{err:#}")) }
}

fn log_step(source: &str, snapshot_id: SnapshotId, report: &StepReport) {
    let (step, ms) = (report.step.name(), report.took.as_millis() as u64);
    match &report.error {
        None => tracing::info!(
            source,
            snapshot_id = snapshot_id.0,
            step,
            ms,
            outcome = "ok",
            "post-snapshot step"
        ),
        Some(error) => {
            tracing::warn!(source, snapshot_id = snapshot_id.0, step, ms, outcome = "failed", error = %error, "post-snapshot step")
        }
    }
}

/// Nothing to observe (the CLI logs each step and has no metrics).
pub fn unobserved(_: &str, _: &StepReport) {}

/// Commits the file at `path` (`ingest::commit_file`) and runs what the source owes. An
/// analysis failure is an error naming the committed snapshot: the snapshot itself is
/// applied and safe, and its analysis stays owed. For the tests, benches and the demo; the
/// CLI does the two itself to choose its exit code.
pub fn ingest_file(
    store: &mut Store,
    config: &Config,
    source: &SourceConfig,
    path: &Path,
    as_of: Option<DateTime<Utc>>,
) -> Result<IngestOutcome> {
    let outcome = commit_file(store, config, source, path, as_of)?;
    let analysed = run_owed(store, config, source, &unobserved, &|| false).with_context(|| {
        format!("snapshot {} is committed; its analysis did not run", outcome.snapshot_id)
    })?;
    if let Some(failure) = analysed.iter().find_map(Analysed::failure) {
        bail!("snapshot {} is committed; its analysis failed: {failure}", outcome.snapshot_id);
    }
    Ok(outcome)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::SourceId;
    use crate::store::OwedState;

    fn owed(snapshot_id: i64, status: SnapshotStatus) -> OwedAnalysis {
        OwedAnalysis {
            snapshot_id: SnapshotId(snapshot_id),
            source_id: SourceId(1),
            status,
            rows_accepted: 0,
            rows_new: 0,
            state: OwedState::Pending,
            attempts: 0,
            error: None,
            superseded_by: None,
        }
    }

    /// (snapshots kept, each with the ids it supersedes) for owed entries given as
    /// (id, applied?).
    fn check(entries: &[(i64, bool)], expected: &[(i64, &[i64])]) {
        let status = |applied: bool| if applied { SnapshotStatus::Applied } else { SnapshotStatus::Held };
        let input = entries.iter().map(|&(id, applied)| owed(id, status(applied))).collect();
        let got: Vec<(i64, Vec<i64>)> = coalesce(input)
            .into_iter()
            .map(|(kept, superseded)| (kept.snapshot_id.0, superseded.iter().map(|s| s.0).collect()))
            .collect();
        let expected: Vec<(i64, Vec<i64>)> = expected.iter().map(|(id, s)| (*id, s.to_vec())).collect();
        assert_eq!(got, expected, "{entries:?}");
    }

    #[test]
    fn the_latest_applied_and_a_later_held_snapshot_are_analysed_the_rest_superseded() {
        check(&[], &[]);
        check(&[(1, true)], &[(1, &[])]);
        check(&[(1, true), (2, true), (3, true)], &[(3, &[1, 2])]);
        check(&[(1, true), (2, false)], &[(1, &[]), (2, &[])]);
        check(&[(1, false), (2, true)], &[(2, &[1])]);
        check(&[(1, true), (2, false), (3, true), (4, false), (5, false)], &[(3, &[1, 2]), (5, &[4])]);
        check(&[(1, false), (2, false)], &[(2, &[1])]);
    }
}
