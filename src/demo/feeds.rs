//! What each invented feed shows on a given day: the county reporting system's CSV extract
//! and the lab network's NDJSON extract, with their own column names and codes, late facts,
//! corrected onsets and a few malformed rows of the kinds real feeds have. Pure: returns text.

use std::fmt::Write as _;

use serde_json::json;

use super::scenario::{JURISDICTIONS, LABS, MISSING_SPECIMEN_FROM, Scenario, TrueCase};

/// Column header of the county feed.
pub const COUNTY_HEADER: &str = "case_id,district,symptom_onset,specimen_collected,result_released,reported_on,\
admitted_on,died_on,outcome,age,sex,hospitalised,symptoms,conditions,exported_at,reporter_note";

/// Cases whose onset the reporting system holds as an impossible date (a field problem).
fn has_impossible_onset(case: &TrueCase) -> bool {
    case.id % 997 == 13
}

/// Cases exported without their key (the row is rejected).
fn has_blank_key(case: &TrueCase) -> bool {
    case.id % 1499 == 7
}

/// Cases exported twice (the last row wins; the first is rejected as a duplicate).
fn is_exported_twice(case: &TrueCase) -> bool {
    case.id % 1201 == 5
}

/// What the county feed will eventually show per onset day, once every report is in: the
/// nowcast's target (cases never given an onset, or rejected, are not in it).
pub fn eventual_county_onsets(scenario: &Scenario) -> Vec<u32> {
    let mut counts = vec![0u32; scenario.days as usize];
    for case in scenario.cases.iter().filter(|c| !has_blank_key(c) && !has_impossible_onset(c)) {
        // A corrected onset can fall outside the scenario's days; it is not on the curve.
        if let Some(slot) =
            case.onset_shown(i32::MAX).and_then(|o| usize::try_from(o).ok()).and_then(|o| counts.get_mut(o))
        {
            *slot += 1;
        }
    }
    counts
}

/// The county reporting system's full extract on `day`: every case reported by then.
pub fn county_csv(scenario: &Scenario, day: i32) -> String {
    let mut out = String::with_capacity(256 * scenario.cases.len());
    out.push_str(COUNTY_HEADER);
    out.push('\n');
    let exported_at = format!("{}T06:00:00Z", scenario.date(day + 1));
    for case in scenario.cases.iter().filter(|c| c.report <= day) {
        let row = county_row(scenario, case, day, &exported_at);
        out.push_str(&row);
        if is_exported_twice(case) {
            out.push_str(&row);
        }
    }
    // The export tool appends a footer line, which is not a record (a ragged row).
    let _ = writeln!(out, "END OF EXTRACT");
    out
}

fn county_row(scenario: &Scenario, case: &TrueCase, day: i32, exported_at: &str) -> String {
    let date = |d: i32| scenario.date(d).to_string();
    let known = |event: Option<(i32, i32)>| event.filter(|(_, known)| *known <= day).map(|(at, _)| date(at));
    let onset = if has_impossible_onset(case) {
        Some("2026-02-30".to_string())
    } else {
        case.onset_shown(day).map(date)
    };
    let died = known(case.death);
    let outcome = if died.is_some() {
        "Died"
    } else if case.recovered.is_some_and(|r| r <= day) {
        "Recovered"
    } else {
        ""
    };
    let hospitalised = match known(case.admission) {
        Some(_) => "Y",
        None if case.admission.is_none() && !case.id.is_multiple_of(5) => "N",
        None => "",
    };
    let mut symptoms = case.symptoms.clone();
    if let Some(t) = case.temperature {
        symptoms.push(format!("{t:.1} C"));
    }
    let key = if has_blank_key(case) { String::new() } else { format!("CR-{:06}", case.id) };
    let fields = [
        key,
        JURISDICTIONS[case.jurisdiction].0.to_string(),
        onset.unwrap_or_default(),
        date(case.specimen),
        date(case.result),
        date(case.report),
        known(case.admission).unwrap_or_default(),
        died.unwrap_or_default(),
        outcome.to_string(),
        county_age(case),
        ["F", "M", "X", "U"][case.sex as usize].to_string(),
        hospitalised.to_string(),
        symptoms.join("; "),
        if case.conditions.is_empty() { "none".into() } else { case.conditions.join("; ") },
        exported_at.to_string(),
        String::new(),
    ];
    let mut row = fields.map(|f| quote(&f)).join(",");
    row.push('\n');
    row
}

