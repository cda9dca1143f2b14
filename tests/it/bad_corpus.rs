//! The corpus of malformed extracts in `tests/data/bad/` (plus a 10 MB field generated at
//! test time), table-driven: each file's expected outcome is either a `failed` snapshot whose
//! note names the problem, or an `applied` snapshot with exactly these rejected rows and field
//! problems. Every file goes through the library (one store, one source per file, so each is
//! a first full extract) and through the real `tidemark ingest` binary. Checked: no panic; a
//! failed snapshot writes no versions, rejects or field problems; an applied snapshot's
//! counts agree with the `snapshot`, `case_version`, `reject` and `field_problem` tables;
//! messages name the line and column; exit codes (1 failed, 0 otherwise); and
//! `PRAGMA integrity_check` is "ok" after the whole corpus.

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};

use rusqlite::Connection;

use tidemark::app::ingest::IngestOutcome;
use tidemark::model::SnapshotStatus;

use crate::support::{
    CORPUS_AS_OF, HEADER, config_toml, corpus_as_of, count, data_dir, integrity_check, open_ro, open_store,
    run, source_toml, tidemark, write_config,
};

/// What a corpus file must give.
#[derive(Debug, Clone, Copy)]
enum Expect {
    /// Status `failed`; the note contains every one of these words.
    Failed(&'static [&'static str]),
    /// Status `applied` with these counts; `rejects` are (line, kind), `problems` are
    /// (line, field, kind) of the `field_problem` table.
    Applied {
        total: i64,
        accepted: i64,
        rejects: &'static [(i64, &'static str)],
        problems: &'static [(i64, &'static str, &'static str)],
    },
}

/// A `reject` row: line, field, kind, reason, raw text.
type RejectRow = (i64, Option<String>, String, String, Option<String>);

/// An extra check of one file's store contents: (connection, source id, snapshot id).
type Extra = fn(&Connection, i64, i64) -> Result<(), String>;

#[derive(Debug, Clone, Copy)]
struct Case {
    file: &'static str,
    expect: Expect,
    extra: Option<Extra>,
    /// A known bug in `src/extract` or `src/store/writer.rs`: the case is skipped by the main
    /// tests and run by an ignored one.
    bug: Option<&'static str>,
}

const fn failed(file: &'static str, words: &'static [&'static str]) -> Case {
    Case { file, expect: Expect::Failed(words), extra: None, bug: None }
}

const fn applied(
    file: &'static str,
    total: i64,
    accepted: i64,
    rejects: &'static [(i64, &'static str)],
    problems: &'static [(i64, &'static str, &'static str)],
) -> Case {
    Case { file, expect: Expect::Applied { total, accepted, rejects, problems }, extra: None, bug: None }
}

impl Case {
    const fn with(self, extra: Extra) -> Case {
        Case { extra: Some(extra), ..self }
    }

    const fn bug(self, why: &'static str) -> Case {
        Case { bug: Some(why), ..self }
    }
}

/// The files generated at test time instead of being committed (10 MB; 200 KB).
const HUGE_FIELD: &str = "huge_field.csv";
const DEEP_NESTING: &str = "deep_nesting.json";

