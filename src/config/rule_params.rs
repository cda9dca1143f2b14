//! `[alert.rules.<rule>]` parameter overrides, validated into the typed parameters of
//! `alert::rules` (whose defaults are documented there). Each table may also say
//! `enabled = false`. Unknown rules, unknown keys and values of the wrong type are config
//! problems naming their key path.

use std::collections::{BTreeMap, BTreeSet};

use crate::config::rules::{
    CountCusumParams, CountFamily, CountParams, CusumInterval, LagParams, MissingnessParams, StalenessParams,
    VolumeParams,
};

/// The rule tables `[alert.rules.*]` accepts.
pub const RULE_TABLES: [&str; 8] = [
    "missingness_jump",
    "lag_jump",
    "held_snapshot",
    "volume_drop",
    "stale_source",
    "failing_polls",
    "count",
    "nowcast_calibration",
];

/// Typed parameters of every rule, with the set of disabled rule tables.
#[derive(Debug, Clone, Default)]
pub struct RuleParams {
    pub missingness: MissingnessParams,
    pub lag: LagParams,
    pub volume: VolumeParams,
    pub staleness: StalenessParams,
    pub count: CountParams,
    pub disabled: BTreeSet<String>,
}

impl RuleParams {
    pub fn enabled(&self, table: &str) -> bool {
        !self.disabled.contains(table)
    }
}

/// Reads one table's keys into `set`, which returns false for a key it does not know.
struct Keys<'a> {
    label: String,
    table: &'a toml::Table,
    problems: &'a mut Vec<String>,
    /// Accepted but deprecated keys.
    warnings: &'a mut Vec<String>,
}

impl Keys<'_> {
    fn float(&mut self, key: &str, slot: &mut f64) {
        match self.table.get(key) {
            None => {}
            Some(toml::Value::Float(x)) => *slot = *x,
            Some(toml::Value::Integer(n)) => *slot = *n as f64,
            Some(_) => self.problems.push(format!("{}.{key}: must be a number", self.label)),
        }
    }

    fn count(&mut self, key: &str, slot: &mut usize) {
        match self.table.get(key) {
            None => {}
            Some(toml::Value::Integer(n)) if *n >= 0 => *slot = *n as usize,
            Some(_) => self.problems.push(format!("{}.{key}: must be a whole number >= 0", self.label)),
        }
    }

    fn flag(&mut self, key: &str, slot: &mut bool) {
        match self.table.get(key) {
            None => {}
            Some(toml::Value::Boolean(b)) => *slot = *b,
            Some(_) => self.problems.push(format!("{}.{key}: must be true or false", self.label)),
        }
    }

    fn only(&mut self, known: &[&str]) {
        for key in self.table.keys() {
            if key != "enabled" && !known.contains(&key.as_str()) {
                self.problems.push(format!(
                    "{}.{key}: unknown parameter (known: {})",
                    self.label,
                    known.join(", ")
                ));
            }
        }
    }
}

/// The typed parameters of `[alert.rules.*]`; bad keys go to `problems`, deprecated ones that
/// still work to `warnings`.
pub fn build(
    tables: &BTreeMap<String, toml::Table>,
    problems: &mut Vec<String>,
    warnings: &mut Vec<String>,
) -> RuleParams {
    let mut params = RuleParams::default();
    for (name, table) in tables {
        let mut keys = Keys { label: format!("alert.rules.{name}"), table, problems, warnings };
        let mut enabled = true;
        keys.flag("enabled", &mut enabled);
        if !enabled {
            params.disabled.insert(name.clone());
        }
        match name.as_str() {
            "missingness_jump" => missingness(&mut keys, &mut params.missingness),
            "lag_jump" => lag(&mut keys, &mut params.lag),
            "volume_drop" => volume(&mut keys, &mut params.volume),
            "failing_polls" => {
                let mut n = params.staleness.max_consecutive_failures as usize;
                keys.count("max_consecutive_failures", &mut n);
                params.staleness.max_consecutive_failures = n.max(1) as u32;
                keys.only(&["max_consecutive_failures"]);
            }
            "held_snapshot" | "stale_source" | "nowcast_calibration" => keys.only(&[]),
            "count" => count(&mut keys, &mut params.count),
            other => problems
                .push(format!("alert.rules.{other}: unknown rule (known: {})", RULE_TABLES.join(", "))),
        }
    }
    params
}

fn missingness(keys: &mut Keys<'_>, p: &mut MissingnessParams) {
    keys.count("baseline_snapshots", &mut p.baseline_snapshots);
    keys.float("min_effect", &mut p.min_effect);
    let mut min_records = p.min_records as usize;
    keys.count("min_records", &mut min_records);
    p.min_records = min_records as u64;
    let mut stratum_min_records = p.stratum_min_records as usize;
    keys.count("stratum_min_records", &mut stratum_min_records);
    p.stratum_min_records = stratum_min_records as u64;
    keys.float("sigmas", &mut p.sigmas);
    keys.only(&["baseline_snapshots", "min_effect", "min_records", "sigmas", "stratum_min_records"]);
}

