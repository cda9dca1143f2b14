//! The invented scenario with known truth: an outbreak in a made-up region of four made-up
//! jurisdictions, each case with its true onset, testing, reporting, hospital and death
//! dates and the day each fact becomes known. Deterministic for a seed; no IO.

use rand::rngs::StdRng;
use rand::{RngExt, SeedableRng};
use rand_distr::{Distribution, Gamma, Poisson};

/// Jurisdictions of the invented region: name, share of cases, lab feed code, and the mean
/// onset-to-report delay in days (it differs, so stratified delays have something to show).
pub const JURISDICTIONS: [(&str, f64, &str, f64); 4] = [
    ("Amberlee", 0.35, "AMB", 3.0),
    ("Brackwater", 0.25, "BRK", 4.5),
    ("Corran Vale", 0.25, "COR", 6.0),
    ("Dunhollow", 0.15, "DUN", 8.0),
];

/// Invented laboratories named in the lab feed.
pub const LABS: [&str; 3] = ["Northgate Analytical", "Saltmere Public Lab", "Orrin Clinical Testing"];

const SYMPTOMS: [&str; 7] =
    ["cough", "fatigue", "headache", "sore throat", "loss of smell", "shortness of breath", "muscle ache"];
const CONDITIONS: [&str; 4] = ["diabetes", "asthma", "heart disease", "chronic kidney disease"];

/// Share of cases reported without an onset date, and of those the share filled in later.
pub const ONSET_MISSING_RATE: f64 = 0.15;
pub const ONSET_FILLED_LATER_RATE: f64 = 0.4;
/// Share of cases whose onset date is corrected in a later extract.
pub const ONSET_CORRECTION_RATE: f64 = 0.03;
/// Share of cases tested by the lab network (and so present in the lab feed).
pub const LAB_COVERAGE: f64 = 0.7;

/// A problem injected into the feeds, recorded as known truth so the demo can tell which
/// alerts it should cause. `rules` are the alert rules expected to catch it and `subject` the
/// alert subject they use (a jurisdiction, a field, or empty for the whole source).
#[derive(Debug, Clone, PartialEq)]
pub struct Injection {
    pub day: i32,
    pub feed: &'static str,
    pub jurisdiction: &'static str,
    pub kind: &'static str,
    pub rules: &'static [&'static str],
    pub subject: &'static str,
}

/// Day from which Brackwater's reports arrive `LAG_JUMP_DAYS` later than before.
pub const LAG_JUMP_FROM: i32 = 60;
pub const LAG_JUMP_DAYS: i32 = 5;
/// Day from which the lab feed leaves the specimen date blank on most new rows.
pub const MISSING_SPECIMEN_FROM: i32 = 45;
/// Day on which the lab feed's full extract carries only `TRUNCATED_SHARE` of its rows.
pub const TRUNCATED_DAY: i32 = 75;
pub const TRUNCATED_SHARE: f64 = 0.4;
/// Days on which an extra cluster of Dunhollow cases is reported, and cases per day.
pub const SPIKE_DAYS: [i32; 3] = [80, 81, 82];
pub const SPIKE_PER_DAY: u32 = 12;

/// The four injected problems, for scenarios long enough to hold them.
pub fn injections(days: u32) -> Vec<Injection> {
    let all = [
        Injection {
            day: LAG_JUMP_FROM,
            feed: "county-reports",
            jurisdiction: "Brackwater",
            kind: "reporting lag jump",
            rules: &["lag_jump", "volume_drop"],
            subject: "Brackwater",
        },
        Injection {
            day: MISSING_SPECIMEN_FROM,
            feed: "lab-results",
            jurisdiction: "",
            kind: "missingness jump (specimen date)",
            rules: &["missingness_jump"],
            subject: "specimen_date",
        },
        Injection {
            day: TRUNCATED_DAY,
            feed: "lab-results",
            jurisdiction: "",
            kind: "truncated extract",
            rules: &["held_snapshot", "volume_drop"],
            subject: "",
        },
        Injection {
            day: SPIKE_DAYS[0],
            feed: "county-reports",
            jurisdiction: "Dunhollow",
            kind: "count spike",
            rules: &["count_z_recent", "count_z_guarded", "count_z_guarded_3day", "count_cusum"],
            subject: "Dunhollow",
        },
    ];
    all.into_iter().filter(|i| i.day < days as i32).collect()
}

