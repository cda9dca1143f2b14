//! The demo scenario: an invented region, two invented feeds and the known truth behind
//! them. `scenario` draws the cases, `feeds` renders what each feed shows on a day, and this
//! file writes one full extract per feed per day, `truth.csv` and a config into a folder.
//! No real people, places or data: every name and value is generated here.

pub mod feeds;
pub mod scenario;

use std::fs;
use std::io;
use std::path::{Path, PathBuf};

pub use self::scenario::{Injection, JURISDICTIONS, Scenario, TrueCase};

/// Days of extracts the demo generates unless told otherwise.
pub const DEFAULT_DAYS: u32 = 100;

/// A file that marks a folder as the demo's own, so a re-run may clear it.
const MARKER: &str = ".tidemark-demo";

/// Source names in the demo config.
pub const COUNTY_SOURCE: &str = "county-reports";
pub const LAB_SOURCE: &str = "lab-results";

/// The demo's files on disk.
#[derive(Debug, Clone)]
pub struct DemoFiles {
    pub dir: PathBuf,
    pub config: PathBuf,
    /// The folder the county source polls (empty at first; the demo drops files into it).
    pub county_inbox: PathBuf,
    /// (day, county extract, lab extract) waiting in `staging/`, in day order.
    pub extracts: Vec<(i32, PathBuf, PathBuf)>,
}

/// Writes the scenario's extracts into `staging/`, `truth.csv`, and a `tidemark.toml` whose
/// lab source fetches `lab_url`, into `dir`, clearing an earlier demo there. Refuses a
/// non-empty folder that is not a demo folder.
pub fn write(dir: &Path, scenario: &Scenario, lab_url: &str) -> io::Result<DemoFiles> {
    prepare_dir(dir)?;
    let county_dir = dir.join("staging").join(COUNTY_SOURCE);
    let lab_dir = dir.join("staging").join(LAB_SOURCE);
    let county_inbox = dir.join("feeds").join(COUNTY_SOURCE);
    fs::create_dir_all(&county_dir)?;
    fs::create_dir_all(&lab_dir)?;
    fs::create_dir_all(&county_inbox)?;
    let mut extracts = Vec::new();
    for day in 0..scenario.days as i32 {
        let (county_text, mut lab_text) =
            (feeds::county_csv(scenario, day), feeds::lab_ndjson(scenario, day));
        if day == scenario::TRUNCATED_DAY && !scenario.injections.is_empty() {
            lab_text = feeds::truncated(&lab_text, scenario::TRUNCATED_SHARE);
        }
        // A feed with nothing to report yet sends nothing: the demo starts on the first day
        // both feeds have a record.
        if extracts.is_empty() && (lab_text.is_empty() || !county_text.contains("\nCR-")) {
            continue;
        }
        let date = scenario.date(day);
        let county = county_dir.join(format!("{COUNTY_SOURCE}-{date}.csv"));
        let lab = lab_dir.join(format!("{LAB_SOURCE}-{date}.ndjson"));
        fs::write(&county, county_text)?;
        fs::write(&lab, lab_text)?;
        extracts.push((day, county, lab));
    }
    fs::write(dir.join("truth.csv"), truth_csv(scenario))?;
    fs::write(dir.join("injected.csv"), injected_csv(scenario))?;
    let config = dir.join("tidemark.toml");
    fs::write(&config, config_text(lab_url))?;
    Ok(DemoFiles { dir: dir.to_path_buf(), config, county_inbox, extracts })
}

fn prepare_dir(dir: &Path) -> io::Result<()> {
    if dir.join(MARKER).exists() {
        for sub in ["feeds", "staging", "data"] {
            if dir.join(sub).exists() {
                fs::remove_dir_all(dir.join(sub))?;
            }
        }
    } else if dir.exists() && fs::read_dir(dir)?.next().is_some() {
        return Err(io::Error::other(format!(
            "{} is not empty and not a demo folder; choose another DIR",
            dir.display()
        )));
    }
    fs::create_dir_all(dir)?;
    fs::write(dir.join(MARKER), "created by `tidemark demo`; safe to delete\n")
}

/// True daily onsets, overall and per jurisdiction.
pub fn truth_csv(scenario: &Scenario) -> String {
    let mut per_day = vec![[0u32; JURISDICTIONS.len()]; scenario.days as usize];
    for case in &scenario.cases {
        per_day[case.onset as usize][case.jurisdiction] += 1;
    }
    let mut out = String::from("onset_date,true_onsets");
    for (name, ..) in JURISDICTIONS {
        out.push_str(&format!(",{}", name.to_lowercase().replace(' ', "_")));
    }
    out.push('\n');
    for (day, counts) in per_day.iter().enumerate() {
        let total: u32 = counts.iter().sum();
        out.push_str(&format!("{},{total}", scenario.date(day as i32)));
        for count in counts {
            out.push_str(&format!(",{count}"));
        }
        out.push('\n');
    }
    out
}

