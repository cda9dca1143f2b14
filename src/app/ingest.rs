//! One extract committed, the same for `tidemark ingest`, the demo and the daemon: archive
//! the bytes, detect duplicates, parse from the archive, stage, apply the truncated-feed
//! guard, and apply or hold in one transaction, which also enters the snapshot's analysis
//! as owed. Committing ends at the commit: what runs after it is `app::pipeline`. Log lines
//! carry counts, ids and file names only, never row contents.

use std::fs::File;
use std::io::BufReader;
use std::path::Path;

use anyhow::{Context, Result, bail};
use chrono::{DateTime, NaiveDate, NaiveTime, Utc};

use crate::config::{AsOfRule, Config, HOLD_REMOVED_MIN, SourceConfig};
use crate::extract::{self, ParseError, ParseSummary};
use crate::model::{ExtractKind, ExtractMeta, RowCounts, SnapshotId, SnapshotStatus, SourceId};
use crate::store::{Ingest, LastApplied, Plan, Store, StoreError, archive};
use crate::text::{escape_outside, escape_path};

/// Rows between checks for a shutdown request: often enough to stop within a second.
const CANCEL_CHECK_EVERY: u64 = 4096;

/// Rows between progress log lines on large extracts.
const PROGRESS_EVERY: u64 = 250_000;

/// What became of one extract.
#[derive(Debug, Clone)]
pub struct IngestOutcome {
    pub snapshot_id: SnapshotId,
    pub status: SnapshotStatus,
    pub counts: RowCounts,
    pub field_problems: u64,
    pub note: Option<String>,
}

impl IngestOutcome {
    /// One line for people: what happened, with counts.
    pub fn summary(&self, source: &str) -> String {
        let c = &self.counts;
        let mut line = format!("snapshot {} of {source}: {}", self.snapshot_id, self.status.name());
        if matches!(self.status, SnapshotStatus::Applied | SnapshotStatus::Held) {
            line.push_str(&format!(
                "; {} rows, {} accepted, {} rejected, {} field problems; {} new, {} changed, {} removed",
                c.total, c.accepted, c.rejected, self.field_problems, c.new, c.changed, c.removed
            ));
        }
        if let Some(note) = &self.note {
            line.push_str(&format!(" ({})", escape_outside(note)));
        }
        line
    }
}

/// Commits the file at `path` for `source`. `as_of` overrides the source's as-of rule.
pub fn commit_file(
    store: &mut Store,
    config: &Config,
    source: &SourceConfig,
    path: &Path,
    as_of: Option<DateTime<Utc>>,
) -> Result<IngestOutcome> {
    let as_of = match as_of {
        Some(time) => time,
        None => as_of_for_file(&source.as_of, path)?,
    };
    let file = File::open(path).with_context(|| format!("opening {}", escape_path(path)))?;
    let archived = archive::store(&config.store.archive, BufReader::new(file))
        .with_context(|| format!("archiving {}", escape_path(path)))?;
    let meta = ExtractMeta {
        as_of,
        received_at: Utc::now(),
        origin: path.display().to_string(),
        sha256: archived.sha256,
        bytes: archived.bytes,
        kind: source.extract,
    };
    commit_archived(store, config, source, &meta, &|| false)
}

