//! The nowcast calibration suite: seeded simulations, in classes of reporting situations
//! that real feeds go through, on which every nowcast method is scored against the known
//! eventual counts. Each class draws its parameters at random within stated ranges for
//! every seed (never one tuned setting); a series runs `history` reference days, and the
//! methods nowcast each of the last `nowcast_days` days with what was known that day, scored
//! at horizons 0..=`max_horizon`. The naive count ("observed so far") is scored alongside.
//! Pure and deterministic for its settings; the bench prints the full table, a test runs a
//! smaller one.

use rand::rngs::StdRng;
use rand::{RngExt, SeedableRng};

use super::{Nowcast, NowcastRow, ensemble, hazard, smooth};
use crate::analysis::score::{covered, wis_of_row};
use crate::analysis::simulate::{ReportCalendar, Scenario, discretised_gamma, simulate};
use crate::analysis::triangle::Triangle;
use crate::model::NowcastMethod;

/// A class of reporting situations.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum ScenarioClass {
    /// One delay distribution throughout: gamma, mean 1-10 days, coefficient of variation
    /// 0.3-1.2.
    ConstantDelay,
    /// The mean delay grows by 30-100% from a random reference day 5-45 days before the end.
    LongerDelay,
    /// The mean delay shrinks by 25-50% from a random reference day 5-45 days before the end.
    ShorterDelay,
    /// Weekend reports are 5-40% of a weekday's; the rest are reported on Monday.
    WeekdayEffect,
    /// A 2-4 day reporting holiday at a random point of the last 25 days, and a weekend lull.
    Holiday,
    /// Rising (3-10% a day), peaking (within the nowcast days) or falling incidence.
    EpidemicPhase,
    /// 0.3-5 cases a day.
    LowCounts,
    /// Two strata with very different delays (mean 1-3 vs 6-12 days) whose shares shift.
    MixedStrata,
}

impl ScenarioClass {
    pub const ALL: [ScenarioClass; 8] = [
        ScenarioClass::ConstantDelay,
        ScenarioClass::LongerDelay,
        ScenarioClass::ShorterDelay,
        ScenarioClass::WeekdayEffect,
        ScenarioClass::Holiday,
        ScenarioClass::EpidemicPhase,
        ScenarioClass::LowCounts,
        ScenarioClass::MixedStrata,
    ];

    pub fn name(self) -> &'static str {
        match self {
            ScenarioClass::ConstantDelay => "constant delay",
            ScenarioClass::LongerDelay => "delay lengthens",
            ScenarioClass::ShorterDelay => "delay shortens",
            ScenarioClass::WeekdayEffect => "weekday effect",
            ScenarioClass::Holiday => "reporting holiday",
            ScenarioClass::EpidemicPhase => "rising/peaking/falling",
            ScenarioClass::LowCounts => "low counts",
            ScenarioClass::MixedStrata => "strata with different delays",
        }
    }
}

/// How big a run is.
#[derive(Debug, Clone, PartialEq)]
pub struct SuiteSettings {
    /// Seeds per class (each with its own random parameters).
    pub seeds: usize,
    /// Reference days simulated before the first nowcast day.
    pub history: usize,
    /// Nowcast days per seed (the last days of the series).
    pub nowcast_days: usize,
    pub max_horizon: usize,
    pub max_delay: usize,
    /// Predictive draws per nowcast.
    pub draws: usize,
    /// Estimation window of the hazard method.
    pub hazard_window: usize,
}

impl SuiteSettings {
    /// The full suite (the bench): the analysis defaults (maximum delay 28, hazard window 42).
    pub fn full() -> SuiteSettings {
        SuiteSettings {
            seeds: 12,
            history: 100,
            nowcast_days: 15,
            max_horizon: 7,
            max_delay: 28,
            draws: 500,
            hazard_window: 42,
        }
    }

    /// A smaller run for `cargo test`.
    pub fn quick() -> SuiteSettings {
        SuiteSettings { seeds: 6, nowcast_days: 6, draws: 300, ..SuiteSettings::full() }
    }
}

/// One simulated series: its triangle as known on the last day and the eventual counts.
#[derive(Debug, Clone)]
pub struct Series {
    pub triangle: Triangle,
    pub truth: Vec<f64>,
}

