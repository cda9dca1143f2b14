//! The dashboard's chart panels: each turns shaped data (see `shape`) into a chart frame and
//! layers, a one-paragraph summary, and a small table of the numbers behind the chart, which
//! the page puts in a `<details>` element for screen readers and for copying.

use chrono::{Days, NaiveDate};

use super::chart::{self, ChartError, Frame, Layer, Mark};
use super::shape::{self, DayCounts, Histogram, LagPoint, NowcastPoint};
use crate::analysis::delay::{Dist, Family};
use crate::analysis::scoring::AutoChoice;
use crate::store::{MISSINGNESS_FIELDS, SnapshotMissing, StoredDelayFit};

/// One chart with its words and numbers.
#[derive(Debug, Clone, PartialEq)]
pub struct Panel {
    /// Letters and dashes: the chart's id in the page.
    pub id: &'static str,
    pub heading: String,
    /// The chart, or `None` when there is nothing to draw (the summary says why).
    pub svg: Option<String>,
    pub summary: String,
    pub table: NumbersTable,
}

/// Column names and rows of text.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct NumbersTable {
    pub headers: Vec<String>,
    pub rows: Vec<Vec<String>>,
}

impl NumbersTable {
    fn new(headers: &[&str]) -> NumbersTable {
        NumbersTable { headers: headers.iter().map(|h| h.to_string()).collect(), rows: Vec::new() }
    }
}

const BAR: (u8, u8, u8) = (86, 120, 160);
const ESTIMATE: (u8, u8, u8) = (190, 80, 20);
const SECOND: (u8, u8, u8) = (40, 130, 90);
/// Background of days whose nowcast has low information.
const LOW_INFORMATION: (u8, u8, u8) = (170, 170, 170);

/// Days shown in the nowcast table (the most recent).
const NOWCAST_TABLE_DAYS: usize = 21;

fn one_decimal(x: f64) -> String {
    if x.is_finite() { format!("{x:.1}") } else { "-".into() }
}

fn optional(x: Option<f64>) -> String {
    x.map(one_decimal).unwrap_or_else(|| "-".into())
}

fn day_label(first: NaiveDate) -> impl Fn(f64) -> String {
    move |x: f64| {
        let offset = x.round();
        if (x - offset).abs() > 0.01 || offset < 0.0 {
            return String::new();
        }
        first
            .checked_add_days(Days::new(offset as u64))
            .map(|d| d.format("%d %b").to_string())
            .unwrap_or_default()
    }
}

fn count_label(y: f64) -> String {
    if (y - y.round()).abs() < 1e-9 { format!("{y:.0}") } else { format!("{y:.1}") }
}

fn offset(first: NaiveDate, date: NaiveDate) -> f64 {
    (date - first).num_days() as f64
}

