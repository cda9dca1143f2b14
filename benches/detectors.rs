//! Detector evaluation: simulated daily series with injected shifts (outbreak spikes
//! of several sizes in counts, level shifts in reporting lag, step changes in missingness,
//! drops in new records), each detector run every day as the daemon would, and per detector
//! the detection rate, false alarms per 100 in-control days and median days to detection,
//! printed as a Markdown table. Fixed seeds; run with `cargo bench --bench detectors`.

use std::time::Instant;

use rand::SeedableRng;
use rand::rngs::StdRng;
use tidemark::alert::rules::{
    self, CountCusumParams, CountFamily, CountInput, CountParams, LagInput, LagParams, MissingCount,
    MissingnessInput, MissingnessParams, VolumeInput, VolumeParams,
};
use tidemark::alert::{Outcome, Rule};
use tidemark::analysis::detector_sim::{self, Injection, RunResult, performance};

/// Series per scenario.
const RUNS: usize = 300;
/// Days per series.
const DAYS: usize = 84;
/// First evaluated day: every detector has its full baseline (CUSUM 28 + 2 guard days, lag
/// 28 + 7 days) well before it.
const EVALUATE_FROM: usize = 42;
/// First shifted day: days 42..63 (21 per series) are the in-control days.
const INJECT_AT: usize = 63;

fn main() {
    let started = Instant::now();
    println!(
        "| detector | scenario | detection rate | false alarms / 100 in-control days | median days to detection |"
    );
    println!("|---|---|---|---|---|");
    if std::env::var_os("DETECTORS_ONLY_DEFAULT_SET").is_none() {
        counts(20.0, None);
        counts(20.0, Some(10.0));
        lags();
        missingness();
        volume();
    }
    default_count_rules();
    eprintln!(
        "{RUNS} series per scenario, {DAYS} days each; done in {:.1} s",
        started.elapsed().as_secs_f64()
    );
}

fn row(detector: &str, scenario: &str, results: &[RunResult]) {
    let p = performance(results);
    let delay = if p.median_delay.is_nan() { "-".to_string() } else { format!("{}", p.median_delay) };
    println!(
        "| {detector} | {scenario} | {:.0}% | {:.2} | {delay} |",
        100.0 * p.detection_rate,
        p.false_alarms_per_100_days
    );
}

/// Runs `alarm(day)` on every evaluated day of one series and tallies it.
fn run_series(injection: Injection, window: usize, alarm: impl Fn(usize) -> bool) -> RunResult {
    let alarms: Vec<bool> = (0..DAYS).map(|day| day >= EVALUATE_FROM && alarm(day)).collect();
    detector_sim::tally(&alarms, EVALUATE_FROM, Some(injection), window)
}

/// Outbreaks of 3 days multiplying the expected count by 1.5, 2 and 3; detected if an alarm
/// comes within 7 days of the start.
fn counts(mean: f64, dispersion: Option<f64>) {
    let outbreak = Injection { start: INJECT_AT, length: 3 };
    let family = match dispersion {
        None => format!("Poisson mean {mean}"),
        Some(size) => format!("NB mean {mean} size {size}"),
    };
    let poisson =
        CountCusumParams { family: CountFamily::Poisson, follow_trend: false, ..CountCusumParams::default() };
    let nb = CountCusumParams { family: CountFamily::NegativeBinomial, ..poisson };
    let z = CountParams::z_scores_only();
    let detectors: [(&str, Rule, CountParams); 6] = [
        ("z recent week (C1)", Rule::CountZRecent, z),
        ("z guarded week (C2)", Rule::CountZGuarded, z),
        ("z guarded 3-day (C3)", Rule::CountZGuarded3Day, z),
        ("Poisson CUSUM (level)", Rule::CountCusum, CountParams { cusum: Some(poisson), ..only_cusum() }),
        ("NB CUSUM (level)", Rule::CountCusum, CountParams { cusum: Some(nb), ..only_cusum() }),
        ("NB CUSUM following trend (default)", Rule::CountCusum, CountParams::default()),
    ];
    for multiplier in [1.5, 2.0, 3.0] {
        let mut rng = StdRng::seed_from_u64(1_000 + (multiplier * 10.0) as u64);
        let series: Vec<Vec<f64>> = (0..RUNS)
            .map(|_| detector_sim::counts(&mut rng, DAYS, mean, dispersion, outbreak, multiplier))
            .collect();
        for (name, rule, params) in &detectors {
            let results: Vec<RunResult> = series
                .iter()
                .map(|counts| {
                    run_series(outbreak, 7, |day| {
                        let input = CountInput {
                            source: "sim".into(),
                            subject: String::new(),
                            daily_counts: counts[..=day].to_vec(),
                            last_day: sim_day(day),
                        };
                        rules::count_aberration(&input, params)
                            .iter()
                            .any(|(r, outcome)| r == rule && outcome.signal().is_some())
                    })
                })
                .collect();
            row(name, &format!("{family}, 3-day outbreak x{multiplier}"), &results);
        }
    }
}

