//! The `ensemble` nowcast: the quantile average of other methods' nowcasts (each quantile of
//! the eventual count is the mean of the members' quantiles; Vincentization). Published
//! forecast-evaluation work finds such an average at least as good as its best member on
//! average (Bracher et al. 2021 on interval scores; common practice in forecast hubs); the
//! calibration suite measures it here. Pure: nowcasts in, a nowcast out.

use super::{Nowcast, NowcastRow};
use crate::model::NowcastMethod;

/// The members of the ensemble.
pub const MEMBERS: [NowcastMethod; 2] = [NowcastMethod::Hazard, NowcastMethod::Smooth];

/// Nowcasts with each of `methods`, in that order, `run` computing a member method; the
/// ensemble is combined from its members' nowcasts, each computed once (even when it is not
/// asked for itself). The pipeline and the calibration suite both nowcast this way.
pub fn with_members(methods: &[NowcastMethod], run: impl Fn(NowcastMethod) -> Nowcast) -> Vec<Nowcast> {
    let wants_ensemble = methods.contains(&NowcastMethod::Ensemble);
    let computed: Vec<Nowcast> =
        MEMBERS.iter().filter(|m| methods.contains(m) || wants_ensemble).map(|&m| run(m)).collect();
    methods
        .iter()
        .filter_map(|&method| match method {
            NowcastMethod::Ensemble => Some(combine(&computed)),
            _ => computed.iter().find(|n| n.method == method).cloned(),
        })
        .collect()
}

/// The quantile average of `members`, over the reference dates that every member has. Rows
/// whose members all call them complete stay complete (median = observed, no width).
pub fn combine(members: &[Nowcast]) -> Nowcast {
    let mut problems: Vec<String> =
        members.iter().flat_map(|m| m.problems.iter().map(move |p| format!("{}: {p}", m.method))).collect();
    let Some(first) = members.first() else {
        problems.push("the ensemble has no members".to_string());
        return Nowcast { method: NowcastMethod::Ensemble, rows: Vec::new(), problems };
    };
    let rows = first
        .rows
        .iter()
        .filter_map(|row| {
            let same: Vec<&NowcastRow> =
                members.iter().filter_map(|m| m.rows.iter().find(|r| r.date == row.date)).collect();
            (same.len() == members.len()).then(|| average(&same))
        })
        .collect();
    Nowcast { method: NowcastMethod::Ensemble, rows, problems }
}

/// The row whose every quantile (and mean and completeness) is the members' mean.
fn average(rows: &[&NowcastRow]) -> NowcastRow {
    let mean = |f: fn(&NowcastRow) -> f64| rows.iter().map(|r| f(r)).sum::<f64>() / rows.len() as f64;
    NowcastRow {
        median: mean(|r| r.median),
        mean: mean(|r| r.mean),
        lower50: mean(|r| r.lower50),
        upper50: mean(|r| r.upper50),
        lower90: mean(|r| r.lower90),
        upper90: mean(|r| r.upper90),
        lower95: mean(|r| r.lower95),
        upper95: mean(|r| r.upper95),
        completeness: mean(|r| r.completeness),
        ..rows[0].clone()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono::NaiveDate;

    fn row(median: f64, lower90: f64, upper90: f64) -> NowcastRow {
        NowcastRow {
            date: NaiveDate::from_ymd_opt(2026, 3, 1).unwrap(),
            horizon: 0,
            observed: 4.0,
            median,
            mean: median,
            lower50: median - 1.0,
            upper50: median + 1.0,
            lower90,
            upper90,
            lower95: lower90 - 1.0,
            upper95: upper90 + 1.0,
            completeness: 0.5,
        }
    }

    #[test]
    fn each_quantile_is_the_members_mean() {
        // Check (by hand): the averages of 10 and 20, of 6 and 8, of 30 and 50.
        let a = Nowcast { method: NowcastMethod::Hazard, rows: vec![row(10.0, 6.0, 30.0)], problems: vec![] };
        let b = Nowcast { method: NowcastMethod::Smooth, rows: vec![row(20.0, 8.0, 50.0)], problems: vec![] };
        let combined = combine(&[a, b]);
        let r = &combined.rows[0];
        assert_eq!((r.median, r.lower90, r.upper90, r.observed), (15.0, 7.0, 40.0, 4.0));
        assert_eq!(combined.method, NowcastMethod::Ensemble);
    }
}