/// Every corpus file and what it must give. Lines are 1-based lines of the file (the header
/// is line 1); for JSON arrays they are record numbers.
const CASES: &[Case] = &[
    applied("ragged_rows.csv", 4, 2, &[(3, "ragged_row"), (4, "ragged_row")], &[]).with(ragged_message),
    failed("unterminated_quote.csv", &["line 2", "unterminated quoted field"]),
    applied("invalid_utf8.csv", 3, 2, &[(3, "invalid_encoding")], &[(2, "jurisdiction", "invalid_encoding")]),
    failed("invalid_utf8_header.csv", &["header", "not valid UTF-8"]),
    applied("bom_header.csv", 2, 2, &[], &[]).with(bom_is_not_part_of_the_key_column),
    failed("empty.csv", &["empty"]),
    applied("header_only.csv", 0, 0, &[], &[]),
    applied("unknown_columns.csv", 2, 2, &[], &[]).with(unknown_columns_go_to_extra_json),
    failed("missing_key_column.csv", &[".key: column \"case_id\" not found in header"]),
    failed("missing_mapped_column.csv", &[".fields.onset_date: column \"onset\" not found in header"]),
    applied("duplicate_keys.csv", 4, 2, &[(2, "duplicate_key"), (4, "duplicate_key")], &[])
        .with(duplicate_keys_keep_the_last_row),
    applied("duplicate_keys_after_trim.csv", 2, 1, &[(2, "duplicate_key")], &[]),
    applied(
        "invalid_dates.csv",
        4,
        4,
        &[],
        &[
            (2, "onset_date", "invalid_date"),
            (3, "report_date", "invalid_date"),
            (4, "onset_date", "invalid_date"),
            (5, "onset_date", "invalid_date"),
            (5, "report_date", "invalid_date"),
        ],
    )
    .with(invalid_fields_are_missing_and_marked),
    applied(
        "future_dates.csv",
        3,
        3,
        &[],
        &[(3, "onset_date", "future_date"), (4, "report_date", "future_date")],
    ),
    applied(
        "negative_ages.csv",
        5,
        5,
        &[],
        &[
            (2, "age", "invalid_age"),
            (3, "age", "invalid_age"),
            (4, "age", "invalid_age"),
            (5, "age", "invalid_age"),
        ],
    ),
    applied(HUGE_FIELD, 3, 2, &[(4, "field_too_long")], &[(2, "symptoms", "field_too_long")])
        .with(huge_raw_text_is_truncated),
    failed("truncated.csv.gz", &["truncated", "compressed stream ends early"]),
    applied("not_gzip_named.csv.gz", 2, 2, &[], &[]),
    applied("nul_bytes.csv", 3, 2, &[(3, "nul_byte")], &[(2, "jurisdiction", "nul_byte")]),
    applied(
        "missing_key_values.csv",
        4,
        1,
        &[(3, "missing_key"), (4, "missing_key"), (5, "missing_key")],
        &[],
    ),
    applied("unknown_codes.csv", 2, 2, &[], &[(2, "sex", "unknown_code")]),
    applied("stray_quote.csv", 2, 2, &[], &[]),
    failed("cut_in_quoted_field.csv", &["truncated", "quoted field on line 3", "nothing of it was applied"]),
    failed("cut_mid_row.csv", &["truncated", "last line (4)", "ragged_row"]),
    failed("cut_last_line.ndjson", &["truncated", "last line (2)", "invalid_json"]),
    failed("cut_array.json", &["truncated", "JSON document ends"]),
    failed("unnamed_header.csv", &["header: column 3 has no name"]),
    failed("headerless.csv", &["header: columns 3 and 4 have the same name"]).with(note_quotes_no_cell),
    failed(DEEP_NESTING, &["max_json_depth", "line 1"]),
    applied(
        "implausible_temperatures.csv",
        4,
        4,
        &[],
        &[
            (2, "symptoms", "invalid_value"),
            (3, "symptoms", "invalid_value"),
            (4, "symptoms", "invalid_value"),
        ],
    ),
    applied(
        "invalid_times.csv",
        2,
        2,
        &[],
        &[(2, "onset_date", "invalid_date"), (3, "report_date", "invalid_date")],
    ),
    applied(
        "repeated_keys.ndjson",
        3,
        2,
        &[(2, "repeated_field")],
        &[(1, "onset_date", "repeated_field"), (3, "ward", "repeated_field")],
    ),
    failed("duplicate_header.csv", &["header: columns 3 and 4 have the same name"]),
    failed("only_blank_lines.csv", &["empty"]),
    failed("binary_garbage.csv", &["header", "not valid UTF-8"]),
    failed("json_in_csv_source.csv", &[".key: column \"case_id\" not found in header"]),
    failed("json_syntax_error.json", &["not valid JSON", "line 3"]),
    applied(
        "json_wrong_types.json",
        6,
        4,
        &[(3, "wrong_type"), (4, "wrong_type")],
        &[(2, "onset_date", "wrong_type"), (5, "symptoms", "wrong_type"), (6, "age", "invalid_age")],
    )
    .with(json_numbers_and_lists_are_read),
    failed("not_an_array.json", &["not valid JSON", "array"]),
    failed("json_trailing_garbage.json", &["not valid JSON", "trailing"]),
    applied("json_empty_array.json", 0, 0, &[], &[]),
    applied("json_nul_escape.json", 2, 2, &[], &[(1, "jurisdiction", "nul_byte")]),
    applied(
        "ndjson_bad_lines.ndjson",
        8,
        3,
        &[
            (3, "invalid_json"),
            (4, "wrong_type"),
            (5, "wrong_type"),
            (6, "invalid_encoding"),
            (8, "missing_key"),
        ],
        &[(7, "onset_date", "invalid_date")],
    ),
    failed("ndjson_only_blank_lines.ndjson", &["empty"]),
    failed("truncated_trailer.csv.gz", &["truncated", "compressed stream ends early"]),
    applied("cr_line_endings.csv", 3, 2, &[(3, "ragged_row")], &[]).bug(
        "with CR-only line ends (classic Mac exports) every row is reported as line 1: csv's \
         Position::line() counts only LF",
    ),
    failed("utf16.csv", &["header", "not valid UTF-8"]),
    applied("bom_first_line.ndjson", 2, 2, &[], &[])
        .bug("a UTF-8 BOM before the first NDJSON line is not skipped: line 1 is rejected invalid_json"),
    applied("bom_array.json", 2, 2, &[], &[])
        .bug("a UTF-8 BOM before a JSON array fails the whole file: not valid JSON at line 1 column 1"),
    failed("json_only_whitespace.json", &["empty"]).bug(
        "a JSON file of only whitespace or newlines says 'not valid JSON: EOF while parsing' \
         instead of 'the extract is empty' (CSV and NDJSON say empty; only 0 bytes is detected)",
    ),
];

