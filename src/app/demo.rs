//! `tidemark demo`: generates the invented scenario and plays it through the daemon: each
//! day the county extract is dropped into a watched folder and the lab extract is offered by
//! an HTTP server on loopback; the daemon polls both and ingests through the same path as
//! `tidemark ingest`. The summary compares what the store knows with the scenario's truth.

use std::collections::{BTreeMap, HashMap};
use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

use anyhow::{Context, Result};
use chrono::NaiveDate;
use tokio::net::TcpListener;
use tokio::sync::{Notify, mpsc};
use tokio_util::sync::CancellationToken;

use super::analyse::{self, BacktestRequest, TriangleKey};
use super::commands;
use super::daemon::{self, Hooks, PollEvent};
use super::ingest::end_of_day;
use super::pipeline::{Analysed, StepReport};
use crate::analysis::nowcast::NowcastRow;
use crate::config::Config;
use crate::demo::{self, COUNTY_SOURCE, LAB_SOURCE, Scenario};
use crate::model::{Field, MethodChoice, SnapshotId, SnapshotStatus, SourceId};
use crate::serve::feed::{self, Feed};
use crate::serve::{self};
use crate::store::{Reader, Store};

/// Longest the demo waits for one day's polls before giving up.
const POLL_WAIT: Duration = Duration::from_secs(60);

/// What `tidemark demo` was asked to do.
#[derive(Debug, Clone)]
pub struct DemoOptions {
    pub dir: PathBuf,
    pub seed: u64,
    pub days: u32,
}

/// What the demo found, for its summary.
#[derive(Debug, Clone)]
pub struct DemoReport {
    pub dir: PathBuf,
    pub config: PathBuf,
    pub true_cases: usize,
    /// Per source: (name, statuses with counts, versions, current records, rejects by kind).
    pub sources: Vec<SourceSummary>,
    /// (onset date, count known on the last day, true count), by day.
    pub onset_curve: Vec<(NaiveDate, i64, u32)>,
    pub onset_missing: i64,
    /// The last 14 days' nowcast by onset: (row, eventual reported count, true onsets).
    pub nowcast: Vec<(NowcastRow, u32, u32)>,
    pub nowcast_method: String,
    /// Backtest summary lines (county feed, by onset).
    pub backtest: String,
    /// Alerts the rules raised during the run, by the day of the snapshot that opened them.
    pub alerts: Vec<DemoAlert>,
    /// The problems injected into the feeds (known truth).
    pub injections: Vec<demo::Injection>,
    /// Every post-snapshot step the daemon ran, in order (the scoring benchmark times them).
    pub steps: Vec<StepReport>,
}

/// One alert of the run and the injected problem it matches, if any.
#[derive(Debug, Clone)]
pub struct DemoAlert {
    pub rule: String,
    pub source: String,
    pub subject: String,
    /// Scenario day of the snapshot that opened it.
    pub day: i64,
    /// Day its matching problem was injected.
    pub injected_day: Option<i32>,
    pub line: String,
}

/// The injection an alert matches: same source, a rule expected for it, the same subject
/// (or the whole source, which a problem in one part also moves, or a jurisdiction's part of
/// the subject, `field (jurisdiction)`), fired on or after it.
fn matching_injection(
    injections: &[demo::Injection],
    rule: &str,
    source: &str,
    subject: &str,
    day: i64,
) -> Option<i32> {
    injections
        .iter()
        .filter(|i| {
            let within = subject.strip_prefix(i.subject).is_some_and(|rest| rest.starts_with(" ("));
            i.feed == source
                && i.rules.contains(&rule)
                && (subject.is_empty() || subject == i.subject || within)
        })
        .filter(|i| day >= i64::from(i.day))
        .map(|i| i.day)
        .max()
}

#[derive(Debug, Clone)]
pub struct SourceSummary {
    pub name: String,
    pub statuses: BTreeMap<SnapshotStatus, usize>,
    pub versions: i64,
    pub current: i64,
    pub rejects: Vec<(String, i64)>,
}

