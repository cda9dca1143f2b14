//! Turning one source cell into a canonical value: dates, ages as intervals, yes/no flags,
//! multi-valued lists and temperature readings. Pure functions on strings; the caller has
//! already decided that the cell is not a missing token.

use chrono::NaiveDate;

use crate::model::AgeRange;

/// Upper bound of an open age interval such as "80+", in years (common practice for
/// demographic tables; nobody in a line list is older).
pub const AGE_OPEN_UPPER: f64 = 120.0;

/// Fever threshold in degrees Celsius (common practice: 38.0 C or more is fever).
pub const FEVER_CELSIUS: f64 = 38.0;

/// Why a cell could not be turned into a value. The text names the problem, never the value.
pub type Invalid = &'static str;

/// Parses a date with the first matching format. Datetime strings (`2026-03-01T08:30:00Z`)
/// are accepted when the format matches their date part. Impossible dates such as
/// 2026-02-30 fail.
pub fn parse_date(text: &str, formats: &[String]) -> Result<NaiveDate, Invalid> {
    let text = text.trim();
    for format in formats {
        match quick_date(text, format) {
            Quick::Date(date) => return Ok(date),
            Quick::NoMatch => continue,
            Quick::Unsure => {}
        }
        if let Ok(date) = NaiveDate::parse_from_str(text, format) {
            return Ok(date);
        }
        if let Ok((date, rest)) = NaiveDate::parse_and_remainder(text, format)
            && (rest.starts_with('T') || rest.starts_with(' '))
        {
            return if valid_time(&rest[1..]) { Ok(date) } else { Err(INVALID_TIME) };
        }
    }
    Err("not a valid date in the configured formats")
}

const INVALID_TIME: Invalid = "not a valid time of day after the date";

/// Whether the text after a date's 'T' or space is a time of day (`08:30`, `08:30:00`,
/// `08:30:00.250`, then nothing, `Z`, ` UTC` or an offset such as `+02:00`): a datetime
/// with hour 25 is not a date with a harmless suffix.
fn valid_time(text: &str) -> bool {
    let rest = ["%H:%M:%S%.f", "%H:%M"]
        .iter()
        .find_map(|format| chrono::NaiveTime::parse_and_remainder(text, format).ok().map(|(_, rest)| rest));
    let Some(rest) = rest else { return false };
    let zone = rest.trim_start();
    zone.is_empty()
        || zone.eq_ignore_ascii_case("z")
        || zone.eq_ignore_ascii_case("utc")
        || chrono::DateTime::parse_from_str(&format!("2000-01-01T00:00:00{zone}"), "%Y-%m-%dT%H:%M:%S%#z")
            .is_ok()
}

/// What the fast path of `parse_date` made of a text for one format.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Quick {
    /// The date chrono would have returned.
    Date(NaiveDate),
    /// chrono would have failed for this format too.
    NoMatch,
    /// Ask chrono.
    Unsure,
}

/// The common case without chrono's format interpreter (which dominated parsing time):
/// formats made of `%Y`, `%m`, `%d` (each once) and ASCII literals, on text with exactly
/// 4, 2 and 2 digits in their places. On such text chrono consumes exactly those digits (its
/// widths are 4, 2 and 2), so the answer is the same; anything else goes to chrono, except
/// text that lacks one of the format's literal characters, which chrono cannot match either.
fn quick_date(text: &str, format: &str) -> Quick {
    let (t, f) = (text.as_bytes(), format.as_bytes());
    let (mut ti, mut fi) = (0, 0);
    let mut parts: [Option<u32>; 3] = [None; 3];
    while fi < f.len() {
        match f[fi] {
            b'%' => {
                let (slot, width) = match f.get(fi + 1) {
                    Some(b'Y') => (0, 4),
                    Some(b'm') => (1, 2),
                    Some(b'd') => (2, 2),
                    _ => return Quick::Unsure,
                };
                if parts[slot].is_some() {
                    return Quick::Unsure;
                }
                match t.get(ti..ti + width).filter(|digits| digits.iter().all(u8::is_ascii_digit)) {
                    Some(digits) => {
                        parts[slot] = Some(digits.iter().fold(0, |n, b| n * 10 + u32::from(b - b'0')));
                    }
                    None => return lacks_literal(t, f),
                }
                ti += width;
                fi += 2;
            }
            literal if literal.is_ascii() && !literal.is_ascii_whitespace() => {
                if t.get(ti) != Some(&literal) {
                    return lacks_literal(t, f);
                }
                ti += 1;
                fi += 1;
            }
            _ => return Quick::Unsure,
        }
    }
    let [Some(year), Some(month), Some(day)] = parts else { return Quick::Unsure };
    // Like `parse_date`'s remainder rule: a valid time of day may follow after 'T' or a
    // space (the text is ASCII up to `ti`, so slicing there is safe).
    match t.get(ti) {
        None => {}
        Some(b'T') | Some(b' ') if valid_time(&text[ti + 1..]) => {}
        _ => return Quick::NoMatch,
    }
    match NaiveDate::from_ymd_opt(year as i32, month, day) {
        Some(date) => Quick::Date(date),
        None => Quick::NoMatch,
    }
}

