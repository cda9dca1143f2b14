//! Tests of the alert rules: reference values from docs/validation.md where a rule rests on
//! one (p-chart, C1/C2/C3), hand-computed cases at each gate, and seeded simulations with known
//! truth for the in-control false-alarm rate of the lag rule.

use chrono::TimeZone;
use rand::SeedableRng;
use rand::rngs::StdRng;
use rand_distr::{Distribution, Poisson};

use super::*;
use crate::alert::{Outcome, Rule, Severity};
use std::time::Duration;

use chrono::Utc;

use crate::analysis::aberration;

fn close(got: f64, want: f64, tolerance: f64) -> bool {
    (got - want).abs() < tolerance
}

fn missing(latest: (u64, u64), baseline: &[(u64, u64)]) -> MissingnessInput {
    MissingnessInput {
        source: "labs".into(),
        subject: "onset_date".into(),
        latest: MissingCount { missing: latest.0, records: latest.1 },
        baseline: baseline.iter().map(|&(missing, records)| MissingCount { missing, records }).collect(),
    }
}

/// pbar = 0.10 over 7 x 100 records, n = 100: upper limit 0.1 + 3 sqrt(0.09 / 100) = 0.19.
#[test]
fn missingness_jump_needs_the_limit_and_the_effect() {
    let params = MissingnessParams::default();
    let week = [(10, 100); 7];
    let signal = missingness_jump(&missing((25, 100), &week), &params);
    let signal = signal.signal().expect("25% against 10% alarms");
    assert_eq!(
        (signal.rule, signal.severity, signal.measure),
        (Rule::MissingnessJump, Severity::Warning, "missing_share")
    );
    assert!(
        close(signal.observed, 0.25, 1e-12) && close(signal.figure("p_chart_upper").unwrap(), 0.19, 1e-12)
    );
    assert!(close(signal.threshold, 0.20, 1e-12), "the effect gate is the binding one here");
    assert_eq!(signal.fingerprint(), "missingness_jump|labs|onset_date");
    assert!(missingness_jump(&missing((19, 100), &week), &params).is_clear());
    // A huge extract: 11.5% against 10% is far above the p-chart limit but below 10 points.
    let huge = missingness_jump(&missing((1_150, 10_000), &[(1_000, 10_000); 7]), &params);
    assert!(huge.is_clear());
    let gone = missingness_jump(&missing((100, 100), &week), &params);
    assert_eq!(gone.signal().unwrap().severity, Severity::Critical);
}

/// Textbook p-chart (docs/validation.md): pbar = 0.16, n = 200, upper limit 0.2378. With the
/// effect gate lowered to 5 points, 48/200 = 0.24 alarms and 47/200 = 0.235 does not.
#[test]
fn missingness_jump_uses_the_textbook_p_chart_limit() {
    let params = MissingnessParams { min_effect: 0.05, ..MissingnessParams::default() };
    let baseline = [(32, 200), (32, 200)];
    let fired = missingness_jump(&missing((48, 200), &baseline), &params);
    let upper = fired.signal().expect("0.24 > 0.2378").figure("p_chart_upper").unwrap();
    assert!(close(upper, 0.2378, 5e-5), "{upper}");
    assert!(missingness_jump(&missing((47, 200), &baseline), &params).is_clear());
    // The default 10-point effect keeps 0.24 against 0.16 quiet.
    assert!(missingness_jump(&missing((48, 200), &baseline), &MissingnessParams::default()).is_clear());
}

#[test]
fn missingness_jump_needs_enough_records_and_uses_the_last_snapshots() {
    let params = MissingnessParams::default();
    assert!(matches!(missingness_jump(&missing((29, 29), &[(0, 100)]), &params), Outcome::NotEnoughData(_)));
    assert!(matches!(missingness_jump(&missing((30, 30), &[(0, 29)]), &params), Outcome::NotEnoughData(_)));
    // An old all-missing snapshot beyond the 7 used does not hide the jump.
    let mut baseline = vec![(100, 100)];
    baseline.extend([(0, 100); 7]);
    let fired = missingness_jump(&missing((20, 100), &baseline), &params);
    assert_eq!(fired.signal().unwrap().figure("baseline_share"), Some(0.0));
}

/// Lags of one day: `n` records spread evenly around `centre` (centre-2 ..= centre+2).
fn day_lags(centre: f64, n: usize) -> Vec<f64> {
    (0..n).map(|i| (centre + (i % 5) as f64 - 2.0).max(0.0)).collect()
}

