//! Integration tests: one binary, one module per area. Real SQLite files in temporary
//! folders, the real `tidemark` binary where a process matters.

mod bad_corpus;
mod cli;
mod crash;
mod history_props;
mod tidy;
mod versioning;