/// Draws the series of `class` for one seed, its parameters drawn within the class.
pub fn draw_series(class: ScenarioClass, settings: &SuiteSettings, seed: u64) -> Series {
    let mut rng = StdRng::seed_from_u64(seed ^ (class as u64).wrapping_mul(0x9e37_79b9_7f4a_7c15));
    let days = settings.history + settings.nowcast_days;
    let d = settings.max_delay;
    let gamma = |rng: &mut StdRng, low: f64, high: f64| {
        discretised_gamma(rng.random_range(low..high), rng.random_range(0.3..1.2), d)
    };
    let dispersion = |rng: &mut StdRng| rng.random_bool(0.5).then(|| rng.random_range(5.0..60.0));
    let mut scenario = match class {
        ScenarioClass::ConstantDelay => {
            Scenario::constant_delay(level_curve(&mut rng, days, 20.0, 200.0), d, gamma(&mut rng, 1.5, 11.0))
        }
        ScenarioClass::LongerDelay | ScenarioClass::ShorterDelay => {
            let mean = rng.random_range(2.0..7.0);
            let cv = rng.random_range(0.3..1.0);
            let factor = if class == ScenarioClass::LongerDelay {
                rng.random_range(1.3..2.0)
            } else {
                rng.random_range(0.5..0.75)
            };
            let shift = days - rng.random_range(5..45);
            Scenario::delay_shift(
                level_curve(&mut rng, days, 20.0, 200.0),
                d,
                discretised_gamma(mean + 0.5, cv, d),
                discretised_gamma(mean * factor + 0.5, cv, d),
                shift,
            )
        }
        ScenarioClass::WeekdayEffect | ScenarioClass::Holiday => {
            let weekend = rng.random_range(0.05..0.4);
            let closed = if class == ScenarioClass::Holiday {
                let start = days - rng.random_range(3..25);
                (start..start + rng.random_range(2..5)).collect()
            } else {
                Vec::new()
            };
            let calendar = ReportCalendar { weekday: [1.0, 1.0, 1.0, 1.0, 1.0, weekend, weekend], closed };
            let mut s = Scenario::constant_delay(
                level_curve(&mut rng, days, 20.0, 200.0),
                d,
                gamma(&mut rng, 1.0, 6.0),
            );
            s.calendar = Some(calendar);
            s
        }
        ScenarioClass::EpidemicPhase => Scenario::constant_delay(
            phase_curve(&mut rng, days, settings.nowcast_days),
            d,
            gamma(&mut rng, 1.5, 9.0),
        ),
        ScenarioClass::LowCounts => {
            Scenario::constant_delay(level_curve(&mut rng, days, 0.3, 5.0), d, gamma(&mut rng, 1.5, 9.0))
        }
        ScenarioClass::MixedStrata => return mixed_strata(&mut rng, days, d, seed),
    };
    scenario.dispersion = dispersion(&mut rng);
    let (triangle, truth) = simulate(&scenario, seed);
    Series { triangle, truth }
}

/// A level in [low, high) with a slow random trend (at most doubling or halving over the
/// series).
fn level_curve(rng: &mut StdRng, days: usize, low: f64, high: f64) -> Vec<f64> {
    let level = rng.random_range(low..high);
    let slope = rng.random_range(-0.7..0.7) / days as f64;
    (0..days).map(|t| level * (slope * (t as f64 - days as f64)).exp()).collect()
}

/// Rising, peaking or falling incidence at the end of the series.
fn phase_curve(rng: &mut StdRng, days: usize, nowcast_days: usize) -> Vec<f64> {
    let end = rng.random_range(30.0..300.0);
    let growth = rng.random_range(0.03..0.10);
    let last = days as f64 - 1.0;
    match rng.random_range(0..3) {
        0 => (0..days).map(|t| end * (-growth * (last - t as f64)).exp()).collect(),
        1 => (0..days).map(|t| end * (growth * (last - t as f64)).exp().min(end * 20.0)).collect(),
        _ => {
            let peak = last - rng.random_range(0.0..nowcast_days as f64);
            let width = rng.random_range(8.0..20.0);
            (0..days).map(|t| 3.0 + end * (-0.5 * ((t as f64 - peak) / width).powi(2)).exp()).collect()
        }
    }
}

/// Two strata simulated apart and added: one with short delays, one with long, the share of
/// the first moving linearly over the series.
fn mixed_strata(rng: &mut StdRng, days: usize, d: usize, seed: u64) -> Series {
    let total = level_curve(rng, days, 30.0, 200.0);
    let (from, to) = (rng.random_range(0.15..0.85), rng.random_range(0.15..0.85));
    let share = |t: usize| from + (to - from) * t as f64 / days as f64;
    let fast: Vec<f64> = (0..days).map(|t| total[t] * share(t)).collect();
    let slow: Vec<f64> = (0..days).map(|t| total[t] * (1.0 - share(t))).collect();
    let a = Scenario::constant_delay(fast, d, discretised_gamma(rng.random_range(1.5..3.5), 0.6, d));
    let b = Scenario::constant_delay(slow, d, discretised_gamma(rng.random_range(6.5..12.5), 0.6, d));
    let (ta, ya) = simulate(&a, seed);
    let (tb, yb) = simulate(&b, seed ^ 0x5151);
    let cumulative = ta
        .cumulative
        .iter()
        .zip(&tb.cumulative)
        .map(|(x, y)| x.iter().zip(y).map(|(p, q)| p + q).collect())
        .collect();
    let truth = ya.iter().zip(&yb).map(|(p, q)| p + q).collect();
    Series { triangle: Triangle { cumulative, ..ta }, truth }
}