fn lag_input(baseline_centre: f64, recent_centre: f64) -> LagInput {
    let mut daily_lags: Vec<Vec<f64>> =
        (0..28).map(|d| day_lags(baseline_centre + (d % 2) as f64, 30)).collect();
    daily_lags.extend((0..7).map(|_| day_lags(recent_centre, 30)));
    LagInput { source: "labs".into(), subject: "North".into(), daily_lags }
}

#[test]
fn lag_jump_signals_a_lasting_rise_confirmed_by_mann_whitney() {
    let params = LagParams::default();
    // Baseline daily medians alternate 3 and 4 (mean 3.5, sd 0.51, pooled median 3.5);
    // recent medians 6.5.
    let fired = lag_jump(&lag_input(3.0, 6.5), &params);
    let signal = fired.signal().expect("a 3-day rise alarms");
    assert_eq!(signal.rule, Rule::LagJump);
    assert!(signal.observed > signal.threshold);
    assert!(signal.figure("mann_whitney_p").unwrap() < 1e-10);
    assert_eq!(signal.figure("recent_median_lag"), Some(6.5));
    assert_eq!(signal.figure("baseline_median_lag"), Some(3.5));
    assert_eq!(signal.severity, Severity::Warning, "6.5 is less than twice the baseline 3.5");
    let doubled = lag_jump(&lag_input(3.0, 7.0), &params);
    assert_eq!(doubled.signal().unwrap().severity, Severity::Critical);
    assert!(lag_jump(&lag_input(3.0, 3.5), &params).is_clear());
    // A fall in lag is not a lag jump.
    assert!(lag_jump(&lag_input(6.0, 1.0), &params).is_clear());
}

#[test]
fn lag_jump_needs_a_baseline() {
    let mut input = lag_input(3.0, 7.0);
    input.daily_lags.drain(..20);
    assert!(matches!(lag_jump(&input, &LagParams::default()), Outcome::NotEnoughData(_)));
    let sparse = LagInput { daily_lags: vec![vec![1.0]; 35], ..lag_input(3.0, 3.0) };
    assert!(matches!(lag_jump(&sparse, &LagParams::default()), Outcome::NotEnoughData(_)));
}

/// Known truth: lags drawn from one Poisson(4) distribution throughout, 25 records a day. The
/// EWMA alone alarms on about 0.1-0.3% of evaluations (one-sided 3-sigma limit, estimated
/// baseline); Mann-Whitney at 0.01 and the one-day effect gate only remove alarms, so 600
/// in-control evaluations should give at most a few (bound 1.5%: the count is at most 9
/// with probability > 0.999 if the true rate is 0.5%).
#[test]
fn lag_jump_rarely_alarms_in_control() {
    let mut rng = StdRng::seed_from_u64(5);
    let poisson = Poisson::new(4.0).unwrap();
    let runs = 600;
    let alarms = (0..runs)
        .filter(|_| {
            let daily_lags = (0..35).map(|_| (0..25).map(|_| poisson.sample(&mut rng)).collect()).collect();
            let input = LagInput { source: "s".into(), subject: String::new(), daily_lags };
            lag_jump(&input, &LagParams::default()).signal().is_some()
        })
        .count();
    assert!(alarms as f64 / runs as f64 <= 0.015, "{alarms} alarms in {runs}");
}

#[test]
fn held_snapshot_is_critical() {
    let input = HeldInput { source: "labs".into(), held: true, rows: 120, previous_rows: Some(5_000) };
    let signal = held_snapshot(&input).signal().cloned().unwrap();
    assert_eq!(
        (signal.rule, signal.severity, signal.observed, signal.threshold),
        (Rule::HeldSnapshot, Severity::Critical, 120.0, 5_000.0)
    );
    assert!(signal.summary.contains("120 rows") && signal.summary.contains("5000"));
    assert!(held_snapshot(&HeldInput { held: false, ..input }).is_clear());
}

