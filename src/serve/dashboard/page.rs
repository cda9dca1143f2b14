//! The dashboard's HTML: the list of sources and one page per source, server-rendered, with
//! an inline style sheet and inline SVG (nothing loaded from elsewhere, no JavaScript). All
//! text from the store or the request is escaped here. Pages show aggregates only: counts,
//! shares and percentiles, never a record.

use std::fmt::Write as _;

use super::panels::{NumbersTable, Panel};
use crate::model::SnapshotId;
use crate::store::{SnapshotRow, SourceOverview};
use crate::table::{Cell, Table};

/// Shown on every page.
pub const CAUTION: &str = "Alerts are statistical signals for investigation, not confirmed outbreaks. \
Nowcasts are estimates with uncertainty: read the intervals, not only the line. \
The store behind these pages holds patient-level data; these pages show aggregates only, so keep them on the \
department's network. Follow your jurisdiction's own protocols, case definitions and data-protection law.";

/// Everything one source page shows.
#[derive(Debug, Clone, PartialEq)]
pub struct SourcePage {
    pub name: String,
    /// Applied snapshots for the as-of selector: (id, as-of time), oldest first.
    pub snapshots: Vec<(SnapshotId, String)>,
    /// The snapshot drawn: (id, as-of time).
    pub selected: Option<(SnapshotId, String)>,
    pub panels: Vec<Panel>,
    /// Open alerts; `None` when the store has no alert tables.
    pub alerts: Option<Table>,
    pub snapshot_rows: Vec<SnapshotRow>,
}

/// Escapes text for HTML and SVG element content and attribute values.
pub fn escape(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            other => out.push(other),
        }
    }
    out
}

/// Percent-encodes a path segment (everything but unreserved characters).
pub fn encode_segment(text: &str) -> String {
    let mut out = String::new();
    for byte in text.bytes() {
        if byte.is_ascii_alphanumeric() || b"-._~".contains(&byte) {
            out.push(byte as char);
        } else {
            let _ = write!(out, "%{byte:02X}");
        }
    }
    out
}

const STYLE: &str = "body{font-family:sans-serif;margin:0 auto;max-width:980px;padding:0 16px;color:#1d1d1d}\
header{display:flex;gap:16px;align-items:baseline}\
.caution{background:#fff6e0;border-left:4px solid #c88a00;padding:8px 12px;margin:12px 0}\
svg.chart{max-width:100%;height:auto;border:1px solid #ddd;background:#fff}\
table{border-collapse:collapse;font-size:13px}td,th{border:1px solid #ccc;padding:2px 6px;text-align:right}\
th{background:#f2f2f2}td:first-child,th:first-child{text-align:left}\
section{margin:24px 0}form{margin:12px 0}.selected{font-weight:bold}";

fn document(title: &str, body: &str) -> String {
    format!(
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\
         <title>{}</title><style>{STYLE}</style></head>\n<body>\n{body}\n</body></html>\n",
        escape(title)
    )
}

/// The list of sources.
pub fn index(sources: &[SourceOverview]) -> String {
    let mut body = String::from("<header><h1>tidemark: sources</h1></header>\n");
    let _ =
        writeln!(body, "<aside class=\"caution\" role=\"note\"><strong>Caution.</strong> {CAUTION}</aside>");
    if sources.is_empty() {
        body.push_str("<p>No source has sent an extract yet.</p>");
    } else {
        body.push_str(
            "<table><thead><tr><th>source</th><th>applied snapshots</th><th>latest as of</th>\
             <th>current records</th></tr></thead><tbody>\n",
        );
        for s in sources {
            let _ = writeln!(
                body,
                "<tr><td><a href=\"/sources/{}\">{}</a></td><td>{}</td><td>{}</td><td>{}</td></tr>",
                encode_segment(&s.name),
                escape(&s.name),
                s.applied_snapshots,
                escape(s.latest_as_of.as_deref().unwrap_or("-")),
                s.current_records
            );
        }
        body.push_str("</tbody></table>");
    }
    document("tidemark: sources", &body)
}

/// One source's page.
pub fn source(page: &SourcePage) -> String {
    let name = escape(&page.name);
    let mut body = format!("<header><a href=\"/\">All sources</a><h1>{name}</h1></header>\n");
    let _ =
        writeln!(body, "<aside class=\"caution\" role=\"note\"><strong>Caution.</strong> {CAUTION}</aside>");
    body.push_str(&selector(page));
    match &page.selected {
        None => body.push_str("<p>This source has no applied snapshot yet.</p>"),
        Some((id, as_of)) => {
            let _ = writeln!(
                body,
                "<p id=\"shown\">Every chart below is drawn as of snapshot {id} (as of {}).</p>",
                escape(as_of)
            );
            for panel in &page.panels {
                body.push_str(&panel_html(panel));
            }
            body.push_str(&alerts_html(page.alerts.as_ref()));
        }
    }
    body.push_str(&snapshots_html(&page.snapshot_rows, page.selected.as_ref().map(|s| s.0)));
    document(&format!("tidemark: {}", page.name), &body)
}

