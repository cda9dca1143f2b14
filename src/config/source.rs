//! Validating one `[[source]]` table into a `SourceConfig`: location, schedule, extract kind,
//! format, as-of rule and the column mapping. Problems are pushed with their key path and
//! validation goes on, so the user sees every mistake at once.

use std::collections::{BTreeSet, HashMap};
use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use std::str::FromStr;
use std::time::Duration;

use chrono::format::{Item, StrftimeItems};
use sha2::{Digest, Sha256};

use super::mapping::{LegacyEncoding, Limits, Mapping};
use super::raw::RawSource;
use super::{env_state, parse_duration, redact_url};
use crate::model::{ExtractKind, Field, Format};

/// Default poll schedule: every 15 minutes, at second 0 (cron crate syntax, seconds first).
pub const DEFAULT_SCHEDULE: &str = "0 */15 * * * *";

/// Default truncated-feed guard: hold a full extract that has more than this fraction fewer
/// rows than the last applied one, or would remove more than this fraction of current records.
pub const DEFAULT_HOLD_FRACTION: f64 = 0.2;

/// Default for the stricter removal guard: hold a full extract that would remove more than
/// this fraction of the current records (and more than `HOLD_REMOVED_MIN` of them). A daily
/// full extract withdraws well under 1% of its records; a cut-off file removes its tail.
pub const DEFAULT_HOLD_REMOVED_FRACTION: f64 = 0.05;

/// Removals below this count are never held, whatever the fraction: on a small feed a few
/// withdrawn records are a large share without being suspicious.
pub const HOLD_REMOVED_MIN: u64 = 10;

/// How far an extract's as-of time may lie after the server's clock: a file named for
/// today means the end of today in UTC, which in a zone ahead of UTC can be up to two days
/// ahead of the clock; anything later is a typo in a file name or a wrong clock.
pub const DEFAULT_AS_OF_TOLERANCE: Duration = Duration::from_secs(48 * 3600);

#[derive(Debug, Clone)]
pub enum Location {
    Folder(FolderSettings),
    Url(UrlSettings),
}

/// How a folder source finds complete new files.
#[derive(Debug, Clone)]
pub struct FolderSettings {
    pub path: PathBuf,
    pub pattern: String,
    /// A file is taken only if its size and mtime are the same on two looks this far apart.
    pub settle: Duration,
    /// If set, a file is taken only once a file of the same name plus this suffix exists.
    pub ready_marker: Option<String>,
}

/// How a URL source is fetched.
#[derive(Debug, Clone)]
pub struct UrlSettings {
    pub url: String,
    pub auth_header: String,
    /// Environment variable holding the auth header's value.
    pub auth_env: Option<String>,
    pub connect_timeout: Duration,
    pub timeout: Duration,
    pub max_bytes: u64,
    pub max_redirects: usize,
    /// Attempts after the first one failed with a retryable error.
    pub retries: u32,
    pub retry_base: Duration,
    pub retry_cap: Duration,
}

/// Defaults for polling (named so the docs and tests can cite them).
pub mod defaults {
    use std::time::Duration;
    /// Long enough for a copy over a network share to show progress between looks.
    pub const SETTLE: Duration = Duration::from_secs(2);
    pub const CONNECT_TIMEOUT: Duration = Duration::from_secs(10);
    /// A large extract over a slow link; beyond this the server is treated as stuck.
    pub const TIMEOUT: Duration = Duration::from_secs(300);
    /// Far above any county's line list; a bigger body is a broken or hostile server.
    pub const MAX_BYTES: u64 = 1 << 30;
    pub const MAX_REDIRECTS: usize = 5;
    pub const RETRIES: u32 = 4;
    pub const RETRY_BASE: Duration = Duration::from_secs(2);
    pub const RETRY_CAP: Duration = Duration::from_secs(60);
}

/// Where an extract's as-of time comes from when `--as-of` is not given.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum AsOfRule {
    FileMtime,
    /// The first date in the file name that matches this chrono format; end of that day, UTC.
    NameDate(String),
    /// An HTTP response header (URL sources).
    Header(String),
}

#[derive(Debug, Clone)]
pub struct SourceConfig {
    pub name: String,
    pub location: Location,
    pub schedule: cron::Schedule,
    pub extract: ExtractKind,
    pub format: Format,
    pub as_of: AsOfRule,
    pub expect_every: Option<Duration>,
    pub hold_fraction: f64,
    /// The removal guard's own, stricter threshold (see `DEFAULT_HOLD_REMOVED_FRACTION`).
    pub hold_removed_fraction: f64,
    /// How far an as-of time may lie after the server's clock before it is refused.
    pub as_of_tolerance: Duration,
    pub mapping: Mapping,
    /// SHA-256 of the source's settings; stored so a changed mapping is visible.
    pub config_hash: String,
}

