//! The dashboard: server-rendered HTML pages with inline SVG charts, read-only. `/` lists the
//! sources; `/sources/{name}` shows one source as of a snapshot (`?as_of=TIME`, chosen with
//! a plain HTML form, so no JavaScript is needed): the epidemic curve by onset with the
//! stored nowcast, the curve by report date, the onset-to-report delay histogram with the
//! stored fit, the reporting-lag trend, the missingness map, open alerts and the snapshot
//! list. `shape` shapes data (pure), `chart` draws SVG, `panels` pairs charts with their
//! words, `page` writes HTML; this file reads the store and answers HTTP.
//!
//! Access: the router takes its state so the caller can add an auth layer; it is served on
//! the API's bind (127.0.0.1 by default).

mod chart;
mod page;
mod panels;
mod shape;

use std::path::{Path, PathBuf};

use axum::Router;
use axum::extract::{Path as UrlPath, Query, State};
use axum::http::StatusCode;
use axum::response::{Html, IntoResponse, Response};
use axum::routing::get;
use chrono::{DateTime, NaiveDate, Utc};

pub use self::page::CAUTION;
use self::page::SourcePage;
use self::panels::Panel;
use crate::config::AnalysisConfig;
use crate::model::{Field, NowcastMethod, SnapshotId, SourceId};
use crate::store::{Reader, StoreError, time_text};

/// Most open alerts listed on a page.
const MAX_ALERTS: usize = 50;

/// What the dashboard reads: the store file (opened read-only per request).
#[derive(Debug, Clone)]
pub struct DashboardState {
    pub store: PathBuf,
    /// How `auto` chooses the nowcast drawn: as `tidemark nowcast --method auto` does.
    pub auto: AutoSettings,
}

/// The configuration `auto` reads (`analysis.score_window`, `analysis.nowcast_methods`).
#[derive(Debug, Clone, PartialEq)]
pub struct AutoSettings {
    pub score_window: usize,
    pub methods: Vec<NowcastMethod>,
}

impl AutoSettings {
    pub fn of(analysis: &AnalysisConfig) -> AutoSettings {
        AutoSettings { score_window: analysis.score_window, methods: analysis.nowcast_methods.clone() }
    }
}

impl DashboardState {
    pub fn new(store: PathBuf, analysis: &AnalysisConfig) -> DashboardState {
        DashboardState { store, auto: AutoSettings::of(analysis) }
    }
}

/// `/` and `/sources/{name}`.
pub fn router(state: DashboardState) -> Router {
    Router::new().route("/", get(index)).route("/sources/{name}", get(source_page)).with_state(state)
}

/// Why a page could not be drawn; the client sees a short message, the cause is logged.
#[derive(Debug, thiserror::Error)]
pub enum DashboardError {
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error(transparent)]
    Chart(#[from] chart::ChartError),
}

#[derive(Debug, serde::Deserialize)]
struct AsOfQuery {
    as_of: Option<String>,
}

async fn index(State(state): State<DashboardState>) -> Response {
    let store = state.store.clone();
    let result = tokio::task::spawn_blocking(move || Reader::open(&store)?.source_overview()).await;
    match result {
        Ok(Ok(sources)) => Html(page::index(&sources)).into_response(),
        Ok(Err(err)) => server_error(&DashboardError::Store(err)),
        Err(_) => server_error_text(),
    }
}

async fn source_page(
    State(state): State<DashboardState>,
    UrlPath(name): UrlPath<String>,
    Query(query): Query<AsOfQuery>,
) -> Response {
    let as_of = match query.as_of.as_deref().map(str::trim).filter(|t| !t.is_empty()).map(parse_as_of) {
        None => None,
        Some(Some(time)) => Some(time),
        Some(None) => {
            return message(
                StatusCode::BAD_REQUEST,
                "as_of must be an RFC 3339 time or a date (YYYY-MM-DD).",
            );
        }
    };
    let (store, auto) = (state.store.clone(), state.auto.clone());
    let result = tokio::task::spawn_blocking(move || load_source_page(&store, &auto, &name, as_of)).await;
    match result {
        Ok(Ok(Some(page))) => Html(page::source(&page)).into_response(),
        Ok(Ok(None)) => message(StatusCode::NOT_FOUND, "No source of that name in this store."),
        Ok(Err(err)) => server_error(&err),
        Err(_) => server_error_text(),
    }
}

/// An RFC 3339 time, or a date meaning the end of that day (UTC).
fn parse_as_of(text: &str) -> Option<DateTime<Utc>> {
    if let Ok(time) = DateTime::parse_from_rfc3339(text) {
        return Some(time.with_timezone(&Utc));
    }
    let date = NaiveDate::parse_from_str(text, "%Y-%m-%d").ok()?;
    Some(date.and_hms_opt(23, 59, 59)?.and_utc())
}

