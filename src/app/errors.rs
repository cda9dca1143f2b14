//! The kinds of failure the edges tell apart: a mistake in how tidemark was called
//! (`UsageError`: exit code 2, HTTP 400) and something asked for that does not exist
//! (`NotFound`: HTTP 404). Errors carry one of these in their chain; the CLI and the API
//! decide by the type, never by the message text.

/// A mistake in how tidemark was called (exit code 2), as opposed to a failure (exit code 1).
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct UsageError(pub String);

/// A `UsageError` with this message.
pub fn usage(message: impl Into<String>) -> anyhow::Error {
    UsageError(message.into()).into()
}

/// What was asked for does not exist (yet): a source without snapshots, no applied snapshot
/// at the time asked (exit code 1; HTTP 404).
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct NotFound(pub String);

/// A `NotFound` error with this message.
pub fn not_found(message: impl Into<String>) -> anyhow::Error {
    NotFound(message.into()).into()
}
