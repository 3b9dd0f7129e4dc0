//! Bearer tokens with roles. Tokens are read at start from a file that
//! holds only their SHA-256 digests, one per line with its role and a name:
//!
//! ```text
//! # digest                                                                 role     name
//! sha256:9f86d081884c7d659a2feaa0c55ad015a3bf4f1b2b0b822cd15d6c15b0f00a08 admin    deploy-pipeline
//! ```
//!
//! `apportion hash-token` prints the line's digest for a token read from
//! standard input. A call carries `authorization: Bearer TOKEN`; health and
//! reflection stay open. Tokens never reach logs or metrics: failures are
//! counted by reason only.

use std::collections::HashMap;
use std::path::Path;

use sha2::{Digest, Sha256};
use tonic::Status;
use tonic::metadata::MetadataMap;

use crate::telemetry;

/// What a token may do.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Role {
    /// Registry writes and deletes, and everything else.
    Admin,
    /// Attribution calls, and reading the registry.
    Explain,
    /// Reading the registry and diagnostics.
    Monitor,
}

/// What a call needs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Access {
    /// Register or delete models.
    Write,
    /// Explain.
    Explain,
    /// Get or list models, echo.
    Read,
}

impl Role {
    fn parse(text: &str) -> Option<Role> {
        Some(match text {
            "admin" => Role::Admin,
            "explain" => Role::Explain,
            "monitor" => Role::Monitor,
            _ => return None,
        })
    }

    pub fn allows(self, access: Access) -> bool {
        match self {
            Role::Admin => true,
            Role::Explain => access != Access::Write,
            Role::Monitor => access == Access::Read,
        }
    }
}

/// The tokens a server accepts, by digest.
#[derive(Debug, Clone, Default)]
pub struct Tokens {
    by_digest: HashMap<[u8; 32], Role>,
}

/// A token file that cannot be used: which line, and why.
#[derive(Debug, thiserror::Error)]
#[error("{path}: line {line}: {message}")]
pub struct TokenFileError {
    pub path: String,
    pub line: usize,
    pub message: String,
}

/// The digest line of `token`, as the token file holds it.
pub fn digest_line(token: &str) -> String {
    format!("sha256:{}", hex(&Sha256::digest(token.as_bytes())))
}

fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

impl Tokens {
    /// Reads a token file; any bad line refuses the whole file.
    pub fn load(path: &Path) -> Result<Tokens, TokenFileError> {
        let shown = path.display().to_string();
        let text = std::fs::read_to_string(path).map_err(|e| TokenFileError {
            path: shown.clone(),
            line: 0,
            message: format!("cannot be read: {e}"),
        })?;
        Tokens::parse(&text, &shown)
    }

    pub fn parse(text: &str, path: &str) -> Result<Tokens, TokenFileError> {
        let mut by_digest = HashMap::new();
        for (index, line) in text.lines().enumerate() {
            let fail = |message: String| TokenFileError {
                path: path.to_string(),
                line: index + 1,
                message,
            };
            let line = line.trim();
            if line.is_empty() || line.starts_with('#') {
                continue;
            }
            let fields: Vec<&str> = line.split_whitespace().collect();
            let [digest, role, _name, ..] = fields.as_slice() else {
                return Err(fail(
                    "needs `sha256:DIGEST ROLE NAME` (make the digest with `apportion hash-token`)"
                        .into(),
                ));
            };
            let bytes = digest
                .strip_prefix("sha256:")
                .and_then(parse_digest)
                .ok_or_else(|| {
                    fail(
                        "the digest must be `sha256:` and 64 hex digits; store the token's digest, never the token"
                            .into(),
                    )
                })?;
            let role = Role::parse(role).ok_or_else(|| {
                fail(format!(
                    "unknown role {role:?}; use admin, explain or monitor"
                ))
            })?;
            if by_digest.insert(bytes, role).is_some() {
                return Err(fail("the same token appears twice".into()));
            }
        }
        Ok(Tokens { by_digest })
    }

    pub fn len(&self) -> usize {
        self.by_digest.len()
    }

    pub fn is_empty(&self) -> bool {
        self.by_digest.is_empty()
    }

    /// UNAUTHENTICATED without a known bearer token, PERMISSION_DENIED when
    /// its role does not allow `access`.
    pub fn check(&self, metadata: &MetadataMap, access: Access) -> Result<(), Status> {
        let refuse = |reason: &'static str, status: Status| {
            metrics::counter!(telemetry::AUTH_FAILURES, "reason" => reason).increment(1);
            Err(status)
        };
        let Some(header) = metadata.get("authorization") else {
            return refuse(
                "missing",
                Status::unauthenticated("authorization: send `Bearer TOKEN`"),
            );
        };
        let token = header
            .to_str()
            .ok()
            .and_then(|h| h.strip_prefix("Bearer "))
            .map(str::trim);
        let Some(token) = token else {
            return refuse(
                "malformed",
                Status::unauthenticated("authorization: expected `Bearer TOKEN`"),
            );
        };
        let digest: [u8; 32] = Sha256::digest(token.as_bytes()).into();
        match self.by_digest.get(&digest) {
            None => refuse(
                "unknown",
                Status::unauthenticated("authorization: the token is not known to this server"),
            ),
            Some(role) if !role.allows(access) => refuse(
                "role",
                Status::permission_denied(format!(
                    "authorization: the token's role ({role:?}) may not {}",
                    match access {
                        Access::Write => "register or delete models",
                        Access::Explain => "explain",
                        Access::Read => "read",
                    }
                )),
            ),
            Some(_) => Ok(()),
        }
    }
}

fn parse_digest(hex: &str) -> Option<[u8; 32]> {
    if hex.len() != 64 {
        return None;
    }
    let mut out = [0u8; 32];
    for (i, slot) in out.iter_mut().enumerate() {
        *slot = u8::from_str_radix(hex.get(2 * i..2 * i + 2)?, 16).ok()?;
    }
    Some(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn digests_are_sha256() {
        // FIPS 180-4 test vector: SHA-256("abc").
        assert_eq!(
            digest_line("abc"),
            "sha256:ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
    }

    #[test]
    fn a_bad_line_is_refused_naming_it() {
        let good = format!("# tokens\n{} admin ops\n", digest_line("s3cret"));
        assert_eq!(Tokens::parse(&good, "t").unwrap().len(), 1);
        for (text, line) in [
            (format!("{good}sha256:abc admin x\n"), 3),
            (format!("{good}{} root x\n", digest_line("other")), 3),
            (format!("{} admin\n", digest_line("x")), 1),
            (
                format!("\n{good}{} monitor again\n", digest_line("s3cret")),
                4,
            ),
            ("s3cret admin plaintext\n".to_string(), 1),
        ] {
            let error = Tokens::parse(&text, "t").unwrap_err();
            assert_eq!(error.line, line, "{text:?}: {error}");
        }
    }
}