impl SourceConfig {
    pub fn kind_name(&self) -> &'static str {
        match self.location {
            Location::Folder(_) => "folder",
            Location::Url(_) => "url",
        }
    }

    pub fn describe(&self) -> String {
        let mut out = String::new();
        let _ = writeln!(out, "source {}:", self.name);
        match &self.location {
            Location::Folder(f) => {
                let _ = writeln!(
                    out,
                    "  folder: {} pattern={} settle={}ms ready_marker={}",
                    f.path.display(),
                    f.pattern,
                    f.settle.as_millis(),
                    f.ready_marker.as_deref().unwrap_or("-")
                );
            }
            Location::Url(u) => {
                let _ = writeln!(
                    out,
                    "  url: {} auth={}:{} timeout={}s max_bytes={} retries={}",
                    redact_url(&u.url),
                    u.auth_header,
                    env_state(u.auth_env.as_deref()),
                    u.timeout.as_secs(),
                    u.max_bytes,
                    u.retries
                );
            }
        }
        let _ = writeln!(out, "  schedule: {}", self.schedule.source());
        let _ = writeln!(
            out,
            "  extract: {} format: {} as_of: {:?} hold_fraction: {}",
            self.extract.name(),
            self.format.name(),
            self.as_of,
            self.hold_fraction
        );
        if let Some(every) = self.expect_every {
            let _ = writeln!(out, "  expect_every: {}s", every.as_secs());
        }
        let l = &self.mapping.limits;
        let _ = writeln!(
            out,
            "  hold_removed_fraction: {} as_of_tolerance: {}s",
            self.hold_removed_fraction,
            self.as_of_tolerance.as_secs()
        );
        let _ = writeln!(
            out,
            "  limits: max_bytes={} max_expansion={} max_record_bytes={} max_columns={} max_json_depth={} require_final_newline={}",
            l.max_bytes,
            l.max_expansion,
            l.max_record_bytes,
            l.max_columns,
            l.max_json_depth,
            l.require_final_newline
        );
        let _ = writeln!(out, "  key: {}", self.mapping.key_column);
        for (field, column) in &self.mapping.columns {
            let _ = writeln!(out, "  {field} <- {column}");
        }
        out
    }
}

pub fn build(raw: RawSource, label: &str, base: &Path, problems: &mut Vec<String>) -> Option<SourceConfig> {
    let before = problems.len();
    let mut push = |key: &str, message: String| problems.push(format!("{label}.{key}: {message}"));
    check_name(&raw.name, &mut push);
    let location = build_location(&raw, base, &mut push);
    let schedule_text = raw.schedule.as_deref().unwrap_or(DEFAULT_SCHEDULE);
    let schedule = cron::Schedule::from_str(schedule_text)
        .map_err(|err| push("schedule", format!("invalid cron expression ({err})")))
        .ok();
    let extract = raw.extract.as_deref().unwrap_or("full").parse().unwrap_or_else(|e| {
        push("extract", format!("{e}"));
        ExtractKind::Full
    });
    let format = parse_format(&raw, &mut push);
    let as_of = parse_as_of(raw.as_of.as_deref().unwrap_or("file-mtime"), &mut push);
    let expect_every = raw.expect_every.as_deref().and_then(|text| {
        let parsed = parse_duration(text);
        if parsed.is_none() {
            push("expect_every", format!("\"{text}\" is not a duration such as 90s, 15m, 26h, 2d"));
        }
        parsed
    });
    let hold_fraction = raw.hold_fraction.unwrap_or(DEFAULT_HOLD_FRACTION);
    if !(hold_fraction > 0.0 && hold_fraction < 1.0) {
        push("hold_fraction", "must be between 0 and 1".into());
    }
    let hold_removed_fraction = raw.hold_removed_fraction.unwrap_or(DEFAULT_HOLD_REMOVED_FRACTION);
    if !(hold_removed_fraction > 0.0 && hold_removed_fraction < 1.0) {
        push("hold_removed_fraction", "must be between 0 and 1".into());
    }
    let as_of_tolerance = match raw.as_of_tolerance.as_deref() {
        None => DEFAULT_AS_OF_TOLERANCE,
        Some(text) => parse_duration(text).unwrap_or_else(|| {
            push("as_of_tolerance", format!("\"{text}\" is not a duration such as 90s, 15m, 26h, 2d"));
            DEFAULT_AS_OF_TOLERANCE
        }),
    };
    let mut mapping = build_mapping(&raw, label, &mut push);
    mapping.limits = build_limits(raw.limits.as_ref(), &mut push);
    let config_hash = hash_settings(&raw);
    let (location, schedule) = (location?, schedule?);
    (problems.len() == before).then_some(SourceConfig {
        name: raw.name,
        location,
        schedule,
        extract,
        format,
        as_of,
        expect_every,
        hold_fraction,
        hold_removed_fraction,
        as_of_tolerance,
        mapping,
        config_hash,
    })
}