fn format_of(file: &str) -> &'static str {
    let file = file.trim_end_matches(".gz");
    if file.ends_with(".ndjson") {
        "ndjson"
    } else if file.ends_with(".json") {
        "json"
    } else {
        "csv"
    }
}

/// One source per corpus file, named after it (`truncated.csv.gz` -> `truncated_csv_gz`).
fn source_name(file: &str) -> String {
    file.replace('.', "_")
}

fn corpus_config(cases: &[Case]) -> String {
    let sources: Vec<String> =
        cases.iter().map(|c| source_toml(&source_name(c.file), format_of(c.file), "full", "")).collect();
    config_toml(&sources)
}

/// The committed file, or the generated one (written into `scratch`).
fn fixture(file: &str, scratch: &Path) -> PathBuf {
    let generated: Option<fn() -> Vec<u8>> = match file {
        HUGE_FIELD => Some(huge_field_extract),
        DEEP_NESTING => Some(deep_nesting_extract),
        _ => None,
    };
    if let Some(generate) = generated {
        let path = scratch.join(file);
        if !path.exists() {
            std::fs::write(&path, generate()).unwrap();
        }
        return path;
    }
    data_dir().join("bad").join(file)
}

/// A 10 MB symptoms cell (a broken export), a normal row, and a 100 KB key.
fn huge_field_extract() -> Vec<u8> {
    let mut text = format!("{HEADER}\n");
    text.push_str("C-0001,Amberlee,2026-03-01,2026-03-03,34,F,");
    text.push_str(&"cough;".repeat(10 * 1024 * 1024 / 6));
    text.push('\n');
    text.push_str("C-0002,Amberlee,2026-03-02,2026-03-04,40,M,fever\n");
    text.push_str(&"K".repeat(100 * 1024));
    text.push_str(",Brackwater,2026-03-02,2026-03-04,51,M,\n");
    text.into_bytes()
}

