//! Bearer tokens with scopes. The tokens file holds only SHA-256 hashes of tokens, one per line:
//!
//! ```text
//! # comment
//! sha256:<64 hex digits> submit,read probe-workers
//! sha256:<64 hex digits> admin ops
//! ```
//!
//! Scopes: `submit` (stream and submit batches), `read` (scores, sessions, reference sets),
//! `admin` (create/reset/close sessions, load/upload/delete reference sets; implies the others).
//! A presented token is hashed and compared with every entry in constant time. No token ever
//! appears in a log line or an error message: only the entry's name does.

use sha2::{Digest, Sha256};
use tonic::Request;

use super::error::ServiceError;

/// What a call needs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Scope {
    /// Send hypotheses.
    Submit,
    /// Read scores and definitions.
    Read,
    /// Change sessions and reference sets.
    Admin,
}

impl Scope {
    fn name(self) -> &'static str {
        match self {
            Scope::Submit => "submit",
            Scope::Read => "read",
            Scope::Admin => "admin",
        }
    }
}

struct Entry {
    hash: [u8; 32],
    scopes: Vec<Scope>,
    name: String,
}

/// The loaded tokens file.
pub struct Tokens {
    entries: Vec<Entry>,
}

/// Prefix of a token line's hash field.
const HASH_PREFIX: &str = "sha256:";

/// SHA-256 of a token, as the tokens file stores it.
pub fn token_line_hash(token: &str) -> String {
    format!("{HASH_PREFIX}{}", crate::refs::hex(&Sha256::digest(token.as_bytes())))
}

impl Tokens {
    /// Parse a tokens file; errors name the file and line.
    pub fn parse(file: &str, text: &str) -> Result<Tokens, String> {
        let mut entries = Vec::new();
        for (i, line) in text.lines().enumerate() {
            let line = line.trim();
            if line.is_empty() || line.starts_with('#') {
                continue;
            }
            let at = |m: &str| format!("{file}:{}: {m}", i + 1);
            let mut f = line.split_whitespace();
            let hash = f.next().unwrap_or("");
            let hex = hash.strip_prefix(HASH_PREFIX).ok_or_else(|| at("expected sha256:<64 hex digits> (the file stores token hashes, never tokens)"))?;
            if hex.len() != 64 {
                return Err(at("the hash must be 64 hex digits"));
            }
            let mut h = [0u8; 32];
            for (k, b) in h.iter_mut().enumerate() {
                *b = u8::from_str_radix(&hex[2 * k..2 * k + 2], 16).map_err(|_| at("the hash must be hex digits"))?;
            }
            let scopes = f
                .next()
                .ok_or_else(|| at("missing scopes (submit, read, admin)"))?
                .split(',')
                .map(|s| match s {
                    "submit" => Ok(Scope::Submit),
                    "read" => Ok(Scope::Read),
                    "admin" => Ok(Scope::Admin),
                    other => Err(at(&format!("unknown scope '{other}' (submit, read, admin)"))),
                })
                .collect::<Result<Vec<_>, _>>()?;
            let name = f.next().unwrap_or("unnamed").to_owned();
            entries.push(Entry { hash: h, scopes, name });
        }
        if entries.is_empty() {
            return Err(format!("{file}: no tokens (every call would be refused)"));
        }
        Ok(Tokens { entries })
    }

    /// Check a request's bearer token for `scope`.
    pub fn check<T>(&self, req: &Request<T>, scope: Scope) -> Result<(), ServiceError> {
        let header = req.metadata().get("authorization").and_then(|v| v.to_str().ok()).unwrap_or("");
        let Some(token) = header.strip_prefix("Bearer ").map(str::trim).filter(|t| !t.is_empty()) else {
            return Err(ServiceError::Unauthenticated("missing bearer token (authorization: Bearer <token>)".into()));
        };
        let presented: [u8; 32] = Sha256::digest(token.as_bytes()).into();
        // Compare with every entry, without an early exit, so timing says nothing.
        let mut found: Option<&Entry> = None;
        for e in &self.entries {
            let diff = e.hash.iter().zip(&presented).fold(0u8, |acc, (a, b)| acc | (a ^ b));
            if diff == 0 {
                found = Some(e);
            }
        }
        let e = found.ok_or_else(|| ServiceError::Unauthenticated("invalid token".into()))?;
        if e.scopes.contains(&scope) || e.scopes.contains(&Scope::Admin) {
            Ok(())
        } else {
            Err(ServiceError::Forbidden(format!("token '{}' lacks the '{}' scope", e.name, scope.name())))
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn scopes_and_errors() {
        let file = format!("# ops\n{} submit probe\n{} admin ops\n", token_line_hash("t-probe"), token_line_hash("t-ops"));
        let t = Tokens::parse("tokens", &file).unwrap();
        let req = |tok: Option<&str>| {
            let mut r = Request::new(());
            if let Some(tok) = tok {
                r.metadata_mut().insert("authorization", format!("Bearer {tok}").parse().unwrap());
            }
            r
        };
        assert!(t.check(&req(Some("t-probe")), Scope::Submit).is_ok());
        let status = |e: ServiceError| tonic::Status::from(e);
        let denied = status(t.check(&req(Some("t-probe")), Scope::Admin).unwrap_err());
        assert_eq!(denied.code(), tonic::Code::PermissionDenied);
        assert!(!denied.message().contains("t-probe") && denied.message().contains("probe"));
        assert!(t.check(&req(Some("t-ops")), Scope::Read).is_ok(), "admin implies read");
        assert_eq!(status(t.check(&req(Some("nope")), Scope::Read).unwrap_err()).code(), tonic::Code::Unauthenticated);
        assert_eq!(status(t.check(&req(None), Scope::Read).unwrap_err()).code(), tonic::Code::Unauthenticated);
        let e = Tokens::parse("tokens", "plaintext-token submit\n").err().unwrap();
        assert!(e.starts_with("tokens:1:") && !e.contains("plaintext-token"), "{e}");
        assert!(Tokens::parse("tokens", &format!("{} bogus x\n", token_line_hash("a"))).err().unwrap().contains("unknown scope"));
    }
}
