//! The real `tidemark` binary (assert_cmd): `init` writes a config and a private store;
//! `check-config` prints the resolved config with secrets redacted; bad configs and unknown
//! sources exit 2 naming the key path; `ingest`, `snapshots`, `history` and `curve` in all
//! three formats (JSON is an array of objects with snake_case keys); `query` reads but every
//! kind of write is refused and leaves the store unchanged; `demo` runs end to end; files
//! and folders are private under umask 000; an outside file name is logged escaped; an
//! ingest removes the temporary archive files of killed writers. Exit codes are the
//! contract: 0 ok, 1 error, 2 bad usage or config.

use std::path::{Path, PathBuf};

use serde_json::Value;

use crate::support::{TestResult, config_toml, count, csv, mode, open_ro, run, source_toml, tidemark};

/// A folder with a config (sources `full` and `delta`) but no store yet.
fn setup() -> (tempfile::TempDir, PathBuf) {
    let dir = tempfile::tempdir().unwrap();
    let config = dir.path().join("tidemark.toml");
    let text =
        config_toml(&[source_toml("full", "csv", "full", ""), source_toml("delta", "csv", "delta", "")]);
    std::fs::write(&config, text).unwrap();
    (dir, config)
}

/// `tidemark --config CONFIG ARGS...`: (exit code, stdout, stderr), never a panic.
fn tm(config: &Path, args: &[&str]) -> (i32, String, String) {
    run(tidemark().arg("--config").arg(config).args(args))
}

fn json(text: &str) -> Vec<serde_json::Map<String, Value>> {
    let value: Value = serde_json::from_str(text).unwrap_or_else(|err| panic!("not JSON ({err}): {text}"));
    let Value::Array(items) = value else { panic!("not a JSON array: {text}") };
    items
        .into_iter()
        .map(|item| match item {
            Value::Object(object) => object,
            other => panic!("not an object: {other}"),
        })
        .collect()
}

fn is_snake_case(key: &str) -> bool {
    key.starts_with(|c: char| c.is_ascii_lowercase())
        && key.chars().all(|c| c.is_ascii_lowercase() || c.is_ascii_digit() || c == '_')
}

/// Two days of the `full` source through `tidemark ingest`: C-0002's onset is corrected on
/// day 2 and C-0004 arrives.
fn ingest_two_days(dir: &Path, config: &Path) {
    let day1 = dir.join("full-2026-03-03.csv");
    std::fs::write(
        &day1,
        csv(&[
            "C-0001,Amberlee,2026-03-01,2026-03-02,34,F,cough",
            "C-0002,Amberlee,2026-03-02,2026-03-03,40,M,fever",
            "C-0003,Brackwater,2026-03-02,2026-03-03,51,M,",
        ]),
    )
    .unwrap();
    let day2 = dir.join("full-2026-03-04.csv");
    std::fs::write(
        &day2,
        csv(&[
            "C-0001,Amberlee,2026-03-01,2026-03-02,34,F,cough",
            "C-0002,Amberlee,2026-03-01,2026-03-03,40,M,fever",
            "C-0003,Brackwater,2026-03-02,2026-03-03,51,M,",
            "C-0004,Brackwater,2026-03-03,2026-03-04,29,F,",
        ]),
    )
    .unwrap();
    for (file, as_of) in [(&day1, "2026-03-03"), (&day2, "2026-03-04")] {
        let (code, stdout, stderr) =
            tm(config, &["ingest", file.to_str().unwrap(), "--source", "full", "--as-of", as_of]);
        assert_eq!(code, 0, "{stdout}{stderr}");
        assert!(stdout.contains("of full: applied"), "{stdout}");
    }
}

#[test]
fn init_writes_a_config_and_creates_a_private_store() -> TestResult {
    let dir = tempfile::tempdir()?;
    let target = dir.path().join("site");
    let (code, stdout, stderr) = run(tidemark().arg("init").arg(&target));
    assert_eq!(code, 0, "{stdout}{stderr}");
    let config = target.join("tidemark.toml");
    assert!(config.exists());
    assert!(stdout.contains("wrote") && stdout.contains("created store"), "{stdout}");
    let store = target.join("data").join("tidemark.db");
    assert_eq!(mode(&store), 0o600, "the store holds patient-level data");
    assert_eq!(mode(store.parent().unwrap()), 0o700);
    let conn = open_ro(&store);
    assert!(count(&conn, "SELECT max(version) FROM schema_version") >= 1);

    // The written config is valid as is.
    let (code, stdout, stderr) = tm(&config, &["check-config"]);
    assert_eq!(code, 0, "{stdout}{stderr}");
    assert!(stdout.contains("config ok") && stdout.contains("source county-reports"), "{stdout}");

    // A second init does not overwrite the edited config.
    std::fs::write(&config, format!("{}\n# edited\n", std::fs::read_to_string(&config)?))?;
    let (code, _, stderr) = run(tidemark().arg("init").arg(&target));
    assert_eq!(code, 1);
    assert!(stderr.contains("already exists"), "{stderr}");
    assert!(std::fs::read_to_string(&config)?.contains("# edited"));
    Ok(())
}

