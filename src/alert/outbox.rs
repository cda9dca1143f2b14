//! The delivery policy of the outbox: when a failed message is tried again (capped
//! exponential backoff) and when it is given up as a dead letter (older than the maximum
//! age). Pure: time comes in as an argument. The loop that takes due rows and calls the
//! channels is `app::alerting`.

use std::time::Duration;

use chrono::{DateTime, Utc};

/// Retry settings of the outbox.
#[derive(Debug, Clone, Copy)]
pub struct RetryPolicy {
    pub base: Duration,
    pub cap: Duration,
    pub max_age: Duration,
}

/// The wait after the `attempt`-th failure (1-based): `min(cap, base * 2^(attempt-1))`.
pub fn backoff(policy: &RetryPolicy, attempt: u32) -> Duration {
    let factor = 2u32.saturating_pow(attempt.saturating_sub(1).min(30));
    policy.base.saturating_mul(factor).min(policy.cap)
}

/// When to try again after a failure at `now`, or `None` for a dead letter: a message
/// whose next try would fall past `created + max_age` is given up.
pub fn next_try(
    policy: &RetryPolicy,
    created: DateTime<Utc>,
    attempt: u32,
    now: DateTime<Utc>,
) -> Option<DateTime<Utc>> {
    let wait = chrono::Duration::from_std(backoff(policy, attempt)).ok()?;
    let deadline = created + chrono::Duration::from_std(policy.max_age).ok()?;
    let next = now + wait;
    (next <= deadline).then_some(next)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn policy() -> RetryPolicy {
        RetryPolicy {
            base: Duration::from_secs(30),
            cap: Duration::from_secs(600),
            max_age: Duration::from_secs(3600),
        }
    }

    #[test]
    fn backoff_doubles_then_caps() {
        let waits: Vec<u64> = (1..=7).map(|n| backoff(&policy(), n).as_secs()).collect();
        assert_eq!(waits, vec![30, 60, 120, 240, 480, 600, 600]);
        assert_eq!(backoff(&policy(), 1000).as_secs(), 600, "no overflow");
    }

    #[test]
    fn dead_letter_after_max_age() {
        let created = DateTime::parse_from_rfc3339("2026-03-01T00:00:00Z").unwrap().with_timezone(&Utc);
        let at = |secs| created + chrono::Duration::seconds(secs);
        assert_eq!(next_try(&policy(), created, 1, at(0)), Some(at(30)));
        assert_eq!(next_try(&policy(), created, 6, at(2900)), Some(at(3500)));
        assert_eq!(next_try(&policy(), created, 6, at(3100)), None, "3700 s is past the hour");
    }
}
