//! The reporting triangle: for each reference date t (onset, specimen, report or death) and
//! each delay d in days, the count of cases with reference date t as known on snapshot day
//! t + d. Only cells with t + d <= T (the last snapshot day) are observed. Counts are kept
//! cumulative, as known, because a count can go down (a record removed, a date corrected);
//! `increments` applies the documented rule for downward revisions.

use chrono::{Days, NaiveDate};

/// A reporting triangle with maximum delay `max_delay` (column D holds the count known at
/// delay D, treated as final).
#[derive(Debug, Clone, PartialEq)]
pub struct Triangle {
    /// Reference date of row 0.
    pub first_date: NaiveDate,
    /// The last snapshot day T; row t is observed up to delay `min(T - t, D)`.
    pub last_day: NaiveDate,
    pub max_delay: usize,
    /// `cumulative[t][d]`, `d = 0..=min(T - t, D)`: rows get shorter towards T.
    pub cumulative: Vec<Vec<f64>>,
}

/// Increments of one triangle and how many downward revisions were clipped.
#[derive(Debug, Clone, PartialEq)]
pub struct Increments {
    /// `n[t][d] = max(0, C[t][d] - C[t][d-1])`, `n[t][0] = C[t][0]`.
    pub n: Vec<Vec<f64>>,
    /// Cells whose count went down from the day before (set to zero in `n`).
    pub downward_cells: usize,
    /// Sum of the decreases that were clipped.
    pub downward_total: f64,
}

impl Triangle {
    /// Builds a triangle from `known(t, d)`: the count of reference day t as known on day t+d.
    pub fn from_fn(
        first_date: NaiveDate,
        last_day: NaiveDate,
        max_delay: usize,
        known: impl Fn(usize, usize) -> f64,
    ) -> Triangle {
        let days = (last_day - first_date).num_days().max(-1) + 1;
        let cumulative = (0..days as usize)
            .map(|t| {
                let observed = (days as usize - 1 - t).min(max_delay);
                (0..=observed).map(|d| known(t, d)).collect()
            })
            .collect();
        Triangle { first_date, last_day, max_delay, cumulative }
    }

    pub fn rows(&self) -> usize {
        self.cumulative.len()
    }

    pub fn date(&self, t: usize) -> NaiveDate {
        self.first_date + Days::new(t as u64)
    }

    /// The latest count of row t (at the largest observed delay).
    pub fn latest(&self, t: usize) -> f64 {
        self.cumulative[t].last().copied().unwrap_or(0.0)
    }

    /// The largest observed delay of row t.
    pub fn observed_delay(&self, t: usize) -> usize {
        self.cumulative[t].len().saturating_sub(1)
    }

    /// Daily increments. Rule for downward revisions (a record removed or its date moved
    /// away): the increment is clipped at zero and the decrease is counted, so the estimate
    /// of reporting hazards never sees negative reports; the cumulative counts, and so the
    /// observed totals, keep the decrease.
    pub fn increments(&self) -> Increments {
        let mut downward_cells = 0;
        let mut downward_total = 0.0;
        let n = self
            .cumulative
            .iter()
            .map(|row| {
                let mut previous = 0.0;
                row.iter()
                    .map(|&c| {
                        let step = c - previous;
                        previous = c;
                        if step < 0.0 {
                            downward_cells += 1;
                            downward_total -= step;
                            0.0
                        } else {
                            step
                        }
                    })
                    .collect()
            })
            .collect();
        Increments { n, downward_cells, downward_total }
    }

    /// The triangle without its first `start` rows (all of them when `start` is past the end).
    pub fn without_first_rows(&self, start: usize) -> Triangle {
        let start = start.min(self.rows());
        Triangle {
            first_date: self.date(start),
            last_day: self.last_day,
            max_delay: self.max_delay,
            cumulative: self.cumulative[start..].to_vec(),
        }
    }