/// A record whose district is nested 100,000 arrays deep.
fn deep_nesting_extract() -> Vec<u8> {
    let depth = 100_000;
    format!(r#"[{{"case_id": "C-0001", "district": {}1{}}}]"#, "[".repeat(depth), "]".repeat(depth))
        .into_bytes()
}

macro_rules! ensure {
    ($cond:expr, $($why:tt)+) => {
        if !$cond {
            return Err(format!($($why)+));
        }
    };
}

/// Checks one file's snapshot against its expectation.
fn check_case(conn: &Connection, case: &Case, outcome: &IngestOutcome) -> Result<(), String> {
    let s = outcome.snapshot_id;
    let source_id = count(conn, &format!("SELECT source_id FROM snapshot WHERE snapshot_id = {s}"));
    let (status, note): (String, Option<String>) = conn
        .query_row("SELECT status, note FROM snapshot WHERE snapshot_id = ?1", [s], |r| {
            Ok((r.get(0)?, r.get(1)?))
        })
        .map_err(|e| e.to_string())?;
    let note = note.unwrap_or_default();
    let versions = count(conn, &format!("SELECT count(*) FROM case_version WHERE source_id = {source_id}"));
    let rejects = count(conn, &format!("SELECT count(*) FROM reject WHERE snapshot_id = {s}"));
    let problems = count(conn, &format!("SELECT count(*) FROM field_problem WHERE snapshot_id = {s}"));
    match case.expect {
        Expect::Failed(words) => {
            ensure!(status == "failed", "status {status}, expected failed (note: {note})");
            ensure!(outcome.status == SnapshotStatus::Failed, "outcome {:?}", outcome.status);
            for word in words {
                ensure!(note.contains(word), "note {note:?} does not contain {word:?}");
            }
            ensure!(versions == 0, "a failed snapshot wrote {versions} versions");
            ensure!(
                rejects == 0 && problems == 0,
                "a failed snapshot kept {rejects} rejects, {problems} problems"
            );
            let accepted =
                count(conn, &format!("SELECT rows_accepted FROM snapshot WHERE snapshot_id = {s}"));
            ensure!(accepted == 0, "a failed snapshot counts {accepted} accepted rows");
        }
        Expect::Applied { total, accepted, rejects: want_rejects, problems: want_problems } => {
            ensure!(status == "applied", "status {status}, expected applied (note: {note})");
            let row: [i64; 7] = conn
                .query_row(
                    "SELECT rows_total, rows_accepted, rows_rejected, rows_new, rows_changed, rows_removed,
                            field_problems FROM snapshot WHERE snapshot_id = ?1",
                    [s],
                    |r| Ok([r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?, r.get(5)?, r.get(6)?]),
                )
                .map_err(|e| e.to_string())?;
            let [
                rows_total,
                rows_accepted,
                rows_rejected,
                rows_new,
                rows_changed,
                rows_removed,
                field_problems,
            ] = row;
            ensure!(rows_total == total, "rows_total {rows_total}, expected {total}");
            ensure!(rows_accepted == accepted, "rows_accepted {rows_accepted}, expected {accepted}");
            ensure!(
                rows_total == rows_accepted + rows_rejected,
                "rows_total {rows_total} != accepted {rows_accepted} + rejected {rows_rejected}"
            );
            ensure!(rows_rejected == rejects, "rows_rejected {rows_rejected} but {rejects} reject rows");
            ensure!(field_problems == problems, "field_problems {field_problems} but {problems} rows");
            // A first full extract: everything accepted is new, nothing changed or removed.
            ensure!(
                rows_new == accepted && rows_changed == 0 && rows_removed == 0,
                "new/changed/removed {row:?}"
            );
            let current = count(
                conn,
                &format!(
                    "SELECT count(*) FROM case_version WHERE source_id = {source_id} AND valid_to IS NULL"
                ),
            );
            ensure!(current == rows_accepted, "{current} current records, {rows_accepted} accepted");
            ensure!(versions == rows_accepted, "{versions} versions, {rows_accepted} accepted");
            let c = &outcome.counts;
            ensure!(
                (c.total, c.accepted, c.rejected) == (total as u64, accepted as u64, rejects as u64),
                "outcome counts {c:?}"
            );
            ensure!(
                outcome.field_problems == problems as u64,
                "outcome field problems {}",
                outcome.field_problems
            );

            let mut stmt = conn
                .prepare(
                    "SELECT line, field, kind, reason, raw FROM reject WHERE snapshot_id = ?1 ORDER BY line",
                )
                .map_err(|e| e.to_string())?;
            let found: Vec<RejectRow> = stmt
                .query_map([s], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?)))
                .and_then(Iterator::collect)
                .map_err(|e| e.to_string())?;
            let kinds: Vec<(i64, &str)> = found.iter().map(|(l, _, k, _, _)| (*l, k.as_str())).collect();
            ensure!(kinds == want_rejects, "rejects {kinds:?}, expected {want_rejects:?}");
            for (line, field, kind, reason, raw) in &found {
                ensure!(!reason.is_empty(), "line {line}: empty reason");
                ensure!(
                    raw.as_deref().is_some_and(|r| !r.is_empty()),
                    "line {line}: reject without its raw text"
                );
                if field.is_some() {
                    ensure!(
                        reason.contains("column \""),
                        "line {line} ({kind}): reason {reason:?} names no column"
                    );
                }
            }

            let mut stmt = conn
                .prepare(
                    "SELECT line, field, kind, reason FROM field_problem WHERE snapshot_id = ?1
                     ORDER BY line, field",
                )
                .map_err(|e| e.to_string())?;
            let found: Vec<(i64, String, String, String)> = stmt
                .query_map([s], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?)))
                .and_then(Iterator::collect)
                .map_err(|e| e.to_string())?;
            let mut want: Vec<(i64, &str, &str)> = want_problems.to_vec();
            want.sort();
            let got: Vec<(i64, &str, &str)> =
                found.iter().map(|(l, f, k, _)| (*l, f.as_str(), k.as_str())).collect();
            ensure!(got == want, "field problems {got:?}, expected {want:?}");
            for (line, field, _, reason) in &found {
                ensure!(
                    reason.contains("column \"") || reason.contains("(unmapped)"),
                    "line {line}, {field}: reason {reason:?} names no column"
                );
            }
        }
    }
    if let Some(extra) = case.extra {
        extra(conn, source_id, s.0)?;
    }
    Ok(())
}