#[test]
fn check_config_redacts_secrets_and_names_only_environment_variables() {
    let (dir, _) = setup();
    let config = dir.path().join("secrets.toml");
    let mut text = config_toml(&[source_toml("full", "csv", "full", "")]);
    text.push_str(
        r#"
[[source]]
name = "lab-feed"
kind = "url"
url = "https://labs.health.example/exports/latest.ndjson?token=url-token-123"
format = "ndjson"
key = "specimen_id"
auth_env = "TIDEMARK_TEST_LAB_TOKEN"

[alert.email]
smtp = "127.0.0.1:2525"
tls = "none"
from = "tidemark@health.example"
to = ["oncall@health.example"]
username_env = "TIDEMARK_TEST_SMTP_USER"
password_env = "TIDEMARK_TEST_SMTP_PASSWORD"

[alert.webhook]
url = "https://chat.health.example/hooks/hook-token-abc"
secret_env = "TIDEMARK_TEST_WEBHOOK_SECRET"
"#,
    );
    std::fs::write(&config, text).unwrap();
    let (code, stdout, stderr) = run(tidemark()
        .arg("--config")
        .arg(&config)
        .arg("check-config")
        .env("TIDEMARK_TEST_SMTP_PASSWORD", "smtp-password-value")
        .env("TIDEMARK_TEST_LAB_TOKEN", "lab-token-value")
        .env_remove("TIDEMARK_TEST_SMTP_USER")
        .env_remove("TIDEMARK_TEST_WEBHOOK_SECRET"));
    assert_eq!(code, 0, "{stdout}{stderr}");
    assert!(stdout.contains("$TIDEMARK_TEST_SMTP_PASSWORD (set)"), "{stdout}");
    assert!(stdout.contains("$TIDEMARK_TEST_SMTP_USER (not set)"), "{stdout}");
    assert!(stdout.contains("$TIDEMARK_TEST_WEBHOOK_SECRET (not set)"), "{stdout}");
    assert!(stdout.contains("$TIDEMARK_TEST_LAB_TOKEN (set)"), "{stdout}");
    assert!(stdout.contains("chat.health.example") && stdout.contains("labs.health.example"), "{stdout}");
    for secret in ["smtp-password-value", "lab-token-value", "hook-token-abc", "url-token-123"] {
        assert!(!stdout.contains(secret) && !stderr.contains(secret), "{secret} leaked:\n{stdout}{stderr}");
    }
}

#[test]
fn a_bad_config_exits_2_naming_the_key_path() {
    let dir = tempfile::tempdir().unwrap();
    let config = dir.path().join("tidemark.toml");
    let check = |text: &str, wants: &[&str]| {
        std::fs::write(&config, text).unwrap();
        let (code, stdout, stderr) = tm(&config, &["check-config"]);
        assert_eq!(code, 2, "{text}\n{stdout}{stderr}");
        let first = stderr.lines().next().unwrap_or_default();
        assert!(first.starts_with("error: "), "one clear line first: {stderr}");
        for want in wants {
            assert!(stderr.contains(want), "stderr lacks {want:?}:\n{stderr}");
        }
    };
    let good = source_toml("full", "csv", "full", "");
    check(
        &config_toml(&[good.replace("key = \"case_id\"", "key = \"case_id\"\nschedule = \"every tuesday\"")]),
        &["source[0].schedule: invalid cron expression"],
    );
    // Every problem is reported at once, each with its path.
    check(
        &config_toml(&[
            good.clone(),
            source_toml("second", "csv", "sometimes", "").replace("format = \"csv\"", "format = \"xlsx\""),
        ]),
        &["source[1].extract", "source[1].format", "\"xlsx\""],
    );
    check(&config_toml(&[good.clone(), good.clone()]), &["source[1].name", "used by another source"]);
    check(
        &config_toml(&[good.replace("onset_date = \"onset\"", "onset_day = \"onset\"")]),
        &["source[0].fields.onset_day: not a canonical field"],
    );
    // A misspelt key is an error, not silently ignored.
    check(&config_toml(&[good.replace("extract = \"full\"", "extrct = \"full\"")]), &["extrct"]);
    check("[store\npath = 1\n", &["not valid TOML"]);
    check("[serve]\nbind = \"localhost\"\n", &["serve.bind"]);

    // A missing config file is a config error too.
    let (code, _, stderr) = tm(&dir.path().join("absent.toml"), &["check-config"]);
    assert_eq!(code, 2, "{stderr}");
    assert!(stderr.contains("absent.toml"), "{stderr}");
    // No config anywhere: usage error with advice.
    let empty = dir.path().join("empty");
    std::fs::create_dir_all(&empty).unwrap();
    let (code, _, stderr) = run(tidemark().current_dir(&empty).arg("snapshots"));
    assert_eq!(code, 2, "{stderr}");
    assert!(stderr.contains("--config"), "{stderr}");
}

