//! Running the analyses on the store: build reporting triangles from the stored deltas,
//! nowcast them, backtest the methods, and store results keyed by the snapshot they were
//! computed from. The statistics are in `analysis`; this file only reads, calls and writes.

use super::errors::not_found;
use anyhow::Result;
use chrono::{Days, NaiveDate};

use crate::analysis::backtest::{self, BacktestCell};
use crate::analysis::delay::{self, DelayFit, DelayObs, DelaySummary, FitOptions};
use crate::analysis::nowcast::{Nowcast, NowcastRow, ensemble, hazard, smooth};
use crate::analysis::scoring::{self, AutoChoice, RowScore};
use crate::analysis::triangle::{self, Triangle};
use crate::config::{AnalysisConfig, Config, DelayEnd, SourceConfig};
use crate::model::{Field, MethodChoice, NowcastMethod, SnapshotId, SourceId};
use crate::store::{DelayRow, MaturedNowcast, NowcastKey, Reader, Store};

/// Which triangle: a reference field and a stratum (`("all", "")` for the whole source).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TriangleKey {
    pub field: Field,
    pub kind: String,
    pub stratum: String,
}

impl TriangleKey {
    pub fn all(field: Field) -> TriangleKey {
        TriangleKey { field, kind: "all".into(), stratum: String::new() }
    }
}

/// The day a snapshot describes (its as-of date).
pub fn snapshot_day(reader: &Reader, snapshot_id: SnapshotId) -> Result<NaiveDate> {
    reader.snapshot_day(snapshot_id)?.ok_or_else(|| not_found(format!("no snapshot {snapshot_id}")))
}

/// The triangle of `key` as known at snapshot `snapshot_id`, over the reference dates a
/// nowcast needs (the estimation window plus the maximum delay).
pub fn load_triangle(
    reader: &Reader,
    source_id: SourceId,
    snapshot_id: SnapshotId,
    key: &TriangleKey,
    analysis: &AnalysisConfig,
    extra_days: usize,
) -> Result<Triangle> {
    let last_day = snapshot_day(reader, snapshot_id)?;
    let span = (analysis.window + analysis.max_delay + extra_days) as u64;
    let first = last_day.checked_sub_days(Days::new(span)).unwrap_or(last_day);
    let deltas = reader.triangle_deltas(source_id, key.field, &key.kind, &key.stratum, first, snapshot_id)?;
    Ok(triangle::from_deltas(&deltas, first, last_day, analysis.max_delay))
}

/// Nowcasts a triangle with a named method; the seed makes draws reproducible.
pub fn run_method(method: NowcastMethod, tri: &Triangle, analysis: &AnalysisConfig, seed: u64) -> Nowcast {
    match method {
        NowcastMethod::Smooth => {
            let params = smooth::SmoothParams { draws: analysis.draws, ..smooth::SmoothParams::default() };
            smooth::nowcast(tri, &params, seed)
        }
        NowcastMethod::Hazard => {
            let params = hazard::HazardParams {
                window: analysis.window,
                draws: analysis.draws,
                ..hazard::HazardParams::default()
            };
            hazard::nowcast(tri, &params, seed)
        }
        NowcastMethod::Ensemble => {
            let members =
                [NowcastMethod::Hazard, NowcastMethod::Smooth].map(|m| run_method(m, tri, analysis, seed));
            ensemble::combine(&members)
        }
    }
}

/// Resolves a requested method for one series as of a snapshot. `auto` chooses from the
/// scores matured by that snapshot (`analysis::scoring::choose`); a named method is taken as
/// asked. Either way the choice carries a warning when the method's matured scores show it
/// miscalibrated. The dashboard reads the same `Reader::auto_method`, so they agree.
pub fn resolve_method(
    reader: &Reader,
    config: &Config,
    source_id: SourceId,
    snapshot_id: SnapshotId,
    key: &TriangleKey,
    requested: MethodChoice,
) -> Result<AutoChoice> {
    let series = (key.field.name(), key.kind.as_str(), key.stratum.as_str());
    let window = config.analysis.score_window;
    let configured = &config.analysis.nowcast_methods;
    let Some(method) = requested.method() else {
        return Ok(reader.auto_method(source_id, snapshot_id, series, window, configured)?);
    };
    let scores = reader.rolling_scores(source_id, series, snapshot_id, window)?;
    let score = scores.into_iter().find(|s| s.method == method);
    let warning = score.as_ref().and_then(scoring::calibration_warning);
    Ok(AutoChoice { method, reason: String::new(), score, warning })
}

