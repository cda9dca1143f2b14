//! Alerts: the pure rules (`rules`), the words of a message (`message`), the outbox's retry
//! policy (`outbox`) and the two channels (`email`, `webhook`). The lifecycle's SQL is in
//! `store::alerts`; evaluation and the delivery loop are in `app::alerting`.

pub mod email;
pub mod message;
pub mod outbox;
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