/// Ages as the county system exports them: mostly whole years, some bands, open top bands,
/// months and weeks for infants, and "unknown".
fn county_age(case: &TrueCase) -> String {
    let years = case.age_years;
    match case.id % 20 {
        _ if years < 1.0 && case.id.is_multiple_of(2) => format!("{} weeks", (years * 52.0).floor().max(1.0)),
        _ if years < 2.0 => format!("{} months", (years * 12.0).floor().max(1.0)),
        0 => "unknown".into(),
        1 | 2 => {
            let lo = (years as u32 / 10) * 10;
            format!("{lo}-{}", lo + 9)
        }
        _ if years >= 85.0 => "85+".into(),
        _ => format!("{}", years.floor()),
    }
}

fn quote(field: &str) -> String {
    if field.contains([',', '"', '\n']) {
        format!("\"{}\"", field.replace('"', "\"\""))
    } else {
        field.to_string()
    }
}

/// The lab network's full extract on `day`: one record per tested case with a result.
pub fn lab_ndjson(scenario: &Scenario, day: i32) -> String {
    let mut out = String::with_capacity(256 * scenario.cases.len());
    for case in scenario.cases.iter().filter(|c| c.lab_visible.is_some_and(|v| v <= day)) {
        let date = |d: i32| scenario.date(d).to_string();
        let mut symptoms = case.symptoms.clone();
        if let Some(t) = case.temperature {
            symptoms.push(format!("{t:.1}°C"));
        }
        // The lab sees the onset only when the request form carried it.
        let onset = (case.id % 5 < 3).then(|| case.onset_shown(day).map(date)).flatten();
        let age = if case.age_years < 2.0 {
            format!("{} months", (case.age_years * 12.0).floor())
        } else {
            format!("{}", case.age_years.floor())
        };
        let gender = ["2", "1", "3", "9"][case.sex as usize];
        let record = json!({
            "specimen_id": format!("LAB-{:06}", case.id),
            "area": JURISDICTIONS[case.jurisdiction].2,
            "onsetDate": onset,
            "specimenDate": specimen_filled(scenario, case).then(|| date(case.specimen)),
            "resultDate": date(case.result),
            "patientAge": age,
            "gender": gender,
            "symptomList": symptoms,
            "labName": LABS[case.lab],
        });
        let _ = writeln!(out, "{record}");
        // One request form per 800 cases is garbled by the lab's export (a rejected line).
        if case.id % 800 == 3 {
            let _ = writeln!(out, "{{\"specimen_id\": \"LAB-{:06}-B\", \"area\": ", case.id);
        }
    }
    out
}

/// Injected problem (b): from `MISSING_SPECIMEN_FROM` the lab leaves the specimen date blank
/// on 8 of 10 rows it first sends (earlier rows keep theirs, so history is not rewritten).
fn specimen_filled(scenario: &Scenario, case: &TrueCase) -> bool {
    scenario.injections.is_empty()
        || case.lab_visible.is_none_or(|v| v < MISSING_SPECIMEN_FROM)
        || case.id % 10 >= 8
}

/// Injected problem (c): the extract cut after the first `share` of its lines.
pub fn truncated(text: &str, share: f64) -> String {
    let keep = (text.lines().count() as f64 * share) as usize;
    text.lines().take(keep).flat_map(|l| [l, "\n"]).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn extracts_grow_and_carry_their_quirks() {
        let scenario = Scenario::generate(7, 100);
        let early = county_csv(&scenario, 20);
        let late = county_csv(&scenario, 99);
        assert!(early.starts_with(COUNTY_HEADER));
        assert!(late.lines().count() > early.lines().count());
        assert!(late.ends_with("END OF EXTRACT\n"));
        assert!(late.contains("2026-02-30"));
        let lab = lab_ndjson(&scenario, 99);
        assert!(lab.lines().count() > 1000);
        assert!(lab.lines().any(|l| serde_json::from_str::<serde_json::Value>(l).is_err()));
    }
}