/// A file sent without its header: the first record is read as the header, and the error
/// names column positions, never the record's values.
fn note_quotes_no_cell(conn: &Connection, _: i64, s: i64) -> Result<(), String> {
    let note: String = conn
        .query_row("SELECT note FROM snapshot WHERE snapshot_id = ?1", [s], |r| r.get(0))
        .map_err(|e| e.to_string())?;
    for value in ["2026-03-01", "C-0001", "Amberlee", "cough"] {
        ensure!(!note.contains(value), "the note {note:?} quotes a cell");
    }
    Ok(())
}

fn ragged_message(conn: &Connection, _: i64, s: i64) -> Result<(), String> {
    let reason: String = conn
        .query_row("SELECT reason FROM reject WHERE snapshot_id = ?1 AND line = 3", [s], |r| r.get(0))
        .map_err(|e| e.to_string())?;
    ensure!(reason.contains("expected 7 fields, found 3"), "reason {reason:?}");
    Ok(())
}

fn bom_is_not_part_of_the_key_column(conn: &Connection, source_id: i64, _: i64) -> Result<(), String> {
    let first: String = conn
        .query_row(
            "SELECT case_key FROM case_version WHERE source_id = ?1 ORDER BY case_key LIMIT 1",
            [source_id],
            |r| r.get(0),
        )
        .map_err(|e| e.to_string())?;
    ensure!(first == "C-0001", "first key {first:?}");
    Ok(())
}

fn unknown_columns_go_to_extra_json(conn: &Connection, source_id: i64, _: i64) -> Result<(), String> {
    let extra: Option<String> = conn
        .query_row(
            "SELECT extra_json FROM case_version WHERE source_id = ?1 AND case_key = 'C-0001'",
            [source_id],
            |r| r.get(0),
        )
        .map_err(|e| e.to_string())?;
    let extra: serde_json::Value =
        serde_json::from_str(&extra.unwrap_or_default()).map_err(|e| e.to_string())?;
    ensure!(
        extra == serde_json::json!({"ward_code": "W-17", "lab_comment": "repeat swab"}),
        "extra_json {extra}"
    );
    // A blank unmapped cell is missing: not stored at all.
    let second: Option<String> = conn
        .query_row(
            "SELECT extra_json FROM case_version WHERE source_id = ?1 AND case_key = 'C-0002'",
            [source_id],
            |r| r.get(0),
        )
        .map_err(|e| e.to_string())?;
    ensure!(second.is_none(), "blank extras stored as {second:?}");
    Ok(())
}

