//! Delimited text extracts: BOM, detected or configured delimiter, quoted fields, legacy
//! encodings per cell, ragged rows, unterminated quotes and quoted fields cut off at the end
//! of the file. Streams record by record, within the source's limits.

use std::collections::{BTreeMap, HashMap};
use std::io::{self, BufRead, Read};

use chrono::NaiveDate;

use super::encoding::decode_cell;
use super::limits::CsvGuard;
use super::mapping::{Mapped, Mapping, RawValue, map_row};
use super::pipeline;
use super::{ExtractError, MAX_FIELD_BYTES, MAX_RAW_BYTES, ParseError, Problem, ProblemKind, Row, raw_text};
use crate::model::Field;

const UTF8_BOM: [u8; 3] = [0xEF, 0xBB, 0xBF];
const DELIMITER_CANDIDATES: [u8; 4] = [b',', b';', b'\t', b'|'];

pub(super) fn parse<E>(
    mut input: Box<dyn BufRead + '_>,
    mapping: &Mapping,
    latest: NaiveDate,
    sink: &mut impl FnMut(Row) -> Result<(), E>,
) -> Result<(), ParseError<E>> {
    let head = input.fill_buf().map_err(ExtractError::from)?;
    if head.starts_with(&UTF8_BOM) {
        input.consume(UTF8_BOM.len());
    }
    let head = input.fill_buf().map_err(ExtractError::from)?;
    if head.iter().all(|b| b.is_ascii_whitespace()) {
        return Err(ExtractError::Empty.into());
    }
    let delimiter = mapping.delimiter.unwrap_or_else(|| detect_delimiter(head));
    // The CSV reader counts lines by '\n' only; a file ended by bare '\r' is numbered by
    // record instead (exact unless a quoted cell spans lines).
    let cr_only = cr_only_line_ends(head);
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(false)
        .flexible(true)
        .delimiter(delimiter)
        .from_reader(CsvGuard::new(input, delimiter, &mapping.limits));
    let mut record = csv::ByteRecord::new();
    if !read_record(&mut reader, &mut record)? {
        return Err(ExtractError::Empty.into());
    }
    let layout = Layout::from_header(&record, mapping)?;
    let mut last_line = 1;
    let mut last_spans_lines = false;
    // Records are read here and mapped on a second thread (see `pipeline`).
    let read = |(record, line): &mut (csv::ByteRecord, u64)| -> Result<bool, ExtractError> {
        if !read_record(&mut reader, record)? {
            return Ok(false);
        }
        last_line = match record.position() {
            Some(p) if !cr_only => p.line(),
            _ => last_line + 1,
        };
        last_spans_lines = record.iter().any(|cell| cell.contains(&b'\n'));
        *line = last_line;
        Ok(true)
    };
    let map = |batch: &[(csv::ByteRecord, u64)]| {
        let mut raw_writer = RawWriter::new(delimiter);
        batch
            .iter()
            .map(|(record, line)| layout.row(record, *line, mapping, latest, &mut raw_writer))
            .collect()
    };
    pipeline::run(read, || (csv::ByteRecord::new(), 0), map, sink)?;
    // A quoted field still open at the end: either it swallowed the rest of the file (its
    // cell runs over lines) or the file was cut inside it.
    let guard = reader.into_inner();
    if guard.quote_open() {
        if last_spans_lines {
            return Err(ExtractError::UnterminatedQuote { line: last_line }.into());
        }
        return Err(ExtractError::Truncated(format!(
            "a quoted field on line {} is still open at the end of the file",
            guard.line()
        ))
        .into());
    }
    Ok(())
}

/// Whether the first line ends with a bare '\r' (old Mac line ends).
fn cr_only_line_ends(head: &[u8]) -> bool {
    match head.iter().position(|&b| b == b'\r' || b == b'\n') {
        Some(idx) => head[idx] == b'\r' && head.get(idx + 1) != Some(&b'\n'),
        None => false,
    }
}

fn read_record<R: Read>(
    reader: &mut csv::Reader<R>,
    record: &mut csv::ByteRecord,
) -> Result<bool, ExtractError> {
    reader.read_byte_record(record).map_err(|err| match err.into_kind() {
        csv::ErrorKind::Io(io) => ExtractError::from(io),
        other => ExtractError::Read(io::Error::other(format!("{other:?}"))),
    })
}

/// Picks the candidate that occurs most often, outside quotes, in the first line.
fn detect_delimiter(head: &[u8]) -> u8 {
    let mut counts = [0usize; DELIMITER_CANDIDATES.len()];
    let mut in_quotes = false;
    for &byte in head {
        if !in_quotes && (byte == b'\n' || byte == b'\r') {
            break;
        }
        if byte == b'"' {
            in_quotes = !in_quotes;
        } else if !in_quotes && let Some(idx) = DELIMITER_CANDIDATES.iter().position(|&c| c == byte) {
            counts[idx] += 1;
        }
    }
    let best = (0..counts.len()).max_by_key(|&idx| (counts[idx], usize::MAX - idx)).unwrap_or(0);
    if counts[best] == 0 { b',' } else { DELIMITER_CANDIDATES[best] }
}

