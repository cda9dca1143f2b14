//! The ingest benchmark's invented extracts: a seeded generator of realistic line-list rows
//! (mixed date and age formats, sex codes, symptom lists with temperatures, an ignored and an
//! unmapped column, a few bad dates and duplicate keys), and the next day's revision of them.

use super::*;

/// SplitMix64 (Steele, Lea and Flood 2014): tiny, fast, and good enough to vary test data.
#[derive(Debug, Clone)]
pub(crate) struct Rng(pub(crate) u64);

impl Rng {
    pub(crate) fn new(seed: u64, stream: u64, index: u64) -> Rng {
        let mut rng = Rng(seed
            ^ stream.wrapping_mul(0xA076_1D64_78BD_642F)
            ^ index.wrapping_mul(0xE703_7ED1_A0B4_28DB));
        rng.next();
        rng
    }

    pub(crate) fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in `0..n`.
    pub(crate) fn below(&mut self, n: u64) -> u64 {
        self.next() % n
    }

    /// True with probability `percent` / 100.
    pub(crate) fn chance(&mut self, percent: u64) -> bool {
        self.below(100) < percent
    }

    pub(crate) fn pick<'a>(&mut self, items: &[&'a str]) -> &'a str {
        items[self.below(items.len() as u64) as usize]
    }
}

/// Streams of the generator, so each purpose draws independent numbers.
pub(crate) const STREAM_CASE: u64 = 1;
pub(crate) const STREAM_CHANGE: u64 = 2;

pub(crate) const SYMPTOMS: [&str; 8] =
    ["cough", "sore throat", "headache", "fatigue", "loss of smell", "myalgia", "fever", "runny nose"];
pub(crate) const CONDITIONS: [&str; 5] = ["diabetes", "asthma", "copd", "hypertension", "pregnancy"];

/// How an age is written in the extract.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) enum Age {
    Years(u32),
    Decimal(u32),
    Band(u32),
    Open(u32),
    Months(u32),
    Weeks(u32),
    Unknown,
    Blank,
}

/// One generated case, before it is written as a CSV row.
#[derive(Debug, Clone)]
pub(crate) struct Case {
    pub(crate) key: String,
    pub(crate) district: u32,
    pub(crate) onset: Option<NaiveDate>,
    pub(crate) specimen: Option<NaiveDate>,
    pub(crate) result: Option<NaiveDate>,
    pub(crate) report: NaiveDate,
    pub(crate) admitted: Option<NaiveDate>,
    pub(crate) died: Option<NaiveDate>,
    pub(crate) outcome: &'static str,
    pub(crate) age: Age,
    pub(crate) sex: &'static str,
    pub(crate) hospitalised: &'static str,
    pub(crate) symptoms: Vec<String>,
    pub(crate) conditions: &'static str,
    pub(crate) unit: String,
    /// Whether dates are written day-first (`%d/%m/%Y`), as some reporting units export.
    pub(crate) day_first: bool,
    /// An impossible onset date as written (`2026-02-30`): a field problem.
    pub(crate) bad_onset: bool,
}