/// One true case. Days are offsets from the scenario's first day.
#[derive(Debug, Clone)]
pub struct TrueCase {
    pub id: u32,
    pub jurisdiction: usize,
    pub onset: i32,
    pub specimen: i32,
    pub result: i32,
    pub report: i32,
    pub age_years: f64,
    /// 0 female, 1 male, 2 other, 3 not recorded.
    pub sex: u8,
    pub symptoms: Vec<String>,
    pub temperature: Option<f64>,
    pub conditions: Vec<String>,
    /// Admission day and the day the feed learns of it.
    pub admission: Option<(i32, i32)>,
    /// Death day and the day the feed learns of it.
    pub death: Option<(i32, i32)>,
    /// Day from which the outcome is recorded as recovered.
    pub recovered: Option<i32>,
    /// `None`: onset reported with the case; `Some(Some(day))`: filled in on that day;
    /// `Some(None)`: never reported.
    pub onset_missing: Option<Option<i32>>,
    /// A later extract day and the corrected onset shown from then on.
    pub correction: Option<(i32, i32)>,
    /// Day the lab feed first shows the case, if it was tested by the network.
    pub lab_visible: Option<i32>,
    pub lab: usize,
}

impl TrueCase {
    /// The onset date the reporting system shows on extract day `day` (`None` = blank).
    pub fn onset_shown(&self, day: i32) -> Option<i32> {
        match self.onset_missing {
            Some(None) => return None,
            Some(Some(filled)) if filled > day => return None,
            _ => {}
        }
        match self.correction {
            Some((from, corrected)) if from <= day => Some(corrected),
            _ => Some(self.onset),
        }
    }
}

/// The whole scenario.
#[derive(Debug, Clone)]
pub struct Scenario {
    pub start: chrono::NaiveDate,
    pub days: u32,
    pub cases: Vec<TrueCase>,
    pub injections: Vec<Injection>,
}

impl Scenario {
    /// Generates `days` days of an outbreak that rises and falls over about 90 days.
    pub fn generate(seed: u64, days: u32) -> Scenario {
        let mut rng = StdRng::seed_from_u64(seed);
        let mut cases = Vec::new();
        for onset in 0..days as i32 {
            let expected = expected_onsets(onset);
            let n = Poisson::new(expected).map(|p| p.sample(&mut rng) as u32).unwrap_or(0);
            for _ in 0..n {
                let id = cases.len() as u32 + 1;
                cases.push(draw_case(&mut rng, id, onset));
            }
        }
        let injections = injections(days);
        if !injections.is_empty() {
            lengthen_lags(&mut cases);
            add_spike(&mut cases, seed, days);
        }
        Scenario { start: chrono::NaiveDate::from_ymd_opt(2026, 1, 5).unwrap(), days, cases, injections }
    }

    pub fn date(&self, day: i32) -> chrono::NaiveDate {
        self.start + chrono::Days::new(day.max(0) as u64)
    }

    /// True onsets per day, for `truth.csv` and the demo's comparison.
    pub fn true_onsets(&self) -> Vec<u32> {
        let mut counts = vec![0u32; self.days as usize];
        for case in &self.cases {
            counts[case.onset as usize] += 1;
        }
        counts
    }
}

/// Expected true onsets on a day: a baseline of 3 and a bell-shaped wave peaking on day 45
/// at about 110 cases.
pub fn expected_onsets(day: i32) -> f64 {
    let z = (day as f64 - 45.0) / 14.0;
    3.0 + 107.0 * (-0.5 * z * z).exp()
}

/// Injected problem (a): Brackwater's reports due from `LAG_JUMP_FROM` on arrive later.
fn lengthen_lags(cases: &mut [TrueCase]) {
    let brackwater = JURISDICTIONS.iter().position(|j| j.0 == "Brackwater").unwrap_or(1);
    for case in cases.iter_mut().filter(|c| c.jurisdiction == brackwater && c.report >= LAG_JUMP_FROM) {
        case.report += LAG_JUMP_DAYS;
    }
}

/// Injected problem (d): an extra cluster of Dunhollow cases reported on `SPIKE_DAYS`, drawn
/// from their own random stream so the rest of the scenario is unchanged.
fn add_spike(cases: &mut Vec<TrueCase>, seed: u64, days: u32) {
    let mut rng = StdRng::seed_from_u64(seed ^ 0x5eed_5b1e);
    let dunhollow = JURISDICTIONS.len() - 1;
    for day in SPIKE_DAYS.into_iter().filter(|d| *d < days as i32) {
        for _ in 0..SPIKE_PER_DAY {
            let id = cases.len() as u32 + 1;
            let onset = day - rng.random_range(1..=3);
            let mut case = draw_case(&mut rng, id, onset);
            case.jurisdiction = dunhollow;
            case.report = day;
            case.specimen = case.specimen.min(day);
            case.result = case.result.min(day);
            case.lab_visible = case.lab_visible.map(|v| v.clamp(case.result, day));
            cases.push(case);
        }
    }
}