/// A method under test.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Candidate {
    Method(NowcastMethod),
}

impl Candidate {
    pub fn name(self) -> &'static str {
        match self {
            Candidate::Method(method) => method.name(),
        }
    }
}

/// The scores of one method at one horizon, summed over cells.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Tally {
    pub n: usize,
    pub in50: usize,
    pub in90: usize,
    pub wis: f64,
    pub naive_wis: f64,
}

impl Tally {
    fn add(&mut self, row: &NowcastRow, truth: f64) {
        self.n += 1;
        self.in50 += covered(row.lower50, row.upper50, truth) as usize;
        self.in90 += covered(row.lower90, row.upper90, truth) as usize;
        self.wis += wis_of_row(row, truth);
        self.naive_wis += (truth - row.observed).abs();
    }

    fn merge(&mut self, other: &Tally) {
        self.n += other.n;
        self.in50 += other.in50;
        self.in90 += other.in90;
        self.wis += other.wis;
        self.naive_wis += other.naive_wis;
    }

    pub fn coverage90(&self) -> f64 {
        self.in90 as f64 / self.n.max(1) as f64
    }

    pub fn coverage50(&self) -> f64 {
        self.in50 as f64 / self.n.max(1) as f64
    }

    /// Mean WIS over the naive count's mean absolute error (below 1: better than naive).
    pub fn relative_wis(&self) -> f64 {
        if self.naive_wis > 0.0 {
            self.wis / self.naive_wis
        } else if self.wis > 0.0 {
            f64::INFINITY
        } else {
            0.0
        }
    }
}

/// The scores of one method in one class: per horizon, and pooled.
#[derive(Debug, Clone, PartialEq)]
pub struct ClassScore {
    pub class: ScenarioClass,
    pub candidate: Candidate,
    pub by_horizon: Vec<Tally>,
}

impl ClassScore {
    pub fn pooled(&self) -> Tally {
        let mut all = Tally::default();
        self.by_horizon.iter().for_each(|t| all.merge(t));
        all
    }
}

/// Nowcasts a triangle with a candidate.
pub fn run_candidate(candidate: Candidate, tri: &Triangle, settings: &SuiteSettings, seed: u64) -> Nowcast {
    match candidate {
        Candidate::Method(NowcastMethod::Hazard) => {
            let params = hazard::HazardParams {
                window: settings.hazard_window,
                draws: settings.draws,
                ..hazard::HazardParams::default()
            };
            hazard::nowcast(tri, &params, seed)
        }
        Candidate::Method(NowcastMethod::Smooth) => {
            let params = smooth::SmoothParams { draws: settings.draws, ..smooth::SmoothParams::default() };
            smooth::nowcast(tri, &params, seed)
        }
        Candidate::Method(NowcastMethod::Ensemble) => {
            let parts = ensemble::MEMBERS.map(|m| run_candidate(Candidate::Method(m), tri, settings, seed));
            ensemble::combine(&parts)
        }
    }
}

/// Nowcasts a triangle with each candidate, in order, as the pipeline does
/// (`ensemble::with_members`: each member is fitted once).
fn run_candidates(
    candidates: &[Candidate],
    tri: &Triangle,
    settings: &SuiteSettings,
    seed: u64,
) -> Vec<Nowcast> {
    let methods: Vec<NowcastMethod> = candidates.iter().map(|&Candidate::Method(m)| m).collect();
    ensemble::with_members(&methods, |m| run_candidate(Candidate::Method(m), tri, settings, seed))
}

/// Scores every candidate on one series: (candidate, per-horizon tallies).
pub fn score_series(
    series: &Series,
    candidates: &[Candidate],
    settings: &SuiteSettings,
    seed: u64,
) -> Vec<Vec<Tally>> {
    let mut tallies = vec![vec![Tally::default(); settings.max_horizon + 1]; candidates.len()];
    let rows = series.triangle.rows();
    for day in rows - settings.nowcast_days..rows {
        let known = series.triangle.as_of(series.triangle.date(day));
        let known = recent_rows(&known, settings);
        let nowcasts = run_candidates(candidates, &known, settings, seed ^ day as u64);
        for (at, nowcast) in nowcasts.iter().enumerate() {
            for row in nowcast.rows.iter().filter(|r| r.horizon <= settings.max_horizon) {
                let t = day - row.horizon;
                tallies[at][row.horizon].add(row, series.truth[t]);
            }
        }
    }
    tallies
}