    /// The same triangle as known on an earlier day `as_of` (rows after it dropped, cells
    /// beyond it removed): what a nowcast made on that day could see.
    pub fn as_of(&self, as_of: NaiveDate) -> Triangle {
        let keep_rows = ((as_of - self.first_date).num_days() + 1).clamp(0, self.rows() as i64) as usize;
        let cumulative = (0..keep_rows)
            .map(|t| {
                let observed = (keep_rows - 1 - t).min(self.max_delay);
                self.cumulative[t].iter().take(observed + 1).copied().collect()
            })
            .collect();
        Triangle { first_date: self.first_date, last_day: as_of, max_delay: self.max_delay, cumulative }
    }
}

/// Builds the triangle of reference dates `first_date..=last_day` from the store's deltas:
/// `(reference date, snapshot day, net change)`. A change dated before its reference date
/// counts at delay 0; changes after `last_day`, or at a delay beyond `max_delay` (column D is
/// the count known at delay D), are left out.
pub fn from_deltas(
    deltas: &[(NaiveDate, NaiveDate, f64)],
    first_date: NaiveDate,
    last_day: NaiveDate,
    max_delay: usize,
) -> Triangle {
    let days = ((last_day - first_date).num_days() + 1).max(0) as usize;
    let mut steps = vec![vec![0.0; max_delay + 1]; days];
    for &(reference, day, delta) in deltas {
        let t = (reference - first_date).num_days();
        if t < 0 || t as usize >= days || day > last_day {
            continue;
        }
        let d = (day - reference).num_days().max(0) as usize;
        if d <= max_delay {
            steps[t as usize][d] += delta;
        }
    }
    Triangle::from_fn(first_date, last_day, max_delay, |t, d| steps[t][..=d].iter().sum())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn toy() -> Triangle {
        // The toy triangle of docs/validation.md (T = 4, D = 2), as cumulative counts.
        let n = [[10.0, 6.0, 4.0], [12.0, 7.0, 5.0], [15.0, 9.0, 6.0], [20.0, 12.0, 0.0], [25.0, 0.0, 0.0]];
        let start = NaiveDate::from_ymd_opt(2026, 3, 1).unwrap();
        Triangle::from_fn(start, start + Days::new(4), 2, |t, d| n[t][..=d].iter().sum())
    }

    #[test]
    fn shape_and_as_of() {
        let tri = toy();
        assert_eq!(tri.cumulative[0], [10.0, 16.0, 20.0]);
        assert_eq!(tri.cumulative[3], [20.0, 32.0]);
        assert_eq!(tri.cumulative[4], [25.0]);
        let earlier = tri.as_of(tri.date(2));
        assert_eq!(earlier.rows(), 3);
        assert_eq!(earlier.cumulative[0], [10.0, 16.0, 20.0]);
        assert_eq!(earlier.cumulative[1], [12.0, 19.0]);
        assert_eq!(earlier.cumulative[2], [15.0]);
    }

    #[test]
    fn built_from_store_deltas() {
        let d = |day: u32| NaiveDate::from_ymd_opt(2026, 3, day).unwrap();
        // Onset 3/1: 2 known on 3/1, +1 on 3/2, -1 (a removal) on 3/4; onset 3/2: 1 on 3/3.
        let deltas =
            [(d(1), d(1), 2.0), (d(1), d(2), 1.0), (d(1), d(4), -1.0), (d(2), d(3), 1.0), (d(2), d(9), 5.0)];
        let tri = from_deltas(&deltas, d(1), d(4), 2);
        assert_eq!(tri.cumulative[0], [2.0, 3.0, 3.0], "delay 3 is beyond max_delay 2");
        assert_eq!(tri.cumulative[1], [0.0, 1.0, 1.0]);
        assert_eq!(tri.cumulative[3], [0.0]);
    }

    #[test]
    fn downward_revisions_are_clipped_and_counted() {
        let start = NaiveDate::from_ymd_opt(2026, 3, 1).unwrap();
        let tri = Triangle {
            first_date: start,
            last_day: start,
            max_delay: 3,
            cumulative: vec![vec![5.0, 8.0, 7.0, 9.0]],
        };
        let inc = tri.increments();
        assert_eq!(inc.n[0], [5.0, 3.0, 0.0, 2.0]);
        assert_eq!((inc.downward_cells, inc.downward_total), (1, 1.0));
    }
}
