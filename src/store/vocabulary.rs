//! The domain vocabularies (`model::vocabulary`, the delay families) as SQL text: each is
//! stored under its stable name, and a stored name that no longer parses is a conversion
//! error naming the vocabulary, never a silent default. The row ids (`model::ids`) are SQL
//! integers.

use rusqlite::types::{FromSql, FromSqlError, FromSqlResult, ToSql, ToSqlOutput, ValueRef};

use crate::analysis::delay::Family;
use crate::model::{
    ExtractKind, NowcastMethod, OwedState, Rule, Severity, SnapshotId, SnapshotStatus, SourceId, TokenScope,
};
use crate::table::Cell;

macro_rules! stored_as_name {
    ($($name:ty),+ $(,)?) => {
        $(
            impl ToSql for $name {
                fn to_sql(&self) -> rusqlite::Result<ToSqlOutput<'_>> {
                    Ok(ToSqlOutput::from(self.name()))
                }
            }

            impl FromSql for $name {
                fn column_result(value: ValueRef<'_>) -> FromSqlResult<$name> {
                    let text = value.as_str()?;
                    text.parse::<$name>().map_err(|e| FromSqlError::Other(Box::new(e)))
                }
            }
        )+
    };
}

macro_rules! stored_as_integer {
    ($($name:ident),+ $(,)?) => {
        $(
            impl ToSql for $name {
                fn to_sql(&self) -> rusqlite::Result<ToSqlOutput<'_>> {
                    Ok(ToSqlOutput::from(self.0))
                }
            }

            impl FromSql for $name {
                fn column_result(value: ValueRef<'_>) -> FromSqlResult<$name> {
                    value.as_i64().map($name)
                }
            }
        )+
    };
}

stored_as_integer!(SnapshotId, SourceId);

/// Ids in listings are plain integers.
macro_rules! listed_as_integer {
    ($($name:ident),+) => {
        $(
            impl From<$name> for Cell {
                fn from(id: $name) -> Cell {
                    Cell::from(id.0)
                }
            }
        )+
    };
}

listed_as_integer!(SnapshotId, SourceId);

stored_as_name!(ExtractKind, NowcastMethod, OwedState, Rule, Severity, SnapshotStatus, TokenScope, Family);

#[cfg(test)]
mod tests {
    use rusqlite::Connection;

    use super::*;

    #[test]
    fn names_round_trip_and_an_unknown_stored_name_is_an_error() {
        let conn = Connection::open_in_memory().unwrap();
        let back: SnapshotStatus = conn.query_row("SELECT ?1", [SnapshotStatus::Held], |r| r.get(0)).unwrap();
        assert_eq!(back, SnapshotStatus::Held);
        let err = conn.query_row("SELECT 'hled'", [], |r| r.get::<_, SnapshotStatus>(0)).unwrap_err();
        assert!(err.to_string().contains("accepted: applied, held"), "{err}");
    }
}
