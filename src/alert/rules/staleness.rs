//! The staleness rules: a source with no applied snapshot within its expected interval, and a
//! run of failed polls.

use std::time::Duration;

use chrono::{DateTime, Utc};

use crate::alert::{Figure, Outcome, Rule, Severity, Signal};
use crate::config::rules::StalenessParams;

/// Input of [`stale_source`] and [`failing_polls`].
#[derive(Debug, Clone, PartialEq)]
pub struct StalenessInput {
    pub source: String,
    /// The time of evaluation (passed in; the rules read no clock).
    pub now: DateTime<Utc>,
    /// When the latest snapshot was applied, if ever.
    pub last_applied: Option<DateTime<Utc>>,
    /// When the source started being watched; counts as the last snapshot when there is none.
    pub watching_since: DateTime<Utc>,
    /// The source's `expect_every`; `None` disables [`stale_source`].
    pub expect_every: Option<Duration>,
    pub consecutive_failures: u32,
}

/// Alarms when no snapshot was applied within `expect_every` of `now`.
pub fn stale_source(input: &StalenessInput) -> Outcome {
    let Some(every) = input.expect_every else {
        return Outcome::NotEnoughData("no expect_every configured".into());
    };
    let since = input.last_applied.unwrap_or(input.watching_since);
    let elapsed_hours = (input.now - since).num_seconds() as f64 / 3600.0;
    let limit_hours = every.as_secs_f64() / 3600.0;
    if elapsed_hours <= limit_hours {
        return Outcome::Clear;
    }
    let what =
        if input.last_applied.is_some() { "since the last applied snapshot" } else { "and no snapshot yet" };
    Outcome::Signal(Signal {
        rule: Rule::StaleSource,
        source: input.source.clone(),
        subject: String::new(),
        severity: if elapsed_hours > 2.0 * limit_hours { Severity::Critical } else { Severity::Warning },
        measure: "hours_since_snapshot",
        observed: elapsed_hours,
        threshold: limit_hours,
        figures: vec![Figure::new("expect_every_hours", limit_hours)],
        summary: format!(
            "{}: {:.1} hours {} (expected every {:.1} hours)",
            input.source, elapsed_hours, what, limit_hours
        ),
    })
}

/// Alarms when the latest `max_consecutive_failures` polls or more all failed.
pub fn failing_polls(input: &StalenessInput, params: &StalenessParams) -> Outcome {
    let limit = params.max_consecutive_failures.max(1);
    if input.consecutive_failures < limit {
        return Outcome::Clear;
    }
    Outcome::Signal(Signal {
        rule: Rule::FailingPolls,
        source: input.source.clone(),
        subject: String::new(),
        severity: if input.consecutive_failures >= 2 * limit {
            Severity::Critical
        } else {
            Severity::Warning
        },
        measure: "consecutive_failures",
        observed: f64::from(input.consecutive_failures),
        threshold: f64::from(limit),
        figures: Vec::new(),
        summary: format!("{}: the last {} polls failed", input.source, input.consecutive_failures),
    })
}