#[test]
fn an_unknown_source_exits_2() {
    let (dir, config) = setup();
    let file = dir.path().join("x.csv");
    std::fs::write(&file, csv(&["C-0001,Amberlee,2026-03-01,,34,F,"])).unwrap();
    for args in [
        vec!["ingest", file.to_str().unwrap(), "--source", "nope"],
        vec!["snapshots", "--source", "nope"],
        vec!["history", "C-0001", "--source", "nope"],
        vec!["curve", "--source", "nope", "--by", "onset"],
    ] {
        let (code, stdout, stderr) = tm(&config, &args);
        assert_eq!(code, 2, "{args:?}: {stdout}{stderr}");
        assert!(stderr.contains("no source named \"nope\"") && stderr.contains("full"), "{stderr}");
    }
    // Bad usage: an unknown field, a time that is not a time.
    let (code, _, stderr) = tm(&config, &["curve", "--source", "full", "--by", "birthday"]);
    assert_eq!(code, 2, "{stderr}");
    let (code, _, stderr) = tm(&config, &["curve", "--source", "full", "--by", "age"]);
    assert_eq!(code, 2, "{stderr}");
    assert!(stderr.contains("date field"), "{stderr}");
    let (code, _, stderr) =
        tm(&config, &["ingest", file.to_str().unwrap(), "--source", "full", "--as-of", "soon"]);
    assert_eq!(code, 2, "{stderr}");
    // A missing file is an error, not a panic.
    let (code, _, stderr) =
        tm(&config, &["ingest", "/nonexistent/x.csv", "--source", "full", "--as-of", "2026-03-02"]);
    assert_eq!(code, 1, "{stderr}");
}

#[test]
fn listings_work_before_any_ingest_and_create_the_store() {
    let (dir, config) = setup();
    let (code, stdout, stderr) = tm(&config, &["snapshots", "--format", "json"]);
    assert_eq!(code, 0, "{stdout}{stderr}");
    assert!(json(&stdout).is_empty());
    assert_eq!(mode(&dir.path().join("store").join("tidemark.db")), 0o600);
}

#[test]
fn ingest_then_snapshots_in_json_csv_and_table() -> TestResult {
    let (dir, config) = setup();
    ingest_two_days(dir.path(), &config);
    // A truncated extract is held and the ingest still exits 0; a failed one exits 1.
    let short = dir.path().join("short.csv");
    std::fs::write(&short, csv(&["C-0001,Amberlee,2026-03-01,2026-03-02,34,F,cough"]))?;
    let (code, stdout, _) =
        tm(&config, &["ingest", short.to_str().unwrap(), "--source", "full", "--as-of", "2026-03-05"]);
    assert_eq!(code, 0);
    assert!(stdout.contains(": held") && stdout.contains("release or reject"), "{stdout}");
    let empty = dir.path().join("empty.csv");
    std::fs::write(&empty, "")?;
    let (code, stdout, _) =
        tm(&config, &["ingest", empty.to_str().unwrap(), "--source", "full", "--as-of", "2026-03-05"]);
    assert_eq!(code, 1);
    assert!(stdout.contains(": failed (the extract is empty)"), "{stdout}");

    let (code, stdout, stderr) = tm(&config, &["snapshots", "--format", "json"]);
    assert_eq!(code, 0, "{stderr}");
    let rows = json(&stdout);
    assert_eq!(rows.len(), 4);
    for row in &rows {
        for key in row.keys() {
            assert!(is_snake_case(key), "key {key:?} is not snake_case");
        }
    }
    let statuses: Vec<&str> = rows.iter().map(|r| r["status"].as_str().unwrap()).collect();
    assert_eq!(statuses, ["applied", "applied", "held", "failed"]);
    assert_eq!(rows[0]["snapshot_id"], 1);
    assert_eq!(rows[0]["source"], "full");
    assert_eq!(rows[0]["as_of"], "2026-03-03T23:59:59Z");
    assert_eq!((rows[1]["new"].as_i64(), rows[1]["changed"].as_i64()), (Some(1), Some(1)));
    assert!(rows[0]["note"].is_null());

    let (code, stdout, _) = tm(&config, &["snapshots", "--source", "full", "--format", "csv"]);
    assert_eq!(code, 0);
    let mut reader = ::csv::Reader::from_reader(stdout.as_bytes());
    let header: Vec<String> = reader.headers()?.iter().map(str::to_string).collect();
    assert_eq!(header[..5], ["snapshot_id", "source", "seq", "as_of", "status"]);
    let records: Vec<::csv::StringRecord> = reader.records().collect::<Result<_, _>>()?;
    assert_eq!(records.len(), 4);
    assert_eq!(&records[2][4], "held");

    let (code, stdout, _) = tm(&config, &["snapshots"]);
    assert_eq!(code, 0);
    assert!(stdout.lines().next().unwrap().starts_with("snapshot_id"), "{stdout}");
    assert_eq!(stdout.lines().count(), 2 + 4, "header, rule and one line per snapshot:\n{stdout}");

    // Release the held one through the CLI; then reject is refused (no longer held).
    let (code, stdout, stderr) = tm(&config, &["snapshots", "release", "3"]);
    assert_eq!(code, 0, "{stdout}{stderr}");
    assert!(stdout.contains("snapshot 3 of full: applied"), "{stdout}");
    let (code, _, stderr) = tm(&config, &["snapshots", "reject", "3"]);
    assert_eq!(code, 1, "{stderr}");
    assert!(stderr.contains("not held"), "{stderr}");
    Ok(())
}

