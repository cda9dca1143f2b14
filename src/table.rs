//! Listings as plain data and their three renderings: an aligned text table for people, CSV
//! for spreadsheets, and JSON (an array of objects with snake_case keys) for scripts. Pure:
//! rendering returns a `String`; the caller prints it.

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
    Csv,
    Json,
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

    pub fn to_csv(&self) -> String {
        let mut writer = csv::Writer::from_writer(Vec::new());
        let _ = writer.write_record(&self.columns);
        for row in &self.rows {
            let _ = writer.write_record(row.iter().map(Cell::display));
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
}
