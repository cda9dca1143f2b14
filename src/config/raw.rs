//! The config file exactly as written: serde types with `deny_unknown_fields`, so a typo is an
//! error naming the key rather than a silently ignored setting. Nothing is interpreted here.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields)]
pub struct RawConfig {
    #[serde(default)]
    pub store: RawStore,
    #[serde(default, rename = "source")]
    pub sources: Vec<RawSource>,
    #[serde(default)]
    pub alert: RawAlert,
    #[serde(default)]
    pub serve: RawServe,
    #[serde(default)]
    pub log: RawLog,
    #[serde(default)]
    pub analysis: super::analysis::RawAnalysis,
    #[serde(default)]
    pub quality: super::alerting::RawQuality,
}

#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields)]
pub struct RawStore {
    pub path: Option<String>,
    pub archive: Option<String>,
}

/// One source. Serialised back (to JSON, keys sorted) to fingerprint the source's settings.
#[derive(Debug, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct RawSource {
    pub name: String,
    pub kind: String,
    pub path: Option<String>,
    pub url: Option<String>,
    pub pattern: Option<String>,
    pub schedule: Option<String>,
    pub extract: Option<String>,
    pub format: Option<String>,
    pub as_of: Option<String>,
    pub key: String,
    pub expect_every: Option<String>,
    pub delimiter: Option<String>,
    pub encoding_fallback: Option<String>,
    pub missing: Option<Vec<String>>,
    pub date_formats: Option<Vec<String>>,
    pub list_separator: Option<String>,
    #[serde(default)]
    pub ignore: Vec<String>,
    pub hold_fraction: Option<f64>,
    pub hold_removed_fraction: Option<f64>,
    pub as_of_tolerance: Option<String>,
    pub limits: Option<RawLimits>,
    pub auth_header: Option<String>,
    pub auth_env: Option<String>,
    pub settle: Option<String>,
    pub ready_marker: Option<String>,
    pub connect_timeout: Option<String>,
    pub timeout: Option<String>,
    pub max_bytes: Option<u64>,
    pub max_redirects: Option<usize>,
    pub retries: Option<u32>,
    pub retry_base: Option<String>,
    pub retry_cap: Option<String>,
    #[serde(default)]
    pub fields: BTreeMap<String, String>,
    #[serde(default)]
    pub values: BTreeMap<String, BTreeMap<String, String>>,
}

/// `[source.limits]`: resource limits on each extract; every key is optional.
#[derive(Debug, Deserialize, Serialize, Default)]
#[serde(deny_unknown_fields)]
pub struct RawLimits {
    pub max_expansion: Option<u64>,
    pub max_bytes: Option<u64>,
    pub max_record_bytes: Option<u64>,
    pub max_columns: Option<u64>,
    pub max_json_depth: Option<u64>,
    pub require_final_newline: Option<bool>,
}

#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields)]
pub struct RawAlert {
    pub email: Option<RawEmail>,
    pub webhook: Option<RawWebhook>,
    pub resend_after: Option<String>,
    pub resolve_after: Option<u32>,
    pub max_age: Option<String>,
    pub retry_base: Option<String>,
    pub retry_cap: Option<String>,
    pub failed_polls: Option<u32>,
    pub small_cell_max: Option<u32>,
    pub catch_up_age: Option<String>,
    pub digest_wait: Option<String>,
    #[serde(default)]
    pub rules: BTreeMap<String, toml::Table>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawEmail {
    pub smtp: String,
    pub tls: Option<String>,
    pub from: String,
    pub to: Vec<String>,
    pub username_env: Option<String>,
    pub password_env: Option<String>,
    pub min_severity: Option<String>,
    pub digest: Option<String>,
    pub timeout: Option<String>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawWebhook {
    pub url: String,
    pub secret_env: Option<String>,
    pub min_severity: Option<String>,
    pub digest: Option<String>,
    pub timeout: Option<String>,
}

#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields)]
pub struct RawServe {
    pub bind: Option<String>,
    pub query_max_rows: Option<usize>,
    pub query_timeout: Option<String>,
    pub query_max_value_bytes: Option<usize>,
    pub query_max_answer_bytes: Option<usize>,
    pub query_concurrency: Option<usize>,
    pub sqlite_heap_bytes: Option<usize>,
    pub request_timeout: Option<String>,
    /// The dashboard's address as people reach it, for links in alert messages.
    pub public_url: Option<String>,
}

#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields)]
pub struct RawLog {
    pub format: Option<String>,
}
