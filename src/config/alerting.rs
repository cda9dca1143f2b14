//! The `[alert]` lifecycle and delivery settings and the `[quality]` table: raw serde types
//! as written (unknown keys refused) and their validated forms. Channel secrets stay in
//! environment variables; only their names are kept here.

use std::time::Duration;

use serde::Deserialize;

use super::parse_duration;
use crate::model::Field;

pub use crate::model::Severity;

/// Default re-send interval of an alert nobody has acknowledged: a working shift.
pub const DEFAULT_RESEND_AFTER: Duration = Duration::from_secs(6 * 3600);
/// Default number of consecutive clear evaluations after which an alert resolves.
pub const DEFAULT_RESOLVE_AFTER: u32 = 3;
/// Default time a message is retried before it becomes a dead letter: a day, so a channel
/// that is down overnight still delivers in the morning.
pub const DEFAULT_MAX_AGE: Duration = Duration::from_secs(24 * 3600);
/// Default first retry delay and cap of the exponential backoff.
pub const DEFAULT_RETRY_BASE: Duration = Duration::from_secs(30);
pub const DEFAULT_RETRY_CAP: Duration = Duration::from_secs(30 * 60);
/// Default small-cell threshold: counts of 1 to 4 are not released exactly (common practice
/// in public-health releases, which suppress cells under 5).
pub const DEFAULT_SMALL_CELL_MAX: u32 = 4;
/// Default age of an extract past which the daemon is catching up (its alerts' messages are
/// held for one digest): two days, so a daily feed's normal extract never counts.
pub const DEFAULT_CATCH_UP_AGE: Duration = Duration::from_secs(2 * 86_400);
/// Default longest wait of a held message for its digest: a catch-up whose end never comes
/// (every extract of a source arrives old) still reports within half an hour.
pub const DEFAULT_DIGEST_WAIT: Duration = Duration::from_secs(30 * 60);
/// Default timeout of one delivery attempt.
pub const DEFAULT_CHANNEL_TIMEOUT: Duration = Duration::from_secs(10);

#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields)]
pub struct RawQuality {
    pub lag_from: Option<Vec<String>>,
}

/// The validated `[quality]` table.
#[derive(Debug, Clone)]
pub struct QualitySettings {
    /// Reference date of the reporting lag: the first of these present in a record.
    pub lag_from: Vec<Field>,
}

impl Default for QualitySettings {
    fn default() -> Self {
        QualitySettings { lag_from: vec![Field::OnsetDate, Field::SpecimenDate] }
    }
}

/// Lifecycle and delivery settings of `[alert]` (the channels are in `Config`).
#[derive(Debug, Clone)]
pub struct AlertSettings {
    pub resend_after: Duration,
    pub resolve_after: u32,
    pub max_age: Duration,
    pub retry_base: Duration,
    pub retry_cap: Duration,
    /// Consecutive failed polls of a source before the poll-failure rule fires.
    pub failed_polls: u32,
    /// Case counts from 1 to this are written as a range ("1-4 cases") in alert summaries and
    /// in the figures of outgoing messages, so a message that leaves the server cannot single
    /// out a few people. Default [`DEFAULT_SMALL_CELL_MAX`]; 0 turns it off.
    pub small_cell_max: u32,
    /// A snapshot whose as-of time is older than this when its rules are evaluated (or one
    /// with a newer snapshot of its source already committed) is part of a catch-up: its
    /// messages are held, and each channel receives one digest when the catch-up ends.
    pub catch_up_age: Duration,
    /// Longest a held message waits for its digest before the delivery loop sends one anyway.
    pub digest_wait: Duration,
    /// Typed rule parameters (defaults overridden by `[alert.rules.*]`).
    pub rules: super::rule_params::RuleParams,
}

impl Default for AlertSettings {
    fn default() -> Self {
        AlertSettings {
            resend_after: DEFAULT_RESEND_AFTER,
            resolve_after: DEFAULT_RESOLVE_AFTER,
            max_age: DEFAULT_MAX_AGE,
            retry_base: DEFAULT_RETRY_BASE,
            retry_cap: DEFAULT_RETRY_CAP,
            failed_polls: 3,
            small_cell_max: DEFAULT_SMALL_CELL_MAX,
            catch_up_age: DEFAULT_CATCH_UP_AGE,
            digest_wait: DEFAULT_DIGEST_WAIT,
            rules: super::rule_params::RuleParams::default(),
        }
    }
}

pub fn build_quality(raw: RawQuality, problems: &mut Vec<String>) -> QualitySettings {
    let Some(names) = raw.lag_from else { return QualitySettings::default() };
    let mut lag_from = Vec::new();
    for name in names {
        match Field::parse(&name).filter(|f| f.is_date()) {
            Some(field) => lag_from.push(field),
            None => problems.push(format!("quality.lag_from: \"{name}\" is not a date field")),
        }
    }
    QualitySettings { lag_from }
}

/// Reads a duration key, reporting a problem (and keeping the default) when it is bad.
pub fn duration_or(text: Option<&str>, key: &str, default: Duration, problems: &mut Vec<String>) -> Duration {
    match text {
        None => default,
        Some(text) => parse_duration(text).unwrap_or_else(|| {
            problems.push(format!("{key}: \"{text}\" is not a duration like 30s, 15m, 6h"));
            default
        }),
    }
}

/// Default lowest severity a channel receives: warnings and critical alerts page; `info`
/// messages need no action, so a channel takes them only when asked.
pub const DEFAULT_MIN_SEVERITY: Severity = Severity::Warning;

/// A channel's `min_severity`, [`DEFAULT_MIN_SEVERITY`] when not given.
pub fn severity_or(text: Option<&str>, key: &str, problems: &mut Vec<String>) -> Severity {
    match text {
        None => DEFAULT_MIN_SEVERITY,
        Some(text) => text.parse().unwrap_or_else(|e| {
            problems.push(format!("{key}: {e}"));
            DEFAULT_MIN_SEVERITY
        }),
    }
}
