//! Analysts' access from the command line: `tidemark token create|list|revoke`, and
//! `tidemark serve` (the API, ops endpoints and dashboard without polling). Also the
//! `serve::api::Listings` implementation that answers the API's listings with the same
//! functions the CLI prints, so the two always agree.

use std::sync::Arc;
use std::sync::atomic::AtomicBool;

use anyhow::{Context, Result};
use tokio::net::TcpListener;
use tokio_util::sync::CancellationToken;

use super::commands::{self, CurveArgs, DelaysArgs, NowcastArgs};
use super::errors::{NotFound, UsageError};
use crate::analysis::delay::FamilyChoice;
use crate::config::Config;
use crate::metrics::Metrics;
use crate::model::{MethodChoice, SnapshotStatus};
use crate::serve::api::{ApiState, Endpoint, ListingError, Listings, Params};
use crate::serve::{self, auth, ops};
use crate::store::{self, Reader, TokenScope};
use crate::table::{OutputFormat, Table};

/// `tidemark token create NAME --scope read|sql`: prints the token once.
pub fn token_create(config: &Config, name: &str, scope: TokenScope) -> Result<String> {
    if name.is_empty() || !name.chars().all(|c| c.is_ascii_alphanumeric() || "-_.".contains(c)) {
        return Err(
            UsageError(format!("{name:?}: a token name uses letters, digits, '-', '_' and '.'")).into()
        );
    }
    let token = auth::new_token();
    store::create_token(&config.store.path, name, scope, &auth::token_sha256(&token), &auth::hint(&token))?;
    Ok(format!(
        "{token}\n\ntoken {name:?} (scope {}) created; this is the only time it is shown, keep it in a secret store.\n\
         Use it as: Authorization: Bearer <token>\n",
        scope.name()
    ))
}

/// `tidemark token list`: names, scopes, hints and dates; never the tokens.
pub fn token_list(config: &Config, format: OutputFormat) -> Result<String> {
    let reader = Reader::open(&config.store.path)?;
    let mut table = Table::new(&["name", "scope", "hint", "created_at", "revoked_at"]);
    for t in reader.tokens(false)? {
        table.push(vec![
            t.name.into(),
            t.scope.name().into(),
            t.hint.into(),
            t.created_at.into(),
            t.revoked_at.into(),
        ]);
    }
    Ok(table.render(format))
}

/// `tidemark token revoke NAME`: takes effect at the API's next request.
pub fn token_revoke(config: &Config, name: &str) -> Result<String> {
    Ok(if store::revoke_token(&config.store.path, name)? {
        format!("token {name:?} revoked\n")
    } else {
        format!("token {name:?} was already revoked\n")
    })
}

/// The API's state for `config`: the CLI's listings, the store, the limits.
pub fn api_state(config: &Arc<Config>) -> ApiState {
    ApiState::new(config.store.path.clone(), Arc::new(CliListings { config: config.clone() }), config.serve)
}

/// `tidemark serve`: the API and ops endpoints on `serve.bind` until SIGTERM or Ctrl-C; no
/// polling, so it may run beside `tidemark run` on another address, or alone on a copy.
pub fn serve(config: Config) -> Result<()> {
    let runtime = tokio::runtime::Runtime::new().context("starting the async runtime")?;
    runtime.block_on(async move {
        let config = Arc::new(config);
        Reader::open(&config.store.path)?;
        let listener =
            TcpListener::bind(config.bind).await.with_context(|| format!("binding {}", config.bind))?;
        tracing::info!(bind = %config.bind, store = %config.store.path.display(), "serving the API");
        let shutdown = CancellationToken::new();
        let signal = shutdown.clone();
        tokio::spawn(async move {
            super::signals::stop_on_signal(signal).await;
        });
        serve::serve(listener, app_router(&config, None), shutdown).await.context("serving")?;
        Ok(())
    })
}

/// Everything served on `serve.bind`: the API, the dashboard and the ops endpoints. `running` says whether
/// a scheduler polls (the daemon); without one (`tidemark serve`) `/healthz` checks the store.
pub fn app_router(config: &Arc<Config>, ops_state: Option<ops::OpsState>) -> axum::Router {
    let ops_state = ops_state.unwrap_or_else(|| ops::OpsState {
        metrics: Arc::new(Metrics::default()),
        // No scheduler to wait for: healthy when the store answers.
        scheduler_running: Arc::new(AtomicBool::new(true)),
        store: config.store.path.clone(),
    });
    let dashboard = serve::dashboard::DashboardState { store: config.store.path.clone() };
    serve::app_router(api_state(config), ops_state, dashboard)
}

