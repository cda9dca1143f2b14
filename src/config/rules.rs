//! The alert rules' typed parameters, each default with its reason. The rules themselves live
//! in `alert::rules`; `[alert.rules.<rule>]` overrides these defaults (see `rule_params`).

use crate::analysis::aberration::ShortBaselineParams;
use crate::analysis::change::EwmaParams;

/// Parameters of the missingness-jump rule.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MissingnessParams {
    /// Number of previous snapshots pooled into the baseline share. Default 7: about a week of
    /// daily extracts, long enough to steady the share, short enough to follow a slow drift.
    pub baseline_snapshots: usize,
    /// Smallest absolute rise of the missing share that can alarm. Default 0.10 (10 percentage
    /// points, the smallest rise an epidemiologist acts on): a huge extract makes a rise of 0.5 points "significant" on
    /// the p-chart but nobody should be woken for it.
    pub min_effect: f64,
    /// Smallest number of new or changed records in the latest snapshot, and of records in the
    /// pooled baseline, for the rule to be evaluated. Default 30: below it the p-chart's normal
    /// approximation is poor and one record moves the share by more than 3 points.
    pub min_records: u64,
    /// Width of the p-chart's upper limit in standard errors. Default 3 (Shewhart).
    pub sigmas: f64,
    /// `min_records` for one jurisdiction's share. Default 100: a source of ten fields and
    /// five jurisdictions runs fifty charts a snapshot, so small units at 30 records paged on
    /// noise (about four false alerts per 100 days in the demo); at 100 records one record
    /// moves the share by one point and a 10-point rise is well outside noise.
    pub stratum_min_records: u64,
}

impl Default for MissingnessParams {
    fn default() -> MissingnessParams {
        MissingnessParams {
            baseline_snapshots: 7,
            min_effect: 0.10,
            min_records: 30,
            sigmas: 3.0,
            stratum_min_records: 100,
        }
    }
}

/// Parameters of the lag-jump rule.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LagParams {
    /// EWMA on the daily median lag. Default lambda 0.2, L 3, exact limits: sensitive to a
    /// lasting shift of about one day-to-day sd within a week, in-control ARL near 500 days.
    pub ewma: EwmaParams,
    /// Days of the baseline window before the recent window. Default 28: four weeks, so
    /// weekday effects average out.
    pub baseline_days: usize,
    /// Days of the recent window (ending on the latest day). Default 7.
    pub recent_days: usize,
    /// Baseline days with at least one record needed to estimate the in-control mean and sd.
    /// Default 14.
    pub min_baseline_days: usize,
    /// Records needed in each window for the Mann-Whitney confirmation. Default 20.
    pub min_records: usize,
    /// Mann-Whitney two-sided p-value below which the rise is confirmed. Default 0.01: the
    /// EWMA already selected the window, so the confirmation is kept strict.
    pub alpha: f64,
    /// Smallest rise (days) of the recent pooled median lag over the baseline's that can alarm.
    /// Default 2 days: lags are counted in whole days, and a one-day rise of the median of
    /// the reports received happens without any change in the reporting process whenever
    /// incidence falls (the reports arriving then come from older onsets), so it is noise
    /// for paging; a backlog or a broken feed moves the median by more.
    pub min_effect_days: f64,
    /// Floor of the sd of the daily medians (days). Default 0.5: daily medians of whole days
    /// can be constant for weeks; half a day is the finest step they resolve.
    pub min_sd_days: f64,
}

impl Default for LagParams {
    fn default() -> LagParams {
        LagParams {
            ewma: EwmaParams::default(),
            baseline_days: 28,
            recent_days: 7,
            min_baseline_days: 14,
            min_records: 20,
            alpha: 0.01,
            min_effect_days: 2.0,
            min_sd_days: 0.5,
        }
    }
}

/// Parameters of the volume-drop rule.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct VolumeParams {
    /// Previous snapshots whose new-record counts form the baseline. Default 7 (a week).
    pub baseline_snapshots: usize,
    /// Alarm when new records fall below this fraction of the baseline median. Default 0.5:
    /// Poisson noise alone almost never halves a count of 20 or more (P < 0.01 at 20).
    pub drop_fraction: f64,
    /// Smallest baseline median for the rule to be evaluated. Default 20: below it a halving
    /// is ordinary noise.
    pub min_baseline_median: f64,
    /// Smallest number of baseline snapshots. Default 3.
    pub min_baseline_snapshots: usize,
    /// Per jurisdiction: alarm when its new records fall below this fraction of its baseline
    /// median. Default 0.1: a jurisdiction whose feed broke goes (nearly) silent, while a
    /// falling epidemic or noise does not lose 90% of a jurisdiction's reports in one snapshot
    /// (Poisson: P(X <= 1) is 0.0005 at a mean of 10). A halving in one jurisdiction is
    /// ordinary, so the whole-source fraction would page on noise.
    pub stratum_drop_fraction: f64,
    /// Per jurisdiction: smallest baseline median of new records for the rule to decide.
    /// Default 10.
    pub stratum_min_baseline_median: f64,
}

impl VolumeParams {
    /// The parameters of the per-jurisdiction check.
    pub fn for_stratum(&self) -> VolumeParams {
        VolumeParams {
            drop_fraction: self.stratum_drop_fraction,
            min_baseline_median: self.stratum_min_baseline_median,
            ..*self
        }
    }
}