fn duplicate_keys_keep_the_last_row(conn: &Connection, source_id: i64, s: i64) -> Result<(), String> {
    let (onset, line): (String, i64) = conn
        .query_row(
            "SELECT onset_date, line FROM case_version WHERE source_id = ?1 AND case_key = 'C-0001'",
            [source_id],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .map_err(|e| e.to_string())?;
    ensure!(onset == "2026-02-28" && line == 5, "kept onset {onset} from line {line}, expected line 5");
    let mut stmt = conn
        .prepare("SELECT raw, reason FROM reject WHERE snapshot_id = ?1 ORDER BY line")
        .map_err(|e| e.to_string())?;
    let found: Vec<(String, String)> = stmt
        .query_map([s], |r| Ok((r.get(0)?, r.get(1)?)))
        .and_then(Iterator::collect)
        .map_err(|e| e.to_string())?;
    let raws: Vec<&str> = found.iter().map(|(raw, _)| raw.as_str()).collect();
    ensure!(
        raws == [
            "C-0001,Amberlee,2026-03-01,2026-03-03,34,F,cough",
            "C-0001,Amberlee,2026-03-01,2026-03-05,34,F,cough;fever"
        ],
        "raw lines {raws:?}"
    );
    for (_, reason) in &found {
        ensure!(reason.contains("column \"case_id\"") && reason.contains("line 5"), "reason {reason:?}");
    }
    Ok(())
}

fn invalid_fields_are_missing_and_marked(conn: &Connection, source_id: i64, _: i64) -> Result<(), String> {
    let (onset, invalid): (Option<String>, Option<String>) = conn
        .query_row(
            "SELECT onset_date, invalid FROM case_version WHERE source_id = ?1 AND case_key = 'C-0004'",
            [source_id],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .map_err(|e| e.to_string())?;
    ensure!(onset.is_none(), "an invalid onset was stored as {onset:?}");
    ensure!(invalid.as_deref() == Some("onset_date,report_date"), "invalid = {invalid:?}");
    Ok(())
}

fn huge_raw_text_is_truncated(conn: &Connection, _: i64, s: i64) -> Result<(), String> {
    let raw: String = conn
        .query_row("SELECT raw FROM reject WHERE snapshot_id = ?1", [s], |r| r.get(0))
        .map_err(|e| e.to_string())?;
    ensure!(raw.len() < 8 * 1024, "reject raw text is {} bytes", raw.len());
    ensure!(raw.contains("truncated"), "raw text does not say it was truncated");
    let biggest = count(conn, "SELECT coalesce(max(length(symptoms)), 0) FROM case_version");
    ensure!(biggest < 64 * 1024, "a {biggest}-byte cell reached the store");
    Ok(())
}

fn json_numbers_and_lists_are_read(conn: &Connection, source_id: i64, _: i64) -> Result<(), String> {
    let keys: Vec<String> = conn
        .prepare("SELECT case_key FROM case_version WHERE source_id = ?1 ORDER BY case_key")
        .and_then(|mut stmt| stmt.query_map([source_id], |r| r.get(0))?.collect())
        .map_err(|e| e.to_string())?;
    ensure!(keys == ["1006", "C-0001", "C-0002", "C-0005"], "keys {keys:?}");
    // 38.4 C in a symptom list is fever (common practice: 38.0 C or more).
    let symptoms: String = conn
        .query_row(
            "SELECT symptoms FROM case_version WHERE source_id = ?1 AND case_key = 'C-0001'",
            [source_id],
            |r| r.get(0),
        )
        .map_err(|e| e.to_string())?;
    ensure!(symptoms == r#"["cough","fever"]"#, "symptoms {symptoms}");
    Ok(())
}

fn active_cases() -> Vec<Case> {
    CASES.iter().filter(|c| c.bug.is_none()).copied().collect()
}

fn known_bug_cases() -> Vec<Case> {
    CASES.iter().filter(|c| c.bug.is_some()).copied().collect()
}

/// Ingests `cases` into one fresh store through the library; returns the failures.
fn run_library(cases: &[Case]) -> Vec<String> {
    let dir = tempfile::tempdir().unwrap();
    let (_, config) = write_config(dir.path(), &corpus_config(cases));
    let mut failures = Vec::new();
    for case in cases {
        let source = config.source(&source_name(case.file)).unwrap();
        let path = fixture(case.file, dir.path());
        let mut store = open_store(&config.store.path);
        let outcome = match tidemark::app::pipeline::ingest_file(
            &mut store,
            &config,
            source,
            &path,
            Some(corpus_as_of()),
        ) {
            Ok(outcome) => outcome,
            Err(err) => {
                failures.push(format!("{}: ingest returned an error: {err:#}", case.file));
                continue;
            }
        };
        drop(store);
        let conn = open_ro(&config.store.path);
        if let Err(why) = check_case(&conn, case, &outcome) {
            failures.push(format!("{}: {why}", case.file));
        }
    }
    let integrity = integrity_check(&config.store.path);
    if integrity != "ok" {
        failures.push(format!("integrity_check after the corpus: {integrity}"));
    }
    failures
}

#[test]
fn every_corpus_file_has_an_expected_outcome_and_a_readme_entry() {
    let folder = data_dir().join("bad");
    let readme = std::fs::read_to_string(folder.join("README.md")).unwrap();
    let on_disk: BTreeSet<String> = std::fs::read_dir(&folder)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|name| name != "README.md")
        .collect();
    let in_table: BTreeSet<String> =
        CASES.iter().map(|c| c.file.to_string()).filter(|f| f != HUGE_FIELD && f != DEEP_NESTING).collect();
    assert_eq!(on_disk, in_table, "tests/data/bad and the CASES table disagree");
    assert!(CASES.len() >= 22, "the corpus should have at least 22 files");
    for case in CASES {
        assert!(readme.contains(&format!("`{}`", case.file)), "README.md does not list {}", case.file);
    }
    for name in &on_disk {
        let size = std::fs::metadata(folder.join(name)).unwrap().len();
        assert!(size < 4096, "{name} is {size} bytes; keep committed fixtures tiny");
    }
}

#[test]
fn corpus_through_the_library_gives_the_expected_outcomes() {
    let failures = run_library(&active_cases());
    assert!(failures.is_empty(), "{} corpus files misbehaved:\n{}", failures.len(), failures.join("\n"));
}

#[test]
fn regressions_stray_quotes_cr_line_ends_json_boms_and_blank_json() {
    let cases = known_bug_cases();
    for case in &cases {
        eprintln!("{}: {}", case.file, case.bug.unwrap_or_default());
    }
    let failures = run_library(&cases);
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}

#[test]
fn corpus_through_the_cli_exits_cleanly() {
    let dir = tempfile::tempdir().unwrap();
    let cases = active_cases();
    let (config_path, config) = write_config(dir.path(), &corpus_config(&cases));
    let mut failures = Vec::new();
    for case in &cases {
        let name = source_name(case.file);
        let path = fixture(case.file, dir.path());
        let (code, stdout, stderr) = run(tidemark()
            .arg("--config")
            .arg(&config_path)
            .arg("ingest")
            .arg(&path)
            .args(["--source", &name, "--as-of", CORPUS_AS_OF]));
        let (want_code, want_status) = match case.expect {
            Expect::Failed(_) => (1, "failed"),
            Expect::Applied { .. } => (0, "applied"),
        };
        if code != want_code {
            failures.push(format!("{}: exit code {code}, expected {want_code}; stderr: {stderr}", case.file));
        }
        let headline = stdout.lines().next().unwrap_or_default();
        if !(headline.starts_with("snapshot ") && headline.contains(&format!("of {name}: {want_status}"))) {
            failures.push(format!("{}: first line {headline:?}", case.file));
        }
        match case.expect {
            Expect::Failed(words) => {
                for word in words {
                    if !stdout.contains(word) {
                        failures.push(format!("{}: output does not contain {word:?}: {stdout}", case.file));
                    }
                }
            }
            Expect::Applied { rejects, problems, .. } => {
                // The problem lines printed after the summary name the line (and field).
                let mut lines: Vec<i64> =
                    rejects.iter().map(|r| r.0).chain(problems.iter().map(|p| p.0)).collect();
                lines.sort();
                if let Some(first) = lines.first()
                    && !stdout.contains(&format!("  line {first}"))
                {
                    failures.push(format!("{}: output names no line {first}: {stdout}", case.file));
                }
                for (_, field, _) in problems {
                    if !stdout.contains(&format!("field {field}")) {
                        failures.push(format!("{}: output does not name field {field}: {stdout}", case.file));
                    }
                }
            }
        }
    }
    let conn = open_ro(&config.store.path);
    let snapshots = count(&conn, "SELECT count(*) FROM snapshot");
    if snapshots != cases.len() as i64 {
        failures.push(format!("{snapshots} snapshots for {} files", cases.len()));
    }
    let failed_versions = count(
        &conn,
        "SELECT count(*) FROM case_version v JOIN snapshot n ON n.snapshot_id = v.valid_from
         WHERE n.status <> 'applied'",
    );
    if failed_versions != 0 {
        failures.push(format!("{failed_versions} versions belong to snapshots that were not applied"));
    }
    let integrity = integrity_check(&config.store.path);
    if integrity != "ok" {
        failures.push(format!("integrity_check after the corpus: {integrity}"));
    }
    assert!(failures.is_empty(), "{} problems:\n{}", failures.len(), failures.join("\n"));
}

/// Planted in the values of every corpus file (districts, keys, symptoms, free text), so a
/// message that quotes a cell shows it.
const PLANTED: &str = "QZXV";

/// A corpus file with the marker planted in its values (byte replacement, so broken
/// encodings and structure stay as they were; gzip files are left alone).
fn planted(bytes: &[u8]) -> Vec<u8> {
    let mut text = bytes.to_vec();
    for word in ["Amberlee", "Brackwater", "Dunhollow", "cough", "fever", "repeat", "W-17", "C-0"] {
        let with = format!("{PLANTED}{word}");
        let mut out = Vec::with_capacity(text.len());
        let mut rest = &text[..];
        while let Some(at) = rest.windows(word.len()).position(|w| w == word.as_bytes()) {
            out.extend_from_slice(&rest[..at]);
            out.extend_from_slice(with.as_bytes());
            rest = &rest[at + word.len()..];
        }
        out.extend_from_slice(rest);
        text = out;
    }
    text
}

/// Dates that appear in a file (other than the as-of date), which no message may quote.
fn dates_in(bytes: &[u8]) -> BTreeSet<String> {
    let text = String::from_utf8_lossy(bytes);
    let chars: Vec<char> = text.chars().collect();
    let mut dates = BTreeSet::new();
    for start in 0..chars.len().saturating_sub(9) {
        let piece: String = chars[start..start + 10].iter().collect();
        if chrono::NaiveDate::parse_from_str(&piece, "%Y-%m-%d").is_ok() && piece != CORPUS_AS_OF {
            dates.insert(piece);
        }
    }
    dates
}

/// Every corpus file with the marker planted in its values, through `tidemark ingest`: no
/// error text, log line, problem line, snapshot note, reject or field-problem reason, nor
/// `tidemark status` or `snapshots` output carries a planted value or a date of the file.
#[test]
fn no_message_carries_a_cell_value() {
    let dir = tempfile::tempdir().unwrap();
    let cases: Vec<Case> = active_cases().into_iter().filter(|c| c.file != HUGE_FIELD).collect();
    let (config_path, config) = write_config(dir.path(), &corpus_config(&cases));
    let marked = dir.path().join("marked");
    std::fs::create_dir_all(&marked).unwrap();
    let mut texts: Vec<(String, String)> = Vec::new();
    let mut dates = BTreeSet::new();
    for case in &cases {
        let original = std::fs::read(fixture(case.file, dir.path())).unwrap();
        let bytes = if case.file.ends_with(".gz") { original } else { planted(&original) };
        dates.extend(dates_in(&bytes));
        let path = marked.join(case.file);
        std::fs::write(&path, &bytes).unwrap();
        let (_, stdout, stderr) = run(tidemark()
            .arg("--config")
            .arg(&config_path)
            .arg("ingest")
            .arg(&path)
            .args(["--source", &source_name(case.file), "--as-of", CORPUS_AS_OF]));
        texts.push((case.file.to_string(), format!("{stdout}{stderr}")));
    }
    for args in [&["status"][..], &["snapshots", "--format", "json"][..]] {
        let (_, stdout, stderr) = run(tidemark().arg("--config").arg(&config_path).args(args));
        texts.push((args.join(" "), format!("{stdout}{stderr}")));
    }
    let db = open_ro(&config.store.path);
    for sql in [
        "SELECT coalesce(note, '') FROM snapshot",
        "SELECT reason FROM reject",
        "SELECT reason FROM field_problem",
        "SELECT coalesce(last_error, '') FROM source_health",
    ] {
        let mut stmt = db.prepare(sql).unwrap();
        let rows: Vec<String> = stmt.query_map([], |r| r.get(0)).unwrap().map(Result::unwrap).collect();
        texts.push((sql.to_string(), rows.join("\n")));
    }
    // The marker did reach the store, where it belongs: in the raw text of rejected rows.
    assert!(count(&db, &format!("SELECT count(*) FROM reject WHERE raw LIKE '%{PLANTED}%'")) > 0);
    assert!(dates.len() >= 5, "dates of the corpus: {dates:?}");
    let mut leaks = Vec::new();
    for (what, text) in &texts {
        // The printed file name carries the path, not a value; drop it before scanning.
        let text = text.replace(&marked.display().to_string(), "");
        if text.contains(PLANTED) {
            leaks.push(format!("{what}: {}", text.lines().find(|l| l.contains(PLANTED)).unwrap_or_default()));
        }
        if let Some(date) = dates.iter().find(|d| text.contains(d.as_str())) {
            leaks.push(format!("{what}: quotes the date {date}"));
        }
    }
    assert!(leaks.is_empty(), "messages carry cell values:\n{}", leaks.join("\n"));
}
