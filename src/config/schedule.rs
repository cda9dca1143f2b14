//! Digest schedules: when a channel with `digest = "..."` receives its digest of the alerts
//! below critical. A schedule is a cron-style expression in UTC with six fields (second,
//! minute, hour, day of month, month, day of week; `"0 0 7 * * *"` is 07:00 every day) or five
//! (without the second). A field is `*`, a number, a range `a-b`, a list `a,b,c`, or a step
//! `*/n` or `a-b/n`; day of week runs 0-6 from Sunday (7 is Sunday too). When both the day of
//! month and the day of week are restricted, a day matching either fires (the usual cron
//! rule). Pure: an expression in, fire times out.

use chrono::{DateTime, Datelike, Duration, DurationRound, Timelike, Utc};

/// A parsed digest schedule.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Schedule {
    second: u32,
    minutes: Vec<bool>,
    hours: Vec<bool>,
    days: Vec<bool>,
    months: Vec<bool>,
    weekdays: Vec<bool>,
    days_restricted: bool,
    weekdays_restricted: bool,
    text: String,
}

/// How far back [`Schedule::latest_at_or_before`] looks: a schedule that fires less than once
/// a year (`0 0 7 29 2 *` outside leap years) has no recent fire time.
const LOOK_BACK_DAYS: i64 = 400;

impl Schedule {
    /// Parses an expression; the error names the field that is wrong.
    pub fn parse(text: &str) -> Result<Schedule, String> {
        let fields: Vec<&str> = text.split_whitespace().collect();
        let (second, rest) = match fields.len() {
            6 => (single_second(fields[0])?, &fields[1..]),
            5 => (0, &fields[..]),
            n => {
                return Err(format!(
                    "has {n} fields; expected 6 (second minute hour day month weekday) or 5"
                ));
            }
        };
        let weekdays = field(rest[4], "day of week", 0, 7)?;
        let mut weekday_set = weekdays.clone();
        if weekday_set[7] {
            weekday_set[0] = true;
        }
        weekday_set.truncate(7);
        Ok(Schedule {
            second,
            minutes: field(rest[0], "minute", 0, 59)?,
            hours: field(rest[1], "hour", 0, 23)?,
            days: field(rest[2], "day of month", 1, 31)?,
            months: field(rest[3], "month", 1, 12)?,
            weekdays: weekday_set,
            days_restricted: rest[2] != "*",
            weekdays_restricted: rest[4] != "*",
            text: text.to_string(),
        })
    }

    /// The expression as written.
    pub fn text(&self) -> &str {
        &self.text
    }

    /// The latest fire time at or before `now`, if any within the last 400 days.
    pub fn latest_at_or_before(&self, now: DateTime<Utc>) -> Option<DateTime<Utc>> {
        let mut minute = now.duration_trunc(Duration::minutes(1)).ok()?;
        if now < minute + Duration::seconds(i64::from(self.second)) {
            minute -= Duration::minutes(1);
        }
        let oldest = minute - Duration::days(LOOK_BACK_DAYS);
        while minute > oldest {
            if !self.day_matches(minute) {
                // Jump to the last minute of the previous day.
                minute = minute.duration_trunc(Duration::days(1)).ok()? - Duration::minutes(1);
                continue;
            }
            if self.hours[minute.hour() as usize] && self.minutes[minute.minute() as usize] {
                return Some(minute + Duration::seconds(i64::from(self.second)));
            }
            minute -= Duration::minutes(1);
        }
        None
    }

    fn day_matches(&self, at: DateTime<Utc>) -> bool {
        if !self.months[at.month() as usize] {
            return false;
        }
        let day = self.days[at.day() as usize];
        let weekday = self.weekdays[at.weekday().num_days_from_sunday() as usize];
        match (self.days_restricted, self.weekdays_restricted) {
            (true, true) => day || weekday,
            (true, false) => day,
            (false, true) => weekday,
            (false, false) => true,
        }
    }
}