#[test]
fn volume_drop_compares_with_the_baseline_median() {
    let input = |latest_new, baseline_new: &[u64]| VolumeInput {
        source: "labs".into(),
        subject: String::new(),
        latest_new,
        baseline_new: baseline_new.to_vec(),
    };
    let params = VolumeParams::default();
    let week = [40, 42, 38, 41, 39, 40, 43];
    let fired = volume_drop(&input(15, &week), &params);
    let signal = fired.signal().unwrap();
    assert_eq!((signal.observed, signal.threshold, signal.severity), (15.0, 20.0, Severity::Warning));
    assert!(volume_drop(&input(20, &week), &params).is_clear());
    assert_eq!(volume_drop(&input(0, &week), &params).signal().unwrap().severity, Severity::Critical);
    assert!(matches!(volume_drop(&input(0, &[10; 7]), &params), Outcome::NotEnoughData(_)));
    assert!(matches!(volume_drop(&input(0, &[40, 40]), &params), Outcome::NotEnoughData(_)));
}

/// Per jurisdiction only (near) silence pages: a halving of 12 new records is noise for one
/// jurisdiction, none at all is a broken feed; under a median of 10 it does not decide.
#[test]
fn volume_drop_per_jurisdiction_pages_on_silence_only() {
    let input = |latest_new, baseline_new: &[u64]| VolumeInput {
        source: "county".into(),
        subject: "Brackwater".into(),
        latest_new,
        baseline_new: baseline_new.to_vec(),
    };
    let stratum = VolumeParams::default().for_stratum();
    let week = [12, 10, 14, 11, 13, 12, 12];
    let halving = VolumeParams { min_baseline_median: 10.0, ..VolumeParams::default() };
    assert!(volume_drop(&input(5, &week), &halving).signal().is_some());
    assert!(volume_drop(&input(5, &week), &stratum).is_clear());
    let silent = volume_drop(&input(0, &week), &stratum);
    let signal = silent.signal().unwrap();
    assert_eq!((signal.subject.as_str(), signal.severity), ("Brackwater", Severity::Critical));
    assert!(signal.summary.starts_with("county (Brackwater): 0 new records"), "{}", signal.summary);
    assert!(matches!(volume_drop(&input(0, &[6; 7]), &stratum), Outcome::NotEnoughData(_)));
}

fn staleness(hours_since: Option<i64>, failures: u32) -> StalenessInput {
    let now = Utc.with_ymd_and_hms(2026, 3, 10, 12, 0, 0).unwrap();
    StalenessInput {
        source: "labs".into(),
        now,
        last_applied: hours_since.map(|h| now - chrono::TimeDelta::hours(h)),
        watching_since: now - chrono::TimeDelta::hours(100),
        expect_every: Some(Duration::from_secs(26 * 3600)),
        consecutive_failures: failures,
    }
}

#[test]
fn stale_source_counts_from_the_last_snapshot() {
    assert!(stale_source(&staleness(Some(20), 0)).is_clear());
    assert!(stale_source(&staleness(Some(26), 0)).is_clear());
    let late = stale_source(&staleness(Some(30), 0)).signal().cloned().unwrap();
    assert_eq!(
        (late.rule, late.severity, late.observed, late.threshold),
        (Rule::StaleSource, Severity::Warning, 30.0, 26.0)
    );
    assert_eq!(stale_source(&staleness(Some(53), 0)).signal().unwrap().severity, Severity::Critical);
    // Never a snapshot: counted from when watching started (100 hours).
    assert_eq!(stale_source(&staleness(None, 0)).signal().unwrap().observed, 100.0);
    let unset = StalenessInput { expect_every: None, ..staleness(Some(500), 0) };
    assert!(matches!(stale_source(&unset), Outcome::NotEnoughData(_)));
}

#[test]
fn failing_polls_after_three_in_a_row() {
    let params = StalenessParams::default();
    assert!(failing_polls(&staleness(Some(1), 2), &params).is_clear());
    let signal = failing_polls(&staleness(Some(1), 3), &params).signal().cloned().unwrap();
    assert_eq!((signal.rule, signal.severity, signal.observed), (Rule::FailingPolls, Severity::Warning, 3.0));
    assert_eq!(failing_polls(&staleness(Some(1), 6), &params).signal().unwrap().severity, Severity::Critical);
}

/// docs/validation.md "Aberration and change detection" series, days 1..14.
const SERIES: [f64; 14] = [4., 6., 5., 7., 5., 6., 7., 5., 6., 4., 12., 9., 15., 8.];

fn march(day: u32) -> chrono::NaiveDate {
    chrono::NaiveDate::from_ymd_opt(2026, 3, day).unwrap()
}