/// Commits bytes already in the archive (named by `meta.sha256`). `cancelled` is asked now
/// and then while rows stream in; when it says yes the transaction rolls back.
pub fn commit_archived(
    store: &mut Store,
    config: &Config,
    source: &SourceConfig,
    meta: &ExtractMeta,
    cancelled: &dyn Fn() -> bool,
) -> Result<IngestOutcome> {
    let source_id = store.source_id(&source.name, source.kind_name(), &source.config_hash)?;
    if let Some(earlier) = store.duplicate_of(source_id, &meta.sha256)? {
        let note = format!("same bytes as snapshot {earlier}");
        return unapplied(store, source_id, meta, SnapshotStatus::Duplicate, note);
    }
    if let Some(note) = as_of_in_future(meta.as_of, Utc::now(), source) {
        return unapplied(store, source_id, meta, SnapshotStatus::Failed, note);
    }
    let last = store.last_applied(source_id)?;
    if let Some(last) = last.as_ref().filter(|l| l.as_of > meta.as_of) {
        let note = format!(
            "as-of time {} is earlier than applied snapshot {} ({}); an out-of-order extract would rewrite history",
            crate::store::time_text(meta.as_of),
            last.snapshot_id,
            crate::store::time_text(last.as_of)
        );
        return unapplied(store, source_id, meta, SnapshotStatus::Failed, note);
    }
    let reader =
        archive::open(&config.store.archive, &meta.sha256).context("opening the archived extract")?;
    let mut ingest = store.begin(source_id, meta, &source.mapping.key_column)?;
    let parsed = stage(&mut ingest, reader, source, meta.as_of.date_naive(), cancelled);
    let summary = match parsed {
        Ok(summary) => summary,
        Err(ParseError::Extract(err)) => {
            drop(ingest);
            tracing::warn!(source = %source.name, origin = %escape_outside(&meta.origin), error = %err, "extract failed");
            return unapplied(store, source_id, meta, SnapshotStatus::Failed, err.to_string());
        }
        Err(ParseError::Sink(err)) => return Err(err.into()),
    };
    finish(ingest, config, source, last.as_ref(), &summary)
}

/// Why an as-of time is refused for lying too far after the server's clock, if it does: a
/// typo in a file name (2062 for 2026) or a wrong clock would otherwise put every later
/// extract out of order.
fn as_of_in_future(as_of: DateTime<Utc>, now: DateTime<Utc>, source: &SourceConfig) -> Option<String> {
    let tolerance = chrono::Duration::from_std(source.as_of_tolerance).unwrap_or(chrono::Duration::MAX);
    (as_of > now + tolerance).then(|| {
        format!(
            "as-of time {} is more than {}h after the server's clock ({}); check the file name or --as-of (as_of_tolerance)",
            crate::store::time_text(as_of),
            source.as_of_tolerance.as_secs() / 3600,
            crate::store::time_text(now)
        )
    })
}

/// Parses a held snapshot again from the archive and applies it, without the guard (its
/// analysis is owed again, as an applied snapshot).
pub fn release(store: &mut Store, config: &Config, snapshot_id: SnapshotId) -> Result<IngestOutcome> {
    let (name, sha256, as_of) = store.snapshot_origin(snapshot_id)?;
    let Some(source) = config.source(&name) else {
        bail!("snapshot {snapshot_id} belongs to source {name:?}, which is not in the config");
    };
    let reader = archive::open(&config.store.archive, &sha256)
        .with_context(|| format!("opening the archived bytes of snapshot {snapshot_id}"))?;
    let mut ingest = store.begin_release(snapshot_id, &source.mapping.key_column)?;
    let summary = match stage(&mut ingest, reader, source, as_of.date_naive(), &|| false) {
        Ok(summary) => summary,
        Err(ParseError::Extract(err)) => bail!("snapshot {snapshot_id} no longer parses: {err}"),
        Err(ParseError::Sink(err)) => return Err(err.into()),
    };
    let plan = ingest.plan()?;
    let spec = config.triangle_spec();
    let counts = ingest.apply(&plan, summary.rows_total, Some("released by operator"), Some(&spec))?;
    Ok(IngestOutcome {
        snapshot_id,
        status: SnapshotStatus::Applied,
        counts,
        field_problems: summary.field_problems,
        note: Some("released by operator".into()),
    })
}

fn stage(
    ingest: &mut Ingest<'_>,
    reader: impl std::io::Read,
    source: &SourceConfig,
    latest: NaiveDate,
    cancelled: &dyn Fn() -> bool,
) -> Result<ParseSummary, ParseError<StoreError>> {
    let mut rows = 0u64;
    extract::parse(reader, source.format, &source.mapping, latest, |row| {
        rows += 1;
        if rows.is_multiple_of(CANCEL_CHECK_EVERY) && cancelled() {
            return Err(StoreError::Cancelled);
        }
        if rows.is_multiple_of(PROGRESS_EVERY) {
            tracing::info!(target: "tidemark::progress", source = %source.name, rows, "staging rows");
        }
        ingest.add(row)
    })
}

