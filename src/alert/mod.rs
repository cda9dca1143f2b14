//! Alerts: what a detector reports. This module owns signals (the rule, severity and figures
//! that tripped it; `Rule` and `Severity` themselves are vocabularies in `model`, re-exported
//! here) and, in [`rules`], the pure rule logic that turns measured inputs into signals. It does no IO and reads no clock; storing, deduplicating
//! and delivering alerts belong to the store and the outbox: `message` words a message,
//! `outbox` is the retry policy, `email` and `webhook` are the channels (the lifecycle's SQL is
//! in `store::alerts`, evaluation and the delivery loop in `app::alerting`). A signal is a prompt to
//! investigate, not a confirmed event, and it carries aggregates only, never a patient-level
//! value.

pub mod email;
pub mod message;
pub mod outbox;
pub mod rules;
pub mod webhook;

/// Why one delivery attempt did not succeed.
#[derive(Debug, thiserror::Error)]
pub enum DeliveryError {
    /// The channel cannot be used as configured (a missing secret, a bad address).
    #[error("{0}")]
    Setup(String),
    /// The attempt failed (refused, timed out, an error status); retried.
    #[error("{0}")]
    Failed(String),
}

pub use crate::model::{Rule, Severity};

/// A named number: an aggregate such as a share, a median lag or a baseline mean.
#[derive(Debug, Clone, PartialEq)]
pub struct Figure {
    /// snake_case name, e.g. `baseline_share`.
    pub name: &'static str,
    pub value: f64,
}

impl Figure {
    pub fn new(name: &'static str, value: f64) -> Figure {
        Figure { name, value }
    }
}

/// A tripped rule: what, where, how bad, and the aggregates that tripped it.
#[derive(Debug, Clone, PartialEq)]
pub struct Signal {
    pub rule: Rule,
    /// The source's configured name.
    pub source: String,
    /// The field or stratum (e.g. a jurisdiction); empty when the rule is about the whole
    /// source.
    pub subject: String,
    pub severity: Severity,
    /// What `observed` measures, snake_case (e.g. `missing_share`, `c1`, `hours_since_snapshot`).
    pub measure: &'static str,
    /// The measured value compared with the threshold.
    pub observed: f64,
    /// The value `observed` had to pass.
    pub threshold: f64,
    /// The baseline summary and any other aggregates behind the decision.
    pub figures: Vec<Figure>,
    /// One human-readable line with aggregates only.
    pub summary: String,
}

impl Signal {
    /// Stable identity of the condition: `rule|source|subject`. Two signals with the same
    /// fingerprint are the same alert.
    pub fn fingerprint(&self) -> String {
        fingerprint(self.rule, &self.source, &self.subject)
    }

    /// The figure with this name, if present.
    pub fn figure(&self, name: &str) -> Option<f64> {
        self.figures.iter().find(|f| f.name == name).map(|f| f.value)
    }
}

/// The fingerprint of a (rule, source, subject) triple, as [`Signal::fingerprint`] gives it; the
/// store can compute it for conditions that are clear. It begins with the rule's
/// [`Rule::episode`], so the count rules of one subject are one alert. `|` in names is escaped as `\|` so
/// different triples never collide.
pub fn fingerprint(rule: Rule, source: &str, subject: &str) -> String {
    let escape = |text: &str| text.replace('\\', "\\\\").replace('|', "\\|");
    format!("{}|{}|{}", rule.episode(), escape(source), escape(subject))
}

/// What one rule concluded for one subject.
#[derive(Debug, Clone, PartialEq)]
pub enum Outcome {
    /// The rule tripped.
    Signal(Signal),
    /// The rule was evaluated on enough data and did not trip (counts towards resolving an
    /// open alert).
    Clear,
    /// Too little data to evaluate; the reason is short and has no patient-level value. Neither
    /// raises nor resolves an alert.
    NotEnoughData(String),
}

impl Outcome {
    /// The signal, if the rule tripped.
    pub fn signal(&self) -> Option<&Signal> {
        match self {
            Outcome::Signal(signal) => Some(signal),
            _ => None,
        }
    }

    pub fn is_clear(&self) -> bool {
        matches!(self, Outcome::Clear)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_round_trip() {
        for rule in Rule::ALL {
            assert_eq!(Rule::parse(rule.name()), Some(rule));
        }
        for severity in [Severity::Info, Severity::Warning, Severity::Critical] {
            assert_eq!(Severity::parse(&severity.to_string()), Some(severity));
        }
        assert_eq!(Rule::parse("nope"), None);
        assert!(Severity::Critical > Severity::Warning);
    }

    #[test]
    fn fingerprints_are_stable_and_do_not_collide() {
        assert_eq!(fingerprint(Rule::LagJump, "labs", "North"), "lag_jump|labs|North");
        assert_eq!(fingerprint(Rule::StaleSource, "labs", ""), "stale_source|labs|");
        assert_ne!(fingerprint(Rule::LagJump, "a|b", "c"), fingerprint(Rule::LagJump, "a", "b|c"));
    }
}