/// chrono matches literals exactly, so a format literal absent from the text means no match.
fn lacks_literal(text: &[u8], format: &[u8]) -> Quick {
    let mut idx = 0;
    while idx < format.len() {
        if format[idx] == b'%' {
            idx += 2;
            continue;
        }
        if !text.contains(&format[idx]) {
            return Quick::NoMatch;
        }
        idx += 1;
    }
    Quick::Unsure
}

/// Parses an age into an interval in years: `45` (completed years, `[45, 46)`), `45.5`,
/// `80+`, `30-39`, `<1`, `6 months`, `3 weeks`, `10 days`, `45 years`.
pub fn parse_age(text: &str) -> Result<AgeRange, Invalid> {
    let text = text.trim();
    // Most ages are digits; only text with capitals needs a lower-cased copy.
    let lowered;
    let text = if text.bytes().any(|b| b.is_ascii_uppercase()) {
        lowered = text.to_ascii_lowercase();
        lowered.as_str()
    } else {
        text
    };
    let range = if let Some(lo) = text.strip_suffix('+') {
        let lo = parse_years(lo)?;
        AgeRange { lo, hi: AGE_OPEN_UPPER }
    } else if let Some(hi) = text.strip_prefix('<') {
        AgeRange { lo: 0.0, hi: parse_years(hi)? }
    } else if let Some((lo, hi)) = split_band(text) {
        let (lo, hi) = (parse_years(lo)?, parse_years(hi)?);
        if hi < lo {
            return Err("age band upper bound below lower bound");
        }
        // "30-39" in completed years covers [30, 40).
        AgeRange { lo, hi: hi + 1.0 }
    } else if let Some((number, unit)) = split_unit(text) {
        let years = number / unit_per_year(unit)?;
        if unit_per_year(unit)? == 1.0 && number.fract() == 0.0 {
            AgeRange { lo: years, hi: years + 1.0 }
        } else {
            AgeRange { lo: years, hi: years }
        }
    } else {
        let years = parse_years(text)?;
        if years.fract() == 0.0 {
            AgeRange { lo: years, hi: years + 1.0 }
        } else {
            AgeRange { lo: years, hi: years }
        }
    };
    check_age(range)
}

/// Parses a yes/no flag. Values are matched after the source's value map has been applied.
pub fn parse_flag(text: &str) -> Result<bool, Invalid> {
    let text = text.trim();
    let any = |words: &[&str]| words.iter().any(|word| word.eq_ignore_ascii_case(text));
    if any(&["yes", "y", "true", "t", "1"]) {
        Ok(true)
    } else if any(&["no", "n", "false", "f", "0"]) {
        Ok(false)
    } else {
        Err("not a recognised yes/no value")
    }
}

/// Splits a multi-valued cell, trims and lower-cases each item, turns temperature readings
/// into `fever` (at or above 38.0 C) or drops them (below), and removes duplicates while
/// keeping first-seen order. `none` alone means an explicitly empty list. A temperature
/// outside the plausible human range makes the whole cell invalid: it is neither fever nor
/// a symptom's name.
pub fn split_list(text: &str, separator: &str) -> Result<Vec<String>, Invalid> {
    normalize_items(text.split(separator))
}

