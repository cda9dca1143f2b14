//! Bytes of one extract -> canonical rows and problems. Streaming (memory bounded by the
//! reader's buffer and the longest record, not by the file), synchronous, no database and no
//! clock: the extract's as-of date arrives as an argument. Whole-file failures (wrong
//! format, missing key column, truncated gzip) are an `ExtractError`; everything about a
//! single row is a `Problem` and the rest of the file carries on. An extract that looks cut
//! short (a gzip stream without its end, a quoted field or JSON document still open at the
//! end, a last line that fails to parse and has no newline after it) fails whole: applying
//! it would store cut-off values and, for a full extract, close the records it lost.

mod csv;
mod encoding;
pub mod fuzz;
mod json;
pub mod limits;
pub mod mapping;
pub mod normalize;
mod pipeline;

use std::fmt;
use std::io::{self, BufRead, BufReader, Read};
use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};

use chrono::NaiveDate;

pub use self::limits::{LimitExceeded, Limits};
pub use self::mapping::{LegacyEncoding, Mapped, Mapping, RawValue};
use crate::model::{CaseRecord, Format};

/// Longest cell we accept, in bytes. Real line-list cells are short; a multi-megabyte cell
/// is a broken export, and refusing it keeps one bad row from bloating the store.
pub const MAX_FIELD_BYTES: usize = 64 * 1024;

/// How much of a rejected row's text is kept in the `reject` table.
pub const MAX_RAW_BYTES: usize = 4 * 1024;

/// What kind of problem a row or a cell had; stored as its `code()`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum ProblemKind {
    RaggedRow,
    MissingKey,
    DuplicateKey,
    InvalidEncoding,
    NulByte,
    FieldTooLong,
    InvalidJson,
    WrongType,
    InvalidDate,
    FutureDate,
    InvalidAge,
    InvalidValue,
    UnknownCode,
    RepeatedField,
}

impl ProblemKind {
    pub fn code(self) -> &'static str {
        match self {
            ProblemKind::RaggedRow => "ragged_row",
            ProblemKind::MissingKey => "missing_key",
            ProblemKind::DuplicateKey => "duplicate_key",
            ProblemKind::InvalidEncoding => "invalid_encoding",
            ProblemKind::NulByte => "nul_byte",
            ProblemKind::FieldTooLong => "field_too_long",
            ProblemKind::InvalidJson => "invalid_json",
            ProblemKind::WrongType => "wrong_type",
            ProblemKind::InvalidDate => "invalid_date",
            ProblemKind::FutureDate => "future_date",
            ProblemKind::InvalidAge => "invalid_age",
            ProblemKind::InvalidValue => "invalid_value",
            ProblemKind::UnknownCode => "unknown_code",
            ProblemKind::RepeatedField => "repeated_field",
        }
    }
}

/// A problem with one row (rejected) or one cell (the row is kept, the field is invalid).
/// `line` is the 1-based line of the row in the file (for JSON arrays, the record number);
/// `message` names the column and the problem but never the cell's value.
#[derive(Debug, Clone, PartialEq)]
pub struct Problem {
    pub line: u64,
    pub field: Option<String>,
    pub kind: ProblemKind,
    pub message: String,
    /// The row as read, for rejected rows (truncated to `MAX_RAW_BYTES`).
    pub raw: Option<String>,
}

impl fmt::Display for Problem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "line {}", self.line)?;
        if let Some(field) = &self.field {
            write!(f, ", field {field}")?;
        }
        write!(f, ": {} ({})", self.message, self.kind.code())
    }
}

/// One row delivered to the caller's sink.
#[derive(Debug, Clone, PartialEq)]
pub enum Row {
    Accepted {
        line: u64,
        record: CaseRecord,
        /// The row as read, kept in case a later row with the same key supersedes it.
        raw: String,
        problems: Vec<Problem>,
    },
    Rejected(Problem),
}

