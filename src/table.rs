//! Listings as plain data and their three renderings: an aligned text table for people, CSV
//! for spreadsheets, and JSON (an array of objects with snake_case keys) for scripts. Pure:
//! rendering returns a `String`; the caller prints it.
//!
//! CSV goes to spreadsheets, which run a cell that starts with `=`, `+`, `-` or `@` as a
//! formula: text cells that could be read so get a leading apostrophe (`spreadsheet_safe`);
//! numbers are typed cells and are never touched. `OutputFormat::CsvRaw` (`--raw`) writes
//! every cell exactly as stored, for pipelines that need the bytes.

use std::borrow::Cow;
use std::fmt::Write as _;

use serde_json::{Map, Value};

/// One cell of a listing.
#[derive(Debug, Clone, PartialEq)]
pub enum Cell {
    Null,
    Int(i64),
    Real(f64),
    Text(String),
}

impl Cell {
    fn display(&self) -> String {
        match self {
            Cell::Null => String::new(),
            Cell::Int(n) => n.to_string(),
            Cell::Real(x) => format_real(*x),
            Cell::Text(t) => t.clone(),
        }
    }

    fn json(&self) -> Value {
        match self {
            Cell::Null => Value::Null,
            Cell::Int(n) => Value::from(*n),
            Cell::Real(x) => serde_json::Number::from_f64(*x).map(Value::Number).unwrap_or(Value::Null),
            Cell::Text(t) => Value::String(t.clone()),
        }
    }
}

impl From<i64> for Cell {
    fn from(n: i64) -> Cell {
        Cell::Int(n)
    }
}

impl From<u64> for Cell {
    fn from(n: u64) -> Cell {
        Cell::Int(n as i64)
    }
}

impl From<f64> for Cell {
    fn from(x: f64) -> Cell {
        Cell::Real(x)
    }
}

impl From<&str> for Cell {
    fn from(t: &str) -> Cell {
        Cell::Text(t.to_string())
    }
}

impl From<String> for Cell {
    fn from(t: String) -> Cell {
        Cell::Text(t)
    }
}

impl<T: Into<Cell>> From<Option<T>> for Cell {
    fn from(value: Option<T>) -> Cell {
        value.map(Into::into).unwrap_or(Cell::Null)
    }
}

/// A listing: named columns and rows of cells.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Table {
    pub columns: Vec<String>,
    pub rows: Vec<Vec<Cell>>,
}

/// How to render a listing (`--format`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum OutputFormat {
    Table,
    /// CSV with text cells made safe for spreadsheets.
    Csv,
    Json,
    /// CSV with every cell exactly as stored: `--format csv --raw`, not a `--format` value.
    #[value(skip)]
    CsvRaw,
}

impl OutputFormat {
    /// The format `--raw` asks for: CSV becomes exact CSV; the others are exact already.
    pub fn with_raw(self, raw: bool) -> OutputFormat {
        match self {
            OutputFormat::Csv if raw => OutputFormat::CsvRaw,
            other => other,
        }
    }
}

/// First characters that make a spreadsheet read a cell as a formula (or, for tab and
/// carriage return, hide one after them). Common practice (the OWASP "CSV injection"
/// advice, followed by most exporters) is to prefix such cells with an apostrophe, which
/// spreadsheets show as text and do not display.
const FORMULA_STARTS: &[char] = &['=', '+', '-', '@', '\t', '\r'];

/// A text cell as written to CSV for spreadsheets: with a leading apostrophe when it starts
/// like a formula, unchanged otherwise. Text that is a plain number (`-3`, `-0.5`, `+1e3`)
/// is left alone: a spreadsheet reads it as that number, never as a formula.
pub fn spreadsheet_safe(text: &str) -> Cow<'_, str> {
    if text.starts_with(FORMULA_STARTS) && !is_plain_number(text) {
        Cow::Owned(format!("'{text}"))
    } else {
        Cow::Borrowed(text)
    }
}

