//! API tokens: how they look (`tmk_` and 64 hex digits from 32 random bytes), how they are
//! kept (SHA-256 only) and how a request's `Authorization: Bearer` header is checked
//! against the store's active tokens, comparing hashes in constant time. Reads only.

use sha2::{Digest, Sha256};
use subtle::ConstantTimeEq;

use crate::store::{Reader, StoreError, TokenScope};

/// Every token starts with this, so a token pasted into the wrong place is recognisable
/// (and secret scanners can look for it).
pub const TOKEN_PREFIX: &str = "tmk_";

/// Random bytes in a token: 256 bits, far beyond guessing.
const TOKEN_BYTES: usize = 32;

/// Characters of a token kept as its hint (the prefix and 4 hex digits): enough to tell
/// tokens apart in a list, far too few to help guess one.
const HINT_CHARS: usize = TOKEN_PREFIX.len() + 4;

/// A new random token.
pub fn new_token() -> String {
    let mut bytes = [0u8; TOKEN_BYTES];
    // The thread RNG is a CSPRNG seeded from the operating system.
    rand::fill(&mut bytes);
    let mut token = String::from(TOKEN_PREFIX);
    for b in bytes {
        token.push_str(&format!("{b:02x}"));
    }
    token
}

/// The hex SHA-256 of a token, as stored.
pub fn token_sha256(token: &str) -> String {
    let digest = Sha256::digest(token.as_bytes());
    digest.iter().map(|b| format!("{b:02x}")).collect()
}

/// The recognisable start of a token, for `tidemark token list`.
pub fn hint(token: &str) -> String {
    format!("{}…", &token[..HINT_CHARS.min(token.len())])
}

/// Why a request was not let in.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Denied {
    /// No token, a malformed header, or a token that is not (or no longer) valid: 401.
    Unauthenticated(&'static str),
    /// A valid token without the scope the endpoint needs: 403.
    Forbidden { token: String, needed: TokenScope },
}

/// The bearer token of an `Authorization` header value.
pub fn bearer(header: Option<&str>) -> Result<&str, Denied> {
    let value = header.ok_or(Denied::Unauthenticated("missing bearer token"))?;
    let (scheme, token) = value
        .split_once(' ')
        .ok_or(Denied::Unauthenticated("the Authorization header is not \"Bearer <token>\""))?;
    if !scheme.eq_ignore_ascii_case("bearer") || token.trim().is_empty() {
        return Err(Denied::Unauthenticated("the Authorization header is not \"Bearer <token>\""));
    }
    Ok(token.trim())
}

/// Checks `token` against the store's active tokens and the scope `needed`; returns the
/// token's name. Every active token's hash is compared (in constant time), so the time taken
/// does not say which one, or how much of one, matched.
pub fn check(reader: &Reader, token: &str, needed: TokenScope) -> Result<Result<String, Denied>, StoreError> {
    let presented = token_sha256(token);
    let mut found: Option<(String, TokenScope)> = None;
    for row in reader.tokens(true)? {
        let same: bool = row.sha256.as_bytes().ct_eq(presented.as_bytes()).into();
        if same {
            found = Some((row.name, row.scope));
        }
    }
    Ok(match found {
        None => Err(Denied::Unauthenticated("invalid or revoked token")),
        Some((name, scope)) if scope.allows(needed) => Ok(name),
        Some((name, _)) => Err(Denied::Forbidden { token: name, needed }),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn tokens_are_random_prefixed_and_hashed() {
        let (a, b) = (new_token(), new_token());
        assert_ne!(a, b);
        assert!(a.starts_with(TOKEN_PREFIX) && a.len() == TOKEN_PREFIX.len() + 64, "{a}");
        assert_eq!(token_sha256(&a).len(), 64);
        assert_ne!(token_sha256(&a), token_sha256(&b));
        // SHA-256 of "abc", FIPS 180-2 appendix B.1.
        assert_eq!(token_sha256("abc"), "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad");
        assert_eq!(hint(&a).chars().count(), HINT_CHARS + 1);
    }

    #[test]
    fn bearer_header_forms() {
        assert_eq!(bearer(Some("Bearer tmk_1")), Ok("tmk_1"));
        assert_eq!(bearer(Some("bearer  tmk_1 ")), Ok("tmk_1"));
        assert!(matches!(bearer(None), Err(Denied::Unauthenticated(_))));
        assert!(matches!(bearer(Some("Basic dXNlcg==")), Err(Denied::Unauthenticated(_))));
        assert!(matches!(bearer(Some("Bearer")), Err(Denied::Unauthenticated(_))));
    }
}
