//! `tidemark export` through the real binary: the line list as of an earlier snapshot, and
//! the nowcast and delay tables, as CSV and Parquet. The Parquet file is read back with the
//! parquet crate's reader and compared with the CSV export and with the store (row counts,
//! typed values, nulls where the store has missing values); files are mode 0600. CSV (exports,
//! `tidemark query` and listings, the API's CSV answers) puts an apostrophe before text that
//! starts like a spreadsheet formula, except with `--raw` / `raw=true`; JSON and Parquet are
//! exact.

use std::fs::File;
use std::path::Path;

use parquet::basic::{ConvertedType, Type as PhysicalType};
use parquet::file::reader::{FileReader, SerializedFileReader};
use parquet::record::Field as ParquetField;

use crate::support::{Env, TestResult, count, csv, day, mode, run, source_toml, tidemark};

type Error = Box<dyn std::error::Error>;

/// A Parquet row as (column name, value) pairs.
type ParquetRow = Vec<(String, ParquetField)>;

/// A CSV file's header and rows.
type CsvFile = (Vec<String>, Vec<Vec<String>>);

/// Every row of a Parquet file.
fn parquet_rows(path: &Path) -> Result<Vec<ParquetRow>, Error> {
    let reader = SerializedFileReader::new(File::open(path)?)?;
    let mut rows = Vec::new();
    for row in reader.get_row_iter(None)? {
        let row = row?;
        rows.push(row.get_column_iter().map(|(name, value)| (name.clone(), value.clone())).collect());
    }
    Ok(rows)
}

fn csv_rows(path: &Path) -> Result<CsvFile, Error> {
    let mut reader = csv::Reader::from_path(path)?;
    let headers = reader.headers()?.iter().map(str::to_string).collect();
    let mut rows = Vec::new();
    for record in reader.records() {
        rows.push(record?.iter().map(str::to_string).collect());
    }
    Ok((headers, rows))
}

fn value<'r>(row: &'r [(String, ParquetField)], column: &str) -> &'r ParquetField {
    &row.iter().find(|(name, _)| name == column).unwrap_or_else(|| panic!("no column {column}")).1
}

/// Days since 1970-01-01 of an ISO date.
fn epoch_days(date: &str) -> i32 {
    let date: chrono::NaiveDate = date.parse().unwrap();
    (date - chrono::NaiveDate::from_ymd_opt(1970, 1, 1).unwrap()).num_days() as i32
}

fn export(env: &Env, args: &[&str]) -> String {
    let (code, stdout, stderr) =
        run(tidemark().arg("--config").arg(&env.config_path).arg("export").args(args));
    assert_eq!(code, 0, "export {args:?} failed: {stderr}");
    stdout
}