/// Runs the demo through the daemon: the county feed is a folder the demo drops each day's
/// file into, the lab feed is served over HTTP on loopback. `progress` receives a line now
/// and then.
pub fn run(options: &DemoOptions, progress: &mut dyn FnMut(&str)) -> Result<DemoReport> {
    progress(&format!(
        "generating the scenario (seed {}, {} days) in {}",
        options.seed,
        options.days,
        options.dir.display()
    ));
    let scenario = Scenario::generate(options.seed, options.days);
    let runtime = tokio::runtime::Builder::new_multi_thread().enable_all().build()?;
    let mut steps = Vec::new();
    let (config, started) = runtime.block_on(drive(options, &scenario, &mut steps, progress))?;
    progress(&format!("all days ingested in {:.1} s", started.elapsed().as_secs_f64()));
    Ok(DemoReport { steps, ..summarise(&config, &scenario, options.dir.clone())? })
}

async fn drive(
    options: &DemoOptions,
    scenario: &Scenario,
    steps: &mut Vec<StepReport>,
    progress: &mut dyn FnMut(&str),
) -> Result<(Config, Instant)> {
    let listener = TcpListener::bind("127.0.0.1:0").await.context("binding the demo's lab server")?;
    let lab_url = format!("http://{}/{LAB_SOURCE}.ndjson", listener.local_addr()?);
    let files = demo::write(&options.dir, scenario, &lab_url).context("writing the demo scenario")?;
    let config = Arc::new(Config::load(&files.config)?);
    let shutdown = CancellationToken::new();
    let lab = Arc::new(Feed::default());
    tokio::spawn(serve::serve(listener, feed::router(lab.clone()), shutdown.clone()));
    progress(&format!(
        "lab feed served at {lab_url}; county feed dropped into {}",
        files.county_inbox.display()
    ));
    let (events_tx, mut events) = mpsc::unbounded_channel();
    let (analysed_tx, mut analysed) = mpsc::unbounded_channel::<Analysed>();
    let nudges: HashMap<String, Arc<Notify>> =
        [COUNTY_SOURCE, LAB_SOURCE].iter().map(|s| (s.to_string(), Arc::new(Notify::new()))).collect();
    let mut hooks = Some(Hooks {
        events: Some(events_tx),
        nudges: nudges.clone(),
        analysed: Some(analysed_tx),
        analysis_gate: None,
    });
    let started = Instant::now();
    let mut daemon = None;
    for (idx, (day, county, lab_file)) in files.extracts.iter().enumerate() {
        drop_file(county, &files.county_inbox)?;
        lab.set(std::fs::read(lab_file)?, end_of_day(scenario.date(*day)));
        let mark = Instant::now();
        // The first day starts the daemon, whose start-up polls take it; later days nudge.
        match hooks.take() {
            Some(hooks) => {
                daemon = Some(tokio::spawn(daemon::run(config.clone(), shutdown.clone(), hooks, None)));
            }
            None => nudges.values().for_each(|n| n.notify_one()),
        }
        let waited = async {
            let (outcomes, owed) = wait_for_polls(&mut events, mark).await?;
            wait_for_analyses(&mut analysed, owed, steps).await?;
            Ok::<_, anyhow::Error>(outcomes)
        };
        let outcomes = match waited.await {
            Ok(outcomes) => outcomes,
            Err(err) => match daemon.take() {
                Some(handle) if handle.is_finished() => {
                    handle.await??;
                    return Err(err);
                }
                _ => return Err(err),
            },
        };
        if (idx + 1) % 20 == 0 || idx + 1 == files.extracts.len() {
            progress(&format!("  {}: {}", scenario.date(*day), outcomes.join("; ")));
        }
    }
    shutdown.cancel();
    if let Some(daemon) = daemon {
        daemon.await??;
    }
    Ok((Config::load(&files.config)?, started))
}

/// Places a file in the inbox the way a careful exporter does: copy under a hidden name,
/// then rename, so the daemon never sees a partial file.
fn drop_file(from: &Path, inbox: &Path) -> Result<()> {
    let name = from.file_name().context("extract without a file name")?;
    let hidden = inbox.join(format!(".{}.part", name.to_string_lossy()));
    std::fs::copy(from, &hidden)?;
    std::fs::rename(&hidden, inbox.join(name))?;
    Ok(())
}