/// A decimal number and nothing else: sign, digits, point, exponent.
fn is_plain_number(text: &str) -> bool {
    let body = text.strip_prefix(['+', '-']).unwrap_or(text);
    let (mantissa, exponent) = match body.split_once(['e', 'E']) {
        Some((m, e)) => (m, Some(e.strip_prefix(['+', '-']).unwrap_or(e))),
        None => (body, None),
    };
    let digits = |t: &str| t.bytes().all(|b| b.is_ascii_digit());
    let (whole, fraction) = mantissa.split_once('.').unwrap_or((mantissa, ""));
    let mantissa_ok = !(whole.is_empty() && fraction.is_empty()) && digits(whole) && digits(fraction);
    mantissa_ok && exponent.is_none_or(|e| !e.is_empty() && digits(e))
}

impl Table {
    pub fn new(columns: &[&str]) -> Table {
        Table { columns: columns.iter().map(|c| c.to_string()).collect(), rows: Vec::new() }
    }

    pub fn push(&mut self, row: Vec<Cell>) {
        debug_assert_eq!(row.len(), self.columns.len());
        self.rows.push(row);
    }

    pub fn render(&self, format: OutputFormat) -> String {
        match format {
            OutputFormat::Table => self.to_text(),
            OutputFormat::Csv => self.to_csv(),
            OutputFormat::CsvRaw => self.to_csv_raw(),
            OutputFormat::Json => self.to_json(),
        }
    }

    /// Columns padded to their widest cell; numbers right-aligned.
    pub fn to_text(&self) -> String {
        let cells: Vec<Vec<String>> =
            self.rows.iter().map(|r| r.iter().map(Cell::display).collect()).collect();
        let widths: Vec<usize> = (0..self.columns.len())
            .map(|idx| {
                cells
                    .iter()
                    .map(|r| r[idx].chars().count())
                    .chain([self.columns[idx].len()])
                    .max()
                    .unwrap_or(0)
            })
            .collect();
        let numeric: Vec<bool> = (0..self.columns.len())
            .map(|idx| {
                self.rows.iter().any(|r| matches!(r[idx], Cell::Int(_) | Cell::Real(_)))
                    && self.rows.iter().all(|r| !matches!(r[idx], Cell::Text(_)))
            })
            .collect();
        let mut out = String::new();
        let line = |out: &mut String, values: &[String]| {
            let parts: Vec<String> = values
                .iter()
                .enumerate()
                .map(|(idx, v)| {
                    if numeric[idx] {
                        format!("{v:>width$}", width = widths[idx])
                    } else {
                        format!("{v:<width$}", width = widths[idx])
                    }
                })
                .collect();
            let _ = writeln!(out, "{}", parts.join("  ").trim_end());
        };
        line(&mut out, &self.columns);
        let rule: Vec<String> = widths.iter().map(|w| "-".repeat(*w)).collect();
        let _ = writeln!(out, "{}", rule.join("  "));
        for row in &cells {
            line(&mut out, row);
        }
        out
    }

    /// CSV for spreadsheets: text cells that start like a formula get an apostrophe.
    pub fn to_csv(&self) -> String {
        self.csv_with(|cell| match cell {
            Cell::Text(t) => spreadsheet_safe(t).into_owned(),
            other => other.display(),
        })
    }

    /// CSV with every cell exactly as stored (`--raw`, `raw=true`).
    pub fn to_csv_raw(&self) -> String {
        self.csv_with(Cell::display)
    }

    fn csv_with(&self, text: impl Fn(&Cell) -> String) -> String {
        let mut writer = csv::Writer::from_writer(Vec::new());
        let _ = writer.write_record(&self.columns);
        for row in &self.rows {
            let _ = writer.write_record(row.iter().map(&text));
        }
        String::from_utf8(writer.into_inner().unwrap_or_default()).unwrap_or_default()
    }

