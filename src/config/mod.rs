//! The one TOML config file, in two phases: `raw` is what the user wrote (serde, unknown keys
//! refused), `Config` is what the program uses, validated once at load (durations, cron
//! schedules, mappings compiled). Every error names its key path, e.g.
//! `source[0].schedule: invalid cron expression`. Secrets never live in the file: only the
//! names of environment variables that hold them.

pub mod alerting;
pub mod analysis;
pub mod mapping;
pub mod query;
mod raw;
pub mod rule_params;
pub mod rules;
pub mod schedule;
mod source;

use std::fmt::Write as _;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::time::Duration;

pub use self::alerting::{AlertSettings, QualitySettings, Severity};
pub use self::analysis::{AGE_BAND_EDGES, AnalysisConfig, DelayEnd, TriangleSpec};
use self::raw::RawConfig;
use self::schedule::Schedule;
pub use self::source::{
    AsOfRule, FolderSettings, HOLD_REMOVED_MIN, Location, SourceConfig, UrlSettings, defaults,
};
pub use query::SqlLimits;

/// The example config that `tidemark init` writes, with comments.
pub const EXAMPLE: &str = include_str!("../../config/example.toml");

/// Default bind address of the API, dashboard and ops endpoints: loopback only, because the
/// store holds patient-level data.
pub const DEFAULT_BIND: &str = "127.0.0.1:8440";

#[derive(Debug, Clone)]
pub struct Config {
    /// The file it was read from (relative paths in it are relative to its folder).
    pub file: PathBuf,
    pub store: StoreConfig,
    pub sources: Vec<SourceConfig>,
    pub email: Option<EmailConfig>,
    pub webhook: Option<WebhookConfig>,
    pub bind: SocketAddr,
    /// Limits of the API and of analysts' SQL (`[serve]`).
    pub serve: ServeLimits,
    pub log_json: bool,
    pub analysis: AnalysisConfig,
    /// `[alert]`: lifecycle, retries, rule parameter overrides.
    pub alerting: AlertSettings,
    /// `[quality]`: what the quality measures use.
    pub quality: QualitySettings,
    /// `serve.public_url`: the dashboard as people reach it (links in alert messages).
    pub public_url: Option<String>,
    /// Settings that still work but are deprecated (old key names), one line each; shown by
    /// `check-config` and on stderr whenever the config is loaded.
    pub warnings: Vec<String>,
}

/// How long requests and analysts' queries may run, how much a query may hold and return,
/// and how many queries the API runs at once.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ServeLimits {
    pub query: SqlLimits,
    /// An API request that takes longer is answered 408 and dropped.
    pub request_timeout: Duration,
    /// Analysts' queries the API runs at once; one more waits briefly, then gets 503.
    pub query_concurrency: usize,
}

/// Default number of analysts' queries run at once: two per core of the machine this was
/// sized on (two cores), so queries share the CPU with the ingest writer, and four queries
/// at their memory limits stay well within the server's memory.
pub const DEFAULT_QUERY_CONCURRENCY: usize = 4;

/// Default API request timeout: longer than the SQL time limit, so a slow query ends with
/// its own clear message rather than the generic timeout.
pub const DEFAULT_REQUEST_TIMEOUT: Duration = Duration::from_secs(30);

