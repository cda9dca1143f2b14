//! Application wiring: the command bodies and the ingest pipeline that joins `extract`,
//! `store` and (later) the daemon's tasks. The only library module that uses `anyhow`;
//! nothing else depends on it.

pub mod commands;
pub mod demo;
pub mod ingest;
