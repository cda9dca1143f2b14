//! Whole-extract parsing tests: bytes in, rows and problems out, one line per case.

use std::convert::Infallible;
use std::io::Write;

use chrono::NaiveDate;

use super::*;
use crate::model::Field;

fn mapping() -> Mapping {
    let mut m = Mapping::new("source[0]", "id");
    m.columns.insert(Field::OnsetDate, "onset".into());
    m.columns.insert(Field::Symptoms, "symptoms".into());
    m
}

fn latest() -> NaiveDate {
    NaiveDate::from_ymd_opt(2026, 3, 10).unwrap()
}

/// Accepted keys, rejected (line, kind), field problems (line, field).
type Parsed = (Vec<String>, Vec<(u64, ProblemKind)>, Vec<(u64, String)>);

fn check(format: Format, bytes: &[u8], m: &Mapping) -> Result<Parsed, ExtractError> {
    let mut keys = Vec::new();
    let mut rejects = Vec::new();
    let mut problems = Vec::new();
    let result = parse(bytes, format, m, latest(), |row| {
        match row {
            Row::Accepted { record, problems: p, .. } => {
                keys.push(record.case_key);
                problems.extend(p.into_iter().map(|p| (p.line, p.field.unwrap_or_default())));
            }
            Row::Rejected(p) => rejects.push((p.line, p.kind)),
        }
        Ok::<(), Infallible>(())
    });
    match result {
        Ok(_) => Ok((keys, rejects, problems)),
        Err(ParseError::Extract(err)) => Err(err),
        Err(ParseError::Sink(never)) => match never {},
    }
}

fn keys(format: Format, bytes: &[u8]) -> Vec<String> {
    check(format, bytes, &mapping()).unwrap().0
}

#[test]
fn csv_delimiters_quotes_and_bom() {
    let cases: &[&[u8]] = &[
        b"id,onset,symptoms\n1,2026-03-01,cough\n2,,\n",
        b"id;onset;symptoms\r\n1;2026-03-01;cough\r\n2;;\r\n",
        b"id\tonset\tsymptoms\n1\t2026-03-01\tcough\n2\t\t\n",
        b"id|onset|symptoms\n1|2026-03-01|cough\n2||\n",
        b"\xEF\xBB\xBFid,onset,symptoms\n1,2026-03-01,cough\n2,,\n",
        b"\"id\",\"onset\",\"symptoms\"\n\"1\",\"2026-03-01\",\"cough, \"\"dry\"\"\"\n2,,\n",
        b"id,onset,symptoms\n1,2026-03-01,\"cough\nfever\"\n2,,\n",
    ];
    for bytes in cases {
        assert_eq!(keys(Format::Csv, bytes), ["1", "2"], "{}", String::from_utf8_lossy(bytes));
    }
}

#[test]
fn csv_row_problems_carry_on() {
    let bytes = b"id,onset,symptoms\n1,2026-03-01,cough\n2,2026-03-01\n,2026-03-02,x\n4,2026-02-30,x\n5,2026-03-01,x\n";
    let (keys, rejects, problems) = check(Format::Csv, bytes, &mapping()).unwrap();
    assert_eq!(keys, ["1", "4", "5"]);
    assert_eq!(rejects, [(3, ProblemKind::RaggedRow), (4, ProblemKind::MissingKey)]);
    assert_eq!(problems, [(5, "onset_date".to_string())]);
}

#[test]
fn csv_whole_file_failures() {
    let m = mapping();
    let fails = |bytes: &[u8]| check(Format::Csv, bytes, &m).unwrap_err().to_string();
    assert_eq!(fails(b""), "the extract is empty");
    assert_eq!(fails(b"\xEF\xBB\xBF\n\n"), "the extract is empty");
    assert_eq!(
        fails(b"id,symptom_onset,symptoms\n1,2026-03-01,x\n"),
        "source[0].fields.onset_date: column \"onset\" not found in header"
    );
    assert_eq!(fails(b"key,onset,symptoms\n"), "source[0].key: column \"id\" not found in header");
    assert!(
        fails(b"id,onset,symptoms\n1,\"2026-03-01,x\n2,2026-03-01,x\n").contains("unterminated quoted field")
    );
    assert!(fails(b"id,onset,onset,symptoms\n").contains("more than once"));
}

#[test]
fn csv_header_only_is_empty_not_failed() {
    let (keys, rejects, _) = check(Format::Csv, b"id,onset,symptoms\n", &mapping()).unwrap();
    assert!(keys.is_empty() && rejects.is_empty());
}

#[test]
fn csv_legacy_encoding_fallback() {
    let bytes = b"id,onset,symptoms,comment\n1,2026-03-01,fi\xe8vre,caf\xe9\n";
    let (_, _, problems) = check(Format::Csv, bytes, &mapping()).unwrap();
    assert_eq!(problems, [(2, "symptoms".to_string()), (2, "comment".to_string())]);
    let mut m = mapping();
    m.fallback_encoding = Some(LegacyEncoding::Windows1252);
    let mut symptoms = Vec::new();
    parse(&bytes[..], Format::Csv, &m, latest(), |row| {
        if let Row::Accepted { record, .. } = row {
            symptoms = record.symptoms.unwrap();
            assert_eq!(record.extra["comment"], "café");
        }
        Ok::<(), Infallible>(())
    })
    .unwrap();
    assert_eq!(symptoms, ["fièvre"]);
}

#[test]
fn gzip_is_detected_by_magic_bytes() {
    let plain = b"id,onset,symptoms\n1,2026-03-01,cough\n";
    let mut gz = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::default());
    gz.write_all(plain).unwrap();
    let gz = gz.finish().unwrap();
    assert_eq!(keys(Format::Csv, &gz), ["1"]);
    let truncated = &gz[..gz.len() - 12];
    assert!(check(Format::Csv, truncated, &mapping()).is_err());
}

#[test]
fn ndjson_bad_lines_are_rejected_and_the_rest_read() {
    let bytes = b"{\"id\":\"1\",\"onset\":\"2026-03-01\",\"symptoms\":[\"Cough\",\"38.5 C\"]}\n\n{\"id\":2,\n[1,2]\n{\"id\":\"3\",\"onset\":{\"a\":1}}\n{\"id\":\"4\",\"symptoms\":[{\"x\":1}]}\n";
    let (keys, rejects, problems) = check(Format::Ndjson, bytes, &mapping()).unwrap();
    assert_eq!(keys, ["1", "3", "4"]);
    assert_eq!(rejects, [(3, ProblemKind::InvalidJson), (4, ProblemKind::WrongType)]);
    assert_eq!(problems, [(5, "onset_date".to_string()), (6, "symptoms".to_string())]);
}

#[test]
fn json_array_streams_records() {
    let bytes = br#"[{"id":"1","onset":"2026-03-01","symptoms":"cough;fever"}, 7, {"id":"2","onset":null}]"#;
    let (keys, rejects, _) = check(Format::Json, bytes, &mapping()).unwrap();
    assert_eq!(keys, ["1", "2"]);
    assert_eq!(rejects, [(2, ProblemKind::WrongType)]);
    let m = mapping();
    assert!(matches!(check(Format::Json, b"{\"id\":1}", &m), Err(ExtractError::Json(_))));
    assert!(matches!(check(Format::Json, b"[{\"id\":1},", &m), Err(ExtractError::Json(_))));
    assert!(matches!(check(Format::Json, b"", &m), Err(ExtractError::Empty)));
    assert!(matches!(check(Format::Json, b"[] x", &m), Err(ExtractError::Json(_))));
}