/// The calendar date of simulated day `day` (messages only; the rules do not use it).
fn sim_day(day: usize) -> chrono::NaiveDate {
    chrono::NaiveDate::from_ymd_opt(2026, 1, 1).unwrap() + chrono::Days::new(day as u64)
}

fn only_cusum() -> CountParams {
    CountParams { z_recent: false, z_guarded: false, z_guarded_3day: false, ..CountParams::default() }
}

/// Lasting rises of the reporting lag by 1, 2 and 4 days (25 records a day, Poisson lags of
/// mean 4 days); detected within 14 days.
fn lags() {
    let shift = Injection { start: INJECT_AT, length: usize::MAX };
    for extra in [1.0, 2.0, 4.0] {
        let mut rng = StdRng::seed_from_u64(2_000 + extra as u64);
        let results: Vec<RunResult> = (0..RUNS)
            .map(|_| {
                let lags = detector_sim::daily_lags(&mut rng, DAYS, 25, 4.0, shift, extra);
                run_series(shift, 14, |day| {
                    let input = LagInput {
                        source: "sim".into(),
                        subject: String::new(),
                        daily_lags: lags[..=day].to_vec(),
                    };
                    fires(&rules::lag_jump(&input, &LagParams::default()))
                })
            })
            .collect();
        row("lag jump (EWMA + Mann-Whitney)", &format!("25 records/day, lag mean 4 d, +{extra} d"), &results);
    }
}

/// Lasting steps of a field's missing share from 5% by +5, +10 and +20 points among 100 new
/// or changed records a snapshot, and +3 points among 2,000 (below the 10-point minimum
/// effect); detected within 14 days.
fn missingness() {
    let step = Injection { start: INJECT_AT, length: usize::MAX };
    for (records, extra) in [(100, 0.05), (100, 0.10), (100, 0.20), (2_000, 0.03)] {
        let mut rng = StdRng::seed_from_u64(3_000 + (extra * 100.0) as u64 + records);
        let results: Vec<RunResult> = (0..RUNS)
            .map(|_| {
                let missing = detector_sim::daily_missing(&mut rng, DAYS, records, 0.05, step, extra);
                let count = |day: usize| MissingCount { missing: missing[day], records };
                run_series(step, 14, |day| {
                    let input = MissingnessInput {
                        source: "sim".into(),
                        subject: "field".into(),
                        latest: count(day),
                        baseline: (0..day).map(count).collect(),
                    };
                    fires(&rules::missingness_jump(&input, &MissingnessParams::default()))
                })
            })
            .collect();
        let scenario = format!("{records} records/snapshot, 5% missing, +{:.0} points", 100.0 * extra);
        row("missingness jump (p-chart)", &scenario, &results);
    }
}

/// New records per snapshot Poisson(40), falling to 60%, 40% and 10% for good; detected
/// within 7 days.
fn volume() {
    let drop = Injection { start: INJECT_AT, length: usize::MAX };
    for factor in [0.6, 0.4, 0.1] {
        let mut rng = StdRng::seed_from_u64(4_000 + (factor * 10.0) as u64);
        let results: Vec<RunResult> = (0..RUNS)
            .map(|_| {
                let new = detector_sim::counts(&mut rng, DAYS, 40.0, None, drop, factor);
                run_series(drop, 7, |day| {
                    let input = VolumeInput {
                        source: "sim".into(),
                        subject: String::new(),
                        latest_new: new[day] as u64,
                        baseline_new: new[..day].iter().map(|&n| n as u64).collect(),
                    };
                    fires(&rules::volume_drop(&input, &VolumeParams::default()))
                })
            })
            .collect();
        row("volume drop", &format!("40 new/snapshot, falls to {:.0}%", 100.0 * factor), &results);
    }
}

/// Days of the series the default count rules are scored on; in control from
/// [`EVALUATE_FROM`] to [`EPISODE_INJECT_AT`] (70 days each).
const EPISODE_DAYS: usize = 126;
const EPISODE_INJECT_AT: usize = 112;

