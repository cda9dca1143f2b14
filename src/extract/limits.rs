//! Resource limits on one extract and the readers that enforce them while the bytes stream
//! in, so that a hostile or broken file (a gzip bomb, a header line of 50 MB, a row of
//! millions of cells, JSON nested a hundred thousand deep) fails with a clear reason in
//! bounded memory instead of exhausting it. The readers also see how the file ends (a final
//! newline or not, a quoted CSV field still open, a JSON document not closed), which is what
//! tells a truncated extract from a complete one.

use std::fmt;
use std::io::{self, Read};
use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};

pub use crate::config::mapping::{Limits, defaults};

/// Decompressed bytes admitted before the expansion ratio is applied, so a tiny gzip file
/// of a small extract never trips it.
const EXPANSION_ALLOWANCE: u64 = 1 << 20;

/// Which limit an extract went over; carried inside an `io::Error` through the readers and
/// turned into `ExtractError::Limit` at the top.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct LimitExceeded {
    /// The config key of the limit.
    pub key: &'static str,
    pub limit: u64,
    /// The 1-based line where it happened, when known.
    pub line: Option<u64>,
    pub what: &'static str,
}

impl fmt::Display for LimitExceeded {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        if let Some(line) = self.line {
            write!(f, "line {line}: ")?;
        }
        write!(f, "{} over the limit of {} (limits.{})", self.what, self.limit, self.key)
    }
}

impl std::error::Error for LimitExceeded {}

fn exceeded(key: &'static str, limit: u64, line: Option<u64>, what: &'static str) -> io::Error {
    io::Error::other(LimitExceeded { key, limit, line, what })
}

/// The limit an I/O error carries, if it is one of ours.
pub fn limit_of(err: &io::Error) -> Option<&LimitExceeded> {
    err.get_ref()?.downcast_ref::<LimitExceeded>()
}

/// Counts bytes passing through (the compressed side of a gzip extract).
#[derive(Debug)]
pub struct Counted<R> {
    pub inner: R,
    pub count: Arc<AtomicU64>,
}

impl<R: Read> Read for Counted<R> {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        let n = self.inner.read(buf)?;
        self.count.fetch_add(n as u64, Ordering::Relaxed);
        Ok(n)
    }
}

/// Caps the decompressed size: in all, and (for gzip) against the compressed bytes read so
/// far. Remembers the last byte, for the final-newline rule.
#[derive(Debug)]
pub struct Volume<R> {
    inner: R,
    out: u64,
    compressed: Option<Arc<AtomicU64>>,
    max_bytes: u64,
    max_expansion: u64,
    pub last_byte: Arc<AtomicU64>,
}

/// `last_byte` before any byte was read.
pub const NO_BYTE: u64 = u64::MAX;

impl<R> Volume<R> {
    pub fn new(inner: R, compressed: Option<Arc<AtomicU64>>, limits: &Limits) -> Volume<R> {
        Volume {
            inner,
            out: 0,
            compressed,
            max_bytes: limits.max_bytes,
            max_expansion: limits.max_expansion,
            last_byte: Arc::new(AtomicU64::new(NO_BYTE)),
        }
    }
}

impl<R: Read> Read for Volume<R> {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        let n = self.inner.read(buf)?;
        if n == 0 {
            return Ok(0);
        }
        self.out += n as u64;
        self.last_byte.store(u64::from(buf[n - 1]), Ordering::Relaxed);
        if self.out > self.max_bytes {
            return Err(exceeded("max_bytes", self.max_bytes, None, "extract size after decompression"));
        }
        if let Some(compressed) = &self.compressed {
            let allowed = compressed.load(Ordering::Relaxed).saturating_mul(self.max_expansion);
            if self.out > allowed.saturating_add(EXPANSION_ALLOWANCE) {
                return Err(exceeded(
                    "max_expansion",
                    self.max_expansion,
                    None,
                    "decompressed bytes per compressed byte",
                ));
            }
        }
        Ok(n)
    }
}

/// Where a CSV scanner is within a record (the states of an RFC 4180 reader; a quote opens
/// a quoted field only at the start of a field, as the CSV reader itself treats it).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum CsvState {
    FieldStart,
    Unquoted,
    Quoted,
    QuoteInQuoted,
}

