//! The parent side of the ingest benchmark: generates the extracts, runs each phase in a child
//! process of this binary (so its peak RSS is its own), checks the counts, and measures the
//! cost of duplicate keys.

use super::*;

/// What one child phase reported.
#[derive(Debug, Clone, Default)]
pub(crate) struct PhaseResult {
    /// The machine's 1-minute load average when the phase started (others' work shows here).
    pub(crate) load: f64,
    pub(crate) secs: f64,
    /// For tidemark: seconds of the commit call; the rest of `secs` is the post-snapshot
    /// pipeline's call after it.
    pub(crate) commit_secs: Option<f64>,
    pub(crate) rss_kb: u64,
    pub(crate) rows: u64,
    pub(crate) accepted: u64,
    pub(crate) rejected: u64,
    pub(crate) new: u64,
    pub(crate) changed: u64,
    pub(crate) removed: u64,
    pub(crate) status: String,
}

/// One line of the results table.
#[derive(Debug, Clone)]
pub(crate) struct Line {
    pub(crate) name: &'static str,
    pub(crate) result: PhaseResult,
    pub(crate) store_bytes: u64,
}

pub(crate) fn run_bench(args: &Args) -> Result<()> {
    let dir = args.dir.clone().unwrap_or_else(|| Path::new(env!("CARGO_TARGET_TMPDIR")).join("ingest-bench"));
    if dir.exists() {
        fs::remove_dir_all(&dir).with_context(|| format!("clearing {}", dir.display()))?;
    }
    fs::create_dir_all(dir.join("incoming"))?;
    fs::write(dir.join("tidemark.toml"), CONFIG)?;
    println!("{}", machine_facts());
    println!("work folder: {}", dir.display());

    let day1 = first_day();
    let day2 = day1 + Duration::days(1);
    let file1 = dir.join("incoming").join(format!("{SOURCE}-{day1}.csv"));
    let file2 = dir.join("incoming").join(format!("{SOURCE}-{day2}.csv"));
    let started = Instant::now();
    let gen1 = write_extract(&file1, args.seed, args.rows, 0, day1)?;
    let added = (args.rows * ADDED_PER_MILLE).div_ceil(1000);
    let gen2 = write_extract(&file2, args.seed, args.rows, added, day2)?;
    println!(
        "generated in {:.1} s: day 1 {} rows ({:.1} MB), day 2 {} rows ({:.1} MB, {} changed, {} added)",
        started.elapsed().as_secs_f64(),
        gen1.rows,
        mb(gen1.bytes),
        gen2.rows,
        mb(gen2.bytes),
        gen2.changed,
        gen2.added,
    );

    let store = dir.join("store").join("tidemark.db");
    let naive = dir.join("naive").join("naive.db");
    let t1 = child(&dir, "tidemark", &file1)?;
    let t1_bytes = sqlite_bytes(&store);
    let archive1 = dir_bytes(&dir.join("store").join("archive"));
    let t2 = child(&dir, "tidemark", &file2)?;
    let t2_bytes = sqlite_bytes(&store);
    let archive2 = dir_bytes(&dir.join("store").join("archive"));
    let n1 = child(&dir, "naive", &file1)?;
    let n1_bytes = sqlite_bytes(&naive);
    let n2 = child(&dir, "naive", &file2)?;
    let n2_bytes = sqlite_bytes(&naive);

    check_counts(&t1, &t2, &gen1, &gen2)?;
    let lines = [
        Line { name: "tidemark first ingest", result: t1.clone(), store_bytes: t1_bytes },
        Line { name: "tidemark re-ingest", result: t2.clone(), store_bytes: t2_bytes },
        Line { name: "naive first snapshot", result: n1.clone(), store_bytes: n1_bytes },
        Line { name: "naive second snapshot", result: n2.clone(), store_bytes: n2_bytes },
    ];
    print!("{}", table(&lines));
    let growth = t2_bytes.saturating_sub(t1_bytes);
    let naive_growth = n2_bytes.saturating_sub(n1_bytes);
    let growth_pct = 100.0 * growth as f64 / t1_bytes.max(1) as f64;
    println!(
        "tidemark outcome: day 1 {} ({} new, {} rejected); day 2 {} ({} new, {} changed, {} removed, {} rejected)",
        t1.status, t1.new, t1.rejected, t2.status, t2.new, t2.changed, t2.removed, t2.rejected
    );
    println!(
        "raw archive (compressed extracts, outside the SQLite store; the naive way keeps none): \
         {:.1} MB after day 1, {:.1} MB after day 2",
        mb(archive1),
        mb(archive2)
    );
    println!("tidemark / naive:");
    println!(
        "  first ingest:  time {:.2}x to commit ({:.2}x with the post-snapshot work), bytes {:.2}x",
        t1.commit_secs.unwrap_or(t1.secs) / n1.secs.max(1e-9),
        t1.secs / n1.secs.max(1e-9),
        t1_bytes as f64 / n1_bytes.max(1) as f64
    );
    println!(
        "  re-ingest:     time {:.2}x to commit ({:.2}x with the post-snapshot work), bytes added {:.3}x ({:.1} MB vs {:.1} MB)",
        t2.commit_secs.unwrap_or(t2.secs) / n2.secs.max(1e-9),
        t2.secs / n2.secs.max(1e-9),
        growth as f64 / naive_growth.max(1) as f64,
        mb(growth),
        mb(naive_growth)
    );
    println!(
        "  after 2 days:  bytes {:.2}x ({:.1} MB vs {:.1} MB)",
        t2_bytes as f64 / n2_bytes.max(1) as f64,
        mb(t2_bytes),
        mb(n2_bytes)
    );
    let scale = args.rows as f64 / DEFAULT_ROWS as f64;
    println!("targets (for {DEFAULT_ROWS} rows{}):", if scale < 1.0 { "; this run is smaller" } else { "" });
    // The targets are for the full size; a smaller run only shows that everything works
    // (its store growth is dominated by the fixed per-snapshot triangle and nowcast rows).
    let full = args.rows >= DEFAULT_ROWS;
    let verdict = |ok: bool| match (full, ok) {
        (false, _) => "(not comparable: smaller run)",
        (true, true) => "ok",
        (true, false) => "MISSED",
    };
    for (name, result, target) in
        [("first ingest", &t1, TARGET_FIRST_SECS), ("re-ingest", &t2, TARGET_REINGEST_SECS)]
    {
        let commit = result.commit_secs.unwrap_or(result.secs);
        println!(
            "  {name} <= {target} s: {:.1} s to commit {}; {:.1} s with the post-snapshot work after it {}",
            commit,
            verdict(commit <= target),
            result.secs,
            verdict(result.secs <= target)
        );
    }
    let rss2 = t2.rss_kb as f64 / 1024.0;
    println!(
        "  re-ingest peak RSS <= {TARGET_REINGEST_RSS_MB} MB: {rss2:.0} MB {}",
        verdict(rss2 <= TARGET_REINGEST_RSS_MB)
    );
    println!(
        "  re-ingest store growth <= {TARGET_GROWTH_PERCENT}%: {growth_pct:.2}% {}",
        verdict(growth_pct <= TARGET_GROWTH_PERCENT)
    );
    duplicate_cost(&dir, args)?;
    if !args.keep {
        fs::remove_dir_all(&dir).with_context(|| format!("removing {}", dir.display()))?;
    }
    Ok(())
}