fn lag(keys: &mut Keys<'_>, p: &mut LagParams) {
    keys.float("lambda", &mut p.ewma.lambda);
    keys.float("width", &mut p.ewma.width);
    keys.count("baseline_days", &mut p.baseline_days);
    keys.count("recent_days", &mut p.recent_days);
    keys.count("min_baseline_days", &mut p.min_baseline_days);
    keys.count("min_records", &mut p.min_records);
    keys.float("alpha", &mut p.alpha);
    keys.float("min_effect_days", &mut p.min_effect_days);
    keys.float("min_sd_days", &mut p.min_sd_days);
    keys.only(&[
        "lambda",
        "width",
        "baseline_days",
        "recent_days",
        "min_baseline_days",
        "min_records",
        "alpha",
        "min_effect_days",
        "min_sd_days",
    ]);
}

fn volume(keys: &mut Keys<'_>, p: &mut VolumeParams) {
    keys.count("baseline_snapshots", &mut p.baseline_snapshots);
    keys.float("drop_fraction", &mut p.drop_fraction);
    keys.float("min_baseline_median", &mut p.min_baseline_median);
    keys.count("min_baseline_snapshots", &mut p.min_baseline_snapshots);
    keys.float("stratum_drop_fraction", &mut p.stratum_drop_fraction);
    keys.float("stratum_min_baseline_median", &mut p.stratum_min_baseline_median);
    keys.only(&[
        "baseline_snapshots",
        "drop_fraction",
        "min_baseline_median",
        "min_baseline_snapshots",
        "stratum_drop_fraction",
        "stratum_min_baseline_median",
    ]);
}

/// Keys of `[alert.rules.count]` renamed to describe their method, accepted for one release
/// with a deprecation warning: (old key, new key).
pub const DEPRECATED_COUNT_KEYS: [(&str, &str); 6] = [
    ("c1", "z_recent"),
    ("c2", "z_guarded"),
    ("c3", "z_guarded_3day"),
    ("c1_threshold", "z_recent_threshold"),
    ("c2_threshold", "z_guarded_threshold"),
    ("c3_threshold", "z_guarded_3day_threshold"),
];

fn count(keys: &mut Keys<'_>, p: &mut CountParams) {
    for (old, new) in DEPRECATED_COUNT_KEYS {
        if keys.table.contains_key(old) {
            if keys.table.contains_key(new) {
                keys.problems.push(format!("{}.{old}: the old name of {new}; give only {new}", keys.label));
            } else {
                keys.warnings.push(format!(
                    "{}.{old} is deprecated and will be removed in the next release: write {new}",
                    keys.label
                ));
            }
        }
    }
    let alias = |new: &str| DEPRECATED_COUNT_KEYS.iter().find(|(_, n)| *n == new).map(|(o, _)| *o);
    for (key, slot) in [
        ("z_recent", &mut p.z_recent),
        ("z_guarded", &mut p.z_guarded),
        ("z_guarded_3day", &mut p.z_guarded_3day),
    ] {
        keys.flag(alias(key).unwrap_or(key), slot);
        keys.flag(key, slot);
    }
    for (key, slot) in [
        ("z_recent_threshold", &mut p.z.recent_threshold),
        ("z_guarded_threshold", &mut p.z.guarded_threshold),
        ("z_guarded_3day_threshold", &mut p.z.guarded_3day_threshold),
    ] {
        keys.float(alias(key).unwrap_or(key), slot);
        keys.float(key, slot);
    }
    keys.float("min_sd", &mut p.z.min_sd);
    keys.float("min_expected", &mut p.min_expected);
    keys.flag("poisson_sd_floor", &mut p.z.poisson_floor);
    let mut resolve_after = p.resolve_after as usize;
    keys.count("resolve_after", &mut resolve_after);
    p.resolve_after = (resolve_after as u32).max(1);
    let mut cusum = p.cusum.is_some();
    keys.flag("cusum", &mut cusum);
    let mut c = p.cusum.unwrap_or_default();
    match keys.table.get("cusum_family").and_then(|v| v.as_str()) {
        None => {}
        Some("poisson") => c.family = CountFamily::Poisson,
        Some("negative_binomial") => c.family = CountFamily::NegativeBinomial,
        Some(other) => keys.problems.push(format!(
            "{}.cusum_family: \"{other}\" is not one of poisson, negative_binomial",
            keys.label
        )),
    }
    keys.float("cusum_shift_sds", &mut c.shift_sds);
    cusum_interval(keys, &mut c);
    keys.flag("cusum_follow_trend", &mut c.follow_trend);
    keys.count("cusum_baseline_days", &mut c.baseline_days);
    p.cusum = cusum.then_some(c);
    let mut known = vec![
        "z_recent",
        "z_guarded",
        "z_guarded_3day",
        "z_recent_threshold",
        "z_guarded_threshold",
        "z_guarded_3day_threshold",
        "min_sd",
        "min_expected",
        "poisson_sd_floor",
        "resolve_after",
        "cusum",
        "cusum_family",
        "cusum_shift_sds",
        "cusum_h_sds",
        "cusum_in_control_arl_days",
        "cusum_follow_trend",
        "cusum_baseline_days",
    ];
    known.extend(DEPRECATED_COUNT_KEYS.iter().map(|(old, _)| *old));
    keys.only(&known);
}

