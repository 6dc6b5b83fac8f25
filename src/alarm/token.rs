//! The bearer token that guards operator actions (acknowledge, re-learn a
//! baseline, reload).
//!
//! The token comes from a file (first line, surrounding white space
//! trimmed) or from an environment variable. Requests carry it as
//! `Authorization: Bearer <token>`. The comparison takes the same time
//! whatever the presented token is (it depends only on the expected token's
//! length), so response times reveal nothing about how much of a guess was
//! right. No dependency: a byte-wise XOR folded with OR, behind
//! `std::hint::black_box` so the optimiser cannot turn it into an early
//! exit.

use std::fmt;
use std::path::{Path, PathBuf};

pub use crate::config::alarms::TokenSource;

/// Shortest token accepted (bytes). 16 random bytes in hex are 32.
pub const MIN_TOKEN_LEN: usize = 16;

/// A loaded token. Its `Debug` never shows the secret.
#[derive(Clone)]
pub struct Token {
    secret: Vec<u8>,
}

impl fmt::Debug for Token {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "Token(<{} bytes>)", self.secret.len())
    }
}

#[derive(Debug, thiserror::Error, PartialEq, Eq)]
pub enum TokenError {
    #[error("cannot read token file {path}: {message}")]
    File { path: PathBuf, message: String },
    #[error("environment variable {0} is not set or not valid UTF-8")]
    Env(String),
    #[error("token from {from} is {len} bytes; at least {MIN_TOKEN_LEN} are needed")]
    TooShort { from: String, len: usize },
    #[error("token from {from} contains white space or control characters")]
    BadChars { from: String },
}

impl Token {
    /// A token from its text, checked: at least [`MIN_TOKEN_LEN`] bytes,
    /// printable ASCII without spaces (what a header can carry).
    ///
    /// # Errors
    /// [`TokenError::TooShort`], [`TokenError::BadChars`].
    pub fn new(text: &str, from: &str) -> Result<Token, TokenError> {
        if text.len() < MIN_TOKEN_LEN {
            return Err(TokenError::TooShort {
                from: from.to_string(),
                len: text.len(),
            });
        }
        if !text.bytes().all(|b| b.is_ascii_graphic()) {
            return Err(TokenError::BadChars {
                from: from.to_string(),
            });
        }
        Ok(Token {
            secret: text.as_bytes().to_vec(),
        })
    }

    /// Loads the token.
    ///
    /// # Errors
    /// The file cannot be read, the variable is unset, or the token is not
    /// acceptable (see [`Token::new`]).
    pub fn load(source: &TokenSource) -> Result<Token, TokenError> {
        match source {
            TokenSource::File(path) => {
                let text = read_file(path)?;
                let first = text.lines().next().unwrap_or("").trim();
                Token::new(first, &path.display().to_string())
            }
            TokenSource::Env(var) => {
                let v = std::env::var(var).map_err(|_| TokenError::Env(var.clone()))?;
                Token::new(v.trim(), &format!("${var}"))
            }
        }
    }

    /// Whether `presented` is the token, in constant time.
    pub fn matches(&self, presented: &[u8]) -> bool {
        constant_time_eq(&self.secret, presented)
    }

    /// Whether an `Authorization` header value carries the token. A missing
    /// header, another scheme or a wrong token: false.
    pub fn authorizes(&self, authorization: Option<&str>) -> bool {
        match authorization.and_then(parse_bearer) {
            Some(t) => self.matches(t.as_bytes()),
            None => {
                // Same work as a wrong token, so absence is not faster.
                let _ = constant_time_eq(&self.secret, b"");
                false
            }
        }
    }
}

fn read_file(path: &Path) -> Result<String, TokenError> {
    std::fs::read_to_string(path).map_err(|e| TokenError::File {
        path: path.to_path_buf(),
        message: e.to_string(),
    })
}

/// Compares `expected` with `given` in time that depends only on
/// `expected.len()`: every byte of `expected` is visited, and the length
/// difference is folded in.
pub fn constant_time_eq(expected: &[u8], given: &[u8]) -> bool {
    let mut diff: u64 = (expected.len() ^ given.len()) as u64;
    for (i, &e) in expected.iter().enumerate() {
        // Past the end of `given`, compare with 0 (diff already non-zero).
        let g = std::hint::black_box(given.get(i).copied().unwrap_or(0));
        diff |= u64::from(e ^ g);
    }
    std::hint::black_box(diff) == 0
}

/// The token of an `Authorization: Bearer <token>` header value. The
/// scheme is case-insensitive (RFC 7235 §2.1); one or more spaces separate
/// it from the token; the token itself must be non-empty and has no
/// spaces.
pub fn parse_bearer(value: &str) -> Option<&str> {
    let value = value.trim();
    let (scheme, rest) = value.split_once(' ')?;
    if !scheme.eq_ignore_ascii_case("bearer") {
        return None;
    }
    let token = rest.trim_start();
    if token.is_empty() || token.contains(|c: char| c.is_ascii_whitespace()) {
        return None;
    }
    Some(token)
}
