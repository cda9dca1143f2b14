//! Domain types shared by every stage: canonical fields, the typed case record, snapshot
//! metadata and statuses. Plain data with small pure helpers; nothing here does IO.

use std::collections::BTreeMap;
use std::fmt;

use std::io::Write as _;

use chrono::{DateTime, Datelike, NaiveDate, Utc};
use sha2::{Digest, Sha256};

pub mod ids;
pub mod vocabulary;

pub use ids::{SnapshotId, SourceId};

pub use vocabulary::{
    ExtractKind, Format, MethodChoice, NowcastMethod, OwedState, Rule, Severity, SnapshotStatus, TokenScope,
    UnknownName,
};

/// A canonical line-list field. Every source's columns are mapped onto these by config.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Field {
    CaseKey,
    Jurisdiction,
    OnsetDate,
    SpecimenDate,
    ResultDate,
    ReportDate,
    AdmitDate,
    DeathDate,
    Outcome,
    Age,
    Sex,
    Hospitalised,
    Symptoms,
    Conditions,
}

impl Field {
    /// Every field, in the order used by listings and the store's columns.
    pub const ALL: [Field; 14] = [
        Field::CaseKey,
        Field::Jurisdiction,
        Field::OnsetDate,
        Field::SpecimenDate,
        Field::ResultDate,
        Field::ReportDate,
        Field::AdmitDate,
        Field::DeathDate,
        Field::Outcome,
        Field::Age,
        Field::Sex,
        Field::Hospitalised,
        Field::Symptoms,
        Field::Conditions,
    ];

    /// The date fields, in the order of `CaseRecord::dates`.
    pub const DATES: [Field; 6] = [
        Field::OnsetDate,
        Field::SpecimenDate,
        Field::ResultDate,
        Field::ReportDate,
        Field::AdmitDate,
        Field::DeathDate,
    ];

    pub fn name(self) -> &'static str {
        match self {
            Field::CaseKey => "case_key",
            Field::Jurisdiction => "jurisdiction",
            Field::OnsetDate => "onset_date",
            Field::SpecimenDate => "specimen_date",
            Field::ResultDate => "result_date",
            Field::ReportDate => "report_date",
            Field::AdmitDate => "admit_date",
            Field::DeathDate => "death_date",
            Field::Outcome => "outcome",
            Field::Age => "age",
            Field::Sex => "sex",
            Field::Hospitalised => "hospitalised",
            Field::Symptoms => "symptoms",
            Field::Conditions => "conditions",
        }
    }

    /// Parses a canonical name or its short form (`onset` for `onset_date`, ...).
    pub fn parse(text: &str) -> Option<Field> {
        let text = text.trim().to_ascii_lowercase();
        Field::ALL.into_iter().find(|field| {
            let name = field.name();
            name == text || name.strip_suffix("_date") == Some(text.as_str())
        })
    }

    pub fn is_date(self) -> bool {
        Field::DATES.contains(&self)
    }

    /// Position of a date field in `CaseRecord::dates`.
    pub fn date_index(self) -> Option<usize> {
        Field::DATES.iter().position(|field| *field == self)
    }
}

impl fmt::Display for Field {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// An age as an interval in years, `[lo, hi)`; a point (`lo == hi`) for exact ages such as
/// "6 months" (0.5). "80+" is `[80, 120)`, "30-39" is `[30, 40)`, "45" is `[45, 46)`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AgeRange {
    pub lo: f64,
    pub hi: f64,
}

/// One case as mapped onto the canonical fields. `None` always means *missing* (not captured),
/// never "no"; `invalid` lists fields whose source value was present but unusable.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct CaseRecord {
    pub case_key: String,
    pub jurisdiction: Option<String>,
    /// Indexed like `Field::DATES`.
    pub dates: [Option<NaiveDate>; 6],
    pub outcome: Option<String>,
    pub age: Option<AgeRange>,
    pub sex: Option<String>,
    pub hospitalised: Option<bool>,
    pub symptoms: Option<Vec<String>>,
    pub conditions: Option<Vec<String>>,
    pub invalid: Vec<Field>,
    /// Unmapped source columns, by column name.
    pub extra: BTreeMap<String, String>,
}

/// Room for a typical record's hashed bytes, so the buffer rarely grows.
const ROW_HASH_BUFFER_BYTES: usize = 512;

