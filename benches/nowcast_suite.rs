//! The nowcast calibration suite (docs/validation.md): every method on every scenario class,
//! many seeds with parameters drawn within the class, scored at horizons 0-7 against the
//! known eventual counts. Prints a Markdown table per class (pooled) and per horizon.
//!
//! `cargo bench --bench nowcast_suite` runs the full suite; `-- --seeds N` and
//! `-- --class NAME` (a substring of a class name) make it smaller.

use std::time::Instant;

use tidemark::analysis::nowcast::suite::{self, Candidate, ScenarioClass, SuiteSettings};
use tidemark::model::NowcastMethod;

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let value = |flag: &str| args.iter().position(|a| a == flag).and_then(|at| args.get(at + 1)).cloned();
    let mut settings = SuiteSettings::full();
    if let Some(seeds) = value("--seeds").and_then(|s| s.parse().ok()) {
        settings.seeds = seeds;
    }
    let only = value("--class");
    let candidates = NowcastMethod::ALL.map(Candidate::Method);
    let started = Instant::now();
    println!(
        "{} seeds per class, {} nowcast days each, horizons 0-{}, max delay {}, {} draws\n",
        settings.seeds, settings.nowcast_days, settings.max_horizon, settings.max_delay, settings.draws
    );
    println!(
        "| class | method | 90% coverage | 50% coverage | WIS / naive | worst horizon coverage | worst horizon WIS / naive | targets missed |"
    );
    println!("|---|---|---|---|---|---|---|---|");
    let mut detail = Vec::new();
    for class in
        ScenarioClass::ALL.into_iter().filter(|c| only.as_ref().is_none_or(|o| c.name().contains(o.as_str())))
    {
        let class_started = Instant::now();
        let scores = suite::run_class(class, &candidates, &settings, 2, &|_| {});
        for score in &scores {
            let pooled = score.pooled();
            let worst_cov = score.by_horizon.iter().map(|t| t.coverage90()).fold(f64::INFINITY, f64::min);
            let worst_wis = score.by_horizon.iter().map(|t| t.relative_wis()).fold(0.0, f64::max);
            let missed = suite::misses(score);
            println!(
                "| {} | {} | {:.2} | {:.2} | {:.2} | {:.2} | {:.2} | {} |",
                class.name(),
                score.candidate.name(),
                pooled.coverage90(),
                pooled.coverage50(),
                pooled.relative_wis(),
                worst_cov,
                worst_wis,
                if missed.is_empty() { "none".to_string() } else { missed.len().to_string() }
            );
            detail.push(score.clone());
        }
        eprintln!("{}: {:.1} s", class.name(), class_started.elapsed().as_secs_f64());
    }
    println!("\nPer horizon (90% coverage / WIS relative to naive):\n");
    let horizons = settings.max_horizon + 1;
    let header: Vec<String> = (0..horizons).map(|h| format!("h{h}")).collect();
    println!("| class | method | {} |", header.join(" | "));
    println!("|---|---|{}", "---|".repeat(horizons));
    for score in &detail {
        let cells: Vec<String> = score
            .by_horizon
            .iter()
            .map(|t| format!("{:.2} / {:.2}", t.coverage90(), t.relative_wis()))
            .collect();
        println!("| {} | {} | {} |", score.class.name(), score.candidate.name(), cells.join(" | "));
    }
    eprintln!("suite: {:.1} s", started.elapsed().as_secs_f64());
}
