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
    assert_eq!(
        fails(b"id,onset,onset,symptoms\n"),
        "header: columns 2 and 3 have the same name; every column needs its own"
    );
    assert_eq!(fails(b"id,onset,,symptoms\n"), "header: column 3 has no name; every column needs one");
    // A file sent without its header: the first record is read as one, and its values are
    // never quoted back.
    let headerless = fails(b"1980-05-05,1980-05-05,cough\n");
    assert!(headerless.contains("columns 1 and 2") && !headerless.contains("1980"), "{headerless}");
}

/// Extracts cut short fail whole, with the reason; none of their rows may be applied.
#[test]
fn truncated_extracts_fail_whole() {
    let m = mapping();
    let truncated = |format, bytes: &[u8]| match check(format, bytes, &m) {
        Err(ExtractError::Truncated(why)) => why,
        other => panic!("{}: {other:?}", String::from_utf8_lossy(bytes)),
    };
    let cases: &[(Format, &[u8], &str)] = &[
        (Format::Csv, b"id,onset,symptoms\n1,2026-03-01,\"cough; fe", "quoted field on line 2"),
        (Format::Csv, b"id,onset,symptoms\n1,2026-03-01,cough\n2,2026-03-0", "last line (3)"),
        (Format::Csv, b"id,onset,symptoms\n1,2026-03-01,cough\n2,", "last line (3)"),
        (Format::Ndjson, b"{\"id\":\"1\"}\n{\"id\":\"2\",\"ons", "last line (2)"),
        (Format::Json, b"[{\"id\":\"1\"},{\"id\":\"2\"", "ends at line 1"),
    ];
    for (format, bytes, want) in cases {
        let why = truncated(*format, bytes);
        assert!(why.contains(want), "{why}");
    }
    // Complete files without a final newline are fine; a quoted cell that spans lines too.
    assert_eq!(keys(Format::Csv, b"id,onset,symptoms\n1,2026-03-01,\"cough\nfever\""), ["1"]);
    assert_eq!(keys(Format::Ndjson, b"{\"id\":\"1\"}"), ["1"]);
    // A bad last line that does end with a newline is a rejected row, as any other.
    let (_, rejects, _) = check(Format::Csv, b"id,onset,symptoms\n1,2026-03-01,x\n2,\n", &m).unwrap();
    assert_eq!(rejects, [(3, ProblemKind::RaggedRow)]);
    // A source that always ends with a newline can require it.
    let mut strict = mapping();
    strict.limits.require_final_newline = true;
    assert!(matches!(
        check(Format::Csv, b"id,onset,symptoms\n1,2026-03-01,cough", &strict),
        Err(ExtractError::Truncated(_))
    ));
}

/// Limits fail the whole extract with the limit's name, in bounded memory.
#[test]
fn limits_fail_the_extract() {
    let mut m = mapping();
    m.limits = Limits { max_record_bytes: 64, max_columns: 5, max_json_depth: 4, ..Limits::default() };
    let limit = |format, bytes: &[u8]| match check(format, bytes, &m) {
        Err(ExtractError::Limit(limit)) => limit.key,
        other => panic!("{other:?}"),
    };
    let long = format!("id,onset,symptoms\n1,2026-03-01,{}\n", "x".repeat(100));
    assert_eq!(limit(Format::Csv, long.as_bytes()), "max_record_bytes");
    assert_eq!(limit(Format::Csv, b"id,onset,symptoms,a,b,c\n"), "max_columns");
    assert_eq!(limit(Format::Csv, b"id,onset,symptoms\n1,,,,,,,,\n"), "max_columns");
    assert_eq!(limit(Format::Json, b"[{\"id\":[[[[1]]]]}]"), "max_json_depth");
    assert_eq!(limit(Format::Ndjson, b"{\"id\":[[[[1]]]]}\n"), "max_json_depth");
    let long = format!("{{\"id\":\"{}\"}}\n", "x".repeat(100));
    assert_eq!(limit(Format::Ndjson, long.as_bytes()), "max_record_bytes");
    // A gzip bomb: far more output than max_expansion allows for its size.
    let mut gz = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::best());
    gz.write_all(b"id,onset,symptoms\n").unwrap();
    for _ in 0..64 {
        gz.write_all(&[b'\n'; 1 << 20]).unwrap();
    }
    let bomb = gz.finish().unwrap();
    assert_eq!(limit(Format::Csv, &bomb), "max_expansion");
}

/// A key repeated in one JSON record is a problem, never silently the last value.
#[test]
fn json_repeated_keys_are_problems() {
    let m = mapping();
    let bytes = b"{\"id\":\"1\",\"onset\":\"2026-03-01\",\"onset\":\"2026-03-02\",\"note\":1,\"note\":2}\n{\"id\":\"2\",\"id\":\"3\"}\n";
    let (keys, rejects, problems) = check(Format::Ndjson, bytes, &m).unwrap();
    assert_eq!(keys, ["1"]);
    assert_eq!(rejects, [(2, ProblemKind::RepeatedField)]);
    assert_eq!(problems, [(1, "onset_date".to_string()), (1, "note".to_string())]);
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
    assert!(matches!(check(Format::Json, b"[{\"id\":1},", &m), Err(ExtractError::Truncated(_))));
    assert!(matches!(check(Format::Json, b"", &m), Err(ExtractError::Empty)));
    assert!(matches!(check(Format::Json, b"[] x", &m), Err(ExtractError::Json(_))));
}