/// Waits until the daemon's pipeline has analysed (or superseded) every snapshot in `owed`,
/// so that each day's alerts are decided before the next day's extracts arrive.
async fn wait_for_analyses(
    analysed: &mut mpsc::UnboundedReceiver<Analysed>,
    mut owed: Vec<SnapshotId>,
    steps: &mut Vec<StepReport>,
) -> Result<()> {
    while !owed.is_empty() {
        let analysis = tokio::time::timeout(POLL_WAIT, analysed.recv())
            .await
            .context("the daemon did not analyse the day's snapshots in time")?
            .context("the daemon stopped")?;
        if let Some(failure) = analysis.failure() {
            anyhow::bail!("the analysis of snapshot {} failed: {failure}", analysis.snapshot_id);
        }
        owed.retain(|id| *id != analysis.snapshot_id && !analysis.superseded.contains(id));
        steps.extend(analysis.steps);
    }
    Ok(())
}

/// Waits until both feeds have been polled since `mark`; returns what each poll did and the
/// snapshots whose analysis the polls owe (applied or held).
async fn wait_for_polls(
    events: &mut mpsc::UnboundedReceiver<PollEvent>,
    mark: Instant,
) -> Result<(Vec<String>, Vec<SnapshotId>)> {
    let mut owed = Vec::new();
    let mut done: BTreeMap<String, String> = BTreeMap::new();
    while done.len() < 2 {
        let event = tokio::time::timeout(POLL_WAIT, events.recv())
            .await
            .context("the daemon did not poll in time")?
            .context("the daemon stopped")?;
        if event.started < mark {
            continue;
        }
        owed.extend(
            event
                .snapshots
                .iter()
                .filter(|(_, status)| matches!(status, SnapshotStatus::Applied | SnapshotStatus::Held))
                .map(|(id, _)| *id),
        );
        let what = match (&event.error, event.snapshots.last()) {
            (Some(err), _) => format!("poll failed ({err})"),
            (None, Some((id, status))) => format!("snapshot {id} {}", status.name()),
            (None, None) => "nothing new".into(),
        };
        done.insert(event.source.clone(), format!("{} {what}", event.source));
    }
    Ok((done.into_values().collect(), owed))
}

fn summarise(config: &Config, scenario: &Scenario, dir: PathBuf) -> Result<DemoReport> {
    let reader = Reader::open(&config.store.path)?;
    let mut sources = Vec::new();
    for name in [COUNTY_SOURCE, LAB_SOURCE] {
        let source_id = reader.source_id(name)?.context("demo source has no snapshots")?;
        let mut statuses = BTreeMap::new();
        for snapshot in reader.snapshots(Some(name))? {
            *statuses.entry(snapshot.status).or_insert(0) += 1;
        }
        let (versions, current) = reader.version_counts(source_id)?;
        let rejects = reader.reject_kinds(source_id)?;
        sources.push(SourceSummary { name: name.to_string(), statuses, versions, current, rejects });
    }
    let county_id = reader.source_id(COUNTY_SOURCE)?.context("county source missing")?;
    let last = reader.snapshot_as_of(county_id, None)?.context("no applied county snapshot")?;
    let curve = reader.curve(county_id, last, Field::OnsetDate, None)?;
    let truth = scenario.true_onsets();
    let mut onset_curve = Vec::new();
    let mut onset_missing = 0;
    for row in curve {
        match row.date {
            Some(date) => {
                let day = (date - scenario.start).num_days();
                let true_count = usize::try_from(day).ok().and_then(|d| truth.get(d)).copied().unwrap_or(0);
                onset_curve.push((date, row.count, true_count));
            }
            None => onset_missing = row.count,
        }
    }
    let (nowcast, nowcast_method, backtest) = nowcast_against_truth(config, scenario, county_id, last)?;
    let alerts = demo_alerts(&reader, scenario)?;
    Ok(DemoReport {
        alerts,
        injections: scenario.injections.clone(),
        dir,
        config: config.file.clone(),
        true_cases: scenario.cases.len(),
        sources,
        onset_curve,
        onset_missing,
        nowcast,
        nowcast_method,
        backtest,
        steps: Vec::new(),
    })
}