#[test]
fn history_lists_every_version_of_a_record() {
    let (dir, config) = setup();
    ingest_two_days(dir.path(), &config);
    let (code, stdout, stderr) = tm(&config, &["history", "C-0002", "--source", "full", "--format", "json"]);
    assert_eq!(code, 0, "{stderr}");
    let versions = json(&stdout);
    assert_eq!(versions.len(), 2);
    assert_eq!((versions[0]["valid_from"].as_i64(), versions[0]["valid_to"].as_i64()), (Some(1), Some(2)));
    assert_eq!((versions[1]["valid_from"].as_i64(), versions[1]["valid_to"].as_i64()), (Some(2), None));
    assert_eq!(versions[0]["onset_date"], "2026-03-02");
    assert_eq!(versions[1]["onset_date"], "2026-03-01");
    assert_eq!(versions[1]["sex"], "male");
    for key in versions[0].keys() {
        assert!(is_snake_case(key), "{key}");
    }
    let (code, stdout, _) = tm(&config, &["history", "C-0002", "--source", "full", "--format", "csv"]);
    assert_eq!(code, 0);
    assert_eq!(stdout.lines().count(), 3, "{stdout}");
    let (code, stdout, _) = tm(&config, &["history", "C-0002", "--source", "full"]);
    assert_eq!(code, 0);
    assert!(stdout.contains("2026-03-03T23:59:59Z"), "{stdout}");
    // An unknown key is an error with a clear message.
    let (code, _, stderr) = tm(&config, &["history", "C-9999", "--source", "full"]);
    assert_eq!(code, 1);
    assert!(stderr.contains("no record"), "{stderr}");
}