/// The whole file could not be used; nothing of it may be applied. No variant carries a
/// cell's value: header problems name column positions, not names read from the file.
#[derive(Debug, thiserror::Error)]
pub enum ExtractError {
    #[error("the extract is empty")]
    Empty,
    #[error("{path}: column \"{column}\" not found in header")]
    MissingColumn { path: String, column: String },
    #[error("header: columns {first} and {second} have the same name; every column needs its own")]
    DuplicateColumn { first: usize, second: usize },
    #[error("header: column {position} has no name; every column needs one")]
    UnnamedColumn { position: usize },
    #[error("header: not readable as text ({0})")]
    BadHeader(&'static str),
    #[error("line {line}: unterminated quoted field; the rest of the file cannot be read")]
    UnterminatedQuote { line: u64 },
    #[error("truncated: {0}; nothing of it was applied")]
    Truncated(String),
    #[error("{0}; nothing of it was applied")]
    Limit(LimitExceeded),
    #[error("not valid JSON: {0}")]
    Json(String),
    #[error("reading the extract failed: {0}")]
    Read(io::Error),
}

impl From<io::Error> for ExtractError {
    /// A limit carried through the readers becomes `Limit`; a gzip stream that stops before
    /// its end marker becomes `Truncated`.
    fn from(err: io::Error) -> ExtractError {
        if let Some(limit) = limits::limit_of(&err) {
            return ExtractError::Limit(limit.clone());
        }
        if err.kind() == io::ErrorKind::UnexpectedEof {
            return ExtractError::Truncated(format!("the compressed stream ends early ({err})"));
        }
        ExtractError::Read(err)
    }
}

/// Either the extract failed, or the sink that received its rows did.
#[derive(Debug, thiserror::Error)]
pub enum ParseError<E> {
    #[error(transparent)]
    Extract(#[from] ExtractError),
    #[error("storing a row failed: {0}")]
    Sink(E),
}

/// Counts of one parse (before duplicate keys are resolved).
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct ParseSummary {
    pub rows_total: u64,
    pub rows_accepted: u64,
    pub rows_rejected: u64,
    pub field_problems: u64,
}

impl ParseSummary {
    fn count(&mut self, row: &Row) {
        self.rows_total += 1;
        match row {
            Row::Accepted { problems, .. } => {
                self.rows_accepted += 1;
                self.field_problems += problems.len() as u64;
            }
            Row::Rejected(_) => self.rows_rejected += 1,
        }
    }
}

/// Parses an extract. `latest` is the extract's as-of date: any date after it is impossible.
/// Gzip is detected by its magic bytes, whatever the format. The mapping's `limits` bound
/// every resource; an extract that ends as if cut short fails with `Truncated`.
pub fn parse<E>(
    reader: impl Read,
    format: Format,
    mapping: &Mapping,
    latest: NaiveDate,
    mut sink: impl FnMut(Row) -> Result<(), E>,
) -> Result<ParseSummary, ParseError<E>> {
    let mut summary = ParseSummary::default();
    let mut last_row: Option<(u64, Option<ProblemKind>)> = None;
    let mut counted = |row: Row| {
        summary.count(&row);
        last_row = Some(match &row {
            Row::Accepted { line, .. } => (*line, None),
            Row::Rejected(problem) => (problem.line, Some(problem.kind)),
        });
        sink(row)
    };
    let (input, last_byte) = decompressed(reader, &mapping.limits)?;
    match format {
        Format::Csv => csv::parse(input, mapping, latest, &mut counted)?,
        Format::Ndjson => json::parse_lines(input, mapping, latest, &mut counted)?,
        Format::Json => json::parse_array(input, mapping, latest, &mut counted)?,
    }
    let last_byte = last_byte.load(Ordering::Relaxed);
    let ends_with_newline = last_byte == u64::from(b'\n') || last_byte == u64::from(b'\r');
    if format != Format::Json && last_byte != limits::NO_BYTE && !ends_with_newline {
        check_unterminated_end(last_row, &mapping.limits)?;
    }
    Ok(summary)
}

/// A line-based extract without a final newline is cut short when its last line did not
/// parse as a whole record (or whenever, if the source requires the final newline).
fn check_unterminated_end(
    last_row: Option<(u64, Option<ProblemKind>)>,
    limits: &Limits,
) -> Result<(), ExtractError> {
    let Some((line, kind)) = last_row else { return Ok(()) };
    let unparsed = matches!(
        kind,
        Some(ProblemKind::RaggedRow | ProblemKind::InvalidJson | ProblemKind::InvalidEncoding)
    );
    if unparsed {
        return Err(ExtractError::Truncated(format!(
            "the last line ({line}) has no newline after it and does not parse ({})",
            kind.map(ProblemKind::code).unwrap_or_default()
        )));
    }
    if limits.require_final_newline {
        return Err(ExtractError::Truncated(format!(
            "the last line ({line}) has no newline after it, and this source requires one (limits.require_final_newline)"
        )));
    }
    Ok(())
}

/// Gzip magic bytes (RFC 1952, section 2.3.1).
const GZIP_MAGIC: [u8; 2] = [0x1f, 0x8b];

/// The extract's bytes, decompressed if gzip, within the size limits, and the cell where
/// the last byte read is kept.
fn decompressed<'a>(
    reader: impl Read + 'a,
    limits: &Limits,
) -> Result<(Box<dyn BufRead + 'a>, Arc<AtomicU64>), ExtractError> {
    let compressed = Arc::new(AtomicU64::new(0));
    let counted = limits::Counted { inner: reader, count: compressed.clone() };
    let mut buffered = BufReader::with_capacity(256 * 1024, counted);
    let head = buffered.fill_buf()?;
    let volume = if head.starts_with(&GZIP_MAGIC) {
        let gz: Box<dyn Read + 'a> = Box::new(flate2::bufread::MultiGzDecoder::new(buffered));
        limits::Volume::new(gz, Some(compressed), limits)
    } else {
        let plain: Box<dyn Read + 'a> = Box::new(buffered);
        limits::Volume::new(plain, None, limits)
    };
    let last_byte = volume.last_byte.clone();
    Ok((Box::new(BufReader::with_capacity(256 * 1024, volume)), last_byte))
}

/// A row's bytes as text for the `reject` table, cut to `MAX_RAW_BYTES` with a note of the
/// full length.
fn raw_text(bytes: &[u8]) -> String {
    if bytes.len() <= MAX_RAW_BYTES {
        // Valid UTF-8 (the usual case) is copied as is, without the slower lossy scan.
        return match std::str::from_utf8(bytes) {
            Ok(text) => text.to_owned(),
            Err(_) => String::from_utf8_lossy(bytes).into_owned(),
        };
    }
    let mut text = String::from_utf8_lossy(&bytes[..MAX_RAW_BYTES]).into_owned();
    text.push_str(&format!(" [truncated; {} bytes]", bytes.len()));
    text
}

#[cfg(test)]
mod tests;