/// Every alert raised in the run, by the day of the snapshot that opened it.
fn demo_alerts(reader: &Reader, scenario: &Scenario) -> Result<Vec<DemoAlert>> {
    Ok(reader
        .alert_lines()?
        .into_iter()
        .map(|a| {
            let subject = if a.subject.is_empty() { String::new() } else { format!(" [{}]", a.subject) };
            let line =
                format!("{} {}{} {} ({}): {}", a.rule, a.source, subject, a.severity, a.state, a.summary);
            let day = NaiveDate::parse_from_str(&a.day, "%Y-%m-%d")
                .map(|d| (d - scenario.start).num_days())
                .unwrap_or(-1);
            let injected_day = matching_injection(&scenario.injections, &a.rule, &a.source, &a.subject, day);
            DemoAlert { rule: a.rule, source: a.source, subject: a.subject, day, injected_day, line }
        })
        .collect())
}

type NowcastSummary = (Vec<(NowcastRow, u32, u32)>, String, String);

/// Backtests the county feed by onset, lets `auto` pick the method, and lines up the last 14
/// days of its nowcast with what the feed will eventually show and with the true onsets.
fn nowcast_against_truth(
    config: &Config,
    scenario: &Scenario,
    county_id: SourceId,
    last: SnapshotId,
) -> Result<NowcastSummary> {
    let source = config.source(COUNTY_SOURCE).context("county source missing")?;
    let request = BacktestRequest {
        field: Field::OnsetDate,
        from: None,
        to: None,
        lag: config.analysis.backtest_lag,
        max_horizon: 14,
        methods: crate::config::analysis::NOWCAST_METHODS.to_vec(),
    };
    let mut store = Store::open(&config.store.path)?;
    let (_, cells, from, to) = analyse::backtest(&mut store, config, source, &request)?;
    drop(store);
    let mut backtest =
        format!("  nowcasts made on each day {from}..{to}, scored {} days later:\n", request.lag);
    backtest.push_str(&commands::backtest_summary(&cells));
    let reader = Reader::open(&config.store.path)?;
    let key = TriangleKey::all(Field::OnsetDate);
    let choice = analyse::resolve_method(&reader, config, county_id, last, &key, MethodChoice::Auto)?;
    let method = choice.method;
    backtest.push_str(&format!("  {}\n", choice.reason));
    if let Some(warning) = &choice.warning {
        backtest.push_str(&format!("  {warning}\n"));
    }
    let mut rows = reader.nowcast(last, (Field::OnsetDate.name(), "all", "", method.name()))?;
    if rows.is_empty() {
        let tri = analyse::load_triangle(&reader, county_id, last, &key, &config.analysis, 0)?;
        rows =
            analyse::run_method(method, &tri, &config.analysis, analyse::seed_for(last, &key, method.name()))
                .rows;
    }
    let eventual = demo::feeds::eventual_county_onsets(scenario);
    let truth = scenario.true_onsets();
    let at = |date: NaiveDate, counts: &[u32]| {
        usize::try_from((date - scenario.start).num_days())
            .ok()
            .and_then(|d| counts.get(d))
            .copied()
            .unwrap_or(0)
    };
    let recent: Vec<_> = rows
        .into_iter()
        .filter(|r| r.horizon < 14)
        .map(|r| {
            let (e, t) = (at(r.date, &eventual), at(r.date, &truth));
            (r, e, t)
        })
        .collect();
    Ok((recent, method.to_string(), backtest))
}

/// "0 days", "1 day", "3 days".
fn days_text(n: i64) -> String {
    if n == 1 { "1 day".into() } else { format!("{n} days") }
}