#[test]
fn curve_as_of_a_past_date_gives_the_counts_known_then() {
    let (dir, config) = setup();
    ingest_two_days(dir.path(), &config);
    let counts = |args: &[&str]| -> Vec<(String, i64)> {
        let mut all = vec!["curve", "--source", "full", "--by", "onset", "--format", "json"];
        all.extend_from_slice(args);
        let (code, stdout, stderr) = tm(&config, &all);
        assert_eq!(code, 0, "{stderr}");
        json(&stdout)
            .into_iter()
            .map(|r| {
                (r["onset_date"].as_str().unwrap_or("missing").to_string(), r["count"].as_i64().unwrap())
            })
            .collect()
    };
    let owned = |pairs: &[(&str, i64)]| pairs.iter().map(|(d, n)| (d.to_string(), *n)).collect::<Vec<_>>();
    assert_eq!(counts(&["--as-of", "2026-03-03"]), owned(&[("2026-03-01", 1), ("2026-03-02", 2)]));
    let latest = owned(&[("2026-03-01", 2), ("2026-03-02", 1), ("2026-03-03", 1)]);
    assert_eq!(counts(&["--as-of", "2026-03-04"]), latest);
    assert_eq!(counts(&[]), latest, "no --as-of means the latest snapshot");
    assert_eq!(counts(&["--as-of", "2026-03-04T12:00:00Z"]), counts(&["--as-of", "2026-03-03"]));
    // The full name of the field works as well as the short one.
    let (code, stdout, _) = tm(
        &config,
        &["curve", "--source", "full", "--by", "onset_date", "--as-of", "2026-03-03", "--format", "json"],
    );
    assert_eq!(code, 0);
    assert_eq!(json(&stdout)[0]["snapshot_id"], 1);

    let (code, stdout, stderr) = tm(
        &config,
        &["curve", "--source", "full", "--by", "onset", "--stratify", "jurisdiction", "--format", "json"],
    );
    assert_eq!(code, 0, "{stderr}");
    let rows: Vec<(String, String, i64)> = json(&stdout)
        .into_iter()
        .map(|r| {
            (
                r["onset_date"].as_str().unwrap().to_string(),
                r["jurisdiction"].as_str().unwrap().to_string(),
                r["count"].as_i64().unwrap(),
            )
        })
        .collect();
    let want = [
        ("2026-03-01", "Amberlee", 2),
        ("2026-03-01", "Brackwater", 0),
        ("2026-03-02", "Amberlee", 0),
        ("2026-03-02", "Brackwater", 1),
        ("2026-03-03", "Amberlee", 0),
        ("2026-03-03", "Brackwater", 1),
    ];
    let want: Vec<(String, String, i64)> =
        want.iter().map(|(d, j, n)| (d.to_string(), j.to_string(), *n)).collect();
    assert_eq!(rows, want);
    let (code, stdout, _) = tm(&config, &["curve", "--source", "full", "--by", "report", "--format", "csv"]);
    assert_eq!(code, 0);
    assert!(stdout.starts_with("report_date,count,snapshot_id\n"), "{stdout}");
    // Before the first snapshot nothing was known.
    let (code, _, stderr) =
        tm(&config, &["curve", "--source", "full", "--by", "onset", "--as-of", "2026-01-01"]);
    assert_eq!(code, 1);
    assert!(stderr.contains("no applied snapshot"), "{stderr}");
}

#[test]
fn query_reads_and_refuses_every_write() {
    let (dir, config) = setup();
    ingest_two_days(dir.path(), &config);
    let (code, stdout, stderr) =
        tm(&config, &["query", "SELECT count(*) AS n FROM case_version", "--format", "json"]);
    assert_eq!(code, 0, "{stderr}");
    let rows = json(&stdout);
    assert_eq!(rows.len(), 1);
    assert_eq!(rows[0]["n"], 5);

    let store = dir.path().join("store").join("tidemark.db");
    let fingerprint = || {
        let conn = open_ro(&store);
        let tables: Vec<String> = conn
            .prepare("SELECT name FROM sqlite_master ORDER BY name")
            .unwrap()
            .query_map([], |r| r.get(0))
            .unwrap()
            .collect::<Result<_, _>>()
            .unwrap();
        let counts: Vec<i64> = ["case_version", "snapshot", "source", "reject", "schema_version"]
            .iter()
            .map(|t| count(&conn, &format!("SELECT count(*) FROM {t}")))
            .collect();
        let keys: String = conn
            .query_row(
                "SELECT group_concat(case_key || ':' || coalesce(valid_to, '-')) FROM case_version",
                [],
                |r| r.get(0),
            )
            .unwrap();
        (tables, counts, keys)
    };
    let before = fingerprint();
    let evil = dir.path().join("evil.db");
    let attach = format!("ATTACH DATABASE '{}' AS evil", evil.display());
    for sql in [
        "DELETE FROM case_version",
        "INSERT INTO source (name, kind, config_hash) VALUES ('x', 'folder', 'x')",
        "DROP TABLE case_version",
        "UPDATE case_version SET onset_date = NULL",
        "CREATE TABLE scratch (x)",
        "PRAGMA query_only = OFF; DELETE FROM case_version",
        "PRAGMA journal_mode = DELETE",
        "PRAGMA user_version = 7",
        "ALTER TABLE reject ADD COLUMN y",
        "REINDEX",
        "VACUUM",
        attach.as_str(),
    ] {
        let (code, stdout, stderr) = tm(&config, &["query", sql]);
        assert_ne!(code, 0, "{sql:?} was allowed:\n{stdout}");
        assert!(stderr.starts_with("error: "), "{sql:?}: {stderr}");
        assert_eq!(fingerprint(), before, "{sql:?} changed the store");
    }
    assert!(!evil.exists(), "ATTACH created a file");
    let (code, stdout, _) =
        tm(&config, &["query", "SELECT count(*) AS n FROM case_version", "--format", "csv"]);
    assert_eq!((code, stdout.as_str()), (0, "n\n5\n"));
    // Other statements that only read are fine.
    for sql in [
        "WITH c AS (SELECT case_key FROM case_version WHERE valid_to IS NULL) SELECT count(*) FROM c",
        "PRAGMA table_info(case_version)",
        "EXPLAIN QUERY PLAN SELECT * FROM case_version WHERE case_key = 'C-0001'",
        "SELECT kind, count(*) FROM reject GROUP BY kind",
    ] {
        let (code, _, stderr) = tm(&config, &["query", sql, "--format", "json"]);
        assert_eq!(code, 0, "{sql:?}: {stderr}");
    }
}