/// A seed derived from what is being computed, so a figure is reproduced exactly.
pub fn seed_for(snapshot_id: SnapshotId, key: &TriangleKey, label: &str) -> u64 {
    let text = format!("{snapshot_id}/{}/{}/{}/{label}", key.field.name(), key.kind, key.stratum);
    text.bytes().fold(0xcbf2_9ce4_8422_2325u64, |h, b| (h ^ b as u64).wrapping_mul(0x0100_0000_01b3))
}

/// The nowcasts of every maintained triangle, as of a snapshot, for `Store::write_nowcasts`.
pub type SnapshotNowcasts = Vec<(NowcastKey, Vec<NowcastRow>)>;

/// Nowcasts every maintained triangle as of `snapshot_id`, on a read-only connection. The
/// whole source gets every configured method; strata get `hazard` (cheap enough for many).
pub fn nowcast_snapshot(
    reader: &Reader,
    config: &Config,
    source_id: SourceId,
    snapshot_id: SnapshotId,
) -> Result<SnapshotNowcasts> {
    let analysis = &config.analysis;
    let mut results = Vec::new();
    for &field in &analysis.reference_fields {
        let mut keys = vec![(TriangleKey::all(field), analysis.nowcast_methods.clone())];
        for stratum_field in &analysis.strata {
            for stratum in reader.triangle_strata(source_id, field, stratum_field.name())? {
                let key = TriangleKey { field, kind: stratum_field.name().to_string(), stratum };
                keys.push((key, vec![NowcastMethod::Hazard]));
            }
        }
        for (key, methods) in keys {
            let tri = load_triangle(reader, source_id, snapshot_id, &key, analysis, 0)?;
            for nowcast in
                nowcast_methods(&methods, &tri, analysis, |m| seed_for(snapshot_id, &key, m.name()))
            {
                let recent: Vec<_> =
                    nowcast.rows.into_iter().filter(|r| r.horizon <= analysis.max_delay).collect();
                let id = (
                    field.name().to_string(),
                    key.kind.clone(),
                    key.stratum.clone(),
                    nowcast.method.name().to_string(),
                );
                results.push((id, recent));
            }
        }
    }
    Ok(results)
}

/// The stored nowcasts of the source whose truth has matured by `snapshot_id`, each with its
/// scores (`analysis::scoring`), and the snapshot's day; for `Store::write_scores`.
pub fn score_matured(
    reader: &Reader,
    config: &Config,
    source_id: SourceId,
    snapshot_id: SnapshotId,
) -> Result<(NaiveDate, Vec<(MaturedNowcast, RowScore)>)> {
    let day = snapshot_day(reader, snapshot_id)?;
    let analysis = &config.analysis;
    let matured =
        reader.matured_nowcasts(source_id, snapshot_id, analysis.backtest_lag, analysis.max_delay)?;
    let scored = matured
        .into_iter()
        .map(|m| {
            let score = scoring::score_row(&m.row, m.truth);
            (m, score)
        })
        .collect();
    Ok((day, scored))
}

/// Nowcasts of one triangle with each of `methods`, in that order (`ensemble::with_members`).
fn nowcast_methods(
    methods: &[NowcastMethod],
    tri: &Triangle,
    analysis: &AnalysisConfig,
    seed: impl Fn(NowcastMethod) -> u64,
) -> Vec<Nowcast> {
    ensemble::with_members(methods, |m| run_method(m, tri, analysis, seed(m)))
}

