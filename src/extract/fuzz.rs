//! A mutation fuzzer for the parsers and the mapping, on the stable toolchain: valid CSV,
//! NDJSON and JSON extracts whose every cell carries a marker value are cut, flipped, spliced,
//! padded with the bytes parsers care about (quotes, newlines, delimiters, brackets, escapes,
//! NUL, invalid UTF-8) and sometimes gzip-wrapped or gzip-cut, then parsed. A case fails if
//! the parse panics, if its counts do not add up, or if any message (the whole-file error or
//! a row's problem) carries a marker: messages may name lines, fields and columns, never a
//! cell's value. `cargo test` runs a few thousand fixed seeds; `cargo bench --bench fuzz`
//! runs random seeds for a stated time.

use std::convert::Infallible;
use std::io::Write;
use std::panic::{AssertUnwindSafe, catch_unwind};

use chrono::NaiveDate;
use rand::rngs::StdRng;
use rand::{Rng, RngExt, SeedableRng};

use super::{Mapping, ParseError, Row, parse};
use crate::model::{Field, Format};

/// Every cell value of the base extracts contains this; no message may.
pub const MARKER: &str = "QZXV";

/// Bytes that parsers treat specially.
const SPECIAL: &[u8] = b"\"\n\r,;\t{}[]:\\\0\xff\xc3 ";

/// The mapping the fuzzer parses with: every canonical field mapped.
pub fn mapping() -> Mapping {
    let mut mapping = Mapping::new("source[0]", "id");
    let columns = [
        (Field::Jurisdiction, "area"),
        (Field::OnsetDate, "onset"),
        (Field::ReportDate, "reported"),
        (Field::Age, "age"),
        (Field::Sex, "sex"),
        (Field::Symptoms, "symptoms"),
        (Field::Outcome, "outcome"),
    ];
    for (field, column) in columns {
        mapping.columns.insert(field, column.to_string());
    }
    mapping
}

/// A valid extract of `rows` records in `format`, every value carrying the marker.
pub fn base(format: Format, rows: usize) -> Vec<u8> {
    let m = MARKER;
    let record = |n: usize| {
        [
            ("id", format!("{m}-{n}")),
            ("area", format!("{m} area")),
            ("onset", format!("2026-02-0{} {m}", 1 + n % 9)),
            ("reported", "2026-03-01".to_string()),
            ("age", format!("{m}{n}")),
            ("sex", format!("{m}F")),
            ("symptoms", format!("cough; {m} ache; 3{n} C")),
            ("outcome", format!("{m}, \"quoted\"\nline")),
            ("note", format!("{m} note")),
        ]
    };
    let mut out = Vec::new();
    match format {
        Format::Csv => {
            let names: Vec<&str> = record(0).iter().map(|(k, _)| *k).collect();
            out.extend_from_slice(names.join(",").as_bytes());
            out.push(b'\n');
            for n in 0..rows {
                let cells: Vec<String> =
                    record(n).iter().map(|(_, v)| format!("\"{}\"", v.replace('"', "\"\""))).collect();
                out.extend_from_slice(cells.join(",").as_bytes());
                out.push(b'\n');
            }
        }
        Format::Ndjson | Format::Json => {
            let objects: Vec<String> = (0..rows)
                .map(|n| {
                    let map: serde_json::Map<String, serde_json::Value> =
                        record(n).into_iter().map(|(k, v)| (k.to_string(), v.into())).collect();
                    serde_json::Value::Object(map).to_string()
                })
                .collect();
            let text = if format == Format::Json {
                format!("[{}]", objects.join(",\n"))
            } else {
                objects.join("\n") + "\n"
            };
            out.extend_from_slice(text.as_bytes());
        }
    }
    out
}

