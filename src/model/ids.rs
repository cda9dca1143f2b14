//! Row ids of the store's snapshots and sources as types of their own, so a snapshot id can
//! never be passed where a source id is meant (both are SQLite integer keys). They print
//! and serialise as the bare number; `store::vocabulary` maps them to SQL integers.

use std::fmt;
use std::str::FromStr;

macro_rules! row_id {
    ($(#[$meta:meta])* $name:ident, $what:literal) => {
        $(#[$meta])*
        #[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, serde::Serialize, serde::Deserialize)]
        #[serde(transparent)]
        pub struct $name(pub i64);

        impl fmt::Display for $name {
            fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                write!(f, "{}", self.0)
            }
        }

        impl FromStr for $name {
            type Err = String;

            fn from_str(text: &str) -> Result<$name, String> {
                text.parse::<i64>()
                    .ok()
                    .filter(|id| *id > 0)
                    .map($name)
                    .ok_or_else(|| format!("{} must be a positive whole number", $what))
            }
        }
    };
}

row_id!(
    /// A snapshot's id (`snapshot.snapshot_id`): grows in application order.
    SnapshotId,
    "a snapshot id"
);

row_id!(
    /// A source's id (`source.source_id`).
    SourceId,
    "a source id"
);

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ids_parse_print_and_serialise_as_numbers() {
        assert_eq!("42".parse::<SnapshotId>(), Ok(SnapshotId(42)));
        assert!("0".parse::<SnapshotId>().is_err() && "x".parse::<SourceId>().is_err());
        assert_eq!(SnapshotId(7).to_string(), "7");
        assert_eq!(serde_json::to_string(&SourceId(3)).unwrap(), "3");
    }
}