/// The series' day 1 is 2026-03-01.
fn counts_through(day: usize) -> CountInput {
    CountInput {
        source: "labs".into(),
        subject: "North".into(),
        daily_counts: SERIES[..day].to_vec(),
        last_day: march(day.max(1) as u32),
    }
}

fn outcome(outcomes: &[(Rule, Outcome)], rule: Rule) -> &Outcome {
    &outcomes.iter().find(|(r, _)| *r == rule).unwrap().1
}

/// A Poisson count CUSUM on the baseline's level (no trend), calibrated as by default.
fn poisson_level_cusum() -> CountCusumParams {
    CountCusumParams { family: CountFamily::Poisson, follow_trend: false, ..CountCusumParams::default() }
}

/// The count rules computing the published statistics (no Poisson sd floor).
fn published() -> CountParams {
    let mut params = CountParams::z_scores_only();
    params.z.poisson_floor = false;
    params
}

/// On day 11 C1 = 5.6491 and C2 = 6.8274 alarm; C3 = 5.8274 too (day 9 and 10 contribute 0).
/// On day 12 C3 = 8.3205; on day 13 C1 = 2.9542 does not alarm while C2 = 8.3452 does.
#[test]
fn count_aberration_matches_the_reference_series() {
    let params = published();
    let day11 = count_aberration(&counts_through(11), &params);
    let c1 = outcome(&day11, Rule::CountZRecent).signal().unwrap();
    assert!(close(c1.observed, 5.6491, 5e-5) && c1.threshold == 3.0);
    assert_eq!(c1.figure("count"), Some(12.0));
    assert!(close(c1.figure("baseline_mean").unwrap(), 40.0 / 7.0, 1e-12));
    assert_eq!(c1.fingerprint(), "count|labs|North", "the count rules share one episode per subject");
    assert!(close(outcome(&day11, Rule::CountZGuarded).signal().unwrap().observed, 6.8274, 5e-5));
    let day12 = count_aberration(&counts_through(12), &params);
    let c3 = outcome(&day12, Rule::CountZGuarded3Day).signal().unwrap();
    assert!(close(c3.observed, 8.3205, 5e-5));
    assert_eq!(c3.severity, Severity::Critical, "8.32 is at least twice the threshold 2");
    let day13 = count_aberration(&counts_through(13), &params);
    assert!(outcome(&day13, Rule::CountZRecent).is_clear());
    assert!(close(outcome(&day13, Rule::CountZGuarded).signal().unwrap().observed, 8.3452, 5e-5));
    let day8 = count_aberration(&counts_through(8), &params);
    assert!(outcome(&day8, Rule::CountZRecent).is_clear());
    assert!(matches!(outcome(&day8, Rule::CountZGuarded), Outcome::NotEnoughData(_)));
    assert!(count_aberration(&counts_through(0), &params).is_empty());
}

/// The three-day rule names the three days' counts and the sum it tested, not the last
/// day's count alone; a single case is "1 case"; a day's count of 1-4 is released as "1-4"
/// (small-cell suppression, default threshold 4).
#[test]
fn count_messages_state_what_was_tested() {
    let outcomes = count_aberration(&counts_through(12), &published());
    let c3 = outcome(&outcomes, Rule::CountZGuarded3Day).signal().unwrap();
    assert_eq!(c3.figure("three_day_count"), Some(4.0 + 12.0 + 9.0));
    assert!(
        c3.summary.starts_with("labs (North): 25 cases reported on 2026-03-10 to 2026-03-12 (1-4, 12, 9); sum of the three days' guarded excesses 8.32 > 2.00"),
        "{}",
        c3.summary
    );
    let mut quiet = vec![1.0, 2.0, 1.0, 1.0, 2.0, 1.0, 1.0];
    quiet.push(9.0);
    let one = CountInput { daily_counts: quiet, last_day: march(8), ..counts_through(8) };
    let signal =
        outcome(&count_aberration(&one, &CountParams::z_scores_only()), Rule::CountZRecent).signal().cloned();
    assert!(signal.unwrap().summary.contains("9 cases reported on 2026-03-08"));
    assert_eq!(counted(1.0, "case", "cases"), "1 case");
    assert_eq!(above(10.1304, 10.1301), "10.1304 > 10.1301");
}

