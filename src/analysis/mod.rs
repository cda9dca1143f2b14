//! Pure statistics on counts and delays: the reporting triangle, nowcasts with prediction
//! intervals, scoring of interval forecasts, delay-distribution fits with censoring and
//! truncation, and group comparisons. No IO, no clock, no database: data and parameters in,
//! values and problems out. Randomness takes an explicit seed so results are reproducible.

pub mod aberration;
pub mod arl;
pub mod backtest;
pub mod change;
pub mod delay;
pub mod detector_sim;
pub mod mannwhitney;
pub mod nowcast;
mod numeric;
pub mod quantile;
pub mod score;
pub mod scoring;
pub mod simulate;
pub mod triangle;
