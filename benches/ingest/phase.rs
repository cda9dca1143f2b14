//! One phase of the ingest benchmark, in a child process: commit an extract and run its
//! analysis (two timed calls), or store it the naive way (a new table per snapshot) for
//! comparison; with the load average and peak RSS.

use super::*;

pub(crate) fn run_phase(phase: &str, args: &Args) -> Result<()> {
    let dir = args.dir.as_deref().context("--phase needs --dir")?;
    let file = args.file.as_deref().context("--phase needs --file")?;
    let config = Config::load(&dir.join("tidemark.toml")).context("loading the bench config")?;
    let source = config.source(SOURCE).context("the bench source is missing")?;
    let result = match phase {
        "tidemark" => {
            let started = Instant::now();
            let mut store = Store::open(&config.store.path)?;
            let outcome = commit_file(&mut store, &config, source, file, None)?;
            let commit_secs = Some(started.elapsed().as_secs_f64());
            let analysed = pipeline::run_owed(&mut store, &config, source, &pipeline::unobserved, &|| false)?;
            if let Some(failure) = analysed.iter().find_map(pipeline::Analysed::failure) {
                bail!("the analysis failed: {failure}");
            }
            let secs = started.elapsed().as_secs_f64();
            drop(store);
            let rss_kb = peak_rss_kb();
            checkpoint(&config.store.path)?;
            let c = outcome.counts;
            PhaseResult {
                secs,
                commit_secs,
                rss_kb,
                rows: c.total,
                accepted: c.accepted,
                rejected: c.rejected,
                new: c.new,
                changed: c.changed,
                removed: c.removed,
                status: outcome.status.name().to_string(),
                ..PhaseResult::default()
            }
        }
        "naive" => {
            let path = dir.join("naive").join("naive.db");
            let started = Instant::now();
            let (rows, accepted) = naive_ingest(&path, &config, file)?;
            let secs = started.elapsed().as_secs_f64();
            let rss_kb = peak_rss_kb();
            checkpoint(&path)?;
            PhaseResult {
                secs,
                rss_kb,
                rows,
                accepted,
                rejected: rows - accepted,
                status: "appended".into(),
                ..PhaseResult::default()
            }
        }
        other => bail!("unknown phase {other}"),
    };
    let r = &result;
    println!(
        "RESULT secs={} commit_secs={} rss_kb={} rows={} accepted={} rejected={} new={} changed={} removed={} status={}",
        r.secs,
        r.commit_secs.map(|s| s.to_string()).unwrap_or_default(),
        r.rss_kb,
        r.rows,
        r.accepted,
        r.rejected,
        r.new,
        r.changed,
        r.removed,
        r.status
    );
    Ok(())
}

/// The naive way: every extract becomes a new table holding all its accepted rows, with the
/// same canonical columns and the same parsing, in one transaction at the store's settings.
pub(crate) fn naive_ingest(path: &Path, config: &Config, file: &Path) -> Result<(u64, u64)> {
    let source = config.source(SOURCE).context("the bench source is missing")?;
    fs::create_dir_all(path.parent().unwrap_or(Path::new(".")))?;
    let mut conn = Connection::open(path)?;
    conn.pragma_update(None, "journal_mode", "WAL")?;
    conn.pragma_update(None, "synchronous", "FULL")?;
    conn.pragma_update(None, "cache_size", -65536)?;
    let name = file.file_stem().and_then(|s| s.to_str()).unwrap_or("extract");
    let as_of = tidemark::app::ingest::as_of_for_file(&source.as_of, file)?;
    let table = format!("\"snapshot_{}\"", name.replace(|c: char| !c.is_ascii_alphanumeric(), "_"));
    let tx = conn.transaction()?;
    tx.execute_batch(&format!(
        "CREATE TABLE {table} (line INTEGER, case_key TEXT, jurisdiction TEXT, onset_date TEXT,
             specimen_date TEXT, result_date TEXT, report_date TEXT, admit_date TEXT, death_date TEXT,
             outcome TEXT, age_lo REAL, age_hi REAL, sex TEXT, hospitalised INTEGER, symptoms TEXT,
             conditions TEXT, invalid TEXT, extra_json TEXT)"
    ))?;
    let mut accepted = 0u64;
    let mut stmt = tx.prepare(&format!(
        "INSERT INTO {table} VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15, ?16, ?17, ?18)"
    ))?;
    let reader = std::io::BufReader::new(fs::File::open(file)?);
    let summary = extract::parse(reader, Format::Csv, &source.mapping, as_of.date_naive(), |row| {
        let Row::Accepted { line, record, .. } = row else { return Ok(()) };
        accepted += 1;
        insert_naive(&mut stmt, line, &record)
    })
    .map_err(|err| anyhow::anyhow!("{err}"))?;
    drop(stmt);
    tx.commit()?;
    Ok((summary.rows_total, accepted))
}

pub(crate) fn insert_naive(
    stmt: &mut rusqlite::Statement<'_>,
    line: u64,
    r: &CaseRecord,
) -> rusqlite::Result<()> {
    let date = |field: Field| r.date(field).map(|d| d.to_string());
    let list =
        |items: &Option<Vec<String>>| items.as_ref().map(|i| serde_json::to_string(i).unwrap_or_default());
    let invalid =
        (!r.invalid.is_empty()).then(|| r.invalid.iter().map(|f| f.name()).collect::<Vec<_>>().join(","));
    let extra = (!r.extra.is_empty()).then(|| serde_json::to_string(&r.extra).unwrap_or_default());
    stmt.execute(rusqlite::params![
        line as i64,
        r.case_key,
        r.jurisdiction,
        date(Field::OnsetDate),
        date(Field::SpecimenDate),
        date(Field::ResultDate),
        date(Field::ReportDate),
        date(Field::AdmitDate),
        date(Field::DeathDate),
        r.outcome,
        r.age.map(|a| a.lo),
        r.age.map(|a| a.hi),
        r.sex,
        r.hospitalised,
        list(&r.symptoms),
        list(&r.conditions),
        invalid,
        extra,
    ])?;
    Ok(())
}

/// Moves the WAL into the database file so that file sizes mean something.
pub(crate) fn checkpoint(path: &Path) -> Result<()> {
    let conn = Connection::open(path)?;
    conn.query_row("PRAGMA wal_checkpoint(TRUNCATE)", [], |_| Ok(()))?;
    Ok(())
}

/// The 1-minute load average.
pub(crate) fn load_average() -> f64 {
    fs::read_to_string("/proc/loadavg")
        .ok()
        .and_then(|text| text.split_whitespace().next()?.parse().ok())
        .unwrap_or_default()
}

/// This process's peak resident set size (VmHWM), in KiB.
pub(crate) fn peak_rss_kb() -> u64 {
    status_kb("VmHWM:")
}

pub(crate) fn status_kb(key: &str) -> u64 {
    fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|text| {
            text.lines().find_map(|l| l.strip_prefix(key)?.split_whitespace().next()?.parse().ok())
        })
        .unwrap_or_default()
}