/// Days before the source's first data are unknown: a series of 3 known days cannot test C1
/// (it needs 8), and a near-empty baseline (mean under one case a day) is not enough data
/// either, so two cases after a quiet week do not page.
#[test]
fn count_rules_need_known_days_and_an_expected_count() {
    let params = CountParams::z_scores_only();
    let short = CountInput { daily_counts: vec![0.0, 1.0, 2.0], last_day: march(3), ..counts_through(3) };
    let outcomes = count_aberration(&short, &params);
    let Outcome::NotEnoughData(why) = outcome(&outcomes, Rule::CountZRecent) else {
        panic!("a 3-day series has no C1 baseline");
    };
    assert_eq!(why, "needs 8 known days of counts, has 3 days");
    let mut sparse = vec![0.0; 11];
    sparse.push(2.0);
    let input = CountInput { daily_counts: sparse, last_day: march(12), ..counts_through(12) };
    for (rule, result) in count_aberration(&input, &params) {
        assert!(
            matches!(result, Outcome::NotEnoughData(ref why) if why.contains("minimum expected")),
            "{rule:?}"
        );
    }
    let lenient = CountParams { min_expected: 0.0, ..params };
    assert!(outcome(&count_aberration(&input, &lenient), Rule::CountZRecent).signal().is_some());
}

/// The count rules of one subject are one episode: its outcome is the strongest signal,
/// else clear if any rule decided, else every rule's reason.
#[test]
fn count_episode_takes_the_strongest_signal() {
    let params = published();
    let (rule, outcome) = count_episode(count_aberration(&counts_through(12), &params)).unwrap();
    assert_eq!((rule, outcome.signal().unwrap().severity), (Rule::CountZGuarded3Day, Severity::Critical));
    let (_, day13) = count_episode(count_aberration(&counts_through(13), &params)).unwrap();
    assert!(day13.signal().is_some(), "C2 still signals on day 13 although C1 is clear");
    let (_, day9) = count_episode(count_aberration(&counts_through(9), &params)).unwrap();
    assert!(day9.is_clear(), "C1 decided (clear) while C2 and C3 lack days");
    let (_, short) = count_episode(count_aberration(&counts_through(5), &params)).unwrap();
    let Outcome::NotEnoughData(why) = short else { panic!("5 days decide nothing") };
    assert!(
        why.starts_with("count_z_recent: needs 8") && why.contains("count_z_guarded_3day: needs 12"),
        "{why}"
    );
}

/// The Poisson floor: the reference series' day 11 (12 cases against a week of mean 5.71,
/// sample sd 1.11) has C1 = 5.65 published, and (12 - 5.71) / sqrt(5.71) = 2.63 with the
/// floor, under the threshold 3: a week that happened to vary little no longer makes a
/// modest rise look extreme. A doubling of a mean of 20 still signals (z = 20 / sqrt 20).
#[test]
fn poisson_sd_floor_keeps_a_quiet_week_from_inflating_z() {
    let day11 = count_aberration(&counts_through(11), &CountParams::z_scores_only());
    assert!(outcome(&day11, Rule::CountZRecent).is_clear());
    let mut doubled = vec![20.0; 7];
    doubled.push(40.0);
    let input = CountInput { daily_counts: doubled, last_day: march(8), ..counts_through(8) };
    let signal = outcome(&count_aberration(&input, &CountParams::z_scores_only()), Rule::CountZRecent)
        .signal()
        .cloned();
    assert!(close(signal.unwrap().observed, 20.0 / 20f64.sqrt(), 1e-12));
}