fn finish(
    mut ingest: Ingest<'_>,
    config: &Config,
    source: &SourceConfig,
    last: Option<&LastApplied>,
    summary: &ParseSummary,
) -> Result<IngestOutcome> {
    let snapshot_id = ingest.snapshot_id();
    let plan = ingest.plan()?;
    let hold_reason = if source.extract == ExtractKind::Full {
        truncation_guard(&plan, last, source.hold_fraction, source.hold_removed_fraction)
    } else {
        None
    };
    let (status, counts) = match &hold_reason {
        Some(reason) => (SnapshotStatus::Held, ingest.hold(&plan, summary.rows_total, reason)?),
        None => {
            let spec = config.triangle_spec();
            (SnapshotStatus::Applied, ingest.apply(&plan, summary.rows_total, None, Some(&spec))?)
        }
    };
    tracing::info!(
        source = %source.name, snapshot_id = snapshot_id.0, status = status.name(),
        rows = counts.total, rejected = counts.rejected,
        new = counts.new, changed = counts.changed, removed = counts.removed,
        "extract ingested"
    );
    Ok(IngestOutcome {
        snapshot_id,
        status,
        counts,
        field_problems: summary.field_problems,
        note: hold_reason,
    })
}

/// Why a full extract looks truncated, if it does: far fewer rows than the last applied
/// snapshot (`fraction`), or removing more than `fraction` of the current records, or more
/// than the stricter `removed_fraction` of them when that is over `HOLD_REMOVED_MIN` records.
pub fn truncation_guard(
    plan: &Plan,
    last: Option<&LastApplied>,
    fraction: f64,
    removed_fraction: f64,
) -> Option<String> {
    let last = last?;
    let floor = (1.0 - fraction) * last.rows_accepted as f64;
    if last.rows_accepted > 0 && (plan.accepted as f64) < floor {
        return Some(format!(
            "held: {} rows accepted against {} in snapshot {}, a drop of more than {:.0}%; release or reject it",
            plan.accepted,
            last.rows_accepted,
            last.snapshot_id,
            fraction * 100.0
        ));
    }
    let removed = plan.removed as f64;
    let share = |f: f64| f * plan.current_before as f64;
    let suspicious =
        removed > share(fraction) || (plan.removed > HOLD_REMOVED_MIN && removed > share(removed_fraction));
    if plan.current_before > 0 && suspicious {
        return Some(format!(
            "held: would remove {} of {} current records, more than {:.0}%; release or reject it",
            plan.removed,
            plan.current_before,
            if removed > share(fraction) { fraction } else { removed_fraction } * 100.0
        ));
    }
    None
}

fn unapplied(
    store: &mut Store,
    source_id: SourceId,
    meta: &ExtractMeta,
    status: SnapshotStatus,
    note: String,
) -> Result<IngestOutcome> {
    let snapshot_id = store.record_unapplied(source_id, meta, status, &note)?;
    Ok(IngestOutcome {
        snapshot_id,
        status,
        counts: RowCounts::default(),
        field_problems: 0,
        note: Some(note),
    })
}

/// The as-of time of a file under a source's rule.
pub fn as_of_for_file(rule: &AsOfRule, path: &Path) -> Result<DateTime<Utc>> {
    match rule {
        AsOfRule::FileMtime => {
            let modified = std::fs::metadata(path)
                .and_then(|m| m.modified())
                .with_context(|| format!("reading the modification time of {}", escape_path(path)))?;
            Ok(DateTime::<Utc>::from(modified))
        }
        AsOfRule::NameDate(format) => {
            let name = path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
            let date = date_in_name(&name, format).with_context(|| {
                format!("no date matching {format:?} in the file name {name:?}; pass --as-of")
            })?;
            Ok(end_of_day(date))
        }
        AsOfRule::Header(header) => {
            bail!("as_of = \"header:{header}\" applies to URL sources; pass --as-of for a file")
        }
    }
}