#[test]
fn the_line_list_as_of_an_earlier_snapshot_exports_to_csv_and_typed_parquet() -> TestResult {
    // A high hold fraction, so the second extract's removal of a third of the rows applies.
    let mut env = Env::with_sources(&[source_toml("full", "csv", "full", "hold_fraction = 0.9")]);
    let first = csv(&[
        "C-0001,Amberlee,2026-02-20,2026-02-23,34,F,cough",
        "C-0002,Brackwater,,2026-02-24,,M,",
        "C-0003,Amberlee,2026-02-22,2026-02-25,80+,,fever;cough",
    ]);
    env.ingest("full", &first, day(0));
    // The second extract changes C-0001's onset, removes C-0002 and adds C-0004.
    let second = csv(&[
        "C-0001,Amberlee,2026-02-19,2026-02-23,34,F,cough",
        "C-0003,Amberlee,2026-02-22,2026-02-25,80+,,fever;cough",
        "C-0004,Brackwater,2026-02-27,2026-03-01,5,M,",
    ]);
    env.ingest("full", &second, day(1));
    let dir = env.dir.path().to_path_buf();
    let (csv_path, parquet_path) = (dir.join("list.csv"), dir.join("list.parquet"));
    let as_of = day(0).to_rfc3339();
    let out = export(
        &env,
        &["--source", "full", "--as-of", &as_of, "--format", "csv", "--out", csv_path.to_str().unwrap()],
    );
    assert!(out.contains("wrote 3 rows of line-list") && out.contains("patient-level"), "{out}");
    export(
        &env,
        &[
            "--source",
            "full",
            "--as-of",
            &as_of,
            "--format",
            "parquet",
            "--out",
            parquet_path.to_str().unwrap(),
        ],
    );
    assert_eq!(mode(&csv_path), 0o600);
    assert_eq!(mode(&parquet_path), 0o600);

    // The store's own count of the line list as of the first snapshot.
    let db = env.db();
    let first_id = count(&db, "SELECT min(snapshot_id) FROM snapshot WHERE status = 'applied'");
    let in_store = count(
        &db,
        &format!(
            "SELECT count(*) FROM case_version WHERE valid_from <= {first_id} AND (valid_to IS NULL OR valid_to > {first_id}) AND source_id = (SELECT source_id FROM source WHERE name = 'full')"
        ),
    );
    let (headers, csv_list) = csv_rows(&csv_path)?;
    let parquet_list = parquet_rows(&parquet_path)?;
    assert_eq!(in_store, 3);
    assert_eq!(csv_list.len(), 3);
    assert_eq!(parquet_list.len(), 3);

    // Typed columns.
    let reader = SerializedFileReader::new(File::open(&parquet_path)?)?;
    let schema = reader.metadata().file_metadata().schema_descr_ptr();
    let column = |name: &str| schema.columns().iter().find(|c| c.name() == name).unwrap().clone();
    assert_eq!(column("onset_date").physical_type(), PhysicalType::INT32);
    assert_eq!(column("onset_date").converted_type(), ConvertedType::DATE);
    assert_eq!(column("case_key").physical_type(), PhysicalType::BYTE_ARRAY);
    assert_eq!(column("case_key").converted_type(), ConvertedType::UTF8);
    assert_eq!(column("age_lo").physical_type(), PhysicalType::DOUBLE);
    assert_eq!(column("hospitalised").physical_type(), PhysicalType::BOOLEAN);

    // As of the first snapshot: C-0001 with its first onset date, C-0002 still there with
    // its missing onset and age, and no C-0004.
    let keys: Vec<&ParquetField> = parquet_list.iter().map(|r| value(r, "case_key")).collect();
    assert_eq!(
        keys,
        [
            &ParquetField::Str("C-0001".into()),
            &ParquetField::Str("C-0002".into()),
            &ParquetField::Str("C-0003".into())
        ]
    );
    assert_eq!(value(&parquet_list[0], "onset_date"), &ParquetField::Date(epoch_days("2026-02-20")));
    assert_eq!(value(&parquet_list[0], "age_lo"), &ParquetField::Double(34.0));
    assert_eq!(value(&parquet_list[0], "sex"), &ParquetField::Str("female".into()));
    assert_eq!(value(&parquet_list[1], "onset_date"), &ParquetField::Null);
    assert_eq!(value(&parquet_list[1], "age_lo"), &ParquetField::Null);
    assert_eq!(value(&parquet_list[1], "hospitalised"), &ParquetField::Null);
    assert_eq!(value(&parquet_list[2], "age_lo"), &ParquetField::Double(80.0));
    assert_eq!(value(&parquet_list[2], "sex"), &ParquetField::Null);

    // The CSV says the same, with empty cells where Parquet has nulls.
    let at = |name: &str| headers.iter().position(|h| h == name).unwrap();
    for (csv_row, parquet_row) in csv_list.iter().zip(&parquet_list) {
        assert_eq!(ParquetField::Str(csv_row[at("case_key")].clone()), *value(parquet_row, "case_key"));
        let onset = &csv_row[at("onset_date")];
        let expected =
            if onset.is_empty() { ParquetField::Null } else { ParquetField::Date(epoch_days(onset)) };
        assert_eq!(*value(parquet_row, "onset_date"), expected);
        let age = &csv_row[at("age_lo")];
        let expected = if age.is_empty() { ParquetField::Null } else { ParquetField::Double(age.parse()?) };
        assert_eq!(*value(parquet_row, "age_lo"), expected);
    }

    // Without --as-of: the latest snapshot, C-0002 gone and C-0004 in.
    let latest = dir.join("latest.parquet");
    export(&env, &["--source", "full", "--format", "parquet", "--out", latest.to_str().unwrap()]);
    let keys: Vec<ParquetField> =
        parquet_rows(&latest)?.iter().map(|r| value(r, "case_key").clone()).collect();
    assert_eq!(keys, ["C-0001", "C-0003", "C-0004"].map(|k| ParquetField::Str(k.into())));
    Ok(())
}