/// The last rows a nowcast on this day would load (the store loads the window plus the
/// maximum delay; the smooth method uses at most 120).
fn recent_rows(tri: &Triangle, settings: &SuiteSettings) -> Triangle {
    let keep = (settings.hazard_window + settings.max_delay).max(120).min(tri.rows());
    tri.without_first_rows(tri.rows() - keep)
}

/// Runs one class over every seed on up to `threads` threads; `progress` hears each seed.
pub fn run_class(
    class: ScenarioClass,
    candidates: &[Candidate],
    settings: &SuiteSettings,
    threads: usize,
    progress: &(dyn Fn(usize) + Sync),
) -> Vec<ClassScore> {
    let next = std::sync::atomic::AtomicUsize::new(0);
    let parts: Vec<Vec<Vec<Tally>>> = std::thread::scope(|scope| {
        let workers: Vec<_> = (0..threads.max(1))
            .map(|_| {
                scope.spawn(|| {
                    let mut sum = vec![vec![Tally::default(); settings.max_horizon + 1]; candidates.len()];
                    loop {
                        let seed = next.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                        if seed >= settings.seeds {
                            break sum;
                        }
                        let series = draw_series(class, settings, 1000 + seed as u64);
                        let scored = score_series(&series, candidates, settings, seed as u64);
                        for (total, part) in sum.iter_mut().zip(&scored) {
                            total.iter_mut().zip(part).for_each(|(t, p)| t.merge(p));
                        }
                        progress(seed);
                    }
                })
            })
            .collect();
        workers.into_iter().map(|w| w.join().unwrap_or_else(|p| std::panic::resume_unwind(p))).collect()
    });
    candidates
        .iter()
        .enumerate()
        .map(|(at, &candidate)| {
            let mut by_horizon = vec![Tally::default(); settings.max_horizon + 1];
            for part in &parts {
                by_horizon.iter_mut().zip(&part[at]).for_each(|(t, p)| t.merge(p));
            }
            ClassScore { class, candidate, by_horizon }
        })
        .collect()
}

/// The suite's targets for a method in a class: pooled 90% coverage in [0.85, 0.95] and at
/// least 0.75 at every horizon; pooled WIS at most half the naive count's and at no horizon
/// above it. Returns what it misses.
pub fn misses(score: &ClassScore) -> Vec<String> {
    let pooled = score.pooled();
    let mut missed = Vec::new();
    if !(0.85..=0.95).contains(&pooled.coverage90()) {
        missed.push(format!("pooled 90% coverage {:.2}", pooled.coverage90()));
    }
    if pooled.relative_wis() > 0.5 {
        missed.push(format!("pooled relative WIS {:.2}", pooled.relative_wis()));
    }
    for (h, tally) in score.by_horizon.iter().enumerate() {
        if tally.coverage90() < 0.75 {
            missed.push(format!("horizon {h} coverage {:.2}", tally.coverage90()));
        }
        if tally.relative_wis() > 1.0 {
            missed.push(format!("horizon {h} relative WIS {:.2}", tally.relative_wis()));
        }
    }
    missed
}

#[cfg(test)]
mod tests {
    use super::*;

    fn pooled(scores: &[ClassScore], method: NowcastMethod) -> Tally {
        scores.iter().find(|s| s.candidate == Candidate::Method(method)).expect("method scored").pooled()
    }

    #[test]
    fn suite_smoke_run_meets_the_broad_targets() {
        // Check: simulation with known truth (the full suite is the bench; docs/validation.md).
        // A few seeds of two classes: `smooth` covers and beats the naive count under a
        // constant and a lengthening delay, and beats `hazard` when the delay lengthens.
        let settings = SuiteSettings { seeds: 3, nowcast_days: 4, draws: 200, ..SuiteSettings::quick() };
        let candidates = [Candidate::Method(NowcastMethod::Hazard), Candidate::Method(NowcastMethod::Smooth)];
        for class in [ScenarioClass::ConstantDelay, ScenarioClass::LongerDelay] {
            let scores = run_class(class, &candidates, &settings, 2, &|_| {});
            let smooth = pooled(&scores, NowcastMethod::Smooth);
            assert_eq!(smooth.n, 3 * 4 * 8, "{}", class.name());
            assert!((0.75..=1.0).contains(&smooth.coverage90()), "{}: {}", class.name(), smooth.coverage90());
            assert!(smooth.relative_wis() < 0.5, "{}: {}", class.name(), smooth.relative_wis());
            if class == ScenarioClass::LongerDelay {
                assert!(smooth.wis < pooled(&scores, NowcastMethod::Hazard).wis);
            }
        }
    }
}