#[derive(Debug, Clone)]
pub struct StoreConfig {
    pub path: PathBuf,
    pub archive: PathBuf,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Tls {
    None,
    StartTls,
    Implicit,
}

#[derive(Debug, Clone)]
pub struct EmailConfig {
    pub smtp_host: String,
    pub smtp_port: u16,
    pub tls: Tls,
    pub from: String,
    pub to: Vec<String>,
    pub username_env: Option<String>,
    pub password_env: Option<String>,
    /// Only alerts at or above this severity go to this channel.
    pub min_severity: Severity,
    /// When set, this channel takes alerts below critical as one digest at each fire time of
    /// the schedule instead of one message each; critical ones go out at once.
    pub digest: Option<Schedule>,
    pub timeout: Duration,
}

#[derive(Debug, Clone)]
pub struct WebhookConfig {
    pub url: String,
    pub secret_env: Option<String>,
    pub min_severity: Severity,
    /// As for email: a digest schedule for alerts below critical.
    pub digest: Option<Schedule>,
    pub timeout: Duration,
}

#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    #[error("cannot read config {path}: {source}")]
    Read { path: PathBuf, source: std::io::Error },
    #[error("config {path} is not valid TOML: {message}")]
    Syntax { path: PathBuf, message: String },
    #[error("config {path} has {} problem(s):\n  {}", problems.len(), problems.join("\n  "))]
    Invalid { path: PathBuf, problems: Vec<String> },
}

impl Config {
    /// Reads and validates a config file.
    pub fn load(path: &Path) -> Result<Config, ConfigError> {
        let text = std::fs::read_to_string(path)
            .map_err(|source| ConfigError::Read { path: path.to_path_buf(), source })?;
        Config::parse(&text, path)
    }

    /// Validates config text as if it had been read from `path`.
    pub fn parse(text: &str, path: &Path) -> Result<Config, ConfigError> {
        let raw: RawConfig = toml::from_str(text).map_err(|err| ConfigError::Syntax {
            path: path.to_path_buf(),
            message: err.to_string().trim_end().replace('\n', "\n  "),
        })?;
        let base = path.parent().unwrap_or(Path::new(".")).to_path_buf();
        let mut problems = Vec::new();
        let config = build(raw, path, &base, &mut problems);
        if problems.is_empty() {
            Ok(config)
        } else {
            Err(ConfigError::Invalid { path: path.to_path_buf(), problems })
        }
    }

    /// The reporting triangles the store maintains for every source.
    pub fn triangle_spec(&self) -> TriangleSpec {
        TriangleSpec {
            ref_fields: self.analysis.reference_fields.clone(),
            strata: self.analysis.strata.clone(),
            age_edges: self.analysis.age_bands.clone(),
        }
    }

    pub fn source(&self, name: &str) -> Option<&SourceConfig> {
        self.sources.iter().find(|s| s.name == name)
    }

    /// The resolved config as text, secrets redacted: environment variable names are shown
    /// with whether they are set, never their values; webhook URLs lose their path.
    pub fn describe(&self) -> String {
        let mut out = String::new();
        let _ = writeln!(out, "config: {}", self.file.display());
        let _ = writeln!(out, "store: {}", self.store.path.display());
        let _ = writeln!(out, "archive: {}", self.store.archive.display());
        let _ = writeln!(out, "serve: {}", self.bind);
        let _ = writeln!(out, "log: {}", if self.log_json { "json" } else { "text" });
        for source in &self.sources {
            out.push_str(&source.describe());
        }
        if let Some(email) = &self.email {
            let _ = writeln!(
                out,
                "email: {}:{} tls={:?} from={} to={} username={} password={} min_severity={} digest={} timeout={}ms",
                email.smtp_host,
                email.smtp_port,
                email.tls,
                email.from,
                email.to.join(","),
                env_state(email.username_env.as_deref()),
                env_state(email.password_env.as_deref()),
                email.min_severity.name(),
                email.digest.as_ref().map_or("none", |d| d.text()),
                email.timeout.as_millis(),
            );
        }
        if let Some(webhook) = &self.webhook {
            let _ = writeln!(
                out,
                "webhook: {} secret={} min_severity={} digest={} timeout={}ms",
                redact_url(&webhook.url),
                env_state(webhook.secret_env.as_deref()),
                webhook.min_severity.name(),
                webhook.digest.as_ref().map_or("none", |d| d.text()),
                webhook.timeout.as_millis()
            );
        }
        out.push_str(&self.describe_alerting());
        out
    }
}

