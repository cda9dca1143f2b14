//! Integration tests: one binary, one module per area. Real SQLite files in temporary
//! folders, the real `tidemark` binary where a process matters.

mod alerts;
mod api;
mod backup;
mod bad_corpus;
mod cli;
mod crash;
mod dashboard_browser;
mod delays;
mod digest;
mod exports;
mod folder_source;
mod hardening;
mod history_props;
mod limits;
mod pipeline;
mod quality;
mod run_process;
mod scores;
mod support;
mod tidy;
mod url_source;
mod versioning;