/// Writes a date as `NaiveDate`'s `Display` does (`2026-03-01`), digit by digit for the
/// four-digit years of real records.
fn write_date(out: &mut Vec<u8>, date: NaiveDate) {
    let year = date.year();
    if !(0..=9999).contains(&year) {
        let _ = write!(out, "{date}");
        return;
    }
    let (year, month, day) = (year as u32, date.month(), date.day());
    let digit = |n: u32| b'0' + (n % 10) as u8;
    out.extend_from_slice(&[
        digit(year / 1000),
        digit(year / 100),
        digit(year / 10),
        digit(year),
        b'-',
        digit(month / 10),
        digit(month),
        b'-',
        digit(day / 10),
        digit(day),
    ]);
}

impl CaseRecord {
    pub fn date(&self, field: Field) -> Option<NaiveDate> {
        field.date_index().and_then(|idx| self.dates[idx])
    }

    pub fn set_date(&mut self, field: Field, date: Option<NaiveDate>) {
        if let Some(idx) = field.date_index() {
            self.dates[idx] = date;
        }
    }

    /// A stable 64-bit digest of the canonical content (SHA-256, first 8 bytes). Two versions
    /// of a record with the same hash are the same version; nothing is written for them.
    ///
    /// The digested bytes are each field as text with its length before it (`\0` for a
    /// missing value): dates as `Display` writes them, the age as `lo:hi`, list items joined
    /// by `\u{1}`, the invalid fields' names joined by commas, then each extra column and
    /// value. They are assembled in one buffer without a heap allocation per field, because
    /// every row of every extract is hashed (the test keeps the plain formulation as oracle).
    pub fn row_hash(&self) -> i64 {
        const MISSING: &[u8] = b"\0";
        let mut bytes = Vec::with_capacity(ROW_HASH_BUFFER_BYTES);
        let put = |bytes: &mut Vec<u8>, text: &[u8]| {
            bytes.extend_from_slice(&(text.len() as u64).to_le_bytes());
            bytes.extend_from_slice(text);
        };
        // A field whose text is written in place; its length is filled in afterwards.
        let put_with = |bytes: &mut Vec<u8>, write: &mut dyn FnMut(&mut Vec<u8>)| {
            let at = bytes.len();
            bytes.extend_from_slice(&[0; 8]);
            write(bytes);
            let len = (bytes.len() - at - 8) as u64;
            bytes[at..at + 8].copy_from_slice(&len.to_le_bytes());
        };
        put(&mut bytes, self.case_key.as_bytes());
        put(&mut bytes, self.jurisdiction.as_deref().map_or(MISSING, str::as_bytes));
        for date in &self.dates {
            match date {
                Some(date) => put_with(&mut bytes, &mut |b| write_date(b, *date)),
                None => put(&mut bytes, MISSING),
            }
        }
        put(&mut bytes, self.outcome.as_deref().map_or(MISSING, str::as_bytes));
        match self.age {
            Some(age) => put_with(&mut bytes, &mut |b| {
                let _ = write!(b, "{}:{}", age.lo, age.hi);
            }),
            None => put(&mut bytes, MISSING),
        }
        put(&mut bytes, self.sex.as_deref().map_or(MISSING, str::as_bytes));
        let hospitalised: &[u8] = match self.hospitalised {
            Some(true) => b"1",
            Some(false) => b"0",
            None => MISSING,
        };
        put(&mut bytes, hospitalised);
        for list in [&self.symptoms, &self.conditions] {
            match list {
                Some(items) => put_with(&mut bytes, &mut |b| {
                    for (idx, item) in items.iter().enumerate() {
                        if idx > 0 {
                            b.push(1);
                        }
                        b.extend_from_slice(item.as_bytes());
                    }
                }),
                None => put(&mut bytes, MISSING),
            }
        }
        put_with(&mut bytes, &mut |b| {
            for (idx, field) in self.invalid.iter().enumerate() {
                if idx > 0 {
                    b.push(b',');
                }
                b.extend_from_slice(field.name().as_bytes());
            }
        });
        for (column, value) in &self.extra {
            put(&mut bytes, column.as_bytes());
            put(&mut bytes, value.as_bytes());
        }
        let digest = Sha256::digest(&bytes);
        let mut first = [0u8; 8];
        first.copy_from_slice(&digest[..8]);
        i64::from_le_bytes(first)
    }
}

/// What is known about an extract before it is parsed.
#[derive(Debug, Clone)]
pub struct ExtractMeta {
    pub as_of: DateTime<Utc>,
    pub received_at: DateTime<Utc>,
    /// Where the bytes came from: a file path or URL (never row contents).
    pub origin: String,
    pub sha256: String,
    pub bytes: u64,
    pub kind: ExtractKind,
}