/// `NAME (set)` / `NAME (not set)` / `-`, never the value.
pub fn env_state(name: Option<&str>) -> String {
    match name {
        None => "-".into(),
        Some(name) if std::env::var_os(name).is_some() => format!("${name} (set)"),
        Some(name) => format!("${name} (not set)"),
    }
}

/// Keeps scheme and host; paths and queries of hook URLs often carry tokens.
pub fn redact_url(url: &str) -> String {
    match url.split_once("://") {
        Some((scheme, rest)) => {
            let host = rest.split(['/', '?']).next().unwrap_or_default();
            let host = host.rsplit('@').next().unwrap_or(host);
            if rest.len() > host.len() {
                format!("{scheme}://{host}/[redacted]")
            } else {
                format!("{scheme}://{host}")
            }
        }
        None => "[redacted]".into(),
    }
}

fn build(raw: RawConfig, file: &Path, base: &Path, problems: &mut Vec<String>) -> Config {
    let resolve = |p: &str| base.join(p);
    let store = StoreConfig {
        path: resolve(raw.store.path.as_deref().unwrap_or("data/tidemark.db")),
        archive: resolve(raw.store.archive.as_deref().unwrap_or("data/archive")),
    };
    let mut sources: Vec<SourceConfig> = Vec::new();
    for (idx, raw_source) in raw.sources.into_iter().enumerate() {
        let label = format!("source[{idx}]");
        if sources.iter().any(|s| s.name == raw_source.name) {
            problems.push(format!("{label}.name: \"{}\" is used by another source", raw_source.name));
        }
        if let Some(source) = source::build(raw_source, &label, base, problems) {
            sources.push(source);
        }
    }
    let bind = raw.serve.bind.as_deref().unwrap_or(DEFAULT_BIND);
    let bind = bind.parse().unwrap_or_else(|_| {
        problems.push(format!("serve.bind: \"{bind}\" is not an address:port"));
        DEFAULT_BIND.parse().unwrap()
    });
    let serve = build_serve_limits(&raw.serve, problems);
    let log_json = match raw.log.format.as_deref() {
        None | Some("text") => false,
        Some("json") => true,
        Some(other) => {
            problems.push(format!("log.format: \"{other}\" is not one of text, json"));
            false
        }
    };
    let analysis = analysis::build(raw.analysis, problems);
    let quality = alerting::build_quality(raw.quality, problems);
    let mut warnings = Vec::new();
    let settings = build_alert_settings(&raw.alert, problems, &mut warnings);
    let public_url = raw.serve.public_url.map(|u| u.trim_end_matches('/').to_string());
    Config {
        alerting: settings,
        quality,
        public_url,
        analysis,
        file: file.to_path_buf(),
        store,
        sources,
        email: raw.alert.email.and_then(|e| build_email(e, problems)),
        webhook: raw.alert.webhook.and_then(|w| build_webhook(w, problems)),
        bind,
        serve,
        log_json,
        warnings,
    }
}

fn build_serve_limits(raw: &raw::RawServe, problems: &mut Vec<String>) -> ServeLimits {
    let mut duration = |key: &str, text: Option<&str>, default: Duration| match text {
        None => default,
        Some(text) => parse_duration(text).filter(|d| !d.is_zero()).unwrap_or_else(|| {
            problems.push(format!("serve.{key}: \"{text}\" is not a duration such as 10s"));
            default
        }),
    };
    let timeout = duration("query_timeout", raw.query_timeout.as_deref(), query::DEFAULT_TIMEOUT);
    let request_timeout =
        duration("request_timeout", raw.request_timeout.as_deref(), DEFAULT_REQUEST_TIMEOUT);
    let max_rows = raw.query_max_rows.unwrap_or(query::DEFAULT_MAX_ROWS);
    if max_rows == 0 {
        problems.push("serve.query_max_rows: must be at least 1".into());
    }
    let query = SqlLimits {
        max_rows: max_rows.max(1),
        timeout,
        max_value_bytes: value_limit(raw.query_max_value_bytes, problems),
        max_answer_bytes: at_least_one(
            "query_max_answer_bytes",
            raw.query_max_answer_bytes,
            query::DEFAULT_MAX_ANSWER_BYTES,
            problems,
        ),
        sqlite_heap_bytes: raw.sqlite_heap_bytes.unwrap_or(query::DEFAULT_SQLITE_HEAP_BYTES),
    };
    let query_concurrency =
        at_least_one("query_concurrency", raw.query_concurrency, DEFAULT_QUERY_CONCURRENCY, problems);
    ServeLimits { query, request_timeout, query_concurrency }
}