/// Stores a snapshot's delay fits, one row set per (start field, end) pair; returns how
/// many pairs were written.
pub fn write_delay_fits(
    store: &mut Store,
    source_id: SourceId,
    snapshot_id: SnapshotId,
    fits: &PairFits,
) -> Result<usize> {
    for ((from, to), fits) in fits {
        store.write_delay_fits(snapshot_id, source_id, (from.name(), to.name(), "all", ""), fits)?;
    }
    Ok(fits.len())
}

/// What a backtest was asked to do.
#[derive(Debug, Clone)]
pub struct BacktestRequest {
    pub field: Field,
    pub from: Option<NaiveDate>,
    pub to: Option<NaiveDate>,
    pub lag: usize,
    pub max_horizon: usize,
    pub methods: Vec<NowcastMethod>,
}

/// Backtests the methods on the whole source's triangle as known at the latest snapshot,
/// nowcasting each past day with what was known that day, and stores the scores.
pub fn backtest(
    store: &mut Store,
    config: &Config,
    source: &SourceConfig,
    request: &BacktestRequest,
) -> Result<(SnapshotId, Vec<BacktestCell>, NaiveDate, NaiveDate)> {
    let reader = Reader::open(&config.store.path)?;
    let source_id =
        reader.source_id(&source.name)?.ok_or_else(|| not_found("the source has no snapshots yet"))?;
    let latest = reader
        .snapshot_as_of(source_id, None)?
        .ok_or_else(|| not_found("the source has no applied snapshot"))?;
    let analysis = &config.analysis;
    let last_day = snapshot_day(&reader, latest)?;
    let to = request.to.unwrap_or(last_day - Days::new(request.lag as u64)).min(last_day);
    let from = request.from.unwrap_or(to - Days::new(27));
    if from > to {
        return Err(super::errors::usage(format!(
            "the backtest range starts ({from}) after it ends ({to}); nothing was scored or stored"
        )));
    }
    let key = TriangleKey::all(request.field);
    let extra = (last_day - from).num_days().max(0) as usize;
    let full = load_triangle(&reader, source_id, latest, &key, analysis, extra)?;
    let mut nowcasts = Vec::new();
    let mut day = from;
    while day <= to {
        let known = full.as_of(day);
        let start = known.rows().saturating_sub(analysis.window + analysis.max_delay);
        let known = known.without_first_rows(start);
        let seed = |method: NowcastMethod| {
            seed_for(latest, &key, method.name())
                ^ day.to_string().len() as u64
                ^ (day - from).num_days() as u64
        };
        for nowcast in nowcast_methods(&request.methods, &known, analysis, seed) {
            nowcasts.push((day, nowcast));
        }
        day = day + Days::new(1);
    }
    let cells = backtest::score(&nowcasts, &full, request.lag, request.max_horizon);
    store_backtest(store, source_id, latest, request, &cells, (from, to))?;
    Ok((latest, cells, from, to))
}

fn store_backtest(
    store: &mut Store,
    source_id: SourceId,
    snapshot_id: SnapshotId,
    request: &BacktestRequest,
    cells: &[BacktestCell],
    (from, to): (NaiveDate, NaiveDate),
) -> Result<()> {
    store.write_backtest(snapshot_id, source_id, request.field.name(), cells, (from, to, request.lag))?;
    Ok(())
}

/// Delay observations between two fields from the records valid at `snapshot_id`, by
/// stratum label (`""` without stratification): each record's delay and its truncation
/// horizon (the snapshot day minus the start date).
pub fn delay_observations(
    reader: &Reader,
    source_id: SourceId,
    snapshot_id: SnapshotId,
    (from, to): (Field, DelayEnd),
    stratum: Option<Field>,
    age_edges: &[u32],
) -> Result<Vec<(String, NaiveDate, DelayObs)>> {
    let day = snapshot_day(reader, snapshot_id)?;
    let rows = reader.delay_rows(source_id, snapshot_id, from, to.field(), stratum, age_edges)?;
    Ok(expand_observations(day, rows))
}