#[test]
fn nowcast_and_delay_tables_export_with_the_stored_rows() -> TestResult {
    let mut env = Env::new();
    let mut rows = Vec::new();
    for n in 0..60 {
        rows.push(format!(
            "C-{n:04},Amberlee,2026-02-{:02},2026-02-{:02},30,F,",
            1 + n % 20,
            3 + n % 20 + n % 4
        ));
    }
    let rows: Vec<&str> = rows.iter().map(String::as_str).collect();
    env.ingest("full", &csv(&rows), day(0));
    let db = env.db();
    let stored_nowcasts = count(
        &db,
        "SELECT count(*) FROM nowcast WHERE source_id = (SELECT source_id FROM source WHERE name = 'full')",
    );
    let stored_fits = count(
        &db,
        "SELECT count(*) FROM delay_fit WHERE source_id = (SELECT source_id FROM source WHERE name = 'full')",
    );
    assert!(
        stored_nowcasts > 0 && stored_fits > 0,
        "the ingest stored analyses: {stored_nowcasts} {stored_fits}"
    );
    let dir = env.dir.path().to_path_buf();
    for (table, stored) in [("nowcast", stored_nowcasts), ("delays", stored_fits)] {
        let (csv_path, parquet_path) =
            (dir.join(format!("{table}.csv")), dir.join(format!("{table}.parquet")));
        export(
            &env,
            &["--source", "full", "--table", table, "--format", "csv", "--out", csv_path.to_str().unwrap()],
        );
        export(
            &env,
            &[
                "--source",
                "full",
                "--table",
                table,
                "--format",
                "parquet",
                "--out",
                parquet_path.to_str().unwrap(),
            ],
        );
        let (headers, csv_list) = csv_rows(&csv_path)?;
        let parquet_list = parquet_rows(&parquet_path)?;
        assert_eq!(csv_list.len() as i64, stored, "{table} CSV rows");
        assert_eq!(parquet_list.len() as i64, stored, "{table} Parquet rows");
        let median = headers.iter().position(|h| h == "median").unwrap();
        for (csv_row, parquet_row) in csv_list.iter().zip(&parquet_list) {
            let expected = match csv_row[median].as_str() {
                "" => ParquetField::Null,
                text => ParquetField::Double(text.parse()?),
            };
            assert_eq!(*value(parquet_row, "median"), expected, "{table}");
        }
    }
    // The nowcast table's reference dates are Parquet dates and match the store.
    let first_ref: String = db.query_row("SELECT min(ref_date) FROM nowcast", [], |r| r.get(0))?;
    let nowcasts = parquet_rows(&dir.join("nowcast.parquet"))?;
    assert!(nowcasts.iter().any(|r| *value(r, "ref_date") == ParquetField::Date(epoch_days(&first_ref))));
    Ok(())
}