fn message(status: StatusCode, text: &str) -> Response {
    let body = format!(
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><title>tidemark</title></head><body>\
         <p>{}</p><p><a href=\"/\">All sources</a></p></body></html>\n",
        page::escape(text)
    );
    (status, Html(body)).into_response()
}

fn server_error(err: &DashboardError) -> Response {
    tracing::warn!(error = %err, "dashboard: page failed");
    server_error_text()
}

fn server_error_text() -> Response {
    message(StatusCode::INTERNAL_SERVER_ERROR, "The page could not be drawn; the server log says why.")
}

/// Reads everything one source page shows as of the snapshot current at `as_of` (the
/// latest when `None`); `None` when there is no such source.
pub fn load_source_page(
    store: &Path,
    auto: &AutoSettings,
    name: &str,
    as_of: Option<DateTime<Utc>>,
) -> Result<Option<SourcePage>, DashboardError> {
    let reader = Reader::open(store)?;
    let Some(source_id) = reader.source_id(name)? else { return Ok(None) };
    let applied = reader.applied_snapshots(source_id)?;
    let snapshots: Vec<(SnapshotId, String)> = applied.iter().map(|(id, t)| (*id, time_text(*t))).collect();
    let selected = reader.snapshot_as_of(source_id, as_of)?;
    let selected = selected.and_then(|id| snapshots.iter().find(|(s, _)| *s == id).cloned());
    let (panels, alerts) = match &selected {
        Some((id, _)) => {
            let ids: Vec<SnapshotId> = snapshots.iter().map(|(id, _)| *id).collect();
            (build_panels(&reader, auto, source_id, *id, &ids)?, reader.open_alerts(name, MAX_ALERTS)?)
        }
        None => (Vec::new(), None),
    };
    Ok(Some(SourcePage {
        name: name.to_string(),
        snapshots,
        selected,
        panels,
        alerts,
        snapshot_rows: reader.snapshots(Some(name))?,
    }))
}

fn build_panels(
    reader: &Reader,
    auto: &AutoSettings,
    source_id: SourceId,
    snapshot_id: SnapshotId,
    applied: &[SnapshotId],
) -> Result<Vec<Panel>, DashboardError> {
    let onset =
        shape::day_counts(&reader.curve(source_id, snapshot_id, Field::OnsetDate, None)?, shape::CURVE_DAYS);
    let series = (Field::OnsetDate.name(), "all", "");
    let choice = reader.auto_method(source_id, snapshot_id, series, auto.score_window, &auto.methods)?;
    let rows = reader.nowcast(snapshot_id, (series.0, series.1, series.2, choice.method.name()))?;
    let from = onset.days.first().map(|d| d.0).unwrap_or(NaiveDate::MIN);
    let nowcast = shape::nowcast_points(&rows, from);
    let report =
        shape::day_counts(&reader.curve(source_id, snapshot_id, Field::ReportDate, None)?, shape::CURVE_DAYS);
    let delays: Vec<i64> = reader
        .delay_rows(source_id, snapshot_id, Field::OnsetDate, Some(Field::ReportDate), None, &[])?
        .iter()
        .flat_map(|r| std::iter::repeat_n((r.to - r.from).num_days(), r.count as usize))
        .collect();
    let fit = reader.best_delay_fit(snapshot_id, Field::OnsetDate.name(), Field::ReportDate.name())?;
    let lags = shape::lag_trend(&reader.first_seen_lags(source_id, snapshot_id)?, shape::SNAPSHOT_COLUMNS);
    let window = shape::snapshot_window(applied, snapshot_id, shape::SNAPSHOT_COLUMNS);
    let missing = reader.missingness(source_id, &window)?;
    Ok(vec![
        panels::onset_curve(&onset, &nowcast, &choice)?,
        panels::report_curve(&report)?,
        panels::delay_histogram(&delays, fit.as_ref())?,
        panels::lag_trend(&lags)?,
        panels::missingness(&missing)?,
    ])
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn as_of_accepts_rfc3339_and_plain_dates() {
        assert_eq!(
            parse_as_of("2026-03-02T10:00:00Z").map(time_text).as_deref(),
            Some("2026-03-02T10:00:00Z")
        );
        assert_eq!(parse_as_of("2026-03-02").map(time_text).as_deref(), Some("2026-03-02T23:59:59Z"));
        assert_eq!(parse_as_of("yesterday"), None);
    }
}