/// Epidemic curve by onset: observed bars, the nowcast median and its 90% band.
pub fn onset_curve(
    counts: &DayCounts,
    nowcast: &[NowcastPoint],
    choice: &AutoChoice,
) -> Result<Panel, ChartError> {
    let dates = counts.days.iter().map(|(d, _)| *d).chain(nowcast.iter().map(|p| p.date));
    let (Some(first), Some(last)) = (dates.clone().min(), dates.max()) else {
        return Ok(empty(
            "onset",
            "Epidemic curve by onset date",
            "No record has an onset date in this snapshot.",
        ));
    };
    let span = offset(first, last);
    let y_max =
        shape::axis_max(counts.days.iter().map(|(_, c)| *c as f64).chain(nowcast.iter().map(|p| p.upper90)));
    let bars = bar_marks(first, &counts.days);
    let band: Vec<(f64, f64, f64)> =
        nowcast.iter().map(|p| (offset(first, p.date), p.lower90, p.upper90)).collect();
    let median: Vec<(f64, f64)> = nowcast.iter().map(|p| (offset(first, p.date), p.median)).collect();
    // Days whose estimate rests mostly on the model: shaded behind the bars, full height.
    let low: Vec<Mark> = nowcast
        .iter()
        .filter(|p| p.low_information)
        .map(|p| {
            let x = offset(first, p.date);
            Mark::Bar { x0: x - 0.5, x1: x + 0.5, y0: 0.0, y1: y_max }
        })
        .collect();
    let mut layers = Vec::new();
    if !low.is_empty() {
        layers.push(Layer { class: "low-information", color: LOW_INFORMATION, opacity: 0.35, marks: low });
    }
    layers.push(Layer { class: "observed", color: BAR, opacity: 0.85, marks: bars });
    if !nowcast.is_empty() {
        layers.push(Layer {
            class: "nowcast-band",
            color: ESTIMATE,
            opacity: 0.25,
            marks: vec![Mark::Band(band)],
        });
        layers.push(Layer {
            class: "nowcast-median",
            color: ESTIMATE,
            opacity: 1.0,
            marks: vec![Mark::Line(median)],
        });
    }
    let total: i64 = counts.days.iter().map(|(_, c)| c).sum();
    let mut summary = format!(
        "{total} cases with an onset date from {first} to {last} as known in this snapshot; {} records have no onset date.",
        counts.undated
    );
    if nowcast.is_empty() {
        summary.push_str(" No nowcast is stored for this snapshot, so only the observed counts are shown.");
    } else {
        summary.push_str(&format!(
            " The line is the nowcast median ({} method) of the count that will eventually be reported for each recent onset date; the shaded band is its 90% prediction interval. The last days always look low in the bars because their cases are still arriving. {}.",
            choice.method,
            capitalised(&choice.reason)
        ));
        let low_days = nowcast.iter().filter(|p| p.low_information).count();
        if low_days > 0 {
            summary.push_str(&format!(
                " The {low_days} grey-shaded days have low information: under 10% of their eventual count is expected to be known yet, so their estimate rests mostly on the model."
            ));
        }
        if let Some(warning) = &choice.warning {
            summary.push(' ');
            summary.push_str(warning);
        }
    }
    let desc = format!(
        "Bar chart of cases per onset date from {first} to {last}, with the nowcast median and 90% band for recent days."
    );
    let label = day_label(first);
    let frame = Frame {
        id: "onset",
        title: "Epidemic curve by onset date",
        desc: &desc,
        x_desc: "Onset date (day)",
        y_desc: "Cases (count per day)",
        x: -0.5..span + 0.5,
        y: 0.0..y_max,
        x_label: &label,
        y_label: &count_label,
        x_ticks: 10,
        y_ticks: 6,
        y_label_area: 64,
    };
    let mut table =
        NumbersTable::new(&["onset date", "observed", "nowcast median", "90% interval", "information"]);
    let skip = nowcast.len().saturating_sub(NOWCAST_TABLE_DAYS);
    for p in &nowcast[skip..] {
        table.rows.push(vec![
            p.date.to_string(),
            one_decimal(p.observed),
            one_decimal(p.median),
            format!("{} - {}", one_decimal(p.lower90), one_decimal(p.upper90)),
            if p.low_information { "low" } else { "adequate" }.to_string(),
        ]);
    }
    if nowcast.is_empty() {
        table = NumbersTable::new(&["onset date", "observed"]);
        let skip = counts.days.len().saturating_sub(NOWCAST_TABLE_DAYS);
        table.rows = counts.days[skip..].iter().map(|(d, c)| vec![d.to_string(), c.to_string()]).collect();
    }
    Ok(Panel {
        id: "onset",
        heading: "Epidemic curve by onset date".into(),
        svg: Some(chart::render(&frame, &layers)?),
        summary,
        table,
    })
}

