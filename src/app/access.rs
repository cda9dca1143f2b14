//! Analysts' access from the command line: `tidemark token create|list|revoke`, and
//! `tidemark serve` (the API, ops endpoints and dashboard without polling). Also the
//! `serve::api::Listings` implementation: each request's parameters become a
//! `queries::Question`, answered by the same `queries::answer` the CLI prints, and the
//! answer's error kind chooses the status code.

use std::sync::Arc;
use std::sync::atomic::AtomicBool;

use anyhow::{Context, Result};
use tokio::net::TcpListener;
use tokio_util::sync::CancellationToken;

use super::errors::UsageError;
use super::queries::{self, CurveArgs, DelaysArgs, NowcastArgs, QueryError, Question, ScoresArgs};
use crate::analysis::delay::FamilyChoice;
use crate::config::Config;
use crate::metrics::Metrics;
use crate::model::MethodChoice;
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
    let dashboard = serve::dashboard::DashboardState::new(config.store.path.clone(), &config.analysis);
    serve::app_router(api_state(config), ops_state, dashboard)
}

/// The API's listings, answered by the CLI's own functions.
#[derive(Debug)]
struct CliListings {
    config: Arc<Config>,
}

impl Listings for CliListings {
    fn listing(&self, reader: &Reader, endpoint: Endpoint, params: &Params) -> Result<Table, ListingError> {
        let question = question(endpoint, params)?;
        match queries::answer(&self.config, reader, &question) {
            Ok(answer) => Ok(answer.table),
            Err(QueryError::BadRequest(message)) => Err(ListingError::BadRequest(message)),
            Err(QueryError::NotFound(message)) => Err(ListingError::NotFound(message)),
            Err(QueryError::Unavailable(message)) => Err(ListingError::Unavailable(message)),
            Err(QueryError::Failed(err)) => {
                tracing::warn!(error = %format!("{err:#}"), "API listing failed");
                Err(ListingError::Internal)
            }
        }
    }
}

/// The question an API request asks, from its query parameters (a missing or malformed
/// parameter is a 400 naming it).
fn question<'p>(endpoint: Endpoint, p: &'p Params) -> Result<Question<'p>, ListingError> {
    let format = OutputFormat::Json;
    Ok(match endpoint {
        Endpoint::Sources => Question::Sources,
        Endpoint::Snapshots => Question::Snapshots { source: p.get("source") },
        Endpoint::Curve => Question::Curve(CurveArgs {
            source: p.required("source")?,
            by: p.required("by")?,
            as_of: p.get("as_of"),
            stratify: p.get("stratify"),
            format,
        }),
        Endpoint::Nowcast => Question::Nowcast(NowcastArgs {
            source: p.required("source")?,
            by: p.required("by")?,
            as_of: p.get("as_of"),
            method: p.vocabulary("method")?.unwrap_or(MethodChoice::Auto),
            stratify: p.get("stratify"),
            format,
        }),
        Endpoint::Scores => Question::Scores(ScoresArgs {
            source: p.required("source")?,
            by: p.required("by")?,
            as_of: p.get("as_of"),
        }),
        Endpoint::Delays => Question::Delays(DelaysArgs {
            source: p.required("source")?,
            from: p.required("from")?,
            to: p.required("to")?,
            family: p.vocabulary("family")?.unwrap_or(FamilyChoice::Auto),
            as_of: p.get("as_of"),
            stratify: p.get("stratify"),
            by_week: p.flag("by_week")?,
            compare_by: p.get("compare_by"),
            format,
        }),
        Endpoint::Quality => Question::Quality { source: p.get("source"), as_of: p.get("as_of") },
        Endpoint::Alerts => Question::Alerts { source: p.get("source"), as_of: p.get("as_of") },
    })
}
