//! The ingest benchmark's report: the results table against the performance targets, store and
//! archive sizes, and the facts of the machine it ran on.

use super::*;

pub(crate) fn table(lines: &[Line]) -> String {
    let mut out = String::new();
    let _ = writeln!(
        out,
        "\n{:<24} {:>10} {:>8} {:>10} {:>10} {:>10} {:>12} {:>10} {:>16} {:>6}",
        "phase",
        "rows",
        "wall s",
        "commit s",
        "analyse s",
        "rows/s",
        "peak RSS MB",
        "store MB",
        "growth",
        "load"
    );
    let mut previous: Option<u64> = None;
    for (idx, line) in lines.iter().enumerate() {
        let r = &line.result;
        let growth = match previous.filter(|_| idx % 2 == 1) {
            Some(before) => {
                let added = line.store_bytes.saturating_sub(before);
                format!("+{:.1} MB {:.2}%", mb(added), 100.0 * added as f64 / before.max(1) as f64)
            }
            None => "-".to_string(),
        };
        let (commit, analyse) = match r.commit_secs {
            Some(commit) => (format!("{commit:.2}"), format!("{:.2}", r.secs - commit)),
            None => ("-".to_string(), "-".to_string()),
        };
        let _ = writeln!(
            out,
            "{:<24} {:>10} {:>8.2} {:>10} {:>10} {:>10.0} {:>12.0} {:>10.1} {:>16} {:>6.2}",
            line.name,
            r.rows,
            r.secs,
            commit,
            analyse,
            r.rows as f64 / r.commit_secs.unwrap_or(r.secs).max(1e-9),
            r.rss_kb as f64 / 1024.0,
            mb(line.store_bytes),
            growth,
            r.load
        );
        previous = Some(line.store_bytes);
    }
    let _ = writeln!(
        out,
        "(wall s: commit and analysis; commit s: the commit call (archive, parse, versions,\n \
         first-seen marks, triangle deltas); analyse s: the post-snapshot pipeline's call\n \
         after it (nowcasts, delay fits, quality measures, alert rules); rows/s over the commit time; store MB: SQLite db + wal after a\n \
         checkpoint; peak RSS of the phase's own process; load: 1-minute load average when the\n \
         phase started, i.e. other work on the machine)\n"
    );
    out
}

/// A SQLite store's size: the database file and its WAL.
pub(crate) fn sqlite_bytes(db: &Path) -> u64 {
    let size = |p: &Path| fs::metadata(p).map(|m| m.len()).unwrap_or_default();
    let mut wal = db.as_os_str().to_owned();
    wal.push("-wal");
    size(db) + size(Path::new(&wal))
}

pub(crate) fn dir_bytes(dir: &Path) -> u64 {
    let Ok(entries) = fs::read_dir(dir) else { return 0 };
    entries
        .flatten()
        .map(|e| match e.file_type() {
            Ok(t) if t.is_dir() => dir_bytes(&e.path()),
            _ => e.metadata().map(|m| m.len()).unwrap_or_default(),
        })
        .sum()
}

pub(crate) fn mb(bytes: u64) -> f64 {
    bytes as f64 / (1024.0 * 1024.0)
}

pub(crate) fn machine_facts() -> String {
    let cpuinfo = fs::read_to_string("/proc/cpuinfo").unwrap_or_default();
    let model = cpuinfo
        .lines()
        .find_map(|l| l.strip_prefix("model name")?.split_once(':').map(|(_, m)| m.trim().to_string()))
        .unwrap_or_else(|| "unknown".into());
    let nproc = std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1);
    let meminfo = fs::read_to_string("/proc/meminfo").unwrap_or_default();
    let mem_kb: u64 = meminfo
        .lines()
        .find_map(|l| l.strip_prefix("MemTotal:")?.split_whitespace().next()?.parse().ok())
        .unwrap_or_default();
    format!(
        "machine: nproc {nproc}, CPU {model}, memory {:.1} GiB, SQLite {}, {} build",
        mem_kb as f64 / (1024.0 * 1024.0),
        rusqlite::version(),
        if cfg!(debug_assertions) { "debug" } else { "release" }
    )
}