/// Epidemic curve by report date: observed bars.
pub fn report_curve(counts: &DayCounts) -> Result<Panel, ChartError> {
    let (Some(first), Some(last)) = (counts.days.first().map(|d| d.0), counts.days.last().map(|d| d.0))
    else {
        return Ok(empty("report", "Cases by report date", "No record has a report date in this snapshot."));
    };
    let y_max = shape::axis_max(counts.days.iter().map(|(_, c)| *c as f64));
    let layers =
        [Layer { class: "observed", color: SECOND, opacity: 0.85, marks: bar_marks(first, &counts.days) }];
    let total: i64 = counts.days.iter().map(|(_, c)| c).sum();
    let desc = format!("Bar chart of cases per report date from {first} to {last}.");
    let label = day_label(first);
    let frame = Frame {
        id: "report",
        title: "Cases by report date",
        desc: &desc,
        x_desc: "Report date (day)",
        y_desc: "Cases (count per day)",
        x: -0.5..offset(first, last) + 0.5,
        y: 0.0..y_max,
        x_label: &label,
        y_label: &count_label,
        x_ticks: 10,
        y_ticks: 6,
        y_label_area: 64,
    };
    let mut table = NumbersTable::new(&["report date", "cases"]);
    let skip = counts.days.len().saturating_sub(NOWCAST_TABLE_DAYS);
    table.rows = counts.days[skip..].iter().map(|(d, c)| vec![d.to_string(), c.to_string()]).collect();
    Ok(Panel {
        id: "report",
        heading: "Cases by report date".into(),
        svg: Some(chart::render(&frame, &layers)?),
        summary: format!(
            "{total} cases with a report date from {first} to {last}; {} records have no report date. Counts by report date change little after the fact, unlike counts by onset.",
            counts.undated
        ),
        table,
    })
}

/// Onset-to-report delay histogram, the stored fit's expected counts, and its quantiles.
pub fn delay_histogram(delays: &[i64], fit: Option<&StoredDelayFit>) -> Result<Panel, ChartError> {
    let title = "Delay from onset to report";
    if delays.iter().all(|d| *d < 0) {
        return Ok(empty("delay", title, "No record has both an onset and a report date in this snapshot."));
    }
    let hist: Histogram = shape::histogram(delays, shape::histogram_cap(delays));
    let summary_stats = crate::analysis::delay::summarize(delays);
    let dist = fit.and_then(|f| match (Family::from_name(&f.family), f.params) {
        (Some(family), [Some(a), Some(b)]) => Dist::new(family, [a, b]),
        _ => None,
    });
    let expected = dist.as_ref().map(|d| shape::fitted_counts(d, &hist));
    let bars: Vec<Mark> = hist
        .counts
        .iter()
        .enumerate()
        .map(|(d, &n)| Mark::Bar { x0: d as f64 - 0.4, x1: d as f64 + 0.4, y0: 0.0, y1: n as f64 })
        .collect();
    let y_max =
        shape::axis_max(hist.counts.iter().map(|&n| n as f64).chain(expected.iter().flatten().copied()));
    let mut layers = vec![Layer { class: "observed", color: BAR, opacity: 0.85, marks: bars }];
    if let Some(expected) = &expected {
        let points = expected.iter().enumerate().map(|(d, y)| (d as f64, *y)).collect();
        layers.push(Layer {
            class: "fitted",
            color: ESTIMATE,
            opacity: 1.0,
            marks: vec![Mark::Line(points)],
        });
    }
    let quantile_marks: Vec<Mark> = fit
        .map(|f| {
            [f.median, f.p95]
                .into_iter()
                .flatten()
                .filter(|q| *q <= hist.cap as f64)
                .map(Mark::Rule)
                .collect()
        })
        .unwrap_or_default();
    if !quantile_marks.is_empty() {
        layers.push(Layer { class: "quantiles", color: (90, 90, 90), opacity: 1.0, marks: quantile_marks });
    }
    let cap = hist.cap;
    let label = move |x: f64| {
        let d = x.round();
        if (x - d).abs() > 0.01 || d < 0.0 {
            String::new()
        } else if d as i64 == cap {
            format!("{cap}+")
        } else {
            format!("{d:.0}")
        }
    };
    let desc = format!(
        "Histogram of {} onset-to-report delays in days{}.",
        summary_stats.n,
        if fit.is_some() {
            ", with the fitted distribution's expected counts and vertical lines at its median and 95th percentile"
        } else {
            ""
        }
    );
    let frame = Frame {
        id: "delay",
        title,
        desc: &desc,
        x_desc: "Delay from onset to report (days)",
        y_desc: "Cases (count)",
        x: -0.5..cap as f64 + 0.5,
        y: 0.0..y_max,
        x_label: &label,
        y_label: &count_label,
        x_ticks: 12,
        y_ticks: 6,
        y_label_area: 64,
    };
    let mut summary = format!(
        "{} delays: observed median {} days, 90th percentile {}, 95th percentile {}; {} negative delays (report before onset) are left out.",
        summary_stats.n,
        one_decimal(summary_stats.median),
        one_decimal(summary_stats.p90),
        one_decimal(summary_stats.p95),
        hist.negative
    );
    match fit {
        Some(f) => summary.push_str(&format!(
            " Fitted {} distribution (lowest AIC, corrected for daily censoring and for recent cases whose long delays are not yet seen): median {} days (95% bootstrap interval {} - {}), 95th percentile {} days ({} - {}){}. The line is the fit's expected count per day for as many cases as the bars hold; vertical lines mark the fitted median and 95th percentile.",
            f.family,
            optional(f.median),
            optional(f.median_interval.0),
            optional(f.median_interval.1),
            optional(f.p95),
            optional(f.p95_interval.0),
            optional(f.p95_interval.1),
            if f.identifiable { "" } else { "; the upper tail is not identified by these data" },
        )),
        None => summary.push_str(" No delay fit is stored for this snapshot."),
    }
    let mut table = NumbersTable::new(&["delay (days)", "observed", "fitted expected"]);
    for (d, &n) in hist.counts.iter().enumerate() {
        let fitted = expected.as_ref().map(|e| one_decimal(e[d])).unwrap_or_else(|| "-".into());
        let label = if d as i64 == cap { format!("{cap}+") } else { d.to_string() };
        table.rows.push(vec![label, n.to_string(), fitted]);
    }
    Ok(Panel {
        id: "delay",
        heading: title.into(),
        svg: Some(chart::render(&frame, &layers)?),
        summary,
        table,
    })
}