/// `serve.<key>`: a count or size that must be at least 1.
fn at_least_one(key: &str, value: Option<usize>, default: usize, problems: &mut Vec<String>) -> usize {
    match value {
        None => default,
        Some(0) => {
            problems.push(format!("serve.{key}: must be at least 1"));
            default
        }
        Some(n) => n,
    }
}

/// `serve.query_max_value_bytes`: at least 1, at most SQLite's own maximum.
fn value_limit(value: Option<usize>, problems: &mut Vec<String>) -> usize {
    use query::{DEFAULT_MAX_VALUE_BYTES, MAX_VALUE_BYTES_CEILING};
    let bytes = at_least_one("query_max_value_bytes", value, DEFAULT_MAX_VALUE_BYTES, problems);
    if bytes > MAX_VALUE_BYTES_CEILING {
        problems.push(format!(
            "serve.query_max_value_bytes: at most {MAX_VALUE_BYTES_CEILING} (SQLite's maximum)"
        ));
        return DEFAULT_MAX_VALUE_BYTES;
    }
    bytes
}

fn build_alert_settings(
    raw: &raw::RawAlert,
    problems: &mut Vec<String>,
    warnings: &mut Vec<String>,
) -> AlertSettings {
    use alerting::duration_or;
    let d = AlertSettings::default();
    let mut settings = AlertSettings {
        resend_after: duration_or(
            raw.resend_after.as_deref(),
            "alert.resend_after",
            d.resend_after,
            problems,
        ),
        resolve_after: raw.resolve_after.unwrap_or(d.resolve_after).max(1),
        max_age: duration_or(raw.max_age.as_deref(), "alert.max_age", d.max_age, problems),
        retry_base: duration_or(raw.retry_base.as_deref(), "alert.retry_base", d.retry_base, problems),
        retry_cap: duration_or(raw.retry_cap.as_deref(), "alert.retry_cap", d.retry_cap, problems),
        failed_polls: raw.failed_polls.unwrap_or(d.failed_polls).max(1),
        small_cell_max: raw.small_cell_max.unwrap_or(d.small_cell_max),
        catch_up_age: duration_or(
            raw.catch_up_age.as_deref(),
            "alert.catch_up_age",
            d.catch_up_age,
            problems,
        ),
        digest_wait: duration_or(raw.digest_wait.as_deref(), "alert.digest_wait", d.digest_wait, problems),
        rules: rule_params::build(&raw.rules, problems, warnings),
    };
    settings.rules.count.small_cell_max = settings.small_cell_max;
    if settings.retry_base.is_zero() {
        problems.push("alert.retry_base: must be more than zero".into());
    }
    settings
}