/// `cusum_in_control_arl_days` (calibrated interval) or `cusum_h_sds` (fixed); not both.
fn cusum_interval(keys: &mut Keys, c: &mut CountCusumParams) {
    let has = |key: &str| keys.table.contains_key(key);
    if has("cusum_h_sds") && has("cusum_in_control_arl_days") {
        keys.problems.push(format!(
            "{}: give cusum_in_control_arl_days (a calibrated interval) or cusum_h_sds (a fixed one), not both",
            keys.label
        ));
        return;
    }
    if has("cusum_h_sds") {
        let mut h_sds = 3.0;
        keys.float("cusum_h_sds", &mut h_sds);
        c.interval = CusumInterval::FixedSds(h_sds);
    } else if has("cusum_in_control_arl_days") {
        let mut days = 365.0;
        keys.float("cusum_in_control_arl_days", &mut days);
        if days < 10.0 {
            keys.problems.push(format!("{}.cusum_in_control_arl_days: must be at least 10 days", keys.label));
            return;
        }
        c.interval = CusumInterval::Calibrated { in_control_arl_days: days };
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn overrides_and_problems() {
        let text = "[missingness_jump]\nmin_effect = 0.2\n[count]\ncusum = true\ncusum_family = \"negative_binomial\"\n[lag_jump]\nenabled = false\nbogus = 1\n[nope]\n";
        let tables: BTreeMap<String, toml::Table> = toml::from_str(text).unwrap();
        let (mut problems, mut warnings) = (Vec::new(), Vec::new());
        let p = build(&tables, &mut problems, &mut warnings);
        assert!(warnings.is_empty());
        assert_eq!(p.missingness.min_effect, 0.2);
        assert_eq!(p.count.cusum.unwrap().family, CountFamily::NegativeBinomial);
        assert!(!p.enabled("lag_jump") && p.enabled("count"));
        assert_eq!(problems.len(), 2, "{problems:?}");
        assert!(problems[0].contains("alert.rules.lag_jump.bogus"));
        assert!(problems[1].contains("alert.rules.nope: unknown rule"));
    }

    /// The CUSUM's interval is calibrated (to the given run length) or fixed, not both.
    #[test]
    fn cusum_interval_is_calibrated_or_fixed() {
        let parse = |text: &str| {
            let tables: BTreeMap<String, toml::Table> = toml::from_str(text).unwrap();
            let (mut problems, mut warnings) = (Vec::new(), Vec::new());
            let p = build(&tables, &mut problems, &mut warnings);
            (p.count.cusum, problems)
        };
        let (cusum, problems) =
            parse("[count]\ncusum_in_control_arl_days = 180\ncusum_follow_trend = false\n");
        let cusum = cusum.unwrap();
        assert!(problems.is_empty());
        assert_eq!(cusum.interval, CusumInterval::Calibrated { in_control_arl_days: 180.0 });
        assert!(!cusum.follow_trend);
        let (cusum, _) = parse("[count]\ncusum_h_sds = 4\n");
        assert_eq!(cusum.unwrap().interval, CusumInterval::FixedSds(4.0));
        let (_, problems) = parse("[count]\ncusum_h_sds = 4\ncusum_in_control_arl_days = 180\n");
        assert!(problems[0].contains("not both"), "{problems:?}");
        let (cusum, problems) = parse("[count]\ncusum = false\n");
        assert!(cusum.is_none() && problems.is_empty());
    }

    /// The count rules' old key names still work for one release, each with a warning that
    /// names the new key; giving both names is a problem.
    #[test]
    fn old_count_keys_work_with_a_deprecation_warning() {
        let text =
            "[count]\nc1 = false\nc2 = true\nc3 = true\nc3_threshold = 2.5\nz_guarded_threshold = 4.0\n";
        let tables: BTreeMap<String, toml::Table> = toml::from_str(text).unwrap();
        let (mut problems, mut warnings) = (Vec::new(), Vec::new());
        let p = build(&tables, &mut problems, &mut warnings);
        assert!(problems.is_empty(), "{problems:?}");
        assert!(!p.count.z_recent && p.count.z_guarded && p.count.z_guarded_3day);
        assert_eq!((p.count.z.guarded_3day_threshold, p.count.z.guarded_threshold), (2.5, 4.0));
        assert_eq!(warnings.len(), 4, "{warnings:?}");
        assert!(
            warnings[0].contains("alert.rules.count.c1 is deprecated") && warnings[0].contains("z_recent")
        );
        assert!(
            warnings.iter().any(|w| w.contains("c3_threshold") && w.contains("z_guarded_3day_threshold"))
        );

        let both: BTreeMap<String, toml::Table> =
            toml::from_str("[count]\nc2 = true\nz_guarded = true\n").unwrap();
        let (mut problems, mut warnings) = (Vec::new(), Vec::new());
        build(&both, &mut problems, &mut warnings);
        assert!(problems.len() == 1 && problems[0].contains("give only z_guarded"), "{problems:?}");
    }
}
