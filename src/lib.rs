//! tidemark keeps a health department's case line lists under version control and watches
//! them: it ingests CSV and JSON extracts, versions every record in SQLite so that any past
//! figure can be reproduced, and reports what each extract changed.
//!
//! # Layout
//!
//! In reading order, following the data:
//!
//! - [`model`]: canonical fields, the typed case record, snapshot statuses.
//! - [`config`]: the TOML config, validated once into typed settings.
//! - [`source`]: finding new extracts in folders and fetching them from URLs (no parsing).
//! - [`extract`]: bytes of one extract -> canonical rows and row problems (pure, streaming).
//! - [`store`]: SQLite: migrations, the one writer, as-of reads, the raw archive.
//! - [`analysis`]: pure statistics: triangle, nowcasts, scores, delay fits, tests, C1/C2/C3 and
//!   count CUSUM (`aberration`), CUSUM, EWMA and p-charts (`change`).
//! - [`alert`]: signal vocabulary and the pure alert rules (quality, lag, volume, staleness,
//!   count aberration) that turn measured aggregates into signals.
//! - [`table`]: listings rendered as text, CSV or JSON.
//! - [`text`]: outside text (file names, URLs) escaped before it reaches a log or a terminal.
//! - [`metrics`]: the daemon's counters and their Prometheus text.
//! - [`export`]: line lists, nowcasts and delay fits written as CSV or Parquet (files 0600).
//! - [`serve`]: HTTP edges (ops endpoints, the dashboard; the demo's extract server); read-only.
//! - [`demo`]: an invented scenario with known truth, for the demo and tests.
//! - [`app`]: command bodies, the ingest pipeline, the writer thread and the daemon (the only
//!   place that uses `anyhow`).

pub mod alert;
pub mod analysis;
pub mod app;
pub mod config;
pub mod demo;
pub mod export;
pub mod extract;
pub mod metrics;
pub mod model;
pub mod serve;
pub mod source;
pub mod store;
pub mod table;
pub mod text;
