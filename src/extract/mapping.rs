//! Mapping one source row onto the canonical fields: which column feeds which field, value
//! maps (sex and outcome codes), missing tokens, date formats and list separators. The result
//! is a typed `CaseRecord` plus the field problems found, or a rejection of the whole row.
//! Pure: the row arrives as a lookup function, whatever its byte format was.

use std::borrow::Cow;
use std::collections::BTreeMap;

use chrono::NaiveDate;

use super::normalize::{self, Invalid};
use super::{Problem, ProblemKind};
use crate::model::{CaseRecord, Field};

pub use crate::config::mapping::{DEFAULT_MISSING_TOKENS, LegacyEncoding, Mapping};

/// Canonical sex values; anything else after the value map is a field problem.
pub const SEX_VALUES: [&str; 3] = ["female", "male", "other"];

/// Dates before this are implausible in a case line list.
pub fn earliest_plausible_date() -> NaiveDate {
    NaiveDate::from_ymd_opt(1900, 1, 1).unwrap()
}

impl Mapping {
    /// The config path of the setting that names `field`'s column.
    pub fn config_path(&self, field: Field) -> String {
        match field {
            Field::CaseKey => format!("{}.key", self.label),
            other => format!("{}.fields.{}", self.label, other.name()),
        }
    }

    /// The source column that feeds `field`.
    pub fn column(&self, field: Field) -> Option<&str> {
        match field {
            Field::CaseKey => Some(&self.key_column),
            other => self.columns.get(&other).map(String::as_str),
        }
    }

    /// Whether a source column is neither mapped nor ignored, so it belongs in `extra`.
    pub fn is_extra(&self, column: &str) -> bool {
        column != self.key_column
            && !self.ignore.contains(column)
            && !self.columns.values().any(|c| c == column)
    }

    fn is_missing(&self, text: &str) -> bool {
        let text = text.trim();
        self.missing_tokens.iter().any(|t| t.eq_ignore_ascii_case(text))
    }

    fn apply_value_map<'a>(&'a self, field: Field, text: &'a str) -> &'a str {
        let Some(map) = self.values.get(&field) else { return text };
        let key = text.trim();
        let found = if key.is_ascii() && key.len() <= VALUE_KEY_STACK_BYTES {
            // Short ASCII codes (the usual "F", "Y", "1") are lower-cased on the stack.
            let mut buffer = [0u8; VALUE_KEY_STACK_BYTES];
            let lowered = &mut buffer[..key.len()];
            lowered.copy_from_slice(key.as_bytes());
            lowered.make_ascii_lowercase();
            std::str::from_utf8(lowered).ok().and_then(|lowered| map.get(lowered))
        } else {
            map.get(&key.to_lowercase())
        };
        found.map(String::as_str).unwrap_or(text)
    }
}

/// Longest value-map key lower-cased without a heap allocation; longer ones take the slow path.
const VALUE_KEY_STACK_BYTES: usize = 64;

/// A cell as the byte format delivered it; text borrows the reader's buffer when it can.
#[derive(Debug, Clone, PartialEq)]
pub enum RawValue<'a> {
    Text(Cow<'a, str>),
    /// Items of a JSON array.
    List(Vec<String>),
    /// Explicit JSON null, or a column absent from this row.
    Null,
    /// The cell could not be read (bad encoding, NUL byte, too long, wrong JSON type).
    Unreadable(ProblemKind, &'static str),
}

/// What the mapping made of one row.
#[derive(Debug, Clone, PartialEq)]
pub enum Mapped {
    Accepted { record: CaseRecord, problems: Vec<Problem> },
    Rejected(Problem),
}

/// Maps one row. `get` returns the cell for a mapped field (`None` when the column is absent),
/// `extra` holds the unmapped columns; `latest` is the extract's as-of date (later dates are
/// impossible).
pub fn map_row<'a>(
    mapping: &Mapping,
    line: u64,
    latest: NaiveDate,
    get: impl Fn(Field) -> Option<RawValue<'a>>,
    extra: BTreeMap<String, String>,
) -> Mapped {
    let case_key = match read_key(mapping, line, get(Field::CaseKey)) {
        Ok(key) => key,
        Err(problem) => return Mapped::Rejected(problem),
    };
    let mut record = CaseRecord { case_key, extra, ..CaseRecord::default() };
    let mut problems = Vec::new();
    for (&field, column) in &mapping.columns {
        let Some(raw) = get(field) else { continue };
        if let Err((kind, why)) = set_field(mapping, &mut record, field, raw, latest) {
            record.invalid.push(field);
            problems.push(Problem {
                line,
                field: Some(field.name().to_string()),
                kind,
                message: format!("column \"{column}\": {why}"),
                raw: None,
            });
        }
    }
    record.invalid.sort();
    Mapped::Accepted { record, problems }
}