/// The default count rules together, as the daemon pages them: one episode per series
/// (the strongest of C1, C2 and C3), resolving after 14 clear days. Series with a flat
/// mean of 20, with weekly seasonality, and with weekly seasonality and a trend of +1% a
/// day, Poisson and negative binomial (size 10); a doubling of the expected count lasting 3
/// or 7 days. Reports false episodes per 100 in-control series-days (episodes opened
/// before the doubling) and the share of doublings signalled within 3 days of their start.
fn default_count_rules() {
    println!();
    println!(
        "| default count rules (one episode per series) | scenario | doublings signalled within 3 days | false episodes / 100 in-control days | median days to detection |"
    );
    println!("|---|---|---|---|---|");
    /// Reporting by weekday, Monday first: fewer reports at the weekend (mean 1).
    const WEEKDAY: [f64; 7] = [1.25, 1.1, 1.05, 1.05, 1.0, 0.8, 0.75];
    let shapes: [(&str, bool, f64); 3] =
        [("flat", false, 0.0), ("weekly", true, 0.0), ("weekly, +1%/day", true, 0.01)];
    for dispersion in [None, Some(10.0)] {
        for (shape, weekly, trend) in shapes {
            for length in [3usize, 7] {
                let seed = 5_000
                    + length as u64
                    + 10 * u64::from(weekly)
                    + (trend * 1000.0) as u64
                    + dispersion.map_or(0, |_| 100);
                let mut rng = StdRng::seed_from_u64(seed);
                let doubling = Injection { start: EPISODE_INJECT_AT, length };
                let series: Vec<Vec<f64>> = (0..RUNS)
                    .map(|_| {
                        let mean = |day: usize| {
                            let season = if weekly { WEEKDAY[day % 7] } else { 1.0 };
                            let growth = (1.0 + trend).powi(day as i32 - EVALUATE_FROM as i32);
                            let doubled = if doubling.active(day) { 2.0 } else { 1.0 };
                            20.0 * season * growth * doubled
                        };
                        (0..EPISODE_DAYS).map(|d| draw(&mut rng, mean(d), dispersion)).collect()
                    })
                    .collect();
                let family = dispersion.map_or("Poisson".to_string(), |size| format!("NB size {size}"));
                for (name, params) in rule_sets() {
                    let results: Vec<RunResult> =
                        series.iter().map(|counts| episodes(counts, doubling, &params)).collect();
                    let p = performance(&results);
                    let delay =
                        if p.median_delay.is_nan() { "-".to_string() } else { format!("{}", p.median_delay) };
                    println!(
                        "| {name} | {family} mean 20, {shape}, doubling for {length} days | {:.0}% | {:.2} | {delay} |",
                        100.0 * p.detection_rate,
                        p.false_alarms_per_100_days
                    );
                }
            }
        }
    }
}

/// The default rule set, and variants to compare it with.
fn rule_sets() -> Vec<(&'static str, CountParams)> {
    let default = CountParams::default();
    let published = CountParams::z_scores_only();
    let nb = default.cusum.expect("the default count rules include the CUSUM");
    vec![
        ("default (NB CUSUM following trend, ARL 365)", default),
        (
            "NB CUSUM on the level (no trend)",
            CountParams { cusum: Some(CountCusumParams { follow_trend: false, ..nb }), ..default },
        ),
        ("C1 + C2 + C3 (earlier default)", published),
        ("C2 (threshold 4) + default", {
            let mut p = CountParams { z_guarded: true, ..default };
            p.z.guarded_threshold = 4.0;
            p
        }),
    ]
}

/// One count drawn with mean `mu` (Poisson, or negative binomial of the given size).
fn draw(rng: &mut StdRng, mu: f64, dispersion: Option<f64>) -> f64 {
    use rand_distr::{Distribution, Gamma, Poisson};
    let rate = match dispersion {
        Some(size) => Gamma::new(size, mu / size).expect("valid gamma").sample(rng),
        None => mu,
    };
    if rate <= 0.0 { 0.0 } else { Poisson::new(rate).expect("valid rate").sample(rng) }
}

/// Runs the default count rules every day as one episode: `false_alarms` are the episodes
/// opened in control, `delay` the first signal within 3 days of the doubling.
fn episodes(counts: &[f64], doubling: Injection, params: &CountParams) -> RunResult {
    let (mut live, mut clear_days, mut opened) = (false, 0u32, 0usize);
    let mut delay = None;
    for day in EVALUATE_FROM..counts.len() {
        let input = CountInput {
            source: "sim".into(),
            subject: String::new(),
            daily_counts: counts[..=day].to_vec(),
            last_day: sim_day(day),
        };
        let Some((_, outcome)) = rules::count_episode(rules::count_aberration(&input, params)) else {
            continue;
        };
        match outcome {
            Outcome::Signal(_) => {
                if day >= doubling.start && day < doubling.start + 3 && delay.is_none() {
                    delay = Some(day - doubling.start);
                }
                if !live && day < doubling.start {
                    opened += 1;
                }
                (live, clear_days) = (true, 0);
            }
            Outcome::Clear => {
                clear_days += 1;
                if clear_days >= params.resolve_after {
                    live = false;
                }
            }
            Outcome::NotEnoughData(_) => {}
        }
    }
    RunResult { false_alarms: opened, in_control_days: doubling.start - EVALUATE_FROM, delay }
}

fn fires(outcome: &Outcome) -> bool {
    outcome.signal().is_some()
}