/// The injected problems: day, date, feed, jurisdiction (empty: the whole feed), kind.
pub fn injected_csv(scenario: &Scenario) -> String {
    let mut out = String::from("day,date,feed,jurisdiction,kind\n");
    for i in &scenario.injections {
        out.push_str(&format!(
            "{},{},{},{},{}\n",
            i.day,
            scenario.date(i.day),
            i.feed,
            i.jurisdiction,
            i.kind
        ));
    }
    out
}

/// The demo's config for a lab feed served at `lab_url`.
pub fn config_text(lab_url: &str) -> String {
    CONFIG.replace("LAB_URL", lab_url)
}

/// The demo's config: a folder feed and a URL feed with different column names and codes.
/// Polls run every second; the demo also asks for a poll as soon as it drops a new day.
const CONFIG: &str = r#"# Written by `tidemark demo`: the invented scenario's two feeds.
[store]
path = "data/tidemark.db"
archive = "data/archive"

# Recomputed after every applied snapshot, and every stored nowcast is scored once its truth
# has matured (`tidemark scores`); `--method auto` uses the best matured score. The demo plays
# 100 days in seconds, so it uses fewer bootstrap resamples than the default (100).
[analysis]
reference_fields = ["onset_date", "report_date"]
strata = ["jurisdiction", "age"]
delays = ["onset_date->report_date", "onset_date->first_seen", "onset_date->death_date"]
bootstrap = 10

[[source]]
name = "county-reports"
kind = "folder"
path = "feeds/county-reports"
pattern = "*.csv"
schedule = "* * * * * *"
settle = "50ms"
extract = "full"
as_of = "name:%Y-%m-%d"
key = "case_id"
expect_every = "26h"
ignore = ["exported_at"]

[source.fields]
jurisdiction = "district"
onset_date = "symptom_onset"
specimen_date = "specimen_collected"
result_date = "result_released"
report_date = "reported_on"
admit_date = "admitted_on"
death_date = "died_on"
outcome = "outcome"
age = "age"
sex = "sex"
hospitalised = "hospitalised"
symptoms = "symptoms"
conditions = "conditions"

[source.values.sex]
F = "female"
M = "male"
X = "other"
U = ""

[source.values.hospitalised]
Y = "yes"
N = "no"

[[source]]
name = "lab-results"
kind = "url"
url = "LAB_URL"
format = "ndjson"
schedule = "* * * * * *"
timeout = "30s"
retries = 2
retry_base = "100ms"
extract = "full"
as_of = "header:Last-Modified"
key = "specimen_id"
expect_every = "26h"

[source.fields]
jurisdiction = "area"
onset_date = "onsetDate"
specimen_date = "specimenDate"
result_date = "resultDate"
age = "patientAge"
sex = "gender"
symptoms = "symptomList"

[source.values.sex]
1 = "male"
2 = "female"
3 = "other"
9 = ""

[source.values.jurisdiction]
AMB = "Amberlee"
BRK = "Brackwater"
COR = "Corran Vale"
DUN = "Dunhollow"
"#;

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn demo_config_is_valid() {
        let text = config_text("http://127.0.0.1:9/lab-results.ndjson");
        let config = crate::config::Config::parse(&text, Path::new("/tmp/demo/tidemark.toml")).unwrap();
        assert_eq!(config.sources.len(), 2);
    }

    #[test]
    fn injected_problems_are_in_the_feeds() {
        let scenario = Scenario::generate(7, 100);
        assert_eq!(scenario.injections.len(), 4);
        let csv = injected_csv(&scenario);
        assert!(csv.lines().nth(1).unwrap().starts_with("60,2026-03-06,county-reports,Brackwater,"), "{csv}");
        let blank = |day| {
            let text = feeds::lab_ndjson(&scenario, day);
            let rows: Vec<_> =
                text.lines().filter_map(|l| serde_json::from_str::<serde_json::Value>(l).ok()).collect();
            rows.iter().filter(|r| r["specimenDate"].is_null()).count() as f64 / rows.len() as f64
        };
        assert_eq!(blank(40), 0.0);
        assert!(blank(99) > 0.05, "rows first sent from day 45 lack the specimen date");
        let full = feeds::lab_ndjson(&scenario, 75);
        let cut = feeds::truncated(&full, scenario::TRUNCATED_SHARE);
        assert!(cut.lines().count() * 2 < full.lines().count() && cut.ends_with('\n'));
        let reported = |day| scenario.cases.iter().filter(|c| c.jurisdiction == 3 && c.report == day).count();
        assert!(reported(81) >= scenario::SPIKE_PER_DAY as usize, "the spike adds its cases on day 81");
        let short = Scenario::generate(7, 30);
        assert!(short.injections.is_empty());
    }
}
