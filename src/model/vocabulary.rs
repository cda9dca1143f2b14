//! The domain's closed vocabularies (snapshot statuses, extract kinds, severities, nowcast
//! methods, token scopes, ...) as enums with one stable lower-case name each. The
//! [`vocabulary!`](crate::model::vocabulary) macro gives every such enum the same surface:
//! `ALL`, `name`, `parse`, `Display`, `FromStr` whose error lists the accepted names, serde
//! as the name, and clap's `ValueEnum`, so an unknown value is refused at the edge (config,
//! CLI, API, store) with the accepted values listed instead of falling through to a default.
//! The store maps the same names to SQL text (`store::vocabulary`).

/// An unknown name for one of the vocabularies: says which, and what is accepted.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("unknown {what} {given:?}; accepted: {}", .accepted.join(", "))]
pub struct UnknownName {
    pub what: &'static str,
    pub given: String,
    pub accepted: Vec<&'static str>,
}

/// Declares a vocabulary enum: `vocabulary! { /// doc  pub enum Name("what it is") { Variant => "name", ... } }`.
macro_rules! vocabulary {
    (
        $(#[$meta:meta])*
        $vis:vis enum $name:ident ($what:literal) {
            $( $(#[$vmeta:meta])* $variant:ident => $text:literal ),+ $(,)?
        }
    ) => {
        $(#[$meta])*
        #[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
        $vis enum $name {
            $( $(#[$vmeta])* $variant ),+
        }

        impl $name {
            /// Every value, in declaration order.
            pub const ALL: [$name; <[&str]>::len(&[$(stringify!($variant)),+])] = [$($name::$variant),+];

            /// The stable lower-case name used in configs, the CLI, the API and the store.
            pub fn name(self) -> &'static str {
                match self {
                    $($name::$variant => $text),+
                }
            }

            /// The value called `text` (exactly as [`Self::name`] spells it).
            pub fn parse(text: &str) -> Option<$name> {
                Self::ALL.iter().copied().find(|value| value.name() == text)
            }

            /// Every accepted name, in declaration order.
            pub fn names() -> Vec<&'static str> {
                Self::ALL.iter().map(|value| value.name()).collect()
            }
        }

        impl ::std::fmt::Display for $name {
            fn fmt(&self, f: &mut ::std::fmt::Formatter<'_>) -> ::std::fmt::Result {
                f.write_str(self.name())
            }
        }

        impl ::std::str::FromStr for $name {
            type Err = $crate::model::vocabulary::UnknownName;

            fn from_str(text: &str) -> Result<$name, Self::Err> {
                Self::parse(text).ok_or_else(|| $crate::model::vocabulary::UnknownName {
                    what: $what,
                    given: $crate::model::vocabulary::shorten(text),
                    accepted: Self::names(),
                })
            }
        }

        impl ::serde::Serialize for $name {
            fn serialize<S: ::serde::Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
                serializer.serialize_str(self.name())
            }
        }

        impl<'de> ::serde::Deserialize<'de> for $name {
            fn deserialize<D: ::serde::Deserializer<'de>>(deserializer: D) -> Result<$name, D::Error> {
                let text = <::std::borrow::Cow<'de, str> as ::serde::Deserialize>::deserialize(deserializer)?;
                text.parse().map_err(::serde::de::Error::custom)
            }
        }

        impl ::clap::ValueEnum for $name {
            fn value_variants<'a>() -> &'a [$name] {
                &Self::ALL
            }

            fn to_possible_value(&self) -> Option<::clap::builder::PossibleValue> {
                Some(::clap::builder::PossibleValue::new(self.name()))
            }
        }
    };
}

pub(crate) use vocabulary;

/// An outside value cut to a length fit for an error message (names in these vocabularies
/// are short; a long value is an accident and is not repeated whole).
pub fn shorten(text: &str) -> String {
    const MAX: usize = 40;
    let escaped: String = text.chars().flat_map(char::escape_debug).collect();
    if escaped.chars().count() <= MAX {
        escaped
    } else {
        format!("{}...", escaped.chars().take(MAX).collect::<String>())
    }
}

vocabulary! {
    /// How urgently a signal needs a person. The mapping per rule is documented on each rule
    /// in `alert::rules`; in short: `Critical` means the feed or the day's figures are likely
    /// wrong or missing now (held snapshot, no data for twice the expected interval, polls
    /// failing for twice the limit, a field gone almost entirely, new records at zero, a count
    /// statistic at twice its threshold); `Warning` is every other tripped rule; `Info` is for
    /// messages that need no action (for example a delivery test).
    pub enum Severity("severity") {
        Info => "info",
        Warning => "warning",
        Critical => "critical",
    }
}

vocabulary! {
    /// The rules a signal can come from; the name is used in fingerprints, storage and
    /// messages.
    pub enum Rule("rule") {
        /// A field's missing share jumped in the records new or changed in the latest snapshot.
        MissingnessJump => "missingness_jump",
        /// The daily median reporting lag rose (EWMA, confirmed by Mann-Whitney).
        LagJump => "lag_jump",
        /// The latest snapshot was held (truncated-feed guard).
        HeldSnapshot => "held_snapshot",
        /// Far fewer new records than usual in the latest snapshot.
        VolumeDrop => "volume_drop",
        /// No applied snapshot within the source's expected interval.
        StaleSource => "stale_source",
        /// The source failed several polls in a row.
        FailingPolls => "failing_polls",
        /// C1 on daily counts by report date: z-score against the 7 days just before.
        CountZRecent => "count_z_recent",
        /// C2 on daily counts by report date: z-score against 7 days ending 3 days before.
        CountZGuarded => "count_z_guarded",
        /// C3 on daily counts by report date: the guarded z-scores' excesses over 3 days.
        CountZGuarded3Day => "count_z_guarded_3day",
        /// Upper Poisson or negative-binomial CUSUM on daily counts by report date.
        CountCusum => "count_cusum",
        /// The nowcast `auto` chooses is miscalibrated over its matured scores.
        NowcastCalibration => "nowcast_calibration",
    }
}

vocabulary! {
    /// Whether an extract holds the source's whole line list or only new and changed records.
    pub enum ExtractKind("extract kind") {
        /// Records missing from a full extract are removed.
        Full => "full",
        /// A delta extract never removes.
        Delta => "delta",
    }
}

vocabulary! {
    /// The byte format of an extract (gzip is detected separately, by magic bytes).
    pub enum Format("extract format") {
        Csv => "csv",
        Ndjson => "ndjson",
        Json => "json",
    }
}

vocabulary! {
    /// What became of a snapshot.
    pub enum SnapshotStatus("snapshot status") {
        /// Its records are versioned in the store.
        Applied => "applied",
        /// Suspect (e.g. a truncated feed); waits for an operator to release or reject it.
        Held => "held",
        /// Could not be parsed at all; nothing of it was applied.
        Failed => "failed",
        /// The same bytes as the latest applied snapshot of the source; nothing new.
        Duplicate => "duplicate",
        /// A held snapshot that an operator discarded.
        Rejected => "rejected",
    }
}

vocabulary! {
    /// A nowcast method (`analysis::nowcast`): `Hazard` is the discrete-time reporting-hazard
    /// model, `Smooth` the penalised-spline model.
    pub enum NowcastMethod("nowcast method") {
        Hazard => "hazard",
        Smooth => "smooth",
        /// The quantile average of `hazard` and `smooth`.
        Ensemble => "ensemble",
    }
}

vocabulary! {
    /// The nowcast method a request asks for: one method, or `Auto` (the method with the best
    /// stored backtest score, else the configured default).
    pub enum MethodChoice("nowcast method") {
        Auto => "auto",
        Hazard => "hazard",
        Smooth => "smooth",
        Ensemble => "ensemble",
    }
}

impl MethodChoice {
    /// The method asked for by name, `None` for `Auto`.
    pub fn method(self) -> Option<NowcastMethod> {
        match self {
            MethodChoice::Auto => None,
            MethodChoice::Hazard => Some(NowcastMethod::Hazard),
            MethodChoice::Smooth => Some(NowcastMethod::Smooth),
            MethodChoice::Ensemble => Some(NowcastMethod::Ensemble),
        }
    }
}

vocabulary! {
    /// Where a snapshot's post-snapshot analysis stands (`analysis_owed.state`).
    pub enum OwedState("analysis state") {
        /// Owed, not tried yet (or interrupted by a crash or shutdown).
        Pending => "pending",
        /// Owed; the last try failed.
        Failed => "failed",
        /// Its results are stored.
        Done => "done",
        /// Not analysed: a later snapshot of the source was analysed in its place.
        Superseded => "superseded",
    }
}

vocabulary! {
    /// What an API token may do. `Sql` includes `Read`.
    pub enum TokenScope("token scope") {
        Read => "read",
        Sql => "sql",
    }
}

impl TokenScope {
    /// Whether a token with this scope may do what `needed` asks.
    pub fn allows(self, needed: TokenScope) -> bool {
        self >= needed
    }
}

impl Rule {
    /// The episode a signal of this rule belongs to, the first part of its fingerprint: the
    /// count rules of one source and subject share one (`count`), so one rise that trips
    /// several of them is one alert; every other rule is its own.
    pub fn episode(self) -> &'static str {
        match self {
            Rule::CountZRecent | Rule::CountZGuarded | Rule::CountZGuarded3Day | Rule::CountCusum => "count",
            other => other.name(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_name_parses_back_to_its_value() {
        for status in SnapshotStatus::ALL {
            assert_eq!(status.name().parse::<SnapshotStatus>().unwrap(), status);
        }
        for method in MethodChoice::ALL {
            assert_eq!(MethodChoice::parse(method.name()), Some(method));
        }
    }

    #[test]
    fn an_unknown_name_lists_the_accepted_ones() {
        let err = "hazrd".parse::<NowcastMethod>().unwrap_err();
        assert_eq!(err.to_string(), r#"unknown nowcast method "hazrd"; accepted: hazard, smooth, ensemble"#);
        let long = "x".repeat(500);
        assert!(long.parse::<Severity>().unwrap_err().to_string().len() < 120);
    }

    #[test]
    fn serde_and_clap_use_the_names() {
        assert_eq!(serde_json::to_string(&ExtractKind::Delta).unwrap(), r#""delta""#);
        assert_eq!(serde_json::from_str::<ExtractKind>(r#""full""#).unwrap(), ExtractKind::Full);
        assert!(serde_json::from_str::<ExtractKind>(r#""fulll""#).is_err());
        let value = <TokenScope as clap::ValueEnum>::from_str("sql", false).unwrap();
        assert_eq!(value, TokenScope::Sql);
    }
}