/// The same normalisation for items that arrive already split (JSON arrays).
pub fn normalize_items<'a>(items: impl IntoIterator<Item = &'a str>) -> Result<Vec<String>, Invalid> {
    let mut out: Vec<String> = Vec::new();
    for item in items {
        let item = item.trim().to_lowercase();
        if item.is_empty() || item == "none" {
            continue;
        }
        let item = match temperature_celsius(&item) {
            Some(celsius) if !PLAUSIBLE_CELSIUS.contains(&celsius) => {
                return Err("temperature reading outside the plausible human range (25-45 C, 77-113 F)");
            }
            Some(celsius) if celsius >= FEVER_CELSIUS => "fever".to_string(),
            Some(_) => continue,
            None => item,
        };
        if !out.contains(&item) {
            out.push(item);
        }
    }
    Ok(out)
}

/// Body temperatures a living patient can have, in degrees Celsius (common practice for
/// plausibility checks: 25-45 C, i.e. 77-113 F). A reading outside it is a typing or unit
/// error (380 C, -40 F) and is not evidence of fever.
pub const PLAUSIBLE_CELSIUS: std::ops::RangeInclusive<f64> = 25.0..=45.0;

/// Reads a temperature such as `38.1 c`, `38.1°c`, `temp 39`, `fever 38.5` or `100.4 f`,
/// returning degrees Celsius (NaN for `nan c`, negative for `-40 f`: readings all the same,
/// for the caller's range check). A bare number between 34 and 43 is read as Celsius.
pub fn temperature_celsius(item: &str) -> Option<f64> {
    // Every reading starts with a number (or nan/inf), so an item without a digit is not
    // one: the quick answer for the usual "cough", without lower-casing it again.
    if !item.bytes().any(|b| b.is_ascii_digit()) && !starts_non_finite(item) {
        return None;
    }
    let item = item.trim().to_lowercase();
    let item = ["temperature", "temp", "fever", "t="]
        .iter()
        .find_map(|prefix| item.strip_prefix(prefix))
        .unwrap_or(&item)
        .trim_start_matches([':', ' ', '='])
        .trim();
    let (number, unit) = leading_number(item).or_else(|| non_finite(item))?;
    let unit = unit.trim().trim_start_matches('°').trim();
    match unit {
        "c" | "celsius" => Some(number),
        "f" | "fahrenheit" => Some((number - 32.0) * 5.0 / 9.0),
        "" if (34.0..=43.0).contains(&number) => Some(number),
        _ => None,
    }
}

fn starts_non_finite(item: &str) -> bool {
    let head = item.trim_start().trim_start_matches(['-', '+']).as_bytes();
    head.len() >= 3 && (head[..3].eq_ignore_ascii_case(b"nan") || head[..3].eq_ignore_ascii_case(b"inf"))
}

/// `nan` or `inf` where a reading's number belongs (what some exporters write for a
/// missing or overflowing value).
fn non_finite(text: &str) -> Option<(f64, &str)> {
    ["nan", "-inf", "+inf", "inf"]
        .iter()
        .find_map(|word| text.strip_prefix(word).map(|rest| (f64::NAN, rest)))
        .filter(|(_, rest)| !rest.trim().is_empty())
}

fn leading_number(text: &str) -> Option<(f64, &str)> {
    let sign = usize::from(text.starts_with(['-', '+']));
    let end = text[sign..]
        .char_indices()
        .find(|(_, c)| !(c.is_ascii_digit() || *c == '.' || *c == ','))
        .map(|(idx, _)| idx + sign)
        .unwrap_or(text.len());
    if end == sign || !text[sign..end].bytes().any(|b| b.is_ascii_digit()) {
        return None;
    }
    let number = text[..end].replace(',', ".").parse::<f64>().ok()?;
    Some((number, &text[end..]))
}

fn parse_years(text: &str) -> Result<f64, Invalid> {
    let text = text.trim();
    let value: f64 = text.parse().map_err(|_| "not a recognised age")?;
    if !value.is_finite() {
        return Err("not a recognised age");
    }
    Ok(value)
}

fn split_band(text: &str) -> Option<(&str, &str)> {
    // A leading '-' is a negative number, not a band.
    let idx = text[1..].find(['-', '–']).map(|idx| idx + 1)?;
    let sep_len = text[idx..].chars().next()?.len_utf8();
    let (lo, hi) = (&text[..idx], &text[idx + sep_len..]);
    let looks_numeric = |s: &str| !s.trim().is_empty() && s.trim().parse::<f64>().is_ok();
    (looks_numeric(lo) && looks_numeric(hi)).then_some((lo, hi))
}

fn split_unit(text: &str) -> Option<(f64, &str)> {
    let (number, unit) = leading_number(text)?;
    let unit = unit.trim();
    (!unit.is_empty()).then_some((number, unit))
}