/// The first date in `name` that matches `format`.
pub fn date_in_name(name: &str, format: &str) -> Option<NaiveDate> {
    name.char_indices()
        .filter(|(_, c)| c.is_ascii_digit())
        .find_map(|(idx, _)| NaiveDate::parse_and_remainder(&name[idx..], format).ok().map(|(d, _)| d))
}

/// The last second of a day, UTC: a date given alone means "as known at the end of that day".
pub fn end_of_day(date: NaiveDate) -> DateTime<Utc> {
    date.and_time(NaiveTime::from_hms_opt(23, 59, 59).unwrap_or_default()).and_utc()
}

/// Removes the temporary archive files that an ingest killed mid-copy left behind (logged,
/// never fatal). Call it with the store open for writing (the writer lock held) and before
/// this process archives anything: at `tidemark ingest` and at daemon start.
pub fn remove_archive_orphans(config: &Config) {
    let archive = &config.store.archive;
    match archive::remove_orphans(archive) {
        Ok(0) => {}
        Ok(removed) => tracing::warn!(
            removed, archive = %escape_path(archive), "removed temporary files of interrupted ingests"
        ),
        Err(err) => tracing::warn!(
            archive = %escape_path(archive), error = %err, "temporary files of interrupted ingests not removed"
        ),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn dates_in_file_names() {
        let d = |y, m, day| NaiveDate::from_ymd_opt(y, m, day);
        let cases = [
            ("county-2026-03-05.csv", "%Y-%m-%d", d(2026, 3, 5)),
            ("export_20260305_v2.csv", "%Y%m%d", d(2026, 3, 5)),
            ("v2-labs-2026-03-05.ndjson.gz", "%Y-%m-%d", d(2026, 3, 5)),
            ("labs-latest.csv", "%Y-%m-%d", None),
        ];
        for (name, format, want) in cases {
            assert_eq!(date_in_name(name, format), want, "{name}");
        }
    }

    #[test]
    fn guard_holds_truncated_full_extracts() {
        let last = LastApplied { snapshot_id: SnapshotId(3), as_of: Utc::now(), rows_accepted: 1000 };
        let plan = |accepted, removed| Plan { accepted, removed, current_before: 1000, ..Plan::default() };
        let guard = |plan: &Plan, last| truncation_guard(plan, last, 0.2, 0.05);
        assert!(guard(&plan(800, 0), Some(&last)).is_none());
        assert!(guard(&plan(799, 0), Some(&last)).unwrap().contains("drop of more than 20%"));
        assert!(guard(&plan(1000, 50), Some(&last)).is_none(), "5% removed is not more than 5%");
        assert!(guard(&plan(1000, 51), Some(&last)).unwrap().contains("would remove 51"));
        assert!(guard(&plan(10, 990), None).is_none(), "first snapshot is never held");
        let small = Plan { accepted: 40, removed: 10, current_before: 50, ..Plan::default() };
        let last_small = LastApplied { snapshot_id: SnapshotId(3), as_of: Utc::now(), rows_accepted: 45 };
        assert!(guard(&small, Some(&last_small)).is_none(), "ten removals (20%) are under both guards");
        let small_cut = Plan { accepted: 7, removed: 3, current_before: 10, ..Plan::default() };
        let last_ten = LastApplied { snapshot_id: SnapshotId(3), as_of: Utc::now(), rows_accepted: 7 };
        assert!(
            guard(&small_cut, Some(&last_ten))
                .unwrap()
                .contains("would remove 3 of 10 current records, more than 20%")
        );
        // A writer that paused at 92% of a 3,000-record file: 241 removed, 8% of the records,
        // under the row-count guard's 20% but over the removal guard's 5%.
        let cut = Plan { accepted: 2759, removed: 241, current_before: 3000, ..Plan::default() };
        let last_full = LastApplied { snapshot_id: SnapshotId(3), as_of: Utc::now(), rows_accepted: 3000 };
        assert!(guard(&cut, Some(&last_full)).unwrap().contains("would remove 241 of 3000"));
    }
}