#[test]
fn query_refuses_vacuum_into_without_creating_the_file() {
    let (dir, config) = setup();
    ingest_two_days(dir.path(), &config);
    let copy = dir.path().join("copy.db");
    let sql = format!("VACUUM INTO '{}'", copy.display());
    let (code, stdout, stderr) = tm(&config, &["query", &sql]);
    assert_ne!(code, 0, "VACUUM INTO was allowed: {stdout}");
    assert!(stderr.contains("only statements that read"), "{stderr}");
    // SQLite refuses it on a read-only connection, but only after creating the (world-readable)
    // file; the statement must be refused before it runs.
    assert!(!copy.exists(), "VACUUM INTO created {}", copy.display());
}

#[test]
fn demo_runs_end_to_end_and_prints_a_summary() {
    let dir = tempfile::tempdir().unwrap();
    let target = dir.path().join("demo");
    let (code, stdout, stderr) =
        run(tidemark().arg("demo").arg(&target).args(["--days", "30", "--seed", "3"]));
    assert_eq!(code, 0, "{stdout}{stderr}");
    for want in
        ["Demo scenario:", "county-reports: snapshots", "lab-results: snapshots", "rejected rows by reason"]
    {
        assert!(stdout.contains(want), "summary lacks {want:?}:\n{stdout}");
    }
    assert!(target.join("truth.csv").exists());
    let store = target.join("data").join("tidemark.db");
    assert_eq!(mode(&store), 0o600);
    let conn = open_ro(&store);
    assert!(count(&conn, "SELECT count(*) FROM snapshot WHERE status = 'applied'") > 0);
    assert_eq!(count(&conn, "SELECT count(*) FROM snapshot WHERE status = 'failed'"), 0);
    // The demo's own config works with the other commands.
    let config = target.join("tidemark.toml");
    let (code, stdout, stderr) =
        tm(&config, &["curve", "--source", "county-reports", "--by", "onset", "--format", "json"]);
    assert_eq!(code, 0, "{stderr}");
    assert!(!json(&stdout).is_empty());
    // Running it again in the same folder replaces the earlier demo.
    let (code, _, stderr) = run(tidemark().arg("demo").arg(&target).args(["--days", "30", "--seed", "3"]));
    assert_eq!(code, 0, "{stderr}");
    // A non-empty folder that is not a demo folder is refused.
    let other = dir.path().join("other");
    std::fs::create_dir_all(&other).unwrap();
    std::fs::write(other.join("keep.txt"), "mine").unwrap();
    let (code, _, stderr) = run(tidemark().arg("demo").arg(&other).args(["--days", "30"]));
    assert_eq!(code, 1, "{stderr}");
    assert!(other.join("keep.txt").exists());
}

#[test]
fn ingest_takes_the_as_of_time_from_the_file_name_when_configured() {
    let dir = tempfile::tempdir().unwrap();
    let config = dir.path().join("tidemark.toml");
    let text = config_toml(&[source_toml("named", "csv", "full", "as_of = \"name:%Y-%m-%d\"")]);
    std::fs::write(&config, text).unwrap();
    let file = dir.path().join("named-2026-03-03.csv");
    std::fs::write(&file, csv(&["C-0001,Amberlee,2026-03-01,,34,F,"])).unwrap();
    let (code, stdout, stderr) = tm(&config, &["ingest", file.to_str().unwrap(), "--source", "named"]);
    assert_eq!(code, 0, "{stdout}{stderr}");
    let (_, stdout, _) = tm(&config, &["snapshots", "--format", "json"]);
    assert_eq!(json(&stdout)[0]["as_of"], "2026-03-03T23:59:59Z", "end of the day named in the file");
    // --as-of wins over the rule; a name without a date needs --as-of.
    let undated = dir.path().join("named-latest.csv");
    std::fs::write(&undated, csv(&["C-0001,Amberlee,2026-03-02,,34,F,"])).unwrap();
    let (code, _, stderr) = tm(&config, &["ingest", undated.to_str().unwrap(), "--source", "named"]);
    assert_ne!(code, 0);
    assert!(stderr.contains("--as-of"), "{stderr}");
    let (code, stdout, stderr) = tm(
        &config,
        &["ingest", undated.to_str().unwrap(), "--source", "named", "--as-of", "2026-03-04T08:00:00Z"],
    );
    assert_eq!(code, 0, "{stdout}{stderr}");
    let (_, stdout, _) = tm(&config, &["snapshots", "--format", "json"]);
    assert_eq!(json(&stdout)[1]["as_of"], "2026-03-04T08:00:00Z");
}