#[test]
fn a_bad_export_request_is_refused_and_writes_nothing() -> TestResult {
    let mut env = Env::new();
    env.ingest("full", &csv(&["C-0001,Amberlee,2026-02-20,2026-02-23,34,F,cough"]), day(0));
    let out = env.dir.path().join("x.csv");
    let (code, _, stderr) = run(tidemark()
        .arg("--config")
        .arg(&env.config_path)
        .args(["export", "--source", "full", "--table", "cases", "--format", "csv", "--out"])
        .arg(&out));
    assert_eq!(code, 2, "{stderr}");
    assert!(stderr.contains("--table cases"), "{stderr}");
    let (code, _, stderr) = run(tidemark()
        .arg("--config")
        .arg(&env.config_path)
        .args(["export", "--source", "full", "--as-of", "2020-01-01", "--format", "csv", "--out"])
        .arg(&out));
    assert_eq!(code, 1, "{stderr}");
    assert!(stderr.contains("no applied snapshot"), "{stderr}");
    assert!(!out.exists());
    let leftovers: Vec<_> = std::fs::read_dir(env.dir.path())?
        .filter_map(|e| e.ok())
        .filter(|e| e.file_name().to_string_lossy().contains(".tmp-"))
        .collect();
    assert!(leftovers.is_empty());
    Ok(())
}

/// A jurisdiction that a spreadsheet would run as a command (the textbook CSV-injection
/// payload, common practice in security advice), and one that is a plain negative number.
const FORMULA: &str = "=cmd|' /C calc'!A0";

/// One extract whose jurisdictions start like formulas: `FORMULA`, `-3` (a number as text)
/// and `@SUM(A1)`.
fn formula_env() -> Env {
    let mut env = Env::with_sources(&[source_toml("full", "csv", "full", "")]);
    let rows = [
        format!("C-0001,{FORMULA},2026-02-20,2026-02-23,34,F,cough"),
        "C-0002,-3,2026-02-21,2026-02-24,40,M,".to_string(),
        "C-0003,@SUM(A1),2026-02-22,2026-02-25,51,M,".to_string(),
    ];
    env.ingest("full", &csv(&rows.iter().map(String::as_str).collect::<Vec<_>>()), day(0));
    env
}

/// The jurisdiction column of a CSV export, in row order.
fn jurisdictions(path: &Path) -> Result<Vec<String>, Error> {
    let (headers, rows) = csv_rows(path)?;
    let at = headers.iter().position(|h| h == "jurisdiction").ok_or("no jurisdiction column")?;
    Ok(rows.into_iter().map(|row| row[at].clone()).collect())
}

#[test]
fn csv_exports_neutralise_formula_text_unless_raw_and_parquet_stays_exact() -> TestResult {
    let env = formula_env();
    let dir = env.dir.path().to_path_buf();
    let (safe, raw, parquet) = (dir.join("safe.csv"), dir.join("raw.csv"), dir.join("list.parquet"));
    let out = |path: &Path| path.to_str().unwrap().to_string();
    export(&env, &["--source", "full", "--format", "csv", "--out", &out(&safe)]);
    export(&env, &["--source", "full", "--format", "csv", "--raw", "--out", &out(&raw)]);
    export(&env, &["--source", "full", "--format", "parquet", "--raw", "--out", &out(&parquet)]);
    assert_eq!(jurisdictions(&safe)?, [format!("'{FORMULA}"), "-3".into(), "'@SUM(A1)".into()]);
    assert_eq!(jurisdictions(&raw)?, [FORMULA, "-3", "@SUM(A1)"]);
    // Numbers are typed cells and never touched.
    let (headers, rows) = csv_rows(&safe)?;
    let age = headers.iter().position(|h| h == "age_lo").ok_or("no age_lo")?;
    assert_eq!(rows[0][age], "34");
    let stored: Vec<ParquetField> =
        parquet_rows(&parquet)?.iter().map(|r| value(r, "jurisdiction").clone()).collect();
    assert_eq!(stored, [FORMULA, "-3", "@SUM(A1)"].map(|j| ParquetField::Str(j.into())));
    Ok(())
}

