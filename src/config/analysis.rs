//! The `[analysis]` table: which reporting triangles to maintain (reference fields and
//! strata), the nowcast settings, and which delay distributions to fit after every applied
//! snapshot. Every key has a documented default, so the table may be left out.

use crate::model::{Field, NowcastMethod};

/// The end of a delay: another date field, or the day a record first appeared in the store
/// (the true reporting delay, from version history).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DelayEnd {
    Field(Field),
    FirstSeen,
}

impl DelayEnd {
    pub fn name(self) -> &'static str {
        match self {
            DelayEnd::Field(field) => field.name(),
            DelayEnd::FirstSeen => "first_seen",
        }
    }

    /// The end's date field; `None` for the day the record first appeared.
    pub fn field(self) -> Option<Field> {
        match self {
            DelayEnd::Field(field) => Some(field),
            DelayEnd::FirstSeen => None,
        }
    }

    pub fn parse(text: &str) -> Option<DelayEnd> {
        match text.trim() {
            "first_seen" | "first-seen" => Some(DelayEnd::FirstSeen),
            other => Field::parse(other).filter(|f| f.is_date()).map(DelayEnd::Field),
        }
    }
}

/// Nowcast methods that can be configured.
pub const NOWCAST_METHODS: [NowcastMethod; 3] = NowcastMethod::ALL;

#[derive(Debug, Clone, PartialEq)]
pub struct AnalysisConfig {
    /// Reference date fields with a maintained triangle and nowcasts.
    pub reference_fields: Vec<Field>,
    /// Strata besides the whole source: jurisdiction, age (bands) and/or sex.
    pub strata: Vec<Field>,
    /// Lower edges of the age bands, in years; the last band is open.
    pub age_bands: Vec<u32>,
    /// Longest reporting delay modelled, in days; counts known at this delay are final.
    pub max_delay: usize,
    pub nowcast_methods: Vec<NowcastMethod>,
    /// Reference dates used to estimate the delay distribution.
    pub window: usize,
    /// Predictive draws per nowcast.
    pub draws: usize,
    /// Days after which a count is taken as the truth: a stored nowcast is scored that many
    /// days after it was made, and ad hoc backtests use it unless told otherwise.
    pub backtest_lag: usize,
    /// Forecast days of matured scores that `auto` compares methods over.
    pub score_window: usize,
    /// Delay distributions fitted after each applied snapshot.
    pub delays: Vec<(Field, DelayEnd)>,
    /// Bootstrap resamples behind the delay fits' intervals.
    pub bootstrap: usize,
}

impl Default for AnalysisConfig {
    fn default() -> AnalysisConfig {
        AnalysisConfig {
            reference_fields: vec![Field::OnsetDate, Field::ReportDate],
            strata: vec![Field::Jurisdiction, Field::Age, Field::Sex],
            age_bands: AGE_BAND_EDGES.to_vec(),
            max_delay: 28,
            nowcast_methods: NOWCAST_METHODS.to_vec(),
            window: 42,
            draws: 1000,
            backtest_lag: 28,
            score_window: 28,
            delays: vec![
                (Field::OnsetDate, DelayEnd::Field(Field::ReportDate)),
                (Field::OnsetDate, DelayEnd::FirstSeen),
                (Field::SpecimenDate, DelayEnd::Field(Field::ResultDate)),
                (Field::OnsetDate, DelayEnd::Field(Field::DeathDate)),
            ],
            bootstrap: 100,
        }
    }
}

/// The raw `[analysis]` table.
#[derive(Debug, serde::Deserialize, Default)]
#[serde(deny_unknown_fields)]
pub struct RawAnalysis {
    pub reference_fields: Option<Vec<String>>,
    pub strata: Option<Vec<String>>,
    pub age_bands: Option<Vec<u32>>,
    pub max_delay: Option<usize>,
    pub nowcast_methods: Option<Vec<String>>,
    pub window: Option<usize>,
    pub draws: Option<usize>,
    pub backtest_lag: Option<usize>,
    pub score_window: Option<usize>,
    pub delays: Option<Vec<String>>,
    pub bootstrap: Option<usize>,
}

pub fn build(raw: RawAnalysis, problems: &mut Vec<String>) -> AnalysisConfig {
    let mut config = AnalysisConfig::default();
    let mut push = |key: &str, message: String| problems.push(format!("analysis.{key}: {message}"));
    if let Some(names) = raw.reference_fields {
        config.reference_fields = fields(&names, "reference_fields", |f| f.is_date(), &mut push);
    }
    if let Some(names) = raw.strata {
        let allowed = |f: Field| matches!(f, Field::Jurisdiction | Field::Age | Field::Sex);
        config.strata = fields(&names, "strata", allowed, &mut push);
    }
    if let Some(bands) = raw.age_bands {
        if bands.is_empty() || bands[0] != 0 || bands.windows(2).any(|w| w[0] >= w[1]) {
            push("age_bands", "must start at 0 and increase".into());
        } else {
            config.age_bands = bands;
        }
    }
    let mut positive = |key: &str, value: Option<usize>, target: &mut usize| match value {
        Some(0) => push(key, "must be at least 1".into()),
        Some(v) => *target = v,
        None => {}
    };
    positive("max_delay", raw.max_delay, &mut config.max_delay);
    positive("window", raw.window, &mut config.window);
    positive("draws", raw.draws, &mut config.draws);
    positive("backtest_lag", raw.backtest_lag, &mut config.backtest_lag);
    positive("score_window", raw.score_window, &mut config.score_window);
    positive("bootstrap", raw.bootstrap, &mut config.bootstrap);
    if let Some(methods) = raw.nowcast_methods {
        let mut parsed = Vec::new();
        for method in &methods {
            match method.parse::<NowcastMethod>() {
                Ok(method) => parsed.push(method),
                Err(e) => push("nowcast_methods", e.to_string()),
            }
        }
        config.nowcast_methods = parsed;
    }
    if let Some(pairs) = raw.delays {
        config.delays = pairs.iter().filter_map(|p| delay_pair(p, &mut push)).collect();
    }
    config
}

fn fields(
    names: &[String],
    key: &str,
    allowed: impl Fn(Field) -> bool,
    push: &mut impl FnMut(&str, String),
) -> Vec<Field> {
    names
        .iter()
        .filter_map(|name| match Field::parse(name).filter(|f| allowed(*f)) {
            Some(field) => Some(field),
            None => {
                push(key, format!("\"{name}\" is not allowed here"));
                None
            }
        })
        .collect()
}

fn delay_pair(text: &str, push: &mut impl FnMut(&str, String)) -> Option<(Field, DelayEnd)> {
    let parsed = text.split_once("->").and_then(|(from, to)| {
        let from = Field::parse(from).filter(|f| f.is_date())?;
        Some((from, DelayEnd::parse(to)?))
    });
    if parsed.is_none() {
        push("delays", format!("\"{text}\" is not FIELD->FIELD (date fields or first_seen)"));
    }
    parsed
}

/// Default age bands for stratifying, as lower edges in years (common practice in
/// surveillance tables); the last band is open.
pub const AGE_BAND_EDGES: [u32; 7] = [0, 5, 15, 25, 45, 65, 80];

/// Which triangles to maintain: reference fields, and strata besides the whole source.
#[derive(Debug, Clone, PartialEq)]
pub struct TriangleSpec {
    pub ref_fields: Vec<Field>,
    pub strata: Vec<Field>,
    pub age_edges: Vec<u32>,
}