fn check_name(name: &str, push: &mut impl FnMut(&str, String)) {
    let ok = !name.is_empty() && name.chars().all(|c| c.is_ascii_alphanumeric() || c == '-' || c == '_');
    if !ok {
        push("name", format!("\"{name}\" must be letters, digits, '-' or '_'"));
    }
}

fn build_location(raw: &RawSource, base: &Path, push: &mut impl FnMut(&str, String)) -> Option<Location> {
    let mut duration = |key: &str, value: &Option<String>, default: Duration| match value {
        None => default,
        Some(text) => parse_duration(text).unwrap_or_else(|| {
            push(key, format!("\"{text}\" is not a duration such as 250ms, 90s, 15m, 26h, 2d"));
            default
        }),
    };
    match raw.kind.as_str() {
        "folder" => {
            let settle = duration("settle", &raw.settle, defaults::SETTLE);
            let Some(path) = &raw.path else {
                push("path", "a folder source needs a path".into());
                return None;
            };
            Some(Location::Folder(FolderSettings {
                path: base.join(path),
                pattern: raw.pattern.clone().unwrap_or_else(|| "*".into()),
                settle,
                ready_marker: raw.ready_marker.clone().filter(|m| !m.is_empty()),
            }))
        }
        "url" => {
            let connect_timeout =
                duration("connect_timeout", &raw.connect_timeout, defaults::CONNECT_TIMEOUT);
            let timeout = duration("timeout", &raw.timeout, defaults::TIMEOUT);
            let retry_base = duration("retry_base", &raw.retry_base, defaults::RETRY_BASE);
            let retry_cap = duration("retry_cap", &raw.retry_cap, defaults::RETRY_CAP);
            let Some(url) = &raw.url else {
                push("url", "a url source needs a url".into());
                return None;
            };
            if !(url.starts_with("http://") || url.starts_with("https://")) {
                push("url", "must start with http:// or https://".into());
            }
            Some(Location::Url(UrlSettings {
                url: url.clone(),
                auth_header: raw.auth_header.clone().unwrap_or_else(|| "Authorization".into()),
                auth_env: raw.auth_env.clone(),
                connect_timeout,
                timeout,
                max_bytes: raw.max_bytes.unwrap_or(defaults::MAX_BYTES),
                max_redirects: raw.max_redirects.unwrap_or(defaults::MAX_REDIRECTS),
                retries: raw.retries.unwrap_or(defaults::RETRIES),
                retry_base,
                retry_cap,
            }))
        }
        other => {
            push("kind", format!("\"{other}\" is not one of folder, url"));
            None
        }
    }
}

fn parse_format(raw: &RawSource, push: &mut impl FnMut(&str, String)) -> Format {
    let guessed = raw.pattern.as_deref().map(|p| p.trim_end_matches(".gz")).and_then(|p| {
        [(".ndjson", "ndjson"), (".jsonl", "ndjson"), (".json", "json"), (".csv", "csv")]
            .iter()
            .find(|(ext, _)| p.ends_with(ext))
            .map(|(_, name)| *name)
    });
    raw.format.as_deref().or(guessed).unwrap_or("csv").parse().unwrap_or_else(|e| {
        push("format", format!("{e}"));
        Format::Csv
    })
}

fn parse_as_of(text: &str, push: &mut impl FnMut(&str, String)) -> AsOfRule {
    if text == "file-mtime" {
        AsOfRule::FileMtime
    } else if let Some(format) = text.strip_prefix("name:") {
        if !valid_date_format(format) {
            push("as_of", format!("\"{format}\" is not a valid date format"));
        }
        AsOfRule::NameDate(format.to_string())
    } else if let Some(header) = text.strip_prefix("header:") {
        AsOfRule::Header(header.to_string())
    } else {
        push("as_of", format!("\"{text}\" is not file-mtime, name:FORMAT or header:NAME"));
        AsOfRule::FileMtime
    }
}