fn read_key(mapping: &Mapping, line: u64, raw: Option<RawValue<'_>>) -> Result<String, Problem> {
    let reject = |kind, why: &str| Problem {
        line,
        field: Some(Field::CaseKey.name().to_string()),
        kind,
        message: format!("column \"{}\": {why}", mapping.key_column),
        raw: None,
    };
    match raw {
        Some(RawValue::Text(text)) if !mapping.is_missing(&text) => Ok(text.trim().to_string()),
        Some(RawValue::Unreadable(kind, why)) => Err(reject(kind, why)),
        Some(RawValue::List(_)) => Err(reject(ProblemKind::WrongType, "expected one value, found a list")),
        _ => Err(reject(ProblemKind::MissingKey, "the record key is blank")),
    }
}

type FieldError = (ProblemKind, Invalid);

fn set_field(
    mapping: &Mapping,
    record: &mut CaseRecord,
    field: Field,
    raw: RawValue<'_>,
    latest: NaiveDate,
) -> Result<(), FieldError> {
    let text = match raw {
        RawValue::Null => return Ok(()),
        RawValue::Unreadable(kind, why) => return Err((kind, why)),
        RawValue::List(items) => return set_list(record, field, &items),
        RawValue::Text(text) => text,
    };
    if mapping.is_missing(&text) {
        return Ok(());
    }
    let text = mapping.apply_value_map(field, &text);
    if mapping.is_missing(text) {
        return Ok(());
    }
    let text = text.trim();
    match field {
        Field::CaseKey => {}
        Field::Jurisdiction => record.jurisdiction = Some(text.to_string()),
        Field::Outcome => record.outcome = Some(text.to_lowercase()),
        Field::Sex => record.sex = Some(parse_sex(text)?),
        Field::Age => {
            record.age = Some(normalize::parse_age(text).map_err(|w| (ProblemKind::InvalidAge, w))?)
        }
        Field::Hospitalised => {
            record.hospitalised =
                Some(normalize::parse_flag(text).map_err(|w| (ProblemKind::InvalidValue, w))?)
        }
        Field::Symptoms => {
            record.symptoms = Some(list(normalize::split_list(text, &mapping.list_separator))?)
        }
        Field::Conditions => {
            record.conditions = Some(list(normalize::split_list(text, &mapping.list_separator))?)
        }
        date_field => record.set_date(date_field, Some(parse_date(mapping, text, latest)?)),
    }
    Ok(())
}

fn list(items: Result<Vec<String>, Invalid>) -> Result<Vec<String>, FieldError> {
    items.map_err(|why| (ProblemKind::InvalidValue, why))
}

fn set_list(record: &mut CaseRecord, field: Field, items: &[String]) -> Result<(), FieldError> {
    let items = list(normalize::normalize_items(items.iter().map(String::as_str)))?;
    match field {
        Field::Symptoms => record.symptoms = Some(items),
        Field::Conditions => record.conditions = Some(items),
        _ => return Err((ProblemKind::WrongType, "expected one value, found a list")),
    }
    Ok(())
}

fn parse_sex(text: &str) -> Result<String, FieldError> {
    let value = text.to_lowercase();
    if SEX_VALUES.contains(&value.as_str()) {
        Ok(value)
    } else {
        Err((
            ProblemKind::UnknownCode,
            "not a canonical sex value (female, male, other); add it to the source's value map",
        ))
    }
}