/// Median and 90th percentile of onset-to-first-appearance lag, per snapshot.
pub fn lag_trend(points: &[LagPoint]) -> Result<Panel, ChartError> {
    let title = "Reporting lag by snapshot";
    if points.is_empty() {
        return Ok(empty(
            "lag",
            title,
            "No snapshot up to this one brought a new record with an onset date.",
        ));
    }
    let days: Vec<NaiveDate> = points.iter().map(|p| p.day).collect();
    let label = move |x: f64| {
        let i = x.round();
        if (x - i).abs() > 0.01 || i < 0.0 {
            return String::new();
        }
        days.get(i as usize).map(|d| d.format("%d %b").to_string()).unwrap_or_default()
    };
    let line = |f: fn(&LagPoint) -> f64| -> Vec<(f64, f64)> {
        points.iter().enumerate().map(|(i, p)| (i as f64, f(p))).collect()
    };
    let dots = |f: fn(&LagPoint) -> f64| -> Vec<Mark> {
        points.iter().enumerate().map(|(i, p)| Mark::Dot(i as f64, f(p))).collect()
    };
    let mut median_marks = vec![Mark::Line(line(|p| p.median))];
    median_marks.extend(dots(|p| p.median));
    let mut p90_marks = vec![Mark::Line(line(|p| p.p90))];
    p90_marks.extend(dots(|p| p.p90));
    let layers = [
        Layer { class: "lag-p90", color: ESTIMATE, opacity: 1.0, marks: p90_marks },
        Layer { class: "lag-median", color: BAR, opacity: 1.0, marks: median_marks },
    ];
    let y_max = shape::axis_max(points.iter().map(|p| p.p90));
    let desc = format!(
        "Line chart of the median and 90th percentile of days from onset to first appearance in the store, for the new records of each of {} snapshots.",
        points.len()
    );
    let frame = Frame {
        id: "lag",
        title,
        desc: &desc,
        x_desc: "Snapshot (as-of date)",
        y_desc: "Onset to first appearance (days)",
        x: -0.5..points.len() as f64 - 0.5,
        y: 0.0..y_max,
        x_label: &label,
        y_label: &count_label,
        x_ticks: 10,
        y_ticks: 6,
        y_label_area: 64,
    };
    let last = points[points.len() - 1];
    let mut table =
        NumbersTable::new(&["snapshot", "as-of date", "new records", "median lag (days)", "90th percentile"]);
    for p in points {
        table.rows.push(vec![
            p.snapshot_id.to_string(),
            p.day.to_string(),
            p.n.to_string(),
            one_decimal(p.median),
            one_decimal(p.p90),
        ]);
    }
    Ok(Panel {
        id: "lag",
        heading: title.into(),
        svg: Some(chart::render(&frame, &layers)?),
        summary: format!(
            "For the records each snapshot brought for the first time: days from onset to that snapshot. In the latest snapshot shown ({}), {} new records had a median lag of {} days and a 90th percentile of {} days. A rising line means reports are arriving later.",
            last.day,
            last.n,
            one_decimal(last.median),
            one_decimal(last.p90)
        ),
        table,
    })
}