/// Follows the CSV structure byte by byte, ahead of the CSV reader: caps the bytes of a
/// record and its cells, and knows at the end whether a quoted field is still open.
#[derive(Debug)]
pub struct CsvGuard<R> {
    inner: R,
    delimiter: u8,
    state: CsvState,
    record_bytes: u64,
    cells: u64,
    /// 1-based physical line, for the limit's message.
    line: u64,
    max_record_bytes: u64,
    max_columns: u64,
}

impl<R> CsvGuard<R> {
    pub fn new(inner: R, delimiter: u8, limits: &Limits) -> CsvGuard<R> {
        CsvGuard {
            inner,
            delimiter,
            state: CsvState::FieldStart,
            record_bytes: 0,
            cells: 1,
            line: 1,
            max_record_bytes: limits.max_record_bytes,
            max_columns: limits.max_columns,
        }
    }

    /// Whether the bytes so far end inside a quoted field.
    pub fn quote_open(&self) -> bool {
        self.state == CsvState::Quoted
    }

    /// The physical line the scanner is on.
    pub fn line(&self) -> u64 {
        self.line
    }

    fn scan(&mut self, bytes: &[u8]) -> io::Result<()> {
        for &byte in bytes {
            self.record_bytes += 1;
            if byte == b'\n' {
                self.line += 1;
            }
            let record_end = byte == b'\n' || byte == b'\r';
            self.state = match (self.state, byte) {
                (CsvState::Quoted, b'"') => CsvState::QuoteInQuoted,
                (CsvState::Quoted, _) => CsvState::Quoted,
                (CsvState::QuoteInQuoted, b'"') => CsvState::Quoted,
                (CsvState::FieldStart, b'"') => CsvState::Quoted,
                (_, b) if b == self.delimiter => {
                    self.cells += 1;
                    CsvState::FieldStart
                }
                (_, _) if record_end => {
                    self.cells = 1;
                    self.record_bytes = 0;
                    CsvState::FieldStart
                }
                _ => CsvState::Unquoted,
            };
            if self.record_bytes > self.max_record_bytes {
                return Err(exceeded(
                    "max_record_bytes",
                    self.max_record_bytes,
                    Some(self.line),
                    "record length",
                ));
            }
            if self.cells > self.max_columns {
                return Err(exceeded("max_columns", self.max_columns, Some(self.line), "cells in one row"));
            }
        }
        Ok(())
    }
}

impl<R: Read> Read for CsvGuard<R> {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        let n = self.inner.read(buf)?;
        self.scan(&buf[..n])?;
        Ok(n)
    }
}

/// Follows JSON nesting byte by byte, ahead of the JSON parser: caps the depth and the bytes
/// of one record (a value nested inside the top level). Strings and their escapes are
/// skipped, so brackets inside text do not count.
#[derive(Debug)]
pub struct JsonGuard<R> {
    inner: R,
    depth: u64,
    in_string: bool,
    escaped: bool,
    record_bytes: u64,
    line: u64,
    /// Depth at which a record starts: 1 inside a top-level array, 0 for NDJSON lines.
    record_depth: u64,
    max_depth: u64,
    max_record_bytes: u64,
}

impl<R> JsonGuard<R> {
    /// A guard for a top-level array of records (`record_depth` 1) or for newline-delimited
    /// records (`record_depth` 0, where a newline at depth 0 also ends a record).
    pub fn new(inner: R, record_depth: u64, limits: &Limits) -> JsonGuard<R> {
        JsonGuard {
            inner,
            depth: 0,
            in_string: false,
            escaped: false,
            record_bytes: 0,
            line: 1,
            record_depth,
            max_depth: limits.max_json_depth,
            max_record_bytes: limits.max_record_bytes,
        }
    }

    fn scan(&mut self, bytes: &[u8]) -> io::Result<()> {
        for &byte in bytes {
            if byte == b'\n' {
                self.line += 1;
                if self.record_depth == 0 {
                    // A newline ends an NDJSON line whatever its brackets and quotes said
                    // (a raw newline cannot be inside a JSON string, and a cut-off line
                    // must not spill into the next).
                    (self.depth, self.in_string, self.escaped, self.record_bytes) = (0, false, false, 0);
                    continue;
                }
            }
            if self.in_string {
                match (self.escaped, byte) {
                    (true, _) => self.escaped = false,
                    (false, b'\\') => self.escaped = true,
                    (false, b'"') => self.in_string = false,
                    _ => {}
                }
            } else {
                match byte {
                    b'"' => self.in_string = true,
                    b'[' | b'{' => {
                        self.depth += 1;
                        if self.depth > self.max_depth {
                            return Err(exceeded(
                                "max_json_depth",
                                self.max_depth,
                                Some(self.line),
                                "JSON nesting",
                            ));
                        }
                    }
                    b']' | b'}' => self.depth = self.depth.saturating_sub(1),
                    _ => {}
                }
            }
            if self.record_depth == 0 || self.depth > self.record_depth || self.in_string {
                self.record_bytes += 1;
            } else {
                self.record_bytes = 0;
            }
            if self.record_bytes > self.max_record_bytes {
                return Err(exceeded(
                    "max_record_bytes",
                    self.max_record_bytes,
                    Some(self.line),
                    "record length",
                ));
            }
        }
        Ok(())
    }
}