fn valid_date_format(format: &str) -> bool {
    !format.is_empty() && !StrftimeItems::new(format).any(|item| matches!(item, Item::Error))
}

fn build_limits(raw: Option<&super::raw::RawLimits>, push: &mut impl FnMut(&str, String)) -> Limits {
    let mut limits = Limits::default();
    let Some(raw) = raw else { return limits };
    let mut set = |key: &str, value: Option<u64>, slot: &mut u64| match value {
        Some(0) => push(&format!("limits.{key}"), "must be at least 1".into()),
        Some(n) => *slot = n,
        None => {}
    };
    set("max_expansion", raw.max_expansion, &mut limits.max_expansion);
    set("max_bytes", raw.max_bytes, &mut limits.max_bytes);
    set("max_record_bytes", raw.max_record_bytes, &mut limits.max_record_bytes);
    set("max_columns", raw.max_columns, &mut limits.max_columns);
    set("max_json_depth", raw.max_json_depth, &mut limits.max_json_depth);
    limits.require_final_newline = raw.require_final_newline.unwrap_or(false);
    limits
}

fn build_mapping(raw: &RawSource, label: &str, push: &mut impl FnMut(&str, String)) -> Mapping {
    let mut mapping = Mapping::new(label, raw.key.trim());
    if raw.key.trim().is_empty() {
        push("key", "must name the column that identifies a record".into());
    }
    for (name, column) in &raw.fields {
        match Field::parse(name) {
            Some(Field::CaseKey) => push(&format!("fields.{name}"), "use `key` for the record key".into()),
            Some(field) if !column.trim().is_empty() => {
                mapping.columns.insert(field, column.trim().to_string());
            }
            Some(_) => push(&format!("fields.{name}"), "column name is empty".into()),
            None => push(&format!("fields.{name}"), "not a canonical field".into()),
        }
    }
    for (name, map) in &raw.values {
        let Some(field) = Field::parse(name).filter(|f| !f.is_date()) else {
            push(&format!("values.{name}"), "not a canonical non-date field".into());
            continue;
        };
        let map: HashMap<String, String> =
            map.iter().map(|(k, v)| (k.trim().to_lowercase(), v.clone())).collect();
        mapping.values.insert(field, map);
    }
    if let Some(tokens) = &raw.missing {
        mapping.missing_tokens = tokens.iter().map(|t| t.trim().to_lowercase()).collect();
    }
    if let Some(formats) = &raw.date_formats {
        for format in formats.iter().filter(|f| !valid_date_format(f)) {
            push("date_formats", format!("\"{format}\" is not a valid date format"));
        }
        mapping.date_formats = formats.clone();
    }
    if let Some(sep) = &raw.list_separator {
        if sep.is_empty() {
            push("list_separator", "must not be empty".into());
        }
        mapping.list_separator = sep.clone();
    }
    mapping.ignore = raw.ignore.iter().cloned().collect::<BTreeSet<_>>();
    mapping.delimiter = raw.delimiter.as_deref().and_then(|d| parse_delimiter(d, push));
    mapping.fallback_encoding =
        raw.encoding_fallback.as_deref().and_then(|name| match name.to_ascii_lowercase().as_str() {
            "windows-1252" | "cp1252" => Some(LegacyEncoding::Windows1252),
            "latin-1" | "latin1" | "iso-8859-1" => Some(LegacyEncoding::Latin1),
            _ => {
                push("encoding_fallback", format!("\"{name}\" is not one of windows-1252, latin-1"));
                None
            }
        });
    mapping
}

fn parse_delimiter(text: &str, push: &mut impl FnMut(&str, String)) -> Option<u8> {
    match text {
        "\\t" | "tab" | "\t" => Some(b'\t'),
        one if one.len() == 1 && one.is_ascii() => Some(one.as_bytes()[0]),
        other => {
            push("delimiter", format!("\"{other}\" must be one ASCII character or \"tab\""));
            None
        }
    }
}

fn hash_settings(raw: &RawSource) -> String {
    let json = serde_json::to_string(raw).unwrap_or_default();
    let digest = Sha256::digest(json.as_bytes());
    let hex: String = digest.iter().map(|b| format!("{b:02x}")).collect();
    hex[..16].to_string()
}
