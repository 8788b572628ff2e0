//! Bearer tokens for the project's own service: a file of tokens (or of their SHA-256
//! digests), a check of the `authorization` metadata of each call compared in constant time,
//! and an atomic swap of the whole set when the file is re-read.
//!
//! Health and reflection are deliberately not checked, so that probes and generic tools keep
//! working on a server that requires tokens.
//!
//! # The token file
//! One entry per line; surrounding white space is trimmed; blank lines and lines whose first
//! non-blank character is `#` are ignored. An entry is either the token itself or
//! `sha256:` followed by the 64 hexadecimal digits of the SHA-256 digest of the token's
//! bytes (FIPS 180-4), for example the output of `printf %s "$TOKEN" | sha256sum`. A digest
//! line lets the file be readable by more people than may use the tokens; the digest itself
//! is not accepted as a token.

use std::path::{Path, PathBuf};
use std::sync::{Arc, PoisonError, RwLock};

use ring::digest::{digest, SHA256, SHA256_OUTPUT_LEN};
use tokio::sync::Notify;
use tonic::metadata::MetadataMap;

/// The prefix that marks a digest line in a token file.
pub const DIGEST_PREFIX: &str = "sha256:";

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
    #[error("the token file '{path}' lists no token: put one token (or 'sha256:<64 hex digits>') per line (blank lines and lines starting with '#' are ignored)")]
    Empty {
        /// The file.
        path: PathBuf,
    },
    /// A line starting with `sha256:` that is not 64 hexadecimal digits after it.
    #[error("the token file '{path}' line {line}: {problem}")]
    BadLine {
        /// The file.
        path: PathBuf,
        /// Line number, from 1.
        line: usize,
        /// What is wrong (never the line's text, which may be a secret).
        problem: TokenLineProblem,
    },
}

/// What is wrong with one line of a token file.
#[derive(Clone, Copy, Debug, PartialEq, Eq, thiserror::Error)]
pub enum TokenLineProblem {
    /// `sha256:` followed by something other than 64 hexadecimal digits.
    #[error("a 'sha256:' line needs exactly 64 hexadecimal digits after the colon, found {found} characters")]
    BadDigest {
        /// Characters after the prefix (after trimming).
        found: usize,
    },
}

/// One accepted credential.
#[derive(Clone)]
enum Entry {
    /// The token's bytes.
    Plain(Vec<u8>),
    /// The SHA-256 digest of the token's bytes.
    Sha256([u8; SHA256_OUTPUT_LEN]),
}

/// The tokens a caller may present.
///
/// Clones share one set: [`TokenSet::replace`] on any clone changes, in one step, what every
/// clone accepts (a call checks against either the old set or the new one, never a mix).
#[derive(Clone)]
pub struct TokenSet {
    current: Arc<RwLock<Arc<Vec<Entry>>>>,
}

impl std::fmt::Debug for TokenSet {
    // Never print the tokens themselves.
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        let entries = self.entries();
        let digests = entries
            .iter()
            .filter(|e| matches!(e, Entry::Sha256(_)))
            .count();
        f.debug_struct("TokenSet")
            .field("tokens", &entries.len())
            .field("digests", &digests)
            .finish()
    }
}

impl TokenSet {
    /// Reads a token file (the format is in the [module documentation](self)).
    pub fn from_file(path: &Path) -> Result<Self, TokenFileError> {
        let text = std::fs::read_to_string(path).map_err(|source| TokenFileError::Read {
            path: path.to_path_buf(),
            source,
        })?;
        let set = Self::parse(&text).map_err(|(line, problem)| TokenFileError::BadLine {
            path: path.to_path_buf(),
            line,
            problem,
        })?;
        if set.is_empty() {
            return Err(TokenFileError::Empty {
                path: path.to_path_buf(),
            });
        }
        Ok(set)
    }

    /// Parses the text of a token file (see [`TokenSet::from_file`]); may be empty. A bad
    /// line is reported with its number (from 1).
    pub fn parse(text: &str) -> Result<Self, (usize, TokenLineProblem)> {
        let mut entries = Vec::new();
        for (index, line) in text.lines().enumerate() {
            let line = line.trim();
            if line.is_empty() || line.starts_with('#') {
                continue;
            }
            match line.strip_prefix(DIGEST_PREFIX) {
                Some(hex) => {
                    let hex = hex.trim();
                    let digest = parse_digest(hex).ok_or((
                        index + 1,
                        TokenLineProblem::BadDigest {
                            found: hex.chars().count(),
                        },
                    ))?;
                    entries.push(Entry::Sha256(digest));
                }
                None => entries.push(Entry::Plain(line.as_bytes().to_vec())),
            }
        }
        Ok(Self {
            current: Arc::new(RwLock::new(Arc::new(entries))),
        })
    }