impl DemoReport {
    /// The summary a person reads.
    pub fn report(&self) -> String {
        let mut out = String::new();
        let _ = writeln!(out, "\nDemo scenario: {} true cases in 4 invented jurisdictions.", self.true_cases);
        for s in &self.sources {
            let statuses: Vec<String> = s.statuses.iter().map(|(k, v)| format!("{v} {k}")).collect();
            let _ = writeln!(
                out,
                "\n{}: snapshots {}; {} record versions, {} current records",
                s.name,
                statuses.join(", "),
                s.versions,
                s.current
            );
            let rejects: Vec<String> = s.rejects.iter().map(|(k, v)| format!("{k} {v}")).collect();
            let _ = writeln!(
                out,
                "  rejected rows by reason (all snapshots): {}",
                if rejects.is_empty() { "none".into() } else { rejects.join(", ") }
            );
        }
        let _ = writeln!(out, "\nCases by onset week, as known on the last day, against the truth:");
        let _ = writeln!(out, "  week of      known   true  known/true");
        for week in self.onset_curve.chunks(7) {
            let known: i64 = week.iter().map(|w| w.1).sum();
            let truth: u32 = week.iter().map(|w| w.2).sum();
            let ratio = if truth > 0 { format!("{:.2}", known as f64 / truth as f64) } else { "-".into() };
            let _ = writeln!(out, "  {}  {known:>6} {truth:>6}  {ratio:>10}", week[0].0);
        }
        let _ = writeln!(
            out,
            "  ({} records have no onset date; they are missing, not imputed)",
            self.onset_missing
        );
        let _ = writeln!(
            out,
            "\nThe last 14 days by onset: recent days look low because reports are still arriving.\nNowcast ({}) on the last day against what the feed will eventually show, and the truth:",
            self.nowcast_method
        );
        let _ = writeln!(out, "  onset_date  known  median  90% interval  eventual  true");
        let mut inside = 0;
        for (row, eventual, truth) in &self.nowcast {
            inside += (row.lower90 <= *eventual as f64 && *eventual as f64 <= row.upper90) as usize;
            let band = format!("[{:.0}, {:.0}]", row.lower90, row.upper90);
            let _ = writeln!(
                out,
                "  {}  {:>5}  {:>6.0}  {band:>12}  {eventual:>8}  {truth:>4}",
                row.date, row.observed, row.median
            );
        }
        let _ = writeln!(
            out,
            "  {inside} of {} days have the eventual count inside the 90% interval",
            self.nowcast.len()
        );
        let _ = writeln!(out, "\nBacktest of the county feed by onset:\n{}", self.backtest);
        let _ = writeln!(
            out,
            "\nAlerts raised ({}); the demo config has no alert channel, so they are stored, not sent:",
            self.alerts.len()
        );
        let _ = writeln!(
            out,
            "  {:<18} {:<15} {:<14} {:>5} {:>9}",
            "rule", "source", "subject", "fired", "injected"
        );
        for a in self.alerts.iter().filter(|a| a.injected_day.is_some()) {
            let injected = a.injected_day.map(|d| d.to_string()).unwrap_or_default();
            let _ = writeln!(
                out,
                "  {:<18} {:<15} {:<14} {:>5} {:>9}",
                a.rule, a.source, a.subject, a.day, injected
            );
        }
        let unexplained: Vec<_> = self.alerts.iter().filter(|a| a.injected_day.is_none()).collect();
        let _ = writeln!(
            out,
            "Alerts with no injected cause ({}; false alarms or real features of the invented epidemic):",
            unexplained.len()
        );
        for a in &unexplained {
            let _ = writeln!(out, "  day {:>3}  {}  (no injected cause)", a.day, a.line);
        }
        for i in &self.injections {
            let first = self.alerts.iter().filter(|a| a.injected_day == Some(i.day)).map(|a| a.day).min();
            let place =
                if i.jurisdiction.is_empty() { String::new() } else { format!(" in {}", i.jurisdiction) };
            let verdict = match first {
                Some(day) => {
                    format!("detected on day {day}, {} after it began", days_text(day - i64::from(i.day)))
                }
                None => "NOT detected".to_string(),
            };
            let _ = writeln!(out, "  injected day {:>3}: {}{place} ({}): {verdict}", i.day, i.kind, i.feed);
        }
        let _ = writeln!(out, "  Alerts are signals for investigation, not confirmed events.");
        let _ = writeln!(out, "Store and files: {}", self.dir.display());
        let _ = writeln!(
            out,
            "Try: tidemark --config {} snapshots --source {COUNTY_SOURCE}",
            self.config.display()
        );
        let _ = writeln!(
            out,
            "     tidemark --config {} curve --source {COUNTY_SOURCE} --by onset --as-of 2026-02-20",
            self.config.display()
        );
        let _ = writeln!(
            out,
            "     tidemark --config {} nowcast --source {COUNTY_SOURCE} --by onset",
            self.config.display()
        );
        let _ = writeln!(
            out,
            "\nCurves are as reported; nowcasts are estimates with stated uncertainty, not counts. Treat\nrecent days as incomplete and follow your jurisdiction's own protocols and case definitions."
        );
        out
    }
}