/// One observation per record from counted rows: its delay, and its truncation horizon on
/// the snapshot `day`.
fn expand_observations(day: NaiveDate, rows: Vec<DelayRow>) -> Vec<(String, NaiveDate, DelayObs)> {
    let mut out = Vec::with_capacity(rows.iter().map(|r| r.count as usize).sum());
    for r in rows {
        let obs = observation(day, &r);
        out.extend(std::iter::repeat_n((r.stratum, r.from, obs), r.count as usize));
    }
    out
}

/// The delay of a row's records and their truncation horizon on the snapshot `day`.
fn observation(day: NaiveDate, row: &DelayRow) -> DelayObs {
    DelayObs { delay: (row.to - row.from).num_days(), horizon: Some((day - row.from).num_days()) }
}

/// Fits every family to one set of observations (best AIC first) and summarises them.
pub fn fit_delays(obs: &[DelayObs], bootstrap: usize, seed: u64) -> (DelaySummary, Vec<DelayFit>) {
    let delays: Vec<i64> = obs.iter().map(|o| o.delay).collect();
    let options = FitOptions { bootstrap, ..FitOptions::default() };
    (delay::summarize(&delays), delay::fit_all(obs, &options, seed))
}

/// Delay fits per configured (start field, end) pair.
pub type PairFits = Vec<((Field, DelayEnd), Vec<DelayFit>)>;

/// The configured delay distributions (whole source) fitted as of a snapshot, from one scan
/// of the records for all pairs, in configuration order; pairs without observations are
/// left out. The pairs are fitted on up to two threads (each fit is pure and seeded, so the
/// results do not depend on the order).
pub fn delay_fits(
    reader: &Reader,
    config: &Config,
    source_id: SourceId,
    snapshot_id: SnapshotId,
) -> Result<PairFits> {
    let pairs: Vec<(Field, Option<Field>)> =
        config.analysis.delays.iter().map(|&(from, to)| (from, to.field())).collect();
    let day = snapshot_day(reader, snapshot_id)?;
    let started = std::time::Instant::now();
    let counted = reader.delay_rows_of_pairs(source_id, snapshot_id, &pairs)?;
    tracing::debug!(
        snapshot_id = snapshot_id.0,
        ms = started.elapsed().as_millis() as u64,
        "delay observations read"
    );
    let jobs: Vec<((Field, DelayEnd), Vec<DelayRow>)> =
        config.analysis.delays.iter().copied().zip(counted).collect();
    let bootstrap = config.analysis.bootstrap;
    let fitted = in_parallel(&jobs, 2, |((from, to), rows)| {
        let obs: Vec<(DelayObs, u64)> = rows.iter().map(|r| (observation(day, r), r.count)).collect();
        (!obs.is_empty()).then(|| {
            let seed = seed_for(snapshot_id, &TriangleKey::all(*from), to.name());
            let options = FitOptions { bootstrap, ..FitOptions::default() };
            delay::fit_all_counted(&obs, &options, seed)
        })
    });
    Ok(jobs.into_iter().zip(fitted).filter_map(|((pair, _), fits)| Some((pair, fits?))).collect())
}

/// `work` applied to every job on at most `threads` threads; the results in job order.
fn in_parallel<J: Sync, R: Send>(jobs: &[J], threads: usize, work: impl Fn(&J) -> R + Sync) -> Vec<R> {
    let next = std::sync::atomic::AtomicUsize::new(0);
    let mut results: Vec<(usize, R)> = std::thread::scope(|scope| {
        let workers: Vec<_> = (0..threads.clamp(1, jobs.len().max(1)))
            .map(|_| {
                scope.spawn(|| {
                    let mut done = Vec::new();
                    loop {
                        let at = next.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                        let Some(job) = jobs.get(at) else { break done };
                        done.push((at, work(job)));
                    }
                })
            })
            .collect();
        workers
            .into_iter()
            .flat_map(|w| w.join().unwrap_or_else(|panic| std::panic::resume_unwind(panic)))
            .collect()
    });
    results.sort_unstable_by_key(|(at, _)| *at);
    results.into_iter().map(|(_, r)| r).collect()
}
