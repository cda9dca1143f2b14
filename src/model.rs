//! Domain types shared by every stage: canonical fields, the typed case record, snapshot
//! metadata and statuses. Plain data with small pure helpers; nothing here does IO.

use std::collections::BTreeMap;
use std::fmt;

use chrono::{DateTime, NaiveDate, Utc};
use sha2::{Digest, Sha256};

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
    pub fn row_hash(&self) -> i64 {
        let mut hasher = Sha256::new();
        let mut put = |text: &str| {
            hasher.update((text.len() as u64).to_le_bytes());
            hasher.update(text.as_bytes());
        };
        put(&self.case_key);
        put(self.jurisdiction.as_deref().unwrap_or("\u{0}"));
        for date in &self.dates {
            put(&date.map(|d| d.to_string()).unwrap_or_else(|| "\u{0}".into()));
        }
        put(self.outcome.as_deref().unwrap_or("\u{0}"));
        put(&self.age.map(|a| format!("{}:{}", a.lo, a.hi)).unwrap_or_else(|| "\u{0}".into()));
        put(self.sex.as_deref().unwrap_or("\u{0}"));
        put(match self.hospitalised {
            Some(true) => "1",
            Some(false) => "0",
            None => "\u{0}",
        });
        for list in [&self.symptoms, &self.conditions] {
            match list {
                Some(items) => put(&items.join("\u{1}")),
                None => put("\u{0}"),
            }
        }
        let invalid: Vec<&str> = self.invalid.iter().map(|f| f.name()).collect();
        put(&invalid.join(","));
        for (column, value) in &self.extra {
            put(column);
            put(value);
        }
        let digest = hasher.finalize();
        let mut first = [0u8; 8];
        first.copy_from_slice(&digest[..8]);
        i64::from_le_bytes(first)
    }
}

/// Whether an extract holds the source's whole line list or only new and changed records.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ExtractKind {
    /// Records missing from a full extract are removed.
    Full,
    /// A delta extract never removes.
    Delta,
}

impl ExtractKind {
    pub fn name(self) -> &'static str {
        match self {
            ExtractKind::Full => "full",
            ExtractKind::Delta => "delta",
        }
    }
}

/// The byte format of an extract (gzip is detected separately, by magic bytes).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    Csv,
    Ndjson,
    Json,
}

impl Format {
    pub fn name(self) -> &'static str {
        match self {
            Format::Csv => "csv",
            Format::Ndjson => "ndjson",
            Format::Json => "json",
        }
    }
}

/// What became of a snapshot.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SnapshotStatus {
    /// Its records are versioned in the store.
    Applied,
    /// Suspect (e.g. a truncated feed); waits for an operator to release or reject it.
    Held,
    /// Could not be parsed at all; nothing of it was applied.
    Failed,
    /// The same bytes as an earlier snapshot of the source; nothing new.
    Duplicate,
    /// A held snapshot that an operator discarded.
    Rejected,
}

impl SnapshotStatus {
    pub fn name(self) -> &'static str {
        match self {
            SnapshotStatus::Applied => "applied",
            SnapshotStatus::Held => "held",
            SnapshotStatus::Failed => "failed",
            SnapshotStatus::Duplicate => "duplicate",
            SnapshotStatus::Rejected => "rejected",
        }
    }

    pub fn parse(text: &str) -> Option<SnapshotStatus> {
        [
            SnapshotStatus::Applied,
            SnapshotStatus::Held,
            SnapshotStatus::Failed,
            SnapshotStatus::Duplicate,
            SnapshotStatus::Rejected,
        ]
        .into_iter()
        .find(|status| status.name() == text)
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