/// Rows per part of the duplicate-key measurement: a tenth of the main run, at least 50,000.
pub(crate) const DUPLICATE_PART_DIVISOR: u64 = 10;

/// Target: a row rejected for a duplicate key costs at most this many normal rows.
pub(crate) const TARGET_DUPLICATE_RATIO: f64 = 2.0;

/// What a row rejected as a duplicate key costs against a normal row, each in a fresh store:
/// `n` distinct rows; `2n` distinct rows; and `n` rows followed by the same `n` keys again
/// with changed content, so that every duplicate arrives long after its first row was
/// written (the costly case: that write must be undone). A normal row costs
/// `(t(2n) - t(n)) / n`, a duplicate `(t(n + n duplicates) - t(n)) / n`, both to commit.
pub(crate) fn duplicate_cost(dir: &Path, args: &Args) -> Result<()> {
    let n = (args.rows / DUPLICATE_PART_DIVISOR).max(50_000);
    let day = first_day();
    let mut commit = Vec::new();
    for (name, rows, duplicated) in [("base", n, false), ("distinct", 2 * n, false), ("duplicated", n, true)]
    {
        let part = dir.join(format!("duplicates-{name}"));
        fs::create_dir_all(part.join("incoming"))?;
        fs::write(part.join("tidemark.toml"), CONFIG)?;
        let file = part.join("incoming").join(format!("{SOURCE}-{day}.csv"));
        let generated = if duplicated {
            write_repeated_extract(&file, args.seed, rows)?
        } else {
            write_extract(&file, args.seed, rows, 0, day)?
        };
        let result = child(&part, "tidemark", &file)?;
        if result.status != "applied" || result.rejected != generated.duplicates {
            bail!("duplicate-key part {name}: {} with {} rejected", result.status, result.rejected);
        }
        commit.push(result.commit_secs.unwrap_or(result.secs));
    }
    let per_row = |secs: f64| 1e6 * secs / n as f64;
    let normal = per_row(commit[1] - commit[0]);
    let duplicate = per_row(commit[2] - commit[0]);
    let ratio = duplicate / normal.max(1e-9);
    println!(
        "duplicate keys ({n} rows, then {n} distinct rows or the same {n} keys again): to commit {:.2} s, \
         {:.2} s, {:.2} s; a normal row {normal:.1} us, a duplicate-key reject {duplicate:.1} us",
        commit[0], commit[1], commit[2]
    );
    let verdict = if ratio <= TARGET_DUPLICATE_RATIO { "ok" } else { "MISSED" };
    println!("  duplicate-key reject <= {TARGET_DUPLICATE_RATIO}x a normal row: {ratio:.2}x {verdict}");
    Ok(())
}