impl Case {
    /// Case number `index` as known on `as_of` (all its dates on or before that day).
    pub(crate) fn generate(seed: u64, index: u64, as_of: NaiveDate) -> Case {
        let mut rng = Rng::new(seed, STREAM_CASE, index);
        let report = as_of - Duration::days(rng.below(120) as i64);
        let result = report - Duration::days(rng.below(3) as i64);
        let specimen = result - Duration::days(rng.below(4) as i64);
        let onset = specimen - Duration::days(rng.below(6) as i64);
        let hospitalised = rng.chance(10);
        let admitted = hospitalised.then(|| (onset + Duration::days(2 + rng.below(6) as i64)).min(as_of));
        let died = (hospitalised && rng.chance(15))
            .then(|| (onset + Duration::days(8 + rng.below(20) as i64)).min(as_of));
        let outcome = match (died.is_some(), rng.below(10)) {
            (true, _) => "died",
            (false, 0..=5) => "recovered",
            (false, 6) => "unknown",
            _ => "",
        };
        let years = rng.below(95) as u32;
        let age = match rng.below(100) {
            0..=64 => Age::Years(years),
            65..=74 => Age::Band(years / 10 * 10),
            75..=79 => Age::Open(80),
            80..=82 => Age::Months(1 + rng.below(11) as u32),
            83 => Age::Weeks(1 + rng.below(8) as u32),
            84..=88 => Age::Decimal(years),
            89..=94 => Age::Unknown,
            _ => Age::Blank,
        };
        let sex = match rng.below(100) {
            0..=44 => "F",
            45..=89 => "M",
            90..=91 => "X",
            92..=94 => "U",
            95..=97 => "female",
            _ => "",
        };
        let hosp = match (hospitalised, rng.below(10)) {
            (true, _) => "Y",
            (false, 0..=6) => "N",
            _ => "",
        };
        let mut symptoms = Vec::new();
        match rng.below(20) {
            0 => symptoms.push("none".to_string()),
            1 | 2 => {}
            _ => {
                for _ in 0..1 + rng.below(4) {
                    let s = rng.pick(&SYMPTOMS);
                    if !symptoms.iter().any(|x| x == s) {
                        symptoms.push(if rng.chance(20) { capitalise(s) } else { s.to_string() });
                    }
                }
                if rng.chance(15) {
                    symptoms.push(format!("{}.{} C", 37 + rng.below(3), rng.below(10)));
                }
            }
        }
        let conditions = match rng.below(10) {
            0 => "diabetes",
            1 => "asthma;copd",
            2 => "hypertension; diabetes",
            3 => CONDITIONS[rng.below(CONDITIONS.len() as u64) as usize],
            _ => "",
        };
        let unit = if rng.chance(1) {
            format!("unit-{:03}, annex", rng.below(400))
        } else {
            format!("unit-{:03}", rng.below(400))
        };
        Case {
            key: format!("CR-{:08}", 10_000_000 + index * 7 % 9_000_000_000),
            district: 1 + (rng.below(12) as u32),
            onset: (!rng.chance(8)).then_some(onset),
            specimen: (!rng.chance(4)).then_some(specimen),
            result: (!rng.chance(3)).then_some(result),
            report,
            admitted,
            died,
            outcome,
            age,
            sex,
            hospitalised: hosp,
            symptoms,
            conditions,
            unit,
            day_first: rng.chance(15),
            bad_onset: index % BAD_DATE_EVERY == BAD_DATE_EVERY / 2,
        }
    }

    /// A follow-up that always changes the canonical record: onset filled in or corrected,
    /// a hospital admission, a death, a new symptom or a corrected age.
    pub(crate) fn change(&mut self, seed: u64, index: u64, as_of: NaiveDate) {
        let mut rng = Rng::new(seed, STREAM_CHANGE, index);
        match rng.below(5) {
            0 => {
                self.bad_onset = false;
                self.onset = Some(match self.onset {
                    Some(onset) => onset - Duration::days(1),
                    None => self.specimen.unwrap_or(self.report) - Duration::days(2),
                });
            }
            1 if self.admitted.is_none() => {
                self.hospitalised = "Y";
                self.admitted = Some(as_of);
            }
            1 | 2 if self.died.is_none() => {
                self.outcome = "died";
                self.died = Some(as_of);
            }
            3 => {
                let have = |s: &str| self.symptoms.iter().any(|x| x.eq_ignore_ascii_case(s));
                let missing = SYMPTOMS.iter().find(|s| !have(s) && **s != "fever").unwrap();
                self.symptoms.retain(|s| s != "none");
                self.symptoms.push(missing.to_string());
            }
            _ => {
                self.age = match self.age {
                    Age::Years(y) => Age::Years((y + 1) % 100),
                    Age::Decimal(y) => Age::Decimal(y + 1),
                    Age::Band(b) => Age::Band((b + 10) % 90),
                    Age::Open(_) => Age::Years(85),
                    Age::Months(m) => Age::Months(m % 11 + 1),
                    Age::Weeks(w) => Age::Weeks(w + 1),
                    Age::Unknown | Age::Blank => Age::Years(40),
                };
            }
        }
    }

