//! How one source's rows are read, as configured: the column mapping, value maps, missing
//! tokens, date formats, the legacy encoding to fall back to, and the resource limits on
//! each extract. Plain settings built by `config`; `extract` applies them.

use std::collections::{BTreeMap, BTreeSet, HashMap};

use crate::model::Field;

/// The legacy single-byte encodings a feed may fall back to when a cell is not UTF-8.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LegacyEncoding {
    Windows1252,
    Latin1,
}

/// How one source's rows become canonical records; compiled once from the config.
#[derive(Debug, Clone)]
pub struct Mapping {
    /// Where this mapping lives in the config, e.g. `source[1]`, for error messages.
    pub label: String,
    /// The source column that identifies a record.
    pub key_column: String,
    /// Canonical field -> source column, for every mapped field but the key.
    pub columns: BTreeMap<Field, String>,
    /// Per field: source value (trimmed, lower-cased) -> canonical value.
    pub values: BTreeMap<Field, HashMap<String, String>>,
    /// Cell values that mean "not captured" (trimmed, lower-cased).
    pub missing_tokens: Vec<String>,
    pub date_formats: Vec<String>,
    pub list_separator: String,
    /// Source columns to drop instead of keeping them in `extra`.
    pub ignore: BTreeSet<String>,
    /// CSV delimiter; detected from the header line when `None`.
    pub delimiter: Option<u8>,
    pub fallback_encoding: Option<LegacyEncoding>,
    /// Resource limits on each extract of the source.
    pub limits: Limits,
}

/// Missing tokens when the config names none (common practice in line lists).
pub const DEFAULT_MISSING_TOKENS: [&str; 8] =
    ["", "na", "n/a", "null", "none given", "unknown", "not known", "missing"];

impl Mapping {
    /// A mapping with the defaults and no mapped fields; the config fills it in.
    pub fn new(label: &str, key_column: &str) -> Mapping {
        Mapping {
            label: label.to_string(),
            key_column: key_column.to_string(),
            columns: BTreeMap::new(),
            values: BTreeMap::new(),
            missing_tokens: DEFAULT_MISSING_TOKENS.iter().map(|t| t.to_string()).collect(),
            date_formats: vec!["%Y-%m-%d".to_string()],
            list_separator: ";".to_string(),
            ignore: BTreeSet::new(),
            delimiter: None,
            fallback_encoding: None,
            limits: Limits::default(),
        }
    }
}

/// Limits on one extract; every one is configurable per source (`[source.limits]`).
#[derive(Debug, Clone, PartialEq)]
pub struct Limits {
    /// Decompressed bytes per compressed byte of a gzip extract. Line lists compress about
    /// 5-15x; 100x leaves room for very sparse files and stops a bomb (zeros compress
    /// about 1000x) after a small multiple of its own size.
    pub max_expansion: u64,
    /// Bytes of the extract after decompression, in all.
    pub max_bytes: u64,
    /// Bytes of one line (CSV record, NDJSON line) or one record of a JSON array.
    pub max_record_bytes: u64,
    /// Columns of a header and cells of a row.
    pub max_columns: u64,
    /// Nesting of JSON arrays and objects (a record is an object of values and lists: 3).
    pub max_json_depth: u64,
    /// Treat an extract whose last byte is not a newline as truncated, for feeds known to
    /// always end with one.
    pub require_final_newline: bool,
}

/// Default limits (named so the docs and tests can cite them).
pub mod defaults {
    /// See `Limits::max_expansion`.
    pub const MAX_EXPANSION: u64 = 100;
    /// 16 GiB: ten times the largest national line list we would expect in one file.
    pub const MAX_BYTES: u64 = 16 << 30;
    /// 16 MiB: real rows are under a few KiB; this still admits a 10 MB free-text cell
    /// (rejected as a field problem, not a whole-file failure) while keeping one record's
    /// buffers small.
    pub const MAX_RECORD_BYTES: u64 = 16 << 20;
    /// Wide exports have a few hundred columns.
    pub const MAX_COLUMNS: u64 = 4096;
    /// Records are flat; 64 is far beyond any record and far below a stack overflow.
    pub const MAX_JSON_DEPTH: u64 = 64;
}

impl Default for Limits {
    fn default() -> Limits {
        Limits {
            max_expansion: defaults::MAX_EXPANSION,
            max_bytes: defaults::MAX_BYTES,
            max_record_bytes: defaults::MAX_RECORD_BYTES,
            max_columns: defaults::MAX_COLUMNS,
            max_json_depth: defaults::MAX_JSON_DEPTH,
            require_final_newline: false,
        }
    }
}
