//! API tokens in the `api_token` table: only each token's SHA-256 is stored, with a short
//! hint to recognise it. `tidemark token create|revoke` write here in one short transaction
//! of their own, beside a running daemon: the table is nothing the ingest writer touches, and
//! SQLite serialises the two writers (busy timeout), so a leaked token can be revoked without
//! stopping the daemon. The API only reads this table.

use std::path::Path;

use super::{Reader, StoreError, now_text, open_writer};

pub use crate::model::TokenScope;

/// One token as listed (never the token itself).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TokenRow {
    pub name: String,
    pub scope: TokenScope,
    pub sha256: String,
    pub hint: String,
    pub created_at: String,
    pub revoked_at: Option<String>,
}

/// Stores a new token's hash under `name`; refused when the name is taken (even by a revoked
/// token, so that a name in a log always means one token).
pub fn create_token(
    path: &Path,
    name: &str,
    scope: TokenScope,
    sha256: &str,
    hint: &str,
) -> Result<(), StoreError> {
    let conn = open_writer(path)?;
    let taken: bool =
        conn.query_row("SELECT count(*) > 0 FROM api_token WHERE name = ?1", [name], |r| r.get(0))?;
    if taken {
        return Err(StoreError::Refused(format!(
            "a token named {name:?} exists already (names are never reused); choose another name"
        )));
    }
    conn.execute(
        "INSERT INTO api_token (name, scope, sha256, hint, created_at) VALUES (?1, ?2, ?3, ?4, ?5)",
        (name, scope.name(), sha256, hint, now_text()),
    )?;
    Ok(())
}

/// Revokes the token `name`; false when it was revoked before.
pub fn revoke_token(path: &Path, name: &str) -> Result<bool, StoreError> {
    let conn = open_writer(path)?;
    let exists: bool =
        conn.query_row("SELECT count(*) > 0 FROM api_token WHERE name = ?1", [name], |r| r.get(0))?;
    if !exists {
        return Err(StoreError::Refused(format!("no token named {name:?} (see `tidemark token list`)")));
    }
    let changed = conn.execute(
        "UPDATE api_token SET revoked_at = ?2 WHERE name = ?1 AND revoked_at IS NULL",
        (name, now_text()),
    )?;
    Ok(changed == 1)
}

impl Reader {
    /// Every token, oldest first; `active_only` leaves out revoked ones.
    pub fn tokens(&self, active_only: bool) -> Result<Vec<TokenRow>, StoreError> {
        let mut stmt = self.conn.prepare_cached(
            "SELECT name, scope, sha256, hint, created_at, revoked_at FROM api_token
             WHERE NOT ?1 OR revoked_at IS NULL ORDER BY token_id",
        )?;
        let rows = stmt.query_map([active_only], |r| {
            Ok(TokenRow {
                name: r.get(0)?,
                scope: r.get(1)?,
                sha256: r.get(2)?,
                hint: r.get(3)?,
                created_at: r.get(4)?,
                revoked_at: r.get(5)?,
            })
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn create_list_revoke() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("t.db");
        create_token(&path, "analyst", TokenScope::Read, &"a".repeat(64), "tmk_ab").unwrap();
        create_token(&path, "etl", TokenScope::Sql, &"b".repeat(64), "tmk_cd").unwrap();
        let err = create_token(&path, "etl", TokenScope::Read, &"c".repeat(64), "x").unwrap_err();
        assert!(err.to_string().contains("exists already"), "{err}");
        let reader = Reader::open(&path).unwrap();
        let names: Vec<String> = reader.tokens(true).unwrap().into_iter().map(|t| t.name).collect();
        assert_eq!(names, ["analyst", "etl"]);
        assert!(revoke_token(&path, "analyst").unwrap());
        assert!(!revoke_token(&path, "analyst").unwrap());
        assert!(revoke_token(&path, "nobody").is_err());
        let active: Vec<String> = reader.tokens(true).unwrap().into_iter().map(|t| t.name).collect();
        assert_eq!(active, ["etl"]);
        assert!(reader.tokens(false).unwrap()[0].revoked_at.is_some());
        assert!(TokenScope::Sql.allows(TokenScope::Read));
        assert!(!TokenScope::Read.allows(TokenScope::Sql));
    }
}