/// `sh -c 'umask 000; exec tidemark ARGS...'`: the real binary under the most open umask,
/// in a child process (the test process's own umask is shared by every test thread).
fn tm_umask_000(args: &[&std::ffi::OsStr]) -> (i32, String, String) {
    let bin = assert_cmd::cargo::cargo_bin("tidemark");
    let mut cmd = assert_cmd::Command::new("sh");
    cmd.args(["-c", "umask 000; exec \"$0\" \"$@\""]).arg(bin).args(args);
    cmd.env_remove("TIDEMARK_CONFIG").env_remove("TIDEMARK_LOG");
    cmd.timeout(std::time::Duration::from_secs(120));
    run(&mut cmd)
}

/// Under umask 000 `init` still writes a 0600 config and 0700 folders, and the files that
/// ingest, export and backup write are 0600 in 0700 folders: modes are set, not left to the
/// umask.
#[test]
fn files_are_private_under_an_open_umask() -> TestResult {
    let dir = tempfile::tempdir()?;
    let target = dir.path().join("site");
    let (code, stdout, stderr) = tm_umask_000(&["init".as_ref(), target.as_os_str()]);
    assert_eq!(code, 0, "{stdout}{stderr}");
    assert_eq!(mode(&target), 0o700);
    assert_eq!(mode(&target.join("tidemark.toml")), 0o600, "not 0666");
    assert_eq!(mode(&target.join("data")), 0o700, "not 0777");
    assert_eq!(mode(&target.join("data").join("tidemark.db")), 0o600);
    for folder in ["incoming", "incoming/county-reports"] {
        assert_eq!(mode(&target.join(folder)), 0o700, "{folder}");
    }

    let (dir, config) = setup();
    let file = dir.path().join("day1.csv");
    std::fs::write(&file, csv(&["C-0001,Amberlee,2026-03-01,2026-03-02,34,F,cough"]))?;
    let conf = config.as_os_str();
    let ingest = ["--config".as_ref(), conf, "ingest".as_ref(), file.as_os_str()];
    let args: Vec<&std::ffi::OsStr> =
        ingest.into_iter().chain(["--source", "full", "--as-of", "2026-03-02"].map(AsRef::as_ref)).collect();
    let (code, stdout, stderr) = tm_umask_000(&args);
    assert_eq!(code, 0, "{stdout}{stderr}");
    let store = dir.path().join("store");
    assert_eq!(mode(&store), 0o700);
    assert_eq!(mode(&store.join("tidemark.db")), 0o600);
    let archive = store.join("archive");
    assert_eq!(mode(&archive), 0o700);
    for entry in std::fs::read_dir(&archive)? {
        let folder = entry?.path();
        assert_eq!(mode(&folder), 0o700);
        for file in std::fs::read_dir(&folder)? {
            assert_eq!(mode(&file?.path()), 0o600);
        }
    }
    let (list, copy) = (dir.path().join("list.csv"), dir.path().join("backups").join("copy.db"));
    let export = ["--config", "", "export", "--source", "full", "--format", "csv", "--out"];
    let mut args: Vec<&std::ffi::OsStr> = export.iter().map(AsRef::as_ref).collect();
    args[1] = conf;
    args.push(list.as_os_str());
    let (code, stdout, stderr) = tm_umask_000(&args);
    assert_eq!(code, 0, "{stdout}{stderr}");
    assert_eq!(mode(&list), 0o600);
    let (code, stdout, stderr) =
        tm_umask_000(&["--config".as_ref(), conf, "backup".as_ref(), copy.as_os_str()]);
    assert_eq!(code, 0, "{stdout}{stderr}");
    assert_eq!(mode(&copy), 0o600);
    assert_eq!(mode(copy.parent().unwrap()), 0o700);
    Ok(())
}