/// The API's listings, answered by the CLI's own functions.
#[derive(Debug)]
struct CliListings {
    config: Arc<Config>,
}

impl Listings for CliListings {
    fn listing(&self, reader: &Reader, endpoint: Endpoint, params: &Params) -> Result<Table, ListingError> {
        self.answer(reader, endpoint, params).map_err(classify)
    }
}

impl CliListings {
    fn answer(&self, reader: &Reader, endpoint: Endpoint, p: &Params) -> Result<Table> {
        let config = &self.config;
        let format = OutputFormat::Json;
        match endpoint {
            Endpoint::Sources => sources_table(config, reader),
            Endpoint::Snapshots => {
                if let Some(name) = p.get("source") {
                    known_source(config, name)?;
                }
                commands::snapshots_table(reader, p.get("source"))
            }
            Endpoint::Curve => {
                let args = CurveArgs {
                    source: p.required("source")?,
                    by: p.required("by")?,
                    as_of: p.get("as_of"),
                    stratify: p.get("stratify"),
                    format,
                };
                commands::curve_table(config, reader, &args)
            }
            Endpoint::Nowcast => {
                let args = NowcastArgs {
                    source: p.required("source")?,
                    by: p.required("by")?,
                    as_of: p.get("as_of"),
                    method: p.vocabulary("method")?.unwrap_or(MethodChoice::Auto),
                    stratify: p.get("stratify"),
                    format,
                };
                Ok(commands::nowcast_table(config, reader, &args)?.0)
            }
            Endpoint::Delays => {
                let args = DelaysArgs {
                    source: p.required("source")?,
                    from: p.required("from")?,
                    to: p.required("to")?,
                    family: p.vocabulary("family")?.unwrap_or(FamilyChoice::Auto),
                    as_of: p.get("as_of"),
                    stratify: p.get("stratify"),
                    by_week: p.flag("by_week")?,
                    compare_by: p.get("compare_by"),
                    format,
                };
                Ok(commands::delays_table(config, reader, &args)?.0)
            }
            Endpoint::Quality | Endpoint::Alerts => {
                let source = p.get("source");
                if let Some(name) = source {
                    known_source(config, name)?;
                }
                let as_of = p.get("as_of").map(commands::parse_time_arg).transpose()?;
                let table = if endpoint == Endpoint::Quality {
                    reader.quality(source, as_of)?
                } else {
                    reader.alerts_table(source, as_of)?
                };
                table.ok_or_else(|| {
                    anyhow::Error::new(Unavailable(format!(
                        "{} not available in this store (the quality and alerts tables are missing)",
                        if endpoint == Endpoint::Quality { "quality" } else { "alerts" }
                    )))
                })
            }
        }
    }
}

/// A feature this store does not have (503).
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
struct Unavailable(String);

fn known_source(config: &Config, name: &str) -> Result<()> {
    if config.source(name).is_none() {
        anyhow::bail!(UsageError(format!("no source named {name:?}")));
    }
    Ok(())
}

/// One row per configured source: kind, snapshots, and the latest applied snapshot.
fn sources_table(config: &Config, reader: &Reader) -> Result<Table> {
    let mut table =
        Table::new(&["source", "kind", "snapshots", "applied", "latest_snapshot_id", "latest_as_of"]);
    let snapshots = reader.snapshots(None)?;
    for source in &config.sources {
        let own: Vec<_> = snapshots.iter().filter(|s| s.source == source.name).collect();
        let applied: Vec<_> = own.iter().filter(|s| s.status == SnapshotStatus::Applied).collect();
        let latest = applied.last();
        table.push(vec![
            source.name.clone().into(),
            source.kind_name().into(),
            (own.len() as i64).into(),
            (applied.len() as i64).into(),
            latest.map(|s| s.snapshot_id).into(),
            latest.map(|s| s.as_of.clone()).into(),
        ]);
    }
    Ok(table)
}

/// Sorts an error into what the client did wrong (400), what is not there (404), what this
/// store cannot answer (503) or a failure (500). Messages come from the CLI's own errors,
/// which name fields and sources but never a cell value.
fn classify(err: anyhow::Error) -> ListingError {
    if let Some(listing) = err.downcast_ref::<ListingError>() {
        return listing.clone();
    }
    let message = err.to_string();
    if err.chain().any(|c| c.is::<UsageError>()) {
        return ListingError::BadRequest(message);
    }
    if err.chain().any(|c| c.is::<Unavailable>()) {
        return ListingError::Unavailable(message);
    }
    if err.chain().any(|c| c.is::<NotFound>()) {
        return ListingError::NotFound(message);
    }
    tracing::warn!(error = %format!("{err:#}"), "API listing failed");
    ListingError::Internal
}