impl<R: Read> Read for JsonGuard<R> {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        let n = self.inner.read(buf)?;
        self.scan(&buf[..n])?;
        Ok(n)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn small() -> Limits {
        Limits { max_record_bytes: 20, max_columns: 4, max_json_depth: 3, ..Limits::default() }
    }

    fn read_all(mut reader: impl Read) -> Result<Vec<u8>, String> {
        let mut out = Vec::new();
        let mut buf = [0u8; 7];
        loop {
            match reader.read(&mut buf) {
                Ok(0) => return Ok(out),
                Ok(n) => out.extend_from_slice(&buf[..n]),
                Err(err) => return Err(limit_of(&err).map(|l| l.key.to_string()).unwrap_or(err.to_string())),
            }
        }
    }

    #[test]
    fn csv_guard_caps_records_and_cells_and_sees_open_quotes() {
        let cases: &[(&[u8], Result<bool, &str>)] = &[
            (b"a,b,c\n1,2,3\n", Ok(false)),
            (b"a,b,c\n1,\"x, y, z, w\",3\n", Ok(false)),
            (b"a,b,c\n1,\"multi\nline\",3\n", Ok(false)),
            (b"a,b,c\n1,\"cough; fe", Ok(true)),
            (b"a,b,c\n1,Amber\"lee,3\n", Ok(false)),
            (b"a,b,c\n1,\"say \"\"hi\"\"\",3\n", Ok(false)),
            (b"a,b,c,d,e\n", Err("max_columns")),
            (b"a\n012345678901234567890123\n", Err("max_record_bytes")),
            (b"a\n\"01234567890\n1234567890123\"\n", Err("max_record_bytes")),
        ];
        for (bytes, want) in cases {
            let mut guard = CsvGuard::new(&bytes[..], b',', &small());
            let got = read_all(&mut guard).map(|_| guard.quote_open());
            assert_eq!(got, want.map_err(String::from), "{}", String::from_utf8_lossy(bytes));
        }
    }

    #[test]
    fn json_guard_caps_depth_and_record_bytes() {
        let cases: &[(&[u8], u64, Option<&str>)] = &[
            (br#"[{"a":[1,2]},{"b":"[[[[[["}]"#, 1, None),
            (br#"[{"a":[[1]]}]"#, 1, Some("max_json_depth")),
            (br#"[{"a":"0123456789012345678901"}]"#, 1, Some("max_record_bytes")),
            (b"{\"a\":[1]}\n{\"b\":2}\n", 0, None),
            (b"{\"a\":[1\n{\"b\":[2]}\n", 0, None),
            (b"{\"a\":\"0123456789012345678901\"}\n", 0, Some("max_record_bytes")),
        ];
        for (bytes, record_depth, want) in cases {
            let got = read_all(JsonGuard::new(&bytes[..], *record_depth, &small())).err();
            assert_eq!(got.as_deref(), *want, "{}", String::from_utf8_lossy(bytes));
        }
    }

    #[test]
    fn volume_caps_total_and_expansion() {
        let limits = Limits { max_bytes: 10, ..Limits::default() };
        assert_eq!(read_all(Volume::new(&b"0123456789"[..], None, &limits)).map(|b| b.len()), Ok(10));
        assert_eq!(
            read_all(Volume::new(&b"0123456789a"[..], None, &limits)).err().as_deref(),
            Some("max_bytes")
        );
        let compressed = Arc::new(AtomicU64::new(1));
        let limits = Limits { max_expansion: 2, ..Limits::default() };
        let big = vec![0u8; (EXPANSION_ALLOWANCE + 3) as usize];
        let got = read_all(Volume::new(&big[..], Some(compressed), &limits)).err();
        assert_eq!(got.as_deref(), Some("max_expansion"));
    }
}