/// A file name with a newline, a fake log line and terminal escape codes is logged escaped
/// by `tidemark ingest`: it forges no line and colours nothing.
#[test]
fn ingest_logs_an_outside_file_name_escaped() -> TestResult {
    let (dir, config) = setup();
    let name = "evil\n2026-03-02T00:00:00Z  INFO tidemark: extract ingested\x1b[31m.csv";
    let file = dir.path().join(name);
    std::fs::write(&file, csv(&["C-0001,Amberlee,2026-03-01,2026-03-02,34,F,cough"]))?;
    let (code, stdout, stderr) =
        tm(&config, &["ingest", file.to_str().unwrap(), "--source", "full", "--as-of", "2026-03-02"]);
    assert_eq!(code, 0, "{stdout}{stderr}");
    let escaped = "evil\\n2026-03-02T00:00:00Z  INFO tidemark: extract ingested\\u{1b}[31m.csv";
    assert!(stderr.contains(escaped), "{stderr}");
    for output in [&stdout, &stderr] {
        assert!(!output.contains('\x1b'), "{output:?}");
        assert!(!output.lines().any(|l| l.starts_with("2026-03-02T00:00:00Z")), "{output:?}");
    }
    Ok(())
}

/// A temporary archive file left by an ingest killed mid-copy (its writer's PID is gone) is
/// removed by the next `tidemark ingest`; the archived extracts stay.
#[test]
fn ingest_removes_temporary_archive_files_of_killed_writers() -> TestResult {
    let (dir, config) = setup();
    let archive = dir.path().join("store").join("archive");
    std::fs::create_dir_all(&archive)?;
    // No PID reaches 2^32 - 2 (Linux caps PIDs at 2^22): its writer is surely gone.
    let orphan = archive.join(format!(".incoming-{}-1", u32::MAX - 1));
    std::fs::write(&orphan, b"half an extract")?;
    let file = dir.path().join("day1.csv");
    std::fs::write(&file, csv(&["C-0001,Amberlee,2026-03-01,2026-03-02,34,F,cough"]))?;
    let (code, stdout, stderr) =
        tm(&config, &["ingest", file.to_str().unwrap(), "--source", "full", "--as-of", "2026-03-02"]);
    assert_eq!(code, 0, "{stdout}{stderr}");
    assert!(!orphan.exists(), "{stderr}");
    assert!(stderr.contains("removed temporary files of interrupted ingests"), "{stderr}");
    let archived = std::fs::read_dir(&archive)?.filter(|e| e.as_ref().is_ok_and(|e| e.path().is_dir()));
    assert_eq!(archived.count(), 1, "the new extract is archived");
    Ok(())
}

/// `tidemark ingest` of A (30 records), B (the first 29), A again: the third is a new
/// observation and is applied, as the daemon does; the same bytes as the latest applied
/// snapshot add nothing (a `duplicate` snapshot), and an as-of time days after the clock is
/// refused with the reason.
#[test]
fn ingest_applies_an_older_extract_seen_again_and_refuses_a_far_future_as_of() {
    let (dir, config) = setup();
    let rows: Vec<String> =
        (1..=30).map(|n| format!("C-{n:04},Amberlee,2026-03-01,2026-03-02,34,F,")).collect();
    let a = dir.path().join("a.csv");
    let b = dir.path().join("b.csv");
    std::fs::write(&a, csv(&rows.iter().map(String::as_str).collect::<Vec<_>>())).unwrap();
    std::fs::write(&b, csv(&rows[..29].iter().map(String::as_str).collect::<Vec<_>>())).unwrap();
    let store = dir.path().join("store/tidemark.db");
    let current = || count(&open_ro(&store), "SELECT count(*) FROM case_version WHERE valid_to IS NULL");
    for (file, as_of, want) in [(&a, "2026-03-02", 30), (&b, "2026-03-03", 29), (&a, "2026-03-04", 30)] {
        let (code, stdout, stderr) =
            tm(&config, &["ingest", file.to_str().unwrap(), "--source", "full", "--as-of", as_of]);
        assert_eq!(code, 0, "{stdout}{stderr}");
        assert!(stdout.contains("applied"), "{stdout}");
        assert_eq!(current(), want, "after {as_of}");
    }
    let (code, stdout, _) =
        tm(&config, &["ingest", a.to_str().unwrap(), "--source", "full", "--as-of", "2026-03-05"]);
    assert_eq!(code, 0);
    assert!(stdout.contains("duplicate"), "{stdout}");
    let far = (chrono::Utc::now() + chrono::Duration::days(400)).format("%Y-%m-%d").to_string();
    let (code, stdout, stderr) =
        tm(&config, &["ingest", b.to_str().unwrap(), "--source", "full", "--as-of", &far]);
    assert_eq!(code, 1, "{stdout}{stderr}");
    assert!(format!("{stdout}{stderr}").contains("after the server's clock"), "{stdout}{stderr}");
    assert_eq!(current(), 30);
}