/// One mutation of `bytes`, chosen by `rng`.
pub fn mutate(rng: &mut impl Rng, bytes: &[u8]) -> Vec<u8> {
    let mut out = bytes.to_vec();
    for _ in 0..rng.random_range(1..4) {
        let at = rng.random_range(0..=out.len());
        match rng.random_range(0..7) {
            0 => out.truncate(at),
            1 if !out.is_empty() => {
                let idx = at.min(out.len() - 1);
                out[idx] ^= 1 << rng.random_range(0..8);
            }
            2 => {
                let byte = SPECIAL[rng.random_range(0..SPECIAL.len())];
                out.insert(at, byte);
            }
            3 => {
                let end = rng.random_range(at..=out.len().min(at + 64));
                out.drain(at..end);
            }
            4 => {
                let end = rng.random_range(at..=out.len().min(at + 64));
                let piece = out[at..end].to_vec();
                out.splice(at..at, piece);
            }
            5 => {
                let byte = SPECIAL[rng.random_range(0..SPECIAL.len())];
                out.splice(at..at, std::iter::repeat_n(byte, rng.random_range(1..200)));
            }
            _ => {}
        }
    }
    if rng.random_bool(0.15) {
        let mut gz = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::fast());
        let _ = gz.write_all(&out);
        out = gz.finish().unwrap_or_default();
        if rng.random_bool(0.5) {
            let cut = rng.random_range(0..=out.len());
            out.truncate(cut);
        }
    }
    out
}

/// Parses one input and checks the invariants; `Err` says what broke.
pub fn check(format: Format, bytes: &[u8], mapping: &Mapping) -> Result<(), String> {
    let latest = NaiveDate::from_ymd_opt(2026, 3, 10).unwrap_or_default();
    let mut messages: Vec<String> = Vec::new();
    let (mut accepted, mut rejected) = (0u64, 0u64);
    let parsed = catch_unwind(AssertUnwindSafe(|| {
        parse(bytes, format, mapping, latest, |row| {
            match row {
                Row::Accepted { problems, .. } => {
                    accepted += 1;
                    messages.extend(problems.into_iter().map(|p| p.to_string()));
                }
                Row::Rejected(problem) => {
                    rejected += 1;
                    messages.push(problem.to_string());
                }
            }
            Ok::<(), Infallible>(())
        })
    }))
    .map_err(|_| "the parse panicked".to_string())?;
    match parsed {
        Ok(summary) => {
            if (summary.rows_accepted, summary.rows_rejected) != (accepted, rejected)
                || summary.rows_total != accepted + rejected
            {
                return Err(format!("counts do not add up: {summary:?}, {accepted} + {rejected} delivered"));
            }
        }
        Err(ParseError::Extract(err)) => messages.push(err.to_string()),
        Err(ParseError::Sink(never)) => match never {},
    }
    // JSON keys are structure, not cells, and name extra columns in problems; a mutation
    // can turn a value into a key, so only CSV messages are held to the marker rule in full.
    match messages.iter().find(|m| m.contains(MARKER)) {
        Some(message) if format == Format::Csv || !message.contains("(repeated_field)") => {
            Err(format!("a message carries a cell value: {message}"))
        }
        _ => Ok(()),
    }
}

/// What a fuzz run found.
#[derive(Debug, Default)]
pub struct Findings {
    pub cases: u64,
    /// (seed, format, input, what broke), for the bad corpus.
    pub failures: Vec<(u64, Format, Vec<u8>, String)>,
}

/// Runs `cases` mutated inputs for each format from `first_seed` on.
pub fn run(first_seed: u64, cases: u64) -> Findings {
    let mapping = mapping();
    let mut findings = Findings::default();
    let bases = [Format::Csv, Format::Ndjson, Format::Json].map(|f| (f, base(f, 6)));
    for seed in first_seed..first_seed + cases {
        let mut rng = StdRng::seed_from_u64(seed);
        for (format, base) in &bases {
            let input = mutate(&mut rng, base);
            findings.cases += 1;
            if let Err(why) = check(*format, &input, &mapping) {
                findings.failures.push((seed, *format, input, why));
            }
        }
    }
    findings
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn base_extracts_parse_cleanly() {
        let mapping = mapping();
        for format in [Format::Csv, Format::Ndjson, Format::Json] {
            check(format, &base(format, 6), &mapping).unwrap();
        }
    }

    /// A short fixed-seed run: nothing panics, counts add up, no message quotes a cell.
    #[test]
    fn mutated_extracts_never_panic_or_leak() {
        let findings = run(0, 1500);
        assert_eq!(findings.cases, 4500);
        let shown: Vec<String> = findings
            .failures
            .iter()
            .take(5)
            .map(|(seed, format, _, why)| format!("seed {seed} {format:?}: {why}"))
            .collect();
        assert!(findings.failures.is_empty(), "{} failures:\n{}", findings.failures.len(), shown.join("\n"));
    }
}