#[test]
fn query_csv_neutralises_formula_text_unless_raw_and_json_stays_exact() {
    let env = formula_env();
    let sql = "SELECT '=1+1' AS f, -3 AS n, -0.5 AS x, '-0.5' AS t";
    let query = |extra: &[&str]| {
        let (code, stdout, stderr) =
            run(tidemark().arg("--config").arg(&env.config_path).args(["query", sql]).args(extra));
        assert_eq!(code, 0, "{stderr}");
        stdout
    };
    assert_eq!(query(&["--format", "csv"]), "f,n,x,t\n'=1+1,-3,-0.5,-0.5\n");
    assert_eq!(query(&["--format", "csv", "--raw"]), "f,n,x,t\n=1+1,-3,-0.5,-0.5\n");
    let json: serde_json::Value = serde_json::from_str(&query(&["--format", "json"])).unwrap();
    assert_eq!(json[0]["f"], "=1+1");
    assert_eq!(json[0]["n"], -3);
    // A listing takes --raw too.
    let curve = |extra: &[&str]| {
        let args =
            ["curve", "--source", "full", "--by", "onset", "--stratify", "jurisdiction", "--format", "csv"];
        let (code, stdout, stderr) =
            run(tidemark().arg("--config").arg(&env.config_path).args(args).args(extra));
        assert_eq!(code, 0, "{stderr}");
        stdout
    };
    assert!(curve(&[]).contains(&format!("'{FORMULA}")), "{}", curve(&[]));
    let raw = curve(&["--raw"]);
    assert!(raw.contains(FORMULA) && !raw.contains(&format!("'{FORMULA}")), "{raw}");
}

/// `method uri` through the API router with a bearer token: (status, body).
async fn api_call(router: &axum::Router, method: &str, uri: &str, token: &str, body: &str) -> (u16, String) {
    use tower::ServiceExt;
    let request = axum::http::Request::builder()
        .method(method)
        .uri(uri)
        .header("authorization", format!("Bearer {token}"))
        .body(axum::body::Body::from(body.to_string()))
        .unwrap();
    let response = router.clone().oneshot(request).await.unwrap();
    let status = response.status().as_u16();
    let bytes = axum::body::to_bytes(response.into_body(), 1 << 20).await.unwrap();
    (status, String::from_utf8_lossy(&bytes).into_owned())
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn api_csv_answers_neutralise_formula_text_unless_raw_is_true() {
    let env = formula_env();
    let config = std::sync::Arc::new(env.config.clone());
    let token =
        tidemark::app::access::token_create(&config, "etl", tidemark::model::TokenScope::Sql).unwrap();
    let token = token.lines().next().unwrap().to_string();
    let router = tidemark::app::access::app_router(&config, None);
    let sql = r#"{"sql": "SELECT '=1+1' AS f, -3 AS n"}"#;
    let query = "/api/v1/query";
    let ask = |uri: String| {
        let (router, token) = (router.clone(), token.clone());
        async move { api_call(&router, "POST", &uri, &token, sql).await }
    };
    assert_eq!(ask(format!("{query}?format=csv")).await, (200, "f,n\n'=1+1,-3\n".into()));
    assert_eq!(ask(format!("{query}?format=csv&raw=true")).await, (200, "f,n\n=1+1,-3\n".into()));
    assert_eq!(ask(format!("{query}?format=csv&raw=false")).await, (200, "f,n\n'=1+1,-3\n".into()));
    assert_eq!(ask(format!("{query}?format=csv&raw=maybe")).await.0, 400);
    let (status, json) = ask(format!("{query}?format=json&raw=true")).await;
    assert_eq!(status, 200);
    assert_eq!(serde_json::from_str::<serde_json::Value>(&json).unwrap()[0]["f"], "=1+1");
    let curve = "/api/v1/curve?source=full&by=onset&stratify=jurisdiction&format=csv";
    let (status, safe) = api_call(&router, "GET", curve, &token, "").await;
    assert_eq!(status, 200, "{safe}");
    assert!(safe.contains(&format!("'{FORMULA}")), "{safe}");
    let (status, raw) = api_call(&router, "GET", &format!("{curve}&raw=true"), &token, "").await;
    assert_eq!(status, 200, "{raw}");
    assert!(raw.contains(FORMULA) && !raw.contains(&format!("'{FORMULA}")), "{raw}");
}