/// The second field: one number (a digest more often than once a minute is not a digest).
fn single_second(text: &str) -> Result<u32, String> {
    match text {
        "*" => Ok(0),
        _ => text
            .parse::<u32>()
            .ok()
            .filter(|s| *s < 60)
            .ok_or_else(|| "second: must be one number from 0 to 59 (or *)".to_string()),
    }
}

/// One field as a table indexed by value (`lo..=hi`, entries below `lo` unused).
fn field(text: &str, name: &str, lo: u32, hi: u32) -> Result<Vec<bool>, String> {
    let mut set = vec![false; hi as usize + 1];
    for part in text.split(',') {
        let (range, step) = match part.split_once('/') {
            Some((range, step)) => {
                let step: u32 =
                    step.parse().ok().filter(|s| *s > 0).ok_or(format!("{name}: bad step in {part:?}"))?;
                (range, step)
            }
            None => (part, 1),
        };
        let (from, to) = match range {
            "*" => (lo, hi),
            _ => match range.split_once('-') {
                Some((a, b)) => (number(a, name, lo, hi)?, number(b, name, lo, hi)?),
                None => {
                    let n = number(range, name, lo, hi)?;
                    (n, if step > 1 { hi } else { n })
                }
            },
        };
        if from > to {
            return Err(format!("{name}: range {part:?} runs backwards"));
        }
        for value in (from..=to).step_by(step as usize) {
            set[value as usize] = true;
        }
    }
    Ok(set)
}

fn number(text: &str, name: &str, lo: u32, hi: u32) -> Result<u32, String> {
    text.parse::<u32>()
        .ok()
        .filter(|n| (lo..=hi).contains(n))
        .ok_or_else(|| format!("{name}: {text:?} is not a number from {lo} to {hi}"))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn at(text: &str) -> DateTime<Utc> {
        text.parse().unwrap()
    }

    #[test]
    fn daily_at_seven() {
        let s = Schedule::parse("0 0 7 * * *").unwrap();
        assert_eq!(s.latest_at_or_before(at("2026-03-10T08:15:00Z")), Some(at("2026-03-10T07:00:00Z")));
        assert_eq!(s.latest_at_or_before(at("2026-03-10T06:59:59Z")), Some(at("2026-03-09T07:00:00Z")));
        assert_eq!(s.latest_at_or_before(at("2026-03-10T07:00:00Z")), Some(at("2026-03-10T07:00:00Z")));
    }

    #[test]
    fn weekdays_lists_steps_and_five_fields() {
        // 2026-03-14 is a Saturday; weekdays 1-5 fire Monday to Friday.
        let s = Schedule::parse("30 7,16 * * 1-5").unwrap();
        assert_eq!(s.latest_at_or_before(at("2026-03-14T12:00:00Z")), Some(at("2026-03-13T16:30:00Z")));
        let every_six_hours = Schedule::parse("0 0 */6 * * *").unwrap();
        assert_eq!(
            every_six_hours.latest_at_or_before(at("2026-03-14T17:59:00Z")),
            Some(at("2026-03-14T12:00:00Z"))
        );
        let sunday = Schedule::parse("0 0 9 * * 7").unwrap();
        assert_eq!(sunday.latest_at_or_before(at("2026-03-14T12:00:00Z")), Some(at("2026-03-08T09:00:00Z")));
    }

    #[test]
    fn bad_expressions_name_the_field() {
        assert!(Schedule::parse("0 0 25 * * *").unwrap_err().starts_with("hour"));
        assert!(Schedule::parse("0 7 * *").unwrap_err().contains("4 fields"));
        assert!(Schedule::parse("*/5 0 7 * * *").unwrap_err().starts_with("second"));
        assert!(Schedule::parse("0 0 7 * * 9-2").unwrap_err().starts_with("day of week"));
    }
}