    pub(crate) fn write(&self, out: &mut Vec<u8>, exported_at: &str) {
        let date = |out: &mut Vec<u8>, d: Option<NaiveDate>| {
            if let Some(d) = d {
                let fmt = if self.day_first { "%d/%m/%Y" } else { "%Y-%m-%d" };
                let _ = write!(out, "{}", d.format(fmt));
            }
            out.push(b',');
        };
        let _ = write!(out, "{},district-{:02},", self.key, self.district);
        if self.bad_onset {
            out.extend_from_slice(b"2026-02-30,");
        } else {
            date(out, self.onset);
        }
        date(out, self.specimen);
        date(out, self.result);
        date(out, Some(self.report));
        date(out, self.admitted);
        date(out, self.died);
        let _ = write!(out, "{},", self.outcome);
        let _ = match self.age {
            Age::Years(y) => write!(out, "{y}"),
            Age::Decimal(y) => write!(out, "{y}.5"),
            Age::Band(b) => write!(out, "{b}-{}", b + 9),
            Age::Open(o) => write!(out, "{o}+"),
            Age::Months(m) => write!(out, "{m} months"),
            Age::Weeks(w) => write!(out, "{w} weeks"),
            Age::Unknown => write!(out, "unknown"),
            Age::Blank => Ok(()),
        };
        let _ = write!(out, ",{},{},", self.sex, self.hospitalised);
        out.extend_from_slice(self.symptoms.join(";").as_bytes());
        let _ = write!(out, ",{},{exported_at},", self.conditions);
        if self.unit.contains(',') {
            let _ = write!(out, "\"{}\"", self.unit);
        } else {
            out.extend_from_slice(self.unit.as_bytes());
        }
        out.push(b'\n');
    }
}

pub(crate) fn capitalise(text: &str) -> String {
    let mut chars = text.chars();
    chars.next().map(|c| c.to_ascii_uppercase().to_string() + chars.as_str()).unwrap_or_default()
}

/// What a generated extract holds.
#[derive(Debug, Clone, Default)]
pub(crate) struct Generated {
    pub(crate) rows: u64,
    pub(crate) bytes: u64,
    /// Distinct keys.
    pub(crate) cases: u64,
    pub(crate) duplicates: u64,
    pub(crate) changed: u64,
    pub(crate) added: u64,
}

/// Writes the extract of `as_of`: cases `0..existing` (changed ones follow up if this is not
/// the first day) and `added` new cases after them. Changes and duplicates are chosen by
/// index, so both days agree on which rows are which.
pub(crate) fn write_extract(
    path: &Path,
    seed: u64,
    existing: u64,
    added: u64,
    as_of: NaiveDate,
) -> Result<Generated> {
    let first = as_of == first_day();
    let mut out = BufWriter::with_capacity(1 << 20, fs::File::create(path)?);
    let exported_at = format!("{as_of}T06:00:00Z");
    let mut generated = Generated { added, cases: existing + added, ..Generated::default() };
    let mut row = Vec::with_capacity(512);
    out.write_all(HEADER.as_bytes())?;
    out.write_all(b"\n")?;
    let mut bytes = HEADER.len() as u64 + 1;
    for index in 0..existing + added {
        let mut case = Case::generate(seed, index, if index < existing { first_day() } else { as_of });
        if !first && index < existing && index % CHANGE_EVERY == CHANGE_EVERY / 3 {
            case.change(seed, index, as_of);
            generated.changed += 1;
        }
        row.clear();
        case.write(&mut row, &exported_at);
        // A duplicate key: an earlier case's key again, with this row's content. The last
        // row wins, so the earlier case's own row is the one rejected.
        if index % DUPLICATE_EVERY == DUPLICATE_EVERY - 1 && index < existing {
            let earlier = Case::generate(seed, index - 3, first_day());
            let mut dup = case.clone();
            dup.key = earlier.key;
            out.write_all(&row)?;
            row.clear();
            dup.write(&mut row, &exported_at);
            generated.duplicates += 1;
            generated.rows += 1;
            bytes += row.len() as u64;
        }
        bytes += row.len() as u64;
        out.write_all(&row)?;
        generated.rows += 1;
    }
    // On disk before any phase is timed, so that no phase pays for writing it back.
    out.into_inner().map_err(|err| err.into_error())?.sync_all()?;
    generated.bytes = bytes;
    Ok(generated)
}