fn gamma_days(rng: &mut StdRng, mean: f64, shape: f64) -> i32 {
    Gamma::new(shape, mean / shape).map(|g| g.sample(rng).floor() as i32).unwrap_or(0)
}

fn pick<const N: usize>(rng: &mut StdRng, items: [&str; N], p: f64) -> Vec<String> {
    items.iter().filter(|_| rng.random_bool(p)).map(|s| s.to_string()).collect()
}

fn draw_jurisdiction(rng: &mut StdRng) -> usize {
    let mut u: f64 = rng.random();
    for (idx, (_, share, _, _)) in JURISDICTIONS.iter().enumerate() {
        if u < *share {
            return idx;
        }
        u -= share;
    }
    JURISDICTIONS.len() - 1
}

fn draw_case(rng: &mut StdRng, id: u32, onset: i32) -> TrueCase {
    let jurisdiction = draw_jurisdiction(rng);
    let report = onset + gamma_days(rng, JURISDICTIONS[jurisdiction].3, 2.5);
    let specimen = (onset + rng.random_range(0..=2)).min(report);
    let result = (specimen + rng.random_range(0..=2)).min(report);
    let age_years =
        if rng.random_bool(0.03) { rng.random_range(0.0..2.0) } else { rng.random_range(2.0..95.0) };
    let old = age_years >= 65.0;
    let admission = rng.random_bool(if old { 0.3 } else { 0.08 }).then(|| {
        let admit = onset + rng.random_range(2..=8);
        (admit, admit.max(report) + rng.random_range(2..=10))
    });
    let death = rng.random_bool(if old { 0.08 } else { 0.005 }).then(|| {
        let died = onset + 1 + gamma_days(rng, 16.0, 4.9);
        (died, died.max(report) + rng.random_range(3..=14))
    });
    let recovered = (death.is_none() && rng.random_bool(0.7)).then(|| onset + rng.random_range(14..=28));
    let onset_missing = rng
        .random_bool(ONSET_MISSING_RATE)
        .then(|| rng.random_bool(ONSET_FILLED_LATER_RATE).then(|| report + rng.random_range(3..=10)));
    let correction = rng.random_bool(ONSET_CORRECTION_RATE).then(|| {
        let shift = *[-3, -2, -1, 1, 2].get(rng.random_range(0..5)).unwrap_or(&1);
        (report + rng.random_range(1..=7), (onset + shift).clamp(0, report))
    });
    let lab_visible = rng.random_bool(LAB_COVERAGE).then(|| result + rng.random_range(0..=1));
    TrueCase {
        id,
        jurisdiction,
        onset,
        specimen,
        result,
        report,
        age_years,
        sex: [0u8, 1, 2, 3][weighted(rng, &[0.49, 0.48, 0.01, 0.02])],
        symptoms: pick(rng, SYMPTOMS, 0.35),
        temperature: rng.random_bool(0.6).then(|| (rng.random_range(365..=401) as f64) / 10.0),
        conditions: pick(rng, CONDITIONS, 0.08),
        admission,
        death,
        recovered,
        onset_missing,
        correction,
        lab_visible,
        lab: rng.random_range(0..LABS.len()),
    }
}

fn weighted(rng: &mut StdRng, weights: &[f64]) -> usize {
    let mut u: f64 = rng.random();
    for (idx, w) in weights.iter().enumerate() {
        if u < *w {
            return idx;
        }
        u -= w;
    }
    weights.len() - 1
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn deterministic_for_a_seed_and_rises_and_falls() {
        let a = Scenario::generate(7, 100);
        let b = Scenario::generate(7, 100);
        assert_eq!(a.cases.len(), b.cases.len());
        assert_eq!(a.true_onsets(), b.true_onsets());
        let onsets = a.true_onsets();
        let week = |from: usize| onsets[from..from + 7].iter().sum::<u32>();
        assert!(week(42) > 4 * week(0), "peak week should dwarf the first");
        assert!(week(42) > 4 * week(90), "and the last");
        for case in &a.cases {
            assert!(
                case.onset <= case.specimen && case.specimen <= case.result && case.result <= case.report
            );
        }
    }
}