/// Field-by-snapshot map of the share of records missing each field.
pub fn missingness(rows: &[SnapshotMissing]) -> Result<Panel, ChartError> {
    let title = "Missing values by field and snapshot";
    if rows.is_empty() {
        return Ok(empty("missing", title, "No applied snapshot to map."));
    }
    let shares = shape::missing_shares(rows);
    let n_fields = MISSINGNESS_FIELDS.len();
    let mut cells = Vec::new();
    for (col, snapshot) in shares.iter().enumerate() {
        for (idx, share) in snapshot.iter().enumerate() {
            // The first field on top.
            let y = (n_fields - 1 - idx) as f64;
            let x = col as f64;
            cells.push(Mark::Cell {
                x0: x - 0.5,
                x1: x + 0.5,
                y0: y - 0.5,
                y1: y + 0.5,
                fill: shape::heat_color(*share),
            });
        }
    }
    let layers = [Layer { class: "cells", color: (0, 0, 0), opacity: 1.0, marks: cells }];
    let days: Vec<String> = rows.iter().map(|r| r.as_of.get(..10).unwrap_or(&r.as_of).to_string()).collect();
    let x_label = move |x: f64| {
        let i = x.round();
        if (x - i).abs() > 0.01 || i < 0.0 {
            return String::new();
        }
        days.get(i as usize).cloned().unwrap_or_default()
    };
    let y_label = move |y: f64| {
        let i = y.round();
        if (y - i).abs() > 0.01 || i < 0.0 || i as usize >= n_fields {
            return String::new();
        }
        MISSINGNESS_FIELDS[n_fields - 1 - i as usize].name().to_string()
    };
    let desc = format!(
        "Heat map of the share of records missing each of {n_fields} fields in each of {} snapshots; white is complete, dark purple is all missing.",
        rows.len()
    );
    let frame = Frame {
        id: "missing",
        title,
        desc: &desc,
        x_desc: "Snapshot (as-of date)",
        y_desc: "Field",
        x: -0.5..rows.len() as f64 - 0.5,
        y: -0.5..n_fields as f64 - 0.5,
        x_label: &x_label,
        y_label: &y_label,
        x_ticks: 6,
        y_ticks: n_fields,
        y_label_area: 110,
    };
    let latest = &shares[shares.len() - 1];
    let mut table =
        NumbersTable::new(&["field", "missing, first snapshot shown (%)", "missing, this snapshot (%)"]);
    for (idx, field) in MISSINGNESS_FIELDS.iter().enumerate() {
        let pct = |s: Option<f64>| s.map(|s| format!("{:.1}", s * 100.0)).unwrap_or_else(|| "-".into());
        table.rows.push(vec![field.name().to_string(), pct(shares[0][idx]), pct(latest[idx])]);
    }
    Ok(Panel {
        id: "missing",
        heading: title.into(),
        svg: Some(chart::render(&frame, &layers)?),
        summary: format!(
            "Share of the records valid in each snapshot that have no value in each field, over the last {} snapshots (white: none missing; dark purple: all missing). A field that turns dark from one snapshot on points to a change in the feed.",
            rows.len()
        ),
        table,
    })
}

fn bar_marks(first: NaiveDate, days: &[(NaiveDate, i64)]) -> Vec<Mark> {
    days.iter()
        .filter(|(_, c)| *c > 0)
        .map(|(d, c)| {
            let x = offset(first, *d);
            Mark::Bar { x0: x - 0.4, x1: x + 0.4, y0: 0.0, y1: *c as f64 }
        })
        .collect()
}

/// The text with its first letter upper-cased.
fn capitalised(text: &str) -> String {
    let mut chars = text.chars();
    chars.next().map(|c| c.to_uppercase().chain(chars).collect()).unwrap_or_default()
}

fn empty(id: &'static str, heading: &str, summary: &str) -> Panel {
    Panel { id, heading: heading.into(), svg: None, summary: summary.into(), table: NumbersTable::default() }
}