    /// The entries in force now; the lock is held only to clone the `Arc`.
    fn entries(&self) -> Arc<Vec<Entry>> {
        Arc::clone(&self.current.read().unwrap_or_else(PoisonError::into_inner))
    }

    /// Makes every clone of this set accept exactly what `other` accepts now, in one step.
    pub fn replace(&self, other: &TokenSet) {
        let next = other.entries();
        *self.current.write().unwrap_or_else(PoisonError::into_inner) = next;
    }

    /// Number of entries (tokens and digests) held.
    pub fn len(&self) -> usize {
        self.entries().len()
    }

    /// True when no token is held (then no caller is accepted).
    pub fn is_empty(&self) -> bool {
        self.entries().is_empty()
    }

    /// True when `candidate` is one of the tokens, or its SHA-256 digest is one of the
    /// digests. Every entry is compared, each in time that depends only on the lengths, so
    /// the answer does not leak which entry or which bytes matched.
    pub fn contains(&self, candidate: &[u8]) -> bool {
        let entries = self.entries();
        let candidate_digest = digest(&SHA256, candidate);
        let candidate_digest = candidate_digest.as_ref();
        let mut found = 0u8;
        for entry in entries.iter() {
            let hit = match entry {
                Entry::Plain(token) => constant_time_eq(token, candidate),
                Entry::Sha256(d) => constant_time_eq(d, candidate_digest),
            };
            found |= u8::from(hit);
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

/// 64 hexadecimal digits (either case) to 32 bytes.
fn parse_digest(hex: &str) -> Option<[u8; SHA256_OUTPUT_LEN]> {
    let bytes = hex.as_bytes();
    if bytes.len() != 2 * SHA256_OUTPUT_LEN {
        return None;
    }
    let nibble = |c: u8| (c as char).to_digit(16).and_then(|d| u8::try_from(d).ok());
    let mut out = [0u8; SHA256_OUTPUT_LEN];
    for (i, pair) in bytes.chunks_exact(2).enumerate() {
        out[i] = (nibble(pair[0])? << 4) | nibble(pair[1])?;
    }
    Some(out)
}

/// A request to re-read the server's files (the token file, the guidance settings file),
/// shared between whoever notices the need (the command line on SIGHUP) and the server task
/// that re-reads. Requests made while no one waits are remembered (one at a time), so none
/// is lost between two reloads.
#[derive(Clone, Debug, Default)]
pub struct ReloadSignal {
    notify: Arc<Notify>,
}

impl ReloadSignal {
    /// A new signal with no request pending.
    pub fn new() -> Self {
        Self::default()
    }

    /// Asks for the files to be re-read.
    pub fn request(&self) {
        self.notify.notify_one();
    }

    /// Resolves at the next request (at once when one is pending).
    pub async fn requested(&self) {
        self.notify.notified().await;
    }
}

/// Re-reads `path` into `tokens` on every request of `signal`, forever. A file that cannot be
/// used is logged and the tokens in force stay in force.
pub async fn reload_on_request(tokens: TokenSet, path: PathBuf, signal: ReloadSignal) {
    loop {
        signal.requested().await;
        reload_tokens(&tokens, &path).await;
    }
}

/// Re-reads `path` into `tokens` once; a file that cannot be used is logged and the tokens in
/// force stay in force.
pub(crate) async fn reload_tokens(tokens: &TokenSet, path: &std::path::Path) {
    // Reading a small file; done on a blocking thread all the same, as a token file may sit
    // on a slow network mount.
    let read_path = path.to_path_buf();
    let read = tokio::task::spawn_blocking(move || TokenSet::from_file(&read_path)).await;
    match read {
        Ok(Ok(next)) => {
            tokens.replace(&next);
            tracing::info!(file = %path.display(), entries = next.len(), "token file re-read; the new tokens are in force");
        }
        Ok(Err(error)) => {
            tracing::warn!(%error, "token file not re-read; the previous tokens stay in force");
        }
        Err(error) => {
            tracing::warn!(%error, "token file re-read failed; the previous tokens stay in force");
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

    /// SHA-256("abc"), the first example of FIPS 180-2 Appendix B.1 (also in FIPS 180-4's
    /// published examples).
    const ABC_DIGEST: &str = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad";
    /// SHA-256 of the 56-byte message "abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq",
    /// FIPS 180-2 Appendix B.2.
    const TWO_BLOCK_DIGEST: &str =
        "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1";
    const TWO_BLOCK_MESSAGE: &str = "abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq";

    fn with_auth(value: &str) -> MetadataMap {
        let mut m = MetadataMap::new();
        m.insert("authorization", MetadataValue::try_from(value).unwrap());
        m
    }

    #[test]
    fn parses_tokens_skipping_comments_and_blank_lines() {
        let set = TokenSet::parse("# forecasters\n\n  alpha-1  \n#beta\nbeta-2\n").unwrap();
        assert_eq!(set.len(), 2);
        assert!(set.contains(b"alpha-1"));
        assert!(set.contains(b"beta-2"));
        assert!(!set.contains(b"#beta"));
        assert!(!set.contains(b"alpha-"));
        assert!(!set.contains(b"alpha-11"));
        assert!(!set.contains(b""));
    }

    #[test]
    fn digest_lines_accept_the_token_whose_digest_they_hold() {
        // Digests from FIPS 180-2 Appendix B; upper case hex and spaces after the colon are
        // accepted too.
        let text = format!(
            "sha256:{ABC_DIGEST}\nsha256: {}\n",
            TWO_BLOCK_DIGEST.to_uppercase()
        );
        let set = TokenSet::parse(&text).unwrap();
        assert_eq!(set.len(), 2);
        assert!(set.contains(b"abc"));
        assert!(set.contains(TWO_BLOCK_MESSAGE.as_bytes()));
        assert!(!set.contains(b"abd"));
        assert!(!set.contains(b"ab"));
        // The digest is not itself a token.
        assert!(!set.contains(ABC_DIGEST.as_bytes()));
        assert!(!set.contains(format!("sha256:{ABC_DIGEST}").as_bytes()));
        assert!(set.check(&with_auth("Bearer abc")).is_ok());
    }

    #[test]
    fn a_malformed_digest_line_is_refused_with_its_line_number_only() {
        for (text, found) in [
            ("ok\nsha256:abc\n", 3),
            ("ok\nsha256:\n", 0),
            // 64 characters, one not hexadecimal.
            (&*format!("ok\nsha256:{}g\n", &ABC_DIGEST[..63]), 64),
        ] {
            assert_eq!(
                TokenSet::parse(text).err(),
                Some((2, TokenLineProblem::BadDigest { found })),
                "{text}"
            );
        }
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("tokens");
        std::fs::write(&p, "# office\nsha256:c0ffee-secret\n").unwrap();
        let e = TokenSet::from_file(&p).unwrap_err().to_string();
        assert!(e.contains("line 2") && e.contains("tokens"), "{e}");
        assert!(!e.contains("c0ffee"), "the line's text is not echoed: {e}");
    }

    #[test]
    fn replace_changes_every_clone_at_once() {
        let set = TokenSet::parse("old\n").unwrap();
        let held_by_handlers = set.clone();
        set.replace(&TokenSet::parse(&format!("sha256:{ABC_DIGEST}\nnew\n")).unwrap());
        assert!(!held_by_handlers.contains(b"old"));
        assert!(held_by_handlers.contains(b"new"));
        assert!(held_by_handlers.contains(b"abc"));
        assert_eq!(held_by_handlers.len(), 2);
        assert_eq!(
            format!("{held_by_handlers:?}"),
            "TokenSet { tokens: 2, digests: 1 }"
        );
    }

    #[tokio::test]
    async fn reload_requests_swap_good_files_and_keep_the_old_set_on_bad_ones() {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join("tokens");
        std::fs::write(&p, "first\n").unwrap();
        let set = TokenSet::from_file(&p).unwrap();
        let signal = ReloadSignal::new();
        let task = tokio::spawn(reload_on_request(set.clone(), p.clone(), signal.clone()));
        let wait_for = |want: &'static [u8], expected: bool| {
            let set = set.clone();
            async move {
                for _ in 0..200 {
                    if set.contains(want) == expected {
                        return true;
                    }
                    tokio::time::sleep(std::time::Duration::from_millis(10)).await;
                }
                false
            }
        };
        std::fs::write(&p, "second\n").unwrap();
        signal.request();
        assert!(wait_for(b"second", true).await);
        assert!(!set.contains(b"first"));
        // An empty file and a bad digest line both leave "second" in force.
        for bad in ["# nothing\n", "sha256:00\n"] {
            std::fs::write(&p, bad).unwrap();
            signal.request();
            tokio::time::sleep(std::time::Duration::from_millis(100)).await;
            assert!(set.contains(b"second"), "{bad}");
        }
        std::fs::remove_file(&p).unwrap();
        signal.request();
        tokio::time::sleep(std::time::Duration::from_millis(100)).await;
        assert!(set.contains(b"second"));
        task.abort();
    }

    #[test]
    fn checks_the_bearer_scheme_and_the_token() {
        let set = TokenSet::parse("s3cret\n").unwrap();
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