/// Writes `n` cases, then the same `n` keys again with changed content (each second row
/// wins; each first row is rejected as a duplicate key).
pub(crate) fn write_repeated_extract(path: &Path, seed: u64, n: u64) -> Result<Generated> {
    let day = first_day();
    let mut out = BufWriter::with_capacity(1 << 20, fs::File::create(path)?);
    let exported_at = format!("{day}T06:00:00Z");
    let mut generated = Generated { cases: n, duplicates: n, rows: 2 * n, ..Generated::default() };
    let mut row = Vec::with_capacity(512);
    writeln!(out, "{HEADER}")?;
    for pass in 0..2 {
        for index in 0..n {
            let mut case = Case::generate(seed, index, day);
            if pass == 1 {
                case.change(seed, index, day);
            }
            row.clear();
            case.write(&mut row, &exported_at);
            generated.bytes += row.len() as u64;
            out.write_all(&row)?;
        }
    }
    out.into_inner().map_err(|err| err.into_error())?.sync_all()?;
    Ok(generated)
}

/// The numbers tidemark reports must be the ones the generator built in.
pub(crate) fn check_counts(
    t1: &PhaseResult,
    t2: &PhaseResult,
    gen1: &Generated,
    gen2: &Generated,
) -> Result<()> {
    let problems = [
        (t1.status == "applied", format!("day 1 status {}", t1.status)),
        (t2.status == "applied", format!("day 2 status {}", t2.status)),
        (t1.rows == gen1.rows, format!("day 1 rows {} != {}", t1.rows, gen1.rows)),
        (t2.rows == gen2.rows, format!("day 2 rows {} != {}", t2.rows, gen2.rows)),
        (t1.new == gen1.cases, format!("day 1 new {} != {}", t1.new, gen1.cases)),
        (t1.rejected == gen1.duplicates, format!("day 1 rejected {} != {}", t1.rejected, gen1.duplicates)),
        (t2.new == gen2.added, format!("day 2 new {} != {}", t2.new, gen2.added)),
        (t2.changed == gen2.changed, format!("day 2 changed {} != {}", t2.changed, gen2.changed)),
        (t2.removed == 0, format!("day 2 removed {}", t2.removed)),
        (t2.rejected == gen2.duplicates, format!("day 2 rejected {} != {}", t2.rejected, gen2.duplicates)),
    ];
    let wrong: Vec<String> = problems.into_iter().filter(|(ok, _)| !ok).map(|(_, why)| why).collect();
    if !wrong.is_empty() {
        bail!("tidemark's counts disagree with the generated data: {}", wrong.join("; "));
    }
    Ok(())
}

/// Runs one phase in a child process of this binary and reads its result line.
pub(crate) fn child(dir: &Path, phase: &str, file: &Path) -> Result<PhaseResult> {
    let exe = std::env::current_exe().context("finding the bench binary")?;
    let load = load_average();
    let output = Command::new(exe)
        .args(["--phase", phase, "--dir"])
        .arg(dir)
        .arg("--file")
        .arg(file)
        .output()
        .context("starting a phase")?;
    let stdout = String::from_utf8_lossy(&output.stdout);
    if !output.status.success() {
        bail!(
            "phase {phase} failed ({}): {}{}",
            output.status,
            stdout,
            String::from_utf8_lossy(&output.stderr)
        );
    }
    let line = stdout
        .lines()
        .find_map(|l| l.strip_prefix("RESULT "))
        .with_context(|| format!("phase {phase} printed no result: {stdout}"))?;
    let mut result = PhaseResult { load, ..PhaseResult::default() };
    for pair in line.split_whitespace() {
        let (key, value) = pair.split_once('=').unwrap_or((pair, ""));
        let n = || value.parse::<u64>().unwrap_or_default();
        match key {
            "secs" => result.secs = value.parse().unwrap_or_default(),
            "commit_secs" => result.commit_secs = value.parse().ok(),
            "rss_kb" => result.rss_kb = n(),
            "rows" => result.rows = n(),
            "accepted" => result.accepted = n(),
            "rejected" => result.rejected = n(),
            "new" => result.new = n(),
            "changed" => result.changed = n(),
            "removed" => result.removed = n(),
            "status" => result.status = value.to_string(),
            _ => {}
        }
    }
    Ok(result)
}