impl Config {
    fn describe_alerting(&self) -> String {
        let a = &self.alerting;
        let mut out = format!(
            "alert: resend_after={}s resolve_after={} max_age={}s retry_base={}ms retry_cap={}ms failed_polls={} small_cell_max={} catch_up_age={}s digest_wait={}s\n",
            a.resend_after.as_secs(),
            a.resolve_after,
            a.max_age.as_secs(),
            a.retry_base.as_millis(),
            a.retry_cap.as_millis(),
            a.failed_polls,
            a.small_cell_max,
            a.catch_up_age.as_secs(),
            a.digest_wait.as_secs()
        );
        let _ = writeln!(out, "alert.rules: {:?}", a.rules);
        let lag: Vec<&str> = self.quality.lag_from.iter().map(|f| f.name()).collect();
        let _ = writeln!(out, "quality: lag_from={}", lag.join(","));
        if let Some(url) = &self.public_url {
            let _ = writeln!(out, "serve.public_url: {url}");
        }
        out
    }
}

fn build_email(raw: raw::RawEmail, problems: &mut Vec<String>) -> Option<EmailConfig> {
    let tls = match raw.tls.as_deref().unwrap_or("starttls") {
        "none" => Tls::None,
        "starttls" => Tls::StartTls,
        "tls" => Tls::Implicit,
        other => {
            problems.push(format!("alert.email.tls: \"{other}\" is not one of none, starttls, tls"));
            return None;
        }
    };
    let Some((host, port)) = raw.smtp.rsplit_once(':').and_then(|(h, p)| Some((h, p.parse().ok()?))) else {
        problems.push(format!("alert.email.smtp: \"{}\" is not host:port", raw.smtp));
        return None;
    };
    if raw.to.is_empty() {
        problems.push("alert.email.to: needs at least one address".into());
    }
    Some(EmailConfig {
        smtp_host: host.to_string(),
        smtp_port: port,
        tls,
        from: raw.from,
        to: raw.to,
        username_env: raw.username_env,
        password_env: raw.password_env,
        min_severity: alerting::severity_or(
            raw.min_severity.as_deref(),
            "alert.email.min_severity",
            problems,
        ),
        digest: digest_schedule(raw.digest.as_deref(), "alert.email.digest", problems),
        timeout: alerting::duration_or(
            raw.timeout.as_deref(),
            "alert.email.timeout",
            alerting::DEFAULT_CHANNEL_TIMEOUT,
            problems,
        ),
    })
}

fn build_webhook(raw: raw::RawWebhook, problems: &mut Vec<String>) -> Option<WebhookConfig> {
    if !(raw.url.starts_with("http://") || raw.url.starts_with("https://")) {
        problems.push("alert.webhook.url: must start with http:// or https://".into());
        return None;
    }
    Some(WebhookConfig {
        min_severity: alerting::severity_or(
            raw.min_severity.as_deref(),
            "alert.webhook.min_severity",
            problems,
        ),
        digest: digest_schedule(raw.digest.as_deref(), "alert.webhook.digest", problems),
        timeout: alerting::duration_or(
            raw.timeout.as_deref(),
            "alert.webhook.timeout",
            alerting::DEFAULT_CHANNEL_TIMEOUT,
            problems,
        ),
        url: raw.url,
        secret_env: raw.secret_env,
    })
}

/// A channel's `digest` schedule, if given and valid.
fn digest_schedule(text: Option<&str>, key: &str, problems: &mut Vec<String>) -> Option<Schedule> {
    match Schedule::parse(text?) {
        Ok(schedule) => Some(schedule),
        Err(why) => {
            problems.push(format!("{key}: {why}"));
            None
        }
    }
}

/// Parses `250ms`, `90s`, `15m`, `26h`, `2d` (a whole number and one unit).
pub fn parse_duration(text: &str) -> Option<Duration> {
    let text = text.trim();
    let split = text.find(|c: char| !c.is_ascii_digit())?;
    let (number, unit) = text.split_at(split);
    let number: u64 = number.parse().ok()?;
    let millis = match unit.trim() {
        "ms" => 1,
        "s" => 1000,
        "m" => 60_000,
        "h" => 3_600_000,
        "d" => 86_400_000,
        _ => return None,
    };
    Some(Duration::from_millis(number.checked_mul(millis)?))
}

#[cfg(test)]
mod tests;
