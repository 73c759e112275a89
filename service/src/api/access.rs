//! Access tokens: `Authorization: Bearer <token>`, checked against the SHA-256 of each
//! configured token in constant time. The token itself is never kept, logged or shown.

use sha2::{Digest, Sha256};
use subtle::ConstantTimeEq;

use crate::config::{Access, Role};

/// Who is asking: the name of the token's `[[access]]` entry, or nobody.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Caller {
    pub name: String,
    pub role: Role,
}

/// Why a request is not let through.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Denied {
    /// No token, an unknown one, or no tokens configured at all (HTTP 401).
    Unauthenticated(String),
    /// A known token whose role is not enough (HTTP 403).
    Forbidden(String),
}

/// The configured tokens and the read policy.
#[derive(Clone)]
pub struct AccessList {
    entries: Vec<(String, Role, [u8; 32])>,
    open_reads: bool,
}

impl std::fmt::Debug for AccessList {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("AccessList")
            .field("tokens", &self.entries.len())
            .field("open_reads", &self.open_reads)
            .finish()
    }
}

/// Lower-case hex SHA-256 of a token, as `[[access]] token_sha256` holds it.
pub fn token_sha256(token: &str) -> String {
    Sha256::digest(token.as_bytes()).iter().map(|b| format!("{b:02x}")).collect()
}

fn from_hex(hex: &str) -> Option<[u8; 32]> {
    let mut out = [0u8; 32];
    if hex.len() != 64 {
        return None;
    }
    for (i, byte) in out.iter_mut().enumerate() {
        *byte = u8::from_str_radix(hex.get(2 * i..2 * i + 2)?, 16).ok()?;
    }
    Some(out)
}

impl AccessList {
    pub fn new(access: &[Access], open_reads: bool) -> Self {
        let entries = access
            .iter()
            .filter_map(|a| from_hex(&a.token_sha256).map(|hash| (a.name.clone(), a.role, hash)))
            .collect();
        AccessList { entries, open_reads }
    }

    pub fn is_empty(&self) -> bool {
        self.entries.is_empty()
    }

    /// Whether callers without a token may read.
    pub fn open_reads(&self) -> bool {
        self.open_reads
    }

    /// The caller behind an `Authorization` header value. Every entry is compared, in
    /// constant time, so timing says nothing about which hash was close.
    fn identify(&self, authorization: Option<&str>) -> Option<Caller> {
        // The scheme's name is case-insensitive (RFC 9110 §11.1).
        let (scheme, token) = authorization?.trim_start().split_once(' ')?;
        if !scheme.eq_ignore_ascii_case("bearer") {
            return None;
        }
        let token = token.trim();
        let presented: [u8; 32] = Sha256::digest(token.as_bytes()).into();
        let mut found = None;
        for (name, role, hash) in &self.entries {
            if bool::from(presented.ct_eq(hash)) && found.is_none() {
                found = Some(Caller { name: name.clone(), role: *role });
            }
        }
        found
    }

    /// May this request read? With `open_reads`, anyone may; else any known token.
    pub fn read(&self, authorization: Option<&str>) -> Result<Option<Caller>, Denied> {
        if self.open_reads {
            return Ok(None);
        }
        self.identify(authorization).map(Some).ok_or_else(|| {
            Denied::Unauthenticated("reading needs a token: Authorization: Bearer <token>".into())
        })
    }

    /// May this request write? Only an operator token may.
    pub fn write(&self, authorization: Option<&str>) -> Result<Caller, Denied> {
        if self.entries.is_empty() {
            return Err(Denied::Unauthenticated(
                "writes are disabled: the config has no [[access]] tokens (see `ridgeline token`)".into(),
            ));
        }
        match self.identify(authorization) {
            None if authorization.is_none() => Err(Denied::Unauthenticated(
                "this change needs an operator token: Authorization: Bearer <token>".into(),
            )),
            None => Err(Denied::Unauthenticated(
                "the token is not one of the configured [[access]] tokens".into(),
            )),
            Some(c) if c.role == Role::Operator => Ok(c),
            Some(c) => Err(Denied::Forbidden(format!(
                "token `{}` may only read; changes need an operator token",
                c.name
            ))),
        }
    }
}

/// A fresh random token: 256 bits straight from the operating system's generator, hex
/// encoded.
pub fn new_token() -> Result<String, getrandom::Error> {
    let mut bytes = [0u8; 32];
    getrandom::fill(&mut bytes)?;
    Ok(bytes.iter().map(|b| format!("{b:02x}")).collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn list(open_reads: bool) -> AccessList {
        let access = [
            Access { name: "ops".into(), token_sha256: token_sha256("op-token"), role: Role::Operator },
            Access { name: "wall".into(), token_sha256: token_sha256("view-token"), role: Role::Viewer },
        ];
        AccessList::new(&access, open_reads)
    }

    #[test]
    fn sha256_matches_the_standard_test_vector() {
        // Source: FIPS 180-2 appendix B.1, SHA-256("abc").
        assert_eq!(token_sha256("abc"), "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad");
    }

    #[test]
    fn writes_need_an_operator_token() {
        let l = list(true);
        assert_eq!(l.write(Some("Bearer op-token")).unwrap().name, "ops");
        assert!(matches!(l.write(None), Err(Denied::Unauthenticated(_))));
        assert!(matches!(l.write(Some("Bearer nope")), Err(Denied::Unauthenticated(_))));
        assert!(matches!(l.write(Some("op-token")), Err(Denied::Unauthenticated(_))));
        assert!(matches!(l.write(Some("Bearer view-token")), Err(Denied::Forbidden(_))));
        assert!(matches!(l.write(Some("Basic op-token")), Err(Denied::Unauthenticated(_))));
    }

    #[test]
    fn the_scheme_name_is_case_insensitive() {
        // Source: RFC 9110 §11.1, the authentication scheme is case-insensitive.
        let l = list(true);
        assert_eq!(l.write(Some("bearer op-token")).unwrap().name, "ops");
        assert_eq!(l.write(Some("BEARER  op-token")).unwrap().name, "ops");
    }

    #[test]
    fn closed_reads_need_any_known_token() {
        let l = list(false);
        assert!(l.read(None).is_err());
        assert_eq!(l.read(Some("Bearer view-token")).unwrap().unwrap().name, "wall");
        assert!(list(true).read(None).is_ok());
    }

    #[test]
    fn without_access_entries_every_write_is_refused() {
        let l = AccessList::new(&[], true);
        assert!(
            matches!(l.write(Some("Bearer anything")), Err(Denied::Unauthenticated(m)) if m.contains("disabled"))
        );
    }

    #[test]
    fn new_tokens_are_long_and_different() {
        let (a, b) = (new_token().unwrap(), new_token().unwrap());
        assert_eq!(a.len(), 64);
        assert_ne!(a, b);
    }
}
