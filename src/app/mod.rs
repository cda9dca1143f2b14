//! Application wiring: the command bodies, the commit of an extract (`ingest`, joining
//! `extract` and `store`), the post-snapshot pipeline after it, the writer thread and the
//! daemon's tasks. The only library module that uses
//! `anyhow`; nothing else depends on it.

pub mod access;
pub mod alerting;
pub mod analyse;
pub mod commands;
pub mod daemon;
pub mod demo;
pub mod errors;
pub mod export;
pub mod ingest;
pub mod pipeline;
pub mod quality;
pub mod queries;
pub mod signals;
pub mod writer;