fn unit_per_year(unit: &str) -> Result<f64, Invalid> {
    match unit {
        "y" | "yr" | "yrs" | "year" | "years" => Ok(1.0),
        "m" | "mo" | "mos" | "month" | "months" => Ok(12.0),
        "w" | "wk" | "wks" | "week" | "weeks" => Ok(365.25 / 7.0),
        "d" | "day" | "days" => Ok(365.25),
        _ => Err("not a recognised age unit"),
    }
}

fn check_age(range: AgeRange) -> Result<AgeRange, Invalid> {
    if range.lo < 0.0 {
        Err("negative age")
    } else if range.lo > AGE_OPEN_UPPER {
        Err("age above 120 years")
    } else {
        Ok(range)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn iso() -> Vec<String> {
        vec!["%Y-%m-%d".to_string()]
    }

    #[test]
    fn dates() {
        let d = |y, m, day| Ok(NaiveDate::from_ymd_opt(y, m, day).unwrap());
        let cases: &[(&str, &[&str], Result<NaiveDate, Invalid>)] = &[
            ("2026-03-01", &["%Y-%m-%d"], d(2026, 3, 1)),
            (" 2026-03-01 ", &["%Y-%m-%d"], d(2026, 3, 1)),
            ("2026-03-01T08:30:00Z", &["%Y-%m-%d"], d(2026, 3, 1)),
            ("2026-03-01 08:30", &["%Y-%m-%d"], d(2026, 3, 1)),
            ("2026-03-01T23:59:59.5+02:00", &["%Y-%m-%d"], d(2026, 3, 1)),
            ("2026-03-01 08:30:00 UTC", &["%Y-%m-%d"], d(2026, 3, 1)),
            ("2026-03-01T08:30:00-0500", &["%Y-%m-%d"], d(2026, 3, 1)),
            ("01/03/2026", &["%Y-%m-%d", "%d/%m/%Y"], d(2026, 3, 1)),
            ("2024-02-29", &["%Y-%m-%d"], d(2024, 2, 29)),
        ];
        for (text, formats, want) in cases {
            let formats: Vec<String> = formats.iter().map(|f| f.to_string()).collect();
            assert_eq!(parse_date(text, &formats), *want, "{text}");
        }
        for bad in [
            "2026-02-30",
            "2025-02-29",
            "2026-13-01",
            "yesterday",
            "2026-03-01x",
            "20260301",
            "2020-01-01T25:00:00",
            "2020-01-01T12:61",
            "2020-01-01 noon",
            "2020-01-01T",
        ] {
            assert!(parse_date(bad, &iso()).is_err(), "{bad} should be invalid");
        }
    }

    /// The fast path must agree with chrono wherever it answers.
    #[test]
    fn quick_dates_agree_with_chrono() {
        let formats = ["%Y-%m-%d", "%d/%m/%Y", "%m/%d/%Y", "%Y%m%d", "%d.%m.%Y", "%Y-%m", "%e/%m/%Y"];
        let texts = [
            "2026-03-01",
            "2026-02-30",
            "2024-02-29",
            "2026-13-01",
            "2026-00-10",
            "0000-01-01",
            "2026-3-1",
            "2026-03-1",
            "01/03/2026",
            "1/3/2026",
            "31/04/2026",
            "20260301",
            "2026030",
            "202603011",
            "2026-03-01T08:30:00Z",
            "2026-03-01 08:30",
            "2026-03-01x",
            "2026-03-01T",
            "01.03.2026",
            "+2026-03-01",
            "2026/03/01",
            "2026-03",
            "yesterday",
            "",
            "1-1-1",
            "12/31/2026",
        ];
        for format in formats {
            for text in texts {
                let chrono_answer = NaiveDate::parse_from_str(text, format).ok().or_else(|| {
                    NaiveDate::parse_and_remainder(text, format)
                        .ok()
                        .filter(|(_, rest)| {
                            (rest.starts_with('T') || rest.starts_with(' ')) && valid_time(&rest[1..])
                        })
                        .map(|(date, _)| date)
                });
                match quick_date(text, format) {
                    Quick::Date(date) => assert_eq!(Some(date), chrono_answer, "{text} as {format}"),
                    Quick::NoMatch => assert_eq!(None, chrono_answer, "{text} as {format}"),
                    Quick::Unsure => {}
                }
            }
        }
        assert_eq!(
            quick_date("2026-03-01", "%Y-%m-%d"),
            Quick::Date(NaiveDate::from_ymd_opt(2026, 3, 1).unwrap())
        );
        assert_eq!(quick_date("01/03/2026", "%Y-%m-%d"), Quick::NoMatch);
    }

    #[test]
    fn ages() {
        let r = |lo, hi| Ok(AgeRange { lo, hi });
        let cases: &[(&str, Result<AgeRange, Invalid>)] = &[
            ("45", r(45.0, 46.0)),
            ("0", r(0.0, 1.0)),
            ("45.5", r(45.5, 45.5)),
            ("80+", r(80.0, 120.0)),
            ("90 +", r(90.0, 120.0)),
            ("30-39", r(30.0, 40.0)),
            ("30 - 39", r(30.0, 40.0)),
            ("<1", r(0.0, 1.0)),
            ("6 months", r(0.5, 0.5)),
            ("18 Months", r(1.5, 1.5)),
            ("45 years", r(45.0, 46.0)),
            ("-3", Err("negative age")),
            ("130", Err("age above 120 years")),
            ("39-30", Err("age band upper bound below lower bound")),
            ("old", Err("not a recognised age")),
            ("5 fortnights", Err("not a recognised age unit")),
        ];
        for (text, want) in cases {
            assert_eq!(parse_age(text), *want, "{text}");
        }
        let weeks = parse_age("3 weeks").unwrap();
        assert!((weeks.lo - 21.0 / 365.25).abs() < 1e-12 && weeks.lo == weeks.hi);
        let days = parse_age("10 days").unwrap();
        assert!((days.lo - 10.0 / 365.25).abs() < 1e-12);
    }

    #[test]
    fn flags() {
        for yes in ["yes", "Y", "TRUE", "1", " t "] {
            assert_eq!(parse_flag(yes), Ok(true), "{yes}");
        }
        for no in ["no", "N", "false", "0"] {
            assert_eq!(parse_flag(no), Ok(false), "{no}");
        }
        assert!(parse_flag("maybe").is_err());
    }

    #[test]
    fn lists_split_trim_lowercase_and_dedupe() {
        let cases: &[(&str, &str, &[&str])] = &[
            ("Cough; Fatigue ;cough", ";", &["cough", "fatigue"]),
            ("cough|38.1 C|headache", "|", &["cough", "fever", "headache"]),
            ("37.2 C, cough", ",", &["cough"]),
            ("fever; 39.0°C", ";", &["fever"]),
            ("none", ";", &[]),
            (" ; ;", ";", &[]),
            ("LOSS OF SMELL", ";", &["loss of smell"]),
        ];
        for (text, sep, want) in cases {
            assert_eq!(split_list(text, sep).unwrap(), *want, "{text}");
        }
        // Outside 25-45 C (77-113 F), a reading is a typing or unit error: the cell is
        // invalid, neither fever nor symptom text.
        for bad in ["cough; 380 C", "-40 F", "NaN C", "inf f", "temp 12 c", "200 f"] {
            assert!(split_list(bad, ";").is_err(), "{bad}");
        }
        assert_eq!(split_list("influenza; infection", ";").unwrap(), ["influenza", "infection"]);
    }

    #[test]
    fn temperatures() {
        // Fever at 38.0 C or more is common practice; 100.4 F is 38.0 C.
        let cases: &[(&str, Option<f64>)] = &[
            ("38.1 c", Some(38.1)),
            ("38.1°C", Some(38.1)),
            ("temp 39", Some(39.0)),
            ("temperature: 37.5 c", Some(37.5)),
            ("fever 38,5", Some(38.5)),
            ("38", Some(38.0)),
            ("cough", None),
            ("12", None),
        ];
        for (text, want) in cases {
            assert_eq!(temperature_celsius(text), *want, "{text}");
        }
        let f = temperature_celsius("100.4 F").unwrap();
        assert!((f - 38.0).abs() < 1e-9);
        assert_eq!(normalize_items(["38.0 C"]).unwrap(), vec!["fever"]);
        assert_eq!(normalize_items(["37.9 C"]).unwrap(), Vec::<String>::new());
        assert_eq!(temperature_celsius("-40 F"), Some(-40.0));
        assert!(temperature_celsius("NaN C").unwrap().is_nan());
    }
}