fn parse_date(mapping: &Mapping, text: &str, latest: NaiveDate) -> Result<NaiveDate, FieldError> {
    let date =
        normalize::parse_date(text, &mapping.date_formats).map_err(|why| (ProblemKind::InvalidDate, why))?;
    if date > latest {
        Err((ProblemKind::FutureDate, "date is after the extract's as-of time"))
    } else if date < earliest_plausible_date() {
        Err((ProblemKind::InvalidDate, "date is before 1900-01-01"))
    } else {
        Ok(date)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::AgeRange;

    fn mapping() -> Mapping {
        let mut m = Mapping::new("source[0]", "id");
        for (field, column) in [
            (Field::OnsetDate, "onset"),
            (Field::Sex, "sex"),
            (Field::Age, "age"),
            (Field::Hospitalised, "hosp"),
            (Field::Symptoms, "symptoms"),
            (Field::Outcome, "outcome"),
        ] {
            m.columns.insert(field, column.to_string());
        }
        let sex = [("f", "female"), ("m", "male"), ("u", "")];
        m.values.insert(Field::Sex, sex.iter().map(|(k, v)| (k.to_string(), v.to_string())).collect());
        m
    }

    fn run(cells: &[(&str, &str)]) -> Mapped {
        let m = mapping();
        let latest = NaiveDate::from_ymd_opt(2026, 3, 10).unwrap();
        let get = |field: Field| {
            let column = m.column(field)?;
            cells.iter().find(|(c, _)| *c == column).map(|(_, v)| RawValue::Text(Cow::Owned(v.to_string())))
        };
        map_row(&m, 7, latest, get, BTreeMap::new())
    }

    fn accepted(cells: &[(&str, &str)]) -> (CaseRecord, Vec<Problem>) {
        match run(cells) {
            Mapped::Accepted { record, problems } => (record, problems),
            other => panic!("expected accepted, got {other:?}"),
        }
    }

    #[test]
    fn maps_codes_and_types() {
        let (r, problems) = accepted(&[
            ("id", " A-1 "),
            ("onset", "2026-03-01"),
            ("sex", "F"),
            ("age", "80+"),
            ("hosp", "Y"),
            ("symptoms", "Cough;38.4 C"),
            ("outcome", "Recovered"),
        ]);
        assert!(problems.is_empty(), "{problems:?}");
        assert_eq!(r.case_key, "A-1");
        assert_eq!(r.date(Field::OnsetDate), NaiveDate::from_ymd_opt(2026, 3, 1));
        assert_eq!(r.sex.as_deref(), Some("female"));
        assert_eq!(r.age, Some(AgeRange { lo: 80.0, hi: 120.0 }));
        assert_eq!(r.hospitalised, Some(true));
        assert_eq!(r.symptoms, Some(vec!["cough".to_string(), "fever".to_string()]));
        assert_eq!(r.outcome.as_deref(), Some("recovered"));
    }

    #[test]
    fn blanks_and_missing_tokens_are_missing_never_no() {
        for blank in ["", "  ", "NA", "unknown", "Not Known"] {
            let (r, problems) = accepted(&[("id", "1"), ("hosp", blank), ("sex", blank)]);
            assert!(problems.is_empty());
            assert_eq!(r.hospitalised, None, "{blank:?}");
            assert_eq!(r.sex, None);
        }
        // A code mapped to "" is missing too.
        let (r, _) = accepted(&[("id", "1"), ("sex", "U")]);
        assert_eq!(r.sex, None);
    }

    #[test]
    fn bad_values_are_field_problems_naming_the_field() {
        let (r, problems) = accepted(&[("id", "1"), ("onset", "2026-02-30"), ("sex", "X"), ("age", "-4")]);
        let fields: Vec<_> = problems.iter().map(|p| p.field.clone().unwrap()).collect();
        assert_eq!(fields, ["onset_date", "age", "sex"]);
        assert_eq!(r.invalid, [Field::OnsetDate, Field::Age, Field::Sex]);
        assert!(problems.iter().all(|p| p.line == 7));
        assert!(problems[0].message.contains("column \"onset\""));
    }

    #[test]
    fn future_dates_are_impossible() {
        let (_, problems) = accepted(&[("id", "1"), ("onset", "2026-03-11")]);
        assert_eq!(problems[0].kind, ProblemKind::FutureDate);
        let (_, problems) = accepted(&[("id", "1"), ("onset", "2026-03-10")]);
        assert!(problems.is_empty());
    }

    #[test]
    fn blank_key_rejects_the_row() {
        for key in ["", "NA"] {
            match run(&[("id", key), ("onset", "2026-03-01")]) {
                Mapped::Rejected(p) => assert_eq!(p.kind, ProblemKind::MissingKey),
                other => panic!("{other:?}"),
            }
        }
    }
}