#[test]
fn count_cusum_option_signals_a_lasting_rise() {
    let fixed = CountCusumParams { interval: CusumInterval::FixedSds(3.0), ..poisson_level_cusum() };
    let params = CountParams { cusum: Some(fixed), ..CountParams::z_scores_only() };
    // A week-long pattern with mean 10, so every 28-day baseline has mean exactly 10.
    let mut counts = [10.0, 12.0, 9.0, 11.0, 8.0, 10.0, 10.0].repeat(5);
    let flat = CountInput {
        source: "labs".into(),
        subject: "North".into(),
        daily_counts: counts.clone(),
        last_day: march(31),
    };
    let outcomes = count_aberration(&flat, &params);
    assert!(outcome(&outcomes, Rule::CountCusum).is_clear());
    // Poisson baseline mean 10, sd sqrt 10: mu1 = 16.32, k = 6.32 / ln 1.632 = 12.905 and
    // h = 3 sqrt 10 = 9.49. In control no count exceeds k, so the sum stays 0; then 18 gives
    // 5.09 (clear) and 19 gives 11.19 > h.
    counts.push(18.0);
    let first = CountInput { daily_counts: counts.clone(), ..flat };
    assert!(outcome(&count_aberration(&first, &params), Rule::CountCusum).is_clear());
    counts.push(19.0);
    let risen = CountInput { daily_counts: counts, ..first };
    let outcomes = count_aberration(&risen, &params);
    let signal = outcome(&outcomes, Rule::CountCusum).signal().unwrap();
    assert!(close(signal.observed, 37.0 - 2.0 * 12.905, 0.01), "{}", signal.observed);
    let k = aberration::poisson_reference_value(10.0, 10.0 + 2.0 * 10f64.sqrt());
    assert!(close(signal.figure("reference_value").unwrap(), k, 1e-9));
    assert!(close(signal.threshold, 3.0 * 10f64.sqrt(), 1e-9));
    // Calibrated (the default): the interval is the one whose in-control ARL is a year.
    let calibrated = CountParams { cusum: Some(poisson_level_cusum()), ..CountParams::z_scores_only() };
    let signal = outcome(&count_aberration(&risen, &calibrated), Rule::CountCusum).signal().cloned().unwrap();
    let design = crate::analysis::arl::design_count_cusum(10.0, 10.0, 2.0, 365.0);
    assert!(close(signal.threshold, design.interval, 1e-9) && design.in_control_arl >= 365.0);
    let short = CountInput { daily_counts: vec![5.0; 20], ..risen.clone() };
    assert!(matches!(
        outcome(&count_aberration(&short, &params), Rule::CountCusum),
        Outcome::NotEnoughData(_)
    ));
}

#[test]
fn negative_binomial_cusum_uses_the_overdispersed_baseline() {
    let counts: Vec<f64> = [4.0, 16.0, 7.0, 13.0, 10.0, 2.0, 18.0].repeat(5);
    let fixed = CountCusumParams { interval: CusumInterval::FixedSds(3.0), ..poisson_level_cusum() };
    let nb = CountCusumParams { family: CountFamily::NegativeBinomial, ..fixed };
    let (k_nb, h_nb) = *count_cusum_references(&counts, &nb).last().unwrap();
    let (k_p, h_p) = *count_cusum_references(&counts, &fixed).last().unwrap();
    // Over-dispersed baseline: the NB chart allows more noise (larger k and h) than Poisson.
    assert!(k_nb > k_p && h_nb > h_p, "{k_nb} {k_p} {h_nb} {h_p}");
    let (mean, sd) = aberration::mean_and_sd(&counts[34 - 30..34 - 2]);
    let size = mean * mean / (sd * sd - mean);
    let want = aberration::negative_binomial_reference_value(mean, mean + 2.0 * sd, size);
    assert!(close(k_nb, want, 1e-9));
    // Calibrated to an in-control ARL of a year, the NB chart also needs a larger interval,
    // and its reference value is the one asked for to within the chain's lattice step.
    let calibrated = CountCusumParams { family: CountFamily::NegativeBinomial, ..poisson_level_cusum() };
    let (k_cal, h_cal) = *count_cusum_references(&counts, &calibrated).last().unwrap();
    let (_, h_poisson) = *count_cusum_references(&counts, &poisson_level_cusum()).last().unwrap();
    assert!(h_cal > h_poisson && (k_cal - want).abs() < 0.1, "{k_cal} {want} {h_cal} {h_poisson}");
}

#[test]
fn summaries_hold_aggregates_only() {
    let outcomes = count_aberration(&counts_through(11), &published());
    let summary = &outcome(&outcomes, Rule::CountZRecent).signal().unwrap().summary;
    assert_eq!(
        summary,
        "labs (North): 12 cases reported on 2026-03-11: z = 5.65 > 3.00 against the 7 report days \
         2026-03-04 to 2026-03-10 (mean 5.7, sd 1.1 cases a day)"
    );
    let signal = missingness_jump(&missing((25, 100), &[(10, 100); 7]), &MissingnessParams::default());
    assert_eq!(
        signal.signal().unwrap().summary,
        "labs: onset_date missing in 25.0% of 100 new or changed records, baseline 10.0% over 7 snapshots"
    );
}

#[test]
fn median_of_values() {
    assert_eq!(median(&[3.0, 1.0, 2.0]), Some(2.0));
    assert_eq!(median(&[4.0, 1.0, 2.0, 3.0]), Some(2.5));
    assert_eq!(median(&[f64::NAN]), None);
}
