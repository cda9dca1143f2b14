//! The extract fuzzer for a stated time: mutated CSV, NDJSON and JSON extracts from random
//! seeds through the parsers and the mapping, checking that nothing panics, counts add up
//! and no message carries a cell value. `TIDEMARK_FUZZ_SECS` sets the time (default 60 s).
//! Each failure is written to `target/fuzz-failures/` to be minimised into
//! `tests/data/bad/` with its expected outcome; the exit code is 1 if any was found.

use std::time::{Duration, Instant};

use tidemark::extract::fuzz;

fn main() {
    let secs: u64 = std::env::var("TIDEMARK_FUZZ_SECS").ok().and_then(|s| s.parse().ok()).unwrap_or(60);
    let started = Instant::now();
    let mut seed: u64 = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_secs() << 20)
        .unwrap_or_default();
    let first = seed;
    let (mut cases, mut failures) = (0u64, Vec::new());
    while started.elapsed() < Duration::from_secs(secs) {
        let findings = fuzz::run(seed, 500);
        cases += findings.cases;
        failures.extend(findings.failures);
        seed += 500;
    }
    let took = started.elapsed().as_secs_f64();
    println!(
        "fuzz: {cases} cases in {took:.1} s ({:.0}/s), seeds {first}..{seed}, {} failures",
        cases as f64 / took,
        failures.len()
    );
    if failures.is_empty() {
        return;
    }
    let dir = std::path::Path::new("target/fuzz-failures");
    let _ = std::fs::create_dir_all(dir);
    for (seed, format, input, why) in &failures {
        println!("seed {seed} {format:?}: {why}");
        let _ = std::fs::write(dir.join(format!("{seed}.{}", format.name())), input);
    }
    std::process::exit(1);
}