/// Row counts of one snapshot.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct RowCounts {
    pub total: u64,
    pub accepted: u64,
    pub rejected: u64,
    pub new: u64,
    pub changed: u64,
    pub removed: u64,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn field_names_round_trip_and_short_forms() {
        for field in Field::ALL {
            assert_eq!(Field::parse(field.name()), Some(field));
        }
        assert_eq!(Field::parse("onset"), Some(Field::OnsetDate));
        assert_eq!(Field::parse("Report"), Some(Field::ReportDate));
        assert_eq!(Field::parse("birthday"), None);
    }

    /// The plain formulation of `row_hash`, one allocation per field: the oracle.
    fn row_hash_plain(r: &CaseRecord) -> i64 {
        let mut hasher = Sha256::new();
        let mut put = |text: &str| {
            hasher.update((text.len() as u64).to_le_bytes());
            hasher.update(text.as_bytes());
        };
        put(&r.case_key);
        put(r.jurisdiction.as_deref().unwrap_or("\u{0}"));
        for date in &r.dates {
            put(&date.map(|d| d.to_string()).unwrap_or_else(|| "\u{0}".into()));
        }
        put(r.outcome.as_deref().unwrap_or("\u{0}"));
        put(&r.age.map(|a| format!("{}:{}", a.lo, a.hi)).unwrap_or_else(|| "\u{0}".into()));
        put(r.sex.as_deref().unwrap_or("\u{0}"));
        put(match r.hospitalised {
            Some(true) => "1",
            Some(false) => "0",
            None => "\u{0}",
        });
        for list in [&r.symptoms, &r.conditions] {
            match list {
                Some(items) => put(&items.join("\u{1}")),
                None => put("\u{0}"),
            }
        }
        let invalid: Vec<&str> = r.invalid.iter().map(|f| f.name()).collect();
        put(&invalid.join(","));
        for (column, value) in &r.extra {
            put(column);
            put(value);
        }
        let digest = hasher.finalize();
        let mut first = [0u8; 8];
        first.copy_from_slice(&digest[..8]);
        i64::from_le_bytes(first)
    }

    #[test]
    fn row_hash_equals_the_plain_formulation() {
        let date = |y, m, d| NaiveDate::from_ymd_opt(y, m, d);
        let full = CaseRecord {
            case_key: "K-1 ü".into(),
            jurisdiction: Some("North".into()),
            dates: [
                date(2026, 3, 1),
                None,
                date(1999, 12, 31),
                date(10_000, 1, 2),
                date(-5, 6, 7),
                date(0, 1, 1),
            ],
            outcome: Some(String::new()),
            age: Some(AgeRange { lo: 0.5, hi: 1.0 / 3.0 }),
            sex: Some("female".into()),
            hospitalised: Some(false),
            symptoms: Some(vec!["cough".into(), "fever".into(), String::new()]),
            conditions: Some(vec![]),
            invalid: vec![Field::OnsetDate, Field::Age],
            extra: [("unit".to_string(), "a\u{1}b".to_string()), ("z".to_string(), String::new())].into(),
        };
        let mut cases = vec![CaseRecord::default(), full.clone()];
        for n in 0..40u32 {
            let mut r = full.clone();
            r.case_key = format!("C{n}");
            r.age = (n % 3 != 0).then_some(AgeRange { lo: f64::from(n) * 1.25, hi: 120.0 });
            r.hospitalised = [None, Some(true), Some(false)][n as usize % 3];
            r.symptoms = (n % 4 != 0).then(|| (0..n % 5).map(|i| format!("s{i}")).collect());
            r.invalid.truncate(n as usize % 3);
            r.dates[1] = date(2026, 1 + n % 12, 1 + n % 28);
            cases.push(r);
        }
        for r in &cases {
            assert_eq!(r.row_hash(), row_hash_plain(r), "{r:?}");
        }
    }

    #[test]
    fn row_hash_distinguishes_missing_from_empty() {
        let base = CaseRecord { case_key: "A1".into(), ..CaseRecord::default() };
        let mut empty_list = base.clone();
        empty_list.symptoms = Some(vec![]);
        let mut blank_text = base.clone();
        blank_text.outcome = Some(String::new());
        assert_ne!(base.row_hash(), empty_list.row_hash());
        assert_ne!(base.row_hash(), blank_text.row_hash());
        assert_eq!(base.row_hash(), base.clone().row_hash());
    }
}