/// Where each mapped field and each extra column sits in the header.
struct Layout {
    width: usize,
    fields: Vec<(Field, usize)>,
    extras: Vec<(String, usize)>,
}

impl Layout {
    fn from_header(header: &csv::ByteRecord, mapping: &Mapping) -> Result<Layout, ExtractError> {
        let mut names = Vec::with_capacity(header.len());
        let mut seen: HashMap<String, usize> = HashMap::new();
        for (idx, cell) in header.iter().enumerate() {
            let name = decode_cell(cell, mapping.fallback_encoding)
                .ok_or(ExtractError::BadHeader("not valid UTF-8"))?
                .trim()
                .to_string();
            // Positions, not names: in a file sent without its header the "names" are the
            // first record's values.
            if name.is_empty() {
                return Err(ExtractError::UnnamedColumn { position: idx + 1 });
            }
            if let Some(first) = seen.insert(name.clone(), idx + 1) {
                return Err(ExtractError::DuplicateColumn { first, second: idx + 1 });
            }
            names.push(name);
        }
        let find = |field: Field| -> Result<(Field, usize), ExtractError> {
            let column = mapping.column(field).unwrap_or_default();
            names.iter().position(|name| name == column).map(|idx| (field, idx)).ok_or_else(|| {
                ExtractError::MissingColumn { path: mapping.config_path(field), column: column.to_string() }
            })
        };
        let mut fields = vec![find(Field::CaseKey)?];
        for &field in mapping.columns.keys() {
            fields.push(find(field)?);
        }
        let extras = names
            .iter()
            .enumerate()
            .filter(|(_, name)| !name.is_empty() && mapping.is_extra(name))
            .map(|(idx, name)| (name.clone(), idx))
            .collect();
        Ok(Layout { width: names.len(), fields, extras })
    }

    fn row(
        &self,
        record: &csv::ByteRecord,
        line: u64,
        mapping: &Mapping,
        latest: NaiveDate,
        raw_writer: &mut RawWriter,
    ) -> Row {
        let raw = raw_writer.render(record);
        if record.len() != self.width {
            return Row::Rejected(Problem {
                line,
                field: None,
                kind: ProblemKind::RaggedRow,
                message: format!("expected {} fields, found {}", self.width, record.len()),
                raw: Some(raw),
            });
        }
        let mut extra_problems = Vec::new();
        let mut extra = BTreeMap::new();
        for (name, idx) in &self.extras {
            match read_cell(&record[*idx], mapping) {
                RawValue::Text(text) if !text.trim().is_empty() => {
                    extra.insert(name.clone(), text.into_owned());
                }
                RawValue::Unreadable(kind, why) => extra_problems.push(Problem {
                    line,
                    field: Some(name.clone()),
                    kind,
                    // The position, not the header name: in a file sent without its
                    // header the "names" are a record's values.
                    message: format!("column {} (unmapped): {why}; the cell was dropped", idx + 1),
                    raw: None,
                }),
                _ => {}
            }
        }
        let get = |field: Field| {
            let idx = self.fields.iter().find(|(f, _)| *f == field)?.1;
            Some(read_cell(&record[idx], mapping))
        };
        match map_row(mapping, line, latest, get, extra) {
            Mapped::Accepted { record, mut problems } => {
                problems.extend(extra_problems);
                Row::Accepted { line, record, raw, problems }
            }
            Mapped::Rejected(problem) => Row::Rejected(Problem { raw: Some(raw), ..problem }),
        }
    }
}

fn read_cell<'a>(bytes: &'a [u8], mapping: &Mapping) -> RawValue<'a> {
    if bytes.len() > MAX_FIELD_BYTES {
        return RawValue::Unreadable(ProblemKind::FieldTooLong, "cell longer than 64 KiB");
    }
    if bytes.contains(&0) {
        return RawValue::Unreadable(ProblemKind::NulByte, "cell contains a NUL byte");
    }
    match decode_cell(bytes, mapping.fallback_encoding) {
        Some(text) => RawValue::Text(text),
        None => RawValue::Unreadable(
            ProblemKind::InvalidEncoding,
            "not valid UTF-8 (set encoding_fallback for a legacy feed)",
        ),
    }
}

/// Re-serialises a record as CSV for the `reject` table (quoting as RFC 4180 does).
struct RawWriter {
    delimiter: u8,
    buffer: Vec<u8>,
}

impl RawWriter {
    fn new(delimiter: u8) -> RawWriter {
        RawWriter { delimiter, buffer: Vec::with_capacity(1024) }
    }

    fn render(&mut self, record: &csv::ByteRecord) -> String {
        self.buffer.clear();
        for (idx, cell) in record.iter().enumerate() {
            if idx > 0 {
                self.buffer.push(self.delimiter);
            }
            let quote = cell.iter().any(|&b| b == self.delimiter || b == b'"' || b == b'\n' || b == b'\r');
            if quote {
                self.buffer.push(b'"');
                for &b in cell {
                    if b == b'"' {
                        self.buffer.push(b'"');
                    }
                    self.buffer.push(b);
                }
                self.buffer.push(b'"');
            } else {
                self.buffer.extend_from_slice(cell);
            }
            if self.buffer.len() > MAX_RAW_BYTES * 2 {
                break;
            }
        }
        raw_text(&self.buffer)
    }
}