    pub fn to_json(&self) -> String {
        let objects: Vec<Value> = self
            .rows
            .iter()
            .map(|row| {
                let object: Map<String, Value> =
                    self.columns.iter().zip(row).map(|(c, v)| (c.clone(), v.json())).collect();
                Value::Object(object)
            })
            .collect();
        let mut text = serde_json::to_string_pretty(&objects).unwrap_or_default();
        text.push('\n');
        text
    }
}

fn format_real(x: f64) -> String {
    if x.fract() == 0.0 && x.abs() < 1e15 {
        format!("{x:.0}")
    } else {
        let text = format!("{x:.4}");
        text.trim_end_matches('0').trim_end_matches('.').to_string()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample() -> Table {
        let mut t = Table::new(&["date", "count", "share"]);
        t.push(vec!["2026-03-01".into(), 12i64.into(), 0.25.into()]);
        t.push(vec![Cell::Null, 3i64.into(), Cell::Null]);
        t
    }

    #[test]
    fn renders_three_ways() {
        let t = sample();
        assert_eq!(
            t.to_text(),
            "date        count  share\n----------  -----  -----\n2026-03-01     12   0.25\n                3\n"
        );
        assert_eq!(t.to_csv(), "date,count,share\n2026-03-01,12,0.25\n,3,\n");
        let json: Value = serde_json::from_str(&t.to_json()).unwrap();
        assert_eq!(json[0]["count"], 12);
        assert_eq!(json[1]["date"], Value::Null);
        assert_eq!(json[0]["share"], 0.25);
    }

    fn check_safe(text: &str, expected: &str) {
        assert_eq!(spreadsheet_safe(text), expected, "{text:?}");
    }

    #[test]
    fn text_that_starts_like_a_formula_gets_an_apostrophe() {
        check_safe("=1+1", "'=1+1");
        check_safe("=cmd|' /C calc'!A0", "'=cmd|' /C calc'!A0");
        check_safe("+41 22 555", "'+41 22 555");
        check_safe("-2+3", "'-2+3");
        check_safe("@SUM(A1:A2)", "'@SUM(A1:A2)");
        check_safe("\t=1", "'\t=1");
        check_safe("\r=1", "'\r=1");
        check_safe("-", "'-");
        check_safe("-e5", "'-e5");
        check_safe("+.", "'+.");
        check_safe("-1e", "'-1e");
        check_safe("Amberlee", "Amberlee");
        check_safe("a=b", "a=b");
        check_safe("", "");
        check_safe("'=already", "'=already");
        // Plain numbers in text cells are read as numbers, never as formulas.
        check_safe("-3", "-3");
        check_safe("-0.5", "-0.5");
        check_safe("+12", "+12");
        check_safe("-.5", "-.5");
        check_safe("-1.5e-3", "-1.5e-3");
    }

    #[test]
    fn csv_neutralises_text_cells_only_and_raw_keeps_the_bytes() {
        let mut t = Table::new(&["text", "int", "real"]);
        t.push(vec!["=1+1".into(), (-3i64).into(), (-0.5).into()]);
        t.push(vec!["@x".into(), Cell::Null, Cell::Null]);
        assert_eq!(t.to_csv(), "text,int,real\n'=1+1,-3,-0.5\n'@x,,\n");
        assert_eq!(t.render(OutputFormat::Csv), t.to_csv());
        assert_eq!(t.to_csv_raw(), "text,int,real\n=1+1,-3,-0.5\n@x,,\n");
        assert_eq!(t.render(OutputFormat::Csv.with_raw(true)), t.to_csv_raw());
        assert_eq!(OutputFormat::Json.with_raw(true), OutputFormat::Json);
        let json: Value = serde_json::from_str(&t.to_json()).unwrap();
        assert_eq!(json[0]["text"], "=1+1");
        assert!(t.to_text().contains("=1+1") && !t.to_text().contains("'="));
    }
}