fn selector(page: &SourcePage) -> String {
    if page.snapshots.is_empty() {
        return String::new();
    }
    let mut out = format!(
        "<form method=\"get\" action=\"/sources/{}\" id=\"as-of-form\"><label for=\"as_of\">As of snapshot </label>\
         <select id=\"as_of\" name=\"as_of\">",
        encode_segment(&page.name)
    );
    let selected = page.selected.as_ref().map(|s| s.0);
    for (id, as_of) in page.snapshots.iter().rev() {
        let mark = if Some(*id) == selected { " selected" } else { "" };
        let _ = write!(out, "<option value=\"{0}\"{mark}>{0} (snapshot {id})</option>", escape(as_of));
    }
    out.push_str("</select> <button type=\"submit\" id=\"redraw\">Redraw</button></form>\n");
    out
}

fn panel_html(panel: &Panel) -> String {
    let mut out = format!("<section id=\"panel-{}\"><h2>{}</h2>\n", panel.id, escape(&panel.heading));
    match &panel.svg {
        Some(svg) => out.push_str(svg),
        None => out.push_str("<p class=\"empty\">Nothing to draw.</p>"),
    }
    let _ = write!(out, "\n<p>{}</p>\n", escape(&panel.summary));
    if !panel.table.rows.is_empty() {
        let _ = writeln!(
            out,
            "<details><summary>The numbers behind this chart</summary>{}</details>",
            numbers_table(&panel.table)
        );
    }
    out.push_str("</section>\n");
    out
}

fn numbers_table(table: &NumbersTable) -> String {
    let mut out = String::from("<table><thead><tr>");
    for h in &table.headers {
        let _ = write!(out, "<th scope=\"col\">{}</th>", escape(h));
    }
    out.push_str("</tr></thead><tbody>");
    for row in &table.rows {
        out.push_str("<tr>");
        for cell in row {
            let _ = write!(out, "<td>{}</td>", escape(cell));
        }
        out.push_str("</tr>");
    }
    out.push_str("</tbody></table>");
    out
}

fn alerts_html(alerts: Option<&Table>) -> String {
    let mut out = String::from("<section id=\"panel-alerts\"><h2>Open alerts</h2>\n");
    match alerts {
        None => out.push_str("<p>This store has no alert tables, so there are no alerts to show.</p>"),
        Some(table) if table.rows.is_empty() => out.push_str("<p>No open alerts for this source now.</p>"),
        Some(table) => {
            let text = NumbersTable {
                headers: table.columns.clone(),
                rows: table.rows.iter().map(|r| r.iter().map(cell_text).collect()).collect(),
            };
            out.push_str(&numbers_table(&text));
            out.push_str(
                "<p>Alerts open now (this list is not redrawn as of a past snapshot). An alert is a signal to \
                 investigate, not a confirmed outbreak.</p>",
            );
        }
    }
    out.push_str("</section>\n");
    out
}

fn cell_text(cell: &Cell) -> String {
    match cell {
        Cell::Null => String::new(),
        Cell::Int(n) => n.to_string(),
        Cell::Real(x) => format!("{x:.3}"),
        Cell::Text(t) => t.clone(),
    }
}

fn snapshots_html(rows: &[SnapshotRow], selected: Option<SnapshotId>) -> String {
    let mut out = String::from(
        "<section id=\"panel-snapshots\"><h2>Snapshots</h2>\n<p>Every extract received, newest first, with row counts.</p>\
         <table><thead><tr><th>snapshot</th><th>seq</th><th>as of</th><th>status</th><th>rows</th>\
         <th>accepted</th><th>rejected</th><th>new</th><th>changed</th><th>removed</th></tr></thead><tbody>\n",
    );
    for r in rows.iter().rev() {
        let class = if Some(r.snapshot_id) == selected { " class=\"selected\"" } else { "" };
        let _ = writeln!(
            out,
            "<tr{class}><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            r.snapshot_id,
            r.seq,
            escape(&r.as_of),
            escape(r.status.name()),
            r.rows_total,
            r.rows_accepted,
            r.rows_rejected,
            r.rows_new,
            r.rows_changed,
            r.rows_removed
        );
    }
    out.push_str("</tbody></table></section>\n");
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn escape_covers_markup_and_quotes() {
        assert_eq!(
            escape("<a href=\"x\">O'Neil & co</a>"),
            "&lt;a href=&quot;x&quot;&gt;O&#39;Neil &amp; co&lt;/a&gt;"
        );
    }

    #[test]
    fn path_segments_are_percent_encoded() {
        assert_eq!(encode_segment("county-reports"), "county-reports");
        assert_eq!(encode_segment("a b/<c>"), "a%20b%2F%3Cc%3E");
    }

    #[test]
    fn a_source_page_escapes_names_and_carries_the_caution_and_selector() {
        let page = SourcePage {
            name: "<script>x</script>".into(),
            snapshots: vec![
                (SnapshotId(1), "2026-03-01T23:59:59Z".into()),
                (SnapshotId(2), "2026-03-02T23:59:59Z".into()),
            ],
            selected: Some((SnapshotId(1), "2026-03-01T23:59:59Z".into())),
            panels: Vec::new(),
            alerts: None,
            snapshot_rows: Vec::new(),
        };
        let html = source(&page);
        assert!(!html.contains("<script>"), "{html}");
        assert!(html.contains("&lt;script&gt;x&lt;/script&gt;"));
        assert!(html.matches(CAUTION).count() >= 1);
        assert!(html.contains("<select id=\"as_of\" name=\"as_of\">"));
        assert!(html.contains("<option value=\"2026-03-01T23:59:59Z\" selected>"));
        assert!(html.contains("action=\"/sources/%3Cscript%3Ex%3C%2Fscript%3E\""));
        assert!(html.contains("no alert tables"));
        assert!(index(&[]).contains(CAUTION));
    }
}
