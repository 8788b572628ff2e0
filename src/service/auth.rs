//! Bearer tokens for the project's own service: a file of tokens, and a check of the
//! `authorization` metadata of each call, compared in constant time.
//!
//! Health and reflection are deliberately not checked, so that probes and generic tools keep
//! working on a server that requires tokens.

use std::path::{Path, PathBuf};

use tonic::metadata::MetadataMap;

/// Why a token file could not be used.
#[derive(Debug, thiserror::Error)]
pub enum TokenFileError {
    /// The file could not be read.
    #[error("cannot read the token file '{path}': {source}")]
    Read {
        /// The file.
        path: PathBuf,
        /// The operating system's error.
        #[source]
        source: std::io::Error,
    },
    /// The file holds no token, so that every call would be refused.
    #[error("the token file '{path}' lists no token: put one token per line (blank lines and lines starting with '#' are ignored)")]
    Empty {
        /// The file.
        path: PathBuf,
    },
}

/// The tokens a caller may present.
#[derive(Clone)]
pub struct TokenSet {
    tokens: Vec<Vec<u8>>,
}

impl std::fmt::Debug for TokenSet {
    // Never print the tokens themselves.
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("TokenSet")
            .field("tokens", &self.tokens.len())
            .finish()
    }
}

impl TokenSet {
    /// Reads a token file: one token per line; surrounding white space is trimmed; blank lines
    /// and lines whose first non-blank character is `#` are ignored.
    pub fn from_file(path: &Path) -> Result<Self, TokenFileError> {
        let text = std::fs::read_to_string(path).map_err(|source| TokenFileError::Read {
            path: path.to_path_buf(),
            source,
        })?;
        let set = Self::parse(&text);
        if set.tokens.is_empty() {
            return Err(TokenFileError::Empty {
                path: path.to_path_buf(),
            });
        }
        Ok(set)
    }

    /// Parses the text of a token file (see [`TokenSet::from_file`]); may be empty.
    pub fn parse(text: &str) -> Self {
        let tokens = text
            .lines()
            .map(str::trim)
            .filter(|l| !l.is_empty() && !l.starts_with('#'))
            .map(|l| l.as_bytes().to_vec())
            .collect();
        Self { tokens }
    }

    /// Number of tokens held.
    pub fn len(&self) -> usize {
        self.tokens.len()
    }

    /// True when no token is held (then no caller is accepted).
    pub fn is_empty(&self) -> bool {
        self.tokens.is_empty()
    }

    /// True when `candidate` is one of the tokens. Every token is compared, each in time
    /// that depends only on the lengths, so the answer does not leak which bytes matched.
    pub fn contains(&self, candidate: &[u8]) -> bool {
        let mut found = 0u8;
        for token in &self.tokens {
            found |= u8::from(constant_time_eq(token, candidate));
        }
        found == 1
    }

    /// Checks the `authorization: Bearer <token>` metadata of a call.
    pub fn check(&self, metadata: &MetadataMap) -> Result<(), AuthFailure> {
        let value = metadata.get("authorization").ok_or(AuthFailure::Missing)?;
        let token = strip_bearer(value.as_bytes()).ok_or(AuthFailure::NotBearer)?;
        if self.contains(token) {
            Ok(())
        } else {
            Err(AuthFailure::UnknownToken)
        }
    }
}

/// Why a call was not authenticated (mapped to `UNAUTHENTICATED` in [`super::status`]).
#[derive(Clone, Copy, Debug, PartialEq, Eq, thiserror::Error)]
pub enum AuthFailure {
    /// No `authorization` metadata.
    #[error("authorization: missing: send metadata 'authorization: Bearer <token>'")]
    Missing,
    /// Metadata present but not `Bearer <token>`.
    #[error("authorization: expected 'Bearer <token>'")]
    NotBearer,
    /// A token that is not in the server's token file.
    #[error("authorization: the token is not one the server accepts")]
    UnknownToken,
}

/// The token after a case-insensitive `Bearer ` scheme (RFC 6750 §2.1), trimmed.
fn strip_bearer(value: &[u8]) -> Option<&[u8]> {
    const SCHEME: &[u8] = b"bearer ";
    if value.len() < SCHEME.len() || !value[..SCHEME.len()].eq_ignore_ascii_case(SCHEME) {
        return None;
    }
    let token = value[SCHEME.len()..].trim_ascii();
    (!token.is_empty()).then_some(token)
}

/// Compares two byte strings in time that depends only on their lengths.
fn constant_time_eq(a: &[u8], b: &[u8]) -> bool {
    let n = a.len().max(b.len());
    let mut diff = u8::from(a.len() != b.len());
    for i in 0..n {
        let x = a.get(i).copied().unwrap_or(0);
        let y = b.get(i).copied().unwrap_or(0);
        diff |= x ^ y;
    }
    diff == 0
}

#[cfg(test)]
mod tests {
    use super::*;
    use tonic::metadata::MetadataValue;

    fn with_auth(value: &str) -> MetadataMap {
        let mut m = MetadataMap::new();
        m.insert("authorization", MetadataValue::try_from(value).unwrap());
        m
    }

    #[test]
    fn parses_tokens_skipping_comments_and_blank_lines() {
        let set = TokenSet::parse("# forecasters\n\n  alpha-1  \n#beta\nbeta-2\n");
        assert_eq!(set.len(), 2);
        assert!(set.contains(b"alpha-1"));
        assert!(set.contains(b"beta-2"));
        assert!(!set.contains(b"#beta"));
        assert!(!set.contains(b"alpha-"));
        assert!(!set.contains(b"alpha-11"));
        assert!(!set.contains(b""));
    }

    #[test]
    fn checks_the_bearer_scheme_and_the_token() {
        let set = TokenSet::parse("s3cret\n");
        assert!(set.check(&with_auth("Bearer s3cret")).is_ok());
        assert!(set.check(&with_auth("bearer s3cret")).is_ok());
        assert_eq!(
            set.check(&with_auth("Bearer nope")),
            Err(AuthFailure::UnknownToken)
        );
        assert_eq!(
            set.check(&with_auth("Bearer s3cre")),
            Err(AuthFailure::UnknownToken)
        );
        for bad in ["Basic s3cret", "s3cret", "Bearer ", "Bearer"] {
            assert_eq!(
                set.check(&with_auth(bad)),
                Err(AuthFailure::NotBearer),
                "{bad}"
            );
        }
        assert_eq!(set.check(&MetadataMap::new()), Err(AuthFailure::Missing));
        assert!(AuthFailure::Missing
            .to_string()
            .starts_with("authorization"));
    }

    #[test]
    fn an_empty_or_missing_file_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("tokens");
        std::fs::write(&p, "# none yet\n\n").unwrap();
        assert!(matches!(
            TokenSet::from_file(&p),
            Err(TokenFileError::Empty { .. })
        ));
        assert!(matches!(
            TokenSet::from_file(&dir.path().join("absent")),
            Err(TokenFileError::Read { .. })
        ));
        std::fs::write(&p, "t1\n").unwrap();
        assert_eq!(TokenSet::from_file(&p).unwrap().len(), 1);
    }

    #[test]
    fn constant_time_eq_agrees_with_equality() {
        for (a, b) in [
            ("", ""),
            ("a", ""),
            ("abc", "abc"),
            ("abc", "abd"),
            ("ab", "abc"),
        ] {
            assert_eq!(
                constant_time_eq(a.as_bytes(), b.as_bytes()),
                a == b,
                "{a} {b}"
            );
        }
    }
}