impl Default for VolumeParams {
    fn default() -> VolumeParams {
        VolumeParams {
            baseline_snapshots: 7,
            drop_fraction: 0.5,
            min_baseline_median: 20.0,
            min_baseline_snapshots: 3,
            stratum_drop_fraction: 0.1,
            stratum_min_baseline_median: 10.0,
        }
    }
}

/// Parameters of the failing-polls rule.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct StalenessParams {
    /// Consecutive failed polls that raise a signal. Default 3: one or two failures are often a
    /// passing network fault or a file still being written.
    pub max_consecutive_failures: u32,
}

impl Default for StalenessParams {
    fn default() -> StalenessParams {
        StalenessParams { max_consecutive_failures: 3 }
    }
}

/// The count distribution assumed by the count CUSUM.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum CountFamily {
    /// Variance equal to the mean; reference value of Lucas (1985).
    Poisson,
    /// Variance above the mean, size estimated from the baseline by moments; falls back to
    /// Poisson when the baseline is not over-dispersed.
    NegativeBinomial,
}

/// The decision interval of the count CUSUM.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum CusumInterval {
    /// Chosen for each day's baseline so that the chart, run on counts distributed as the
    /// baseline says (Poisson, or negative binomial for `NegativeBinomial`), raises a false
    /// alarm once in this many days on average (exact Markov chain on a lattice; see
    /// `analysis::arl`). 365: one false alarm a year per series when nothing changes.
    Calibrated { in_control_arl_days: f64 },
    /// A fixed number of baseline sds (`h = h_sds * sd0` cases), as in earlier releases.
    FixedSds(f64),
}

/// Parameters of the count CUSUM (an option beside the short-baseline z-score rules).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CountCusumParams {
    pub family: CountFamily,
    /// Days of each day's moving baseline. Default 28: four weeks, weekday effects average out.
    pub baseline_days: usize,
    /// Days between a day and the end of its baseline. Default 2, as `count_z_guarded` (C2), so an
    /// outbreak's first days do not raise their own baseline.
    pub guard_days: usize,
    /// The rise to detect, in baseline sds: `mu1 = mu0 + shift_sds * sd0`. Default 2.
    pub shift_sds: f64,
    /// How the decision interval `h` is set. Default: calibrated to an in-control average run
    /// length of 365 days.
    pub interval: CusumInterval,
    /// Floor of the baseline mean (cases per day). Default 0.5, so a run of zeros still gives
    /// a finite reference value.
    pub min_mean: f64,
    /// Project the baseline mean to the day tested along the baseline's own log-linear growth
    /// (see `aberration::fit_trend`), so a steadily growing or falling series is compared with
    /// where its trend has taken it rather than with its level two weeks earlier; the
    /// projection's sampling variance is added to the count variance the chart is designed
    /// for. Default true (with the `NegativeBinomial` family).
    pub follow_trend: bool,
}

impl Default for CountCusumParams {
    fn default() -> CountCusumParams {
        CountCusumParams {
            family: CountFamily::NegativeBinomial,
            baseline_days: 28,
            guard_days: 2,
            shift_sds: 2.0,
            interval: CusumInterval::Calibrated { in_control_arl_days: 365.0 },
            min_mean: 0.5,
            follow_trend: true,
        }
    }
}

/// Which count statistics to evaluate, and their parameters.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CountParams {
    /// Thresholds and sd floor of the three short-baseline z-score rules.
    pub z: ShortBaselineParams,
    /// Evaluate `count_z_recent` (C1: baseline the 7 days just before).
    pub z_recent: bool,
    /// Evaluate `count_z_guarded` (C2: baseline 7 days ending 3 days before).
    pub z_guarded: bool,
    /// Evaluate `count_z_guarded_3day` (C3: three days of guarded excesses).
    pub z_guarded_3day: bool,
    /// Smallest baseline mean (cases a day) on which the count rules decide; under it they
    /// neither raise nor clear ("not enough data"). Default 1: with fewer than one case a day
    /// a z-score is driven by the sd floor, so two cases after a quiet week would page.
    pub min_expected: f64,
    /// Clear evaluations in a row (one a snapshot) before a count episode resolves. Default
    /// 14: two weeks without any count rule tripping, so a sustained rise (an epidemic wave)
    /// whose daily statistic dips under its threshold for a week or more now and then stays
    /// one episode rather than opening again and again.
    pub resolve_after: u32,
    /// Case counts from 1 to this are written as a range in summaries (set from `[alert]
    /// small_cell_max`, default 4).
    pub small_cell_max: u32,
    /// The count CUSUM, off by default (`None`): the z-score rules need only a week or two of
    /// history.
    pub cusum: Option<CountCusumParams>,
}

impl CountParams {
    /// The three short-baseline z-score rules (C1, C2, C3) alone, without the CUSUM; the
    /// other settings as by default.
    pub fn z_scores_only() -> CountParams {
        CountParams {
            z_recent: true,
            z_guarded: true,
            z_guarded_3day: true,
            cusum: None,
            ..CountParams::default()
        }
    }
}

impl Default for CountParams {
    fn default() -> CountParams {
        CountParams {
            z: ShortBaselineParams::default(),
            z_recent: false,
            z_guarded: false,
            z_guarded_3day: false,
            min_expected: 1.0,
            resolve_after: 14,
            small_cell_max: 4,
            cusum: Some(CountCusumParams::default()),
        }
    }
}
