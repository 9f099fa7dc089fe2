//! Token files: read, checked (not world-readable, not empty, one line of visible ASCII) and
//! kept as a secret that is compared in constant time and never printed.

use std::path::Path;

use sha2::{Digest as _, Sha256};

/// Fewest characters a token may have. A token guards the line's models and decisions, and a
/// short one can be guessed: 16 random characters is the floor (common practice: 32 bytes
/// from the OS's random source, e.g. `head -c 32 /dev/urandom | base64`).
pub const MIN_TOKEN_LEN: usize = 16;

/// A bearer token. `Debug` shows only that it is set; nothing prints its value.
pub struct Token {
    /// SHA-256 of the token: compared against the digest of what a client sends, so the
    /// comparison takes the same time whatever the lengths and contents.
    digest: [u8; 32],
    /// The token itself, the key of the session cookie's and CSRF token's MACs.
    key: Vec<u8>,
}

impl std::fmt::Debug for Token {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("Token(<redacted>)")
    }
}

impl Token {
    /// A token from its text (already checked).
    pub(crate) fn new(text: &str) -> Token {
        Token { digest: Sha256::digest(text.as_bytes()).into(), key: text.as_bytes().to_vec() }
    }

    /// Whether `presented` is this token, in time independent of where they differ.
    pub fn matches(&self, presented: &str) -> bool {
        let theirs: [u8; 32] = Sha256::digest(presented.as_bytes()).into();
        constant_time_eq(&self.digest, &theirs)
    }

    /// The key for MACs derived from this token.
    pub(crate) fn key(&self) -> &[u8] {
        &self.key
    }
}

/// Equality of two digests without an early exit.
pub(crate) fn constant_time_eq(a: &[u8; 32], b: &[u8; 32]) -> bool {
    let diff = a.iter().zip(b).fold(0u8, |acc, (x, y)| acc | (x ^ y));
    std::hint::black_box(diff) == 0
}

/// Read the token in `path` for the setting `key` (named in every message).
///
/// # Errors
/// Missing or unreadable file, readable by every user, empty, shorter than
/// [`MIN_TOKEN_LEN`], more than one line, or characters a bearer header cannot carry.
pub fn read(key: &str, path: &Path) -> Result<Token, String> {
    let shown = path.display();
    let meta = std::fs::metadata(path).map_err(|e| format!("server.{key} = {shown:?}: cannot read it: {e}"))?;
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt as _;
        let mode = meta.permissions().mode() & 0o777;
        if mode & 0o004 != 0 {
            return Err(format!(
                "server.{key} = {shown:?} is readable by every user (mode {mode:04o}): restrict it with \
                 `chmod 600 {shown}` (or 640 and a group lineside runs in), then start again"
            ));
        }
    }
    if !meta.is_file() {
        return Err(format!("server.{key} = {shown:?} is not a file"));
    }
    let text = std::fs::read_to_string(path).map_err(|e| format!("server.{key} = {shown:?}: cannot read it: {e}"))?;
    let token = text.trim_end_matches(['\n', '\r']);
    if token.trim().is_empty() {
        return Err(format!(
            "server.{key} = {shown:?} is empty: write a token of {MIN_TOKEN_LEN} or more characters into it"
        ));
    }
    if token.contains(['\n', '\r']) {
        return Err(format!("server.{key} = {shown:?} holds more than one line: write the token alone on one line"));
    }
    if let Some(c) = token.chars().find(|c| !c.is_ascii_graphic()) {
        return Err(format!(
            "server.{key} = {shown:?}: the token contains {c:?}; a bearer token is visible ASCII without spaces"
        ));
    }
    if token.len() < MIN_TOKEN_LEN {
        return Err(format!(
            "server.{key} = {shown:?}: the token has {} characters, fewer than {MIN_TOKEN_LEN}; use a long random one \
             (e.g. `head -c 32 /dev/urandom | base64`)",
            token.len()
        ));
    }
    Ok(Token::new(token))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn file(name: &str, text: &str, mode: u32) -> std::path::PathBuf {
        let dir = std::env::temp_dir().join(format!("lineside-token-{}-{name}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let p = dir.join("token");
        std::fs::write(&p, text).unwrap();
        #[cfg(unix)]
        {
            use std::os::unix::fs::PermissionsExt as _;
            std::fs::set_permissions(&p, std::fs::Permissions::from_mode(mode)).unwrap();
        }
        p
    }

    #[test]
    fn a_good_file_gives_a_token_that_matches_only_itself() {
        let t = read("admin_token_file", &file("good", "abcdefghijklmnop0123\n", 0o600)).unwrap();
        assert!(t.matches("abcdefghijklmnop0123"));
        assert!(!t.matches("abcdefghijklmnop012"));
        assert!(!t.matches("abcdefghijklmnop01234"));
        assert!(!t.matches(""));
        assert_eq!(format!("{t:?}"), "Token(<redacted>)");
    }

    #[test]
    fn bad_files_are_refused_with_what_to_do() {
        let cases = [
            ("world", "abcdefghijklmnop0123", 0o644, "readable by every user (mode 0644)"),
            ("empty", "\n", 0o600, "is empty"),
            ("short", "abc", 0o600, "fewer than 16"),
            ("lines", "abcdefghijklmnop0123\nsecond", 0o600, "more than one line"),
            ("space", "abcdefgh ijklmnop0123", 0o600, "visible ASCII"),
        ];
        for (name, text, mode, expected) in cases {
            let e = read("admin_token_file", &file(name, text, mode)).unwrap_err();
            assert!(e.contains(expected) && e.contains("server.admin_token_file"), "{name}: {e}");
            assert!(!e.contains("abcdefghijklmnop"), "{name}: the message shows the token: {e}");
        }
        let e = read("client_token_file", Path::new("/nonexistent/token")).unwrap_err();
        assert!(e.contains("server.client_token_file") && e.contains("/nonexistent/token"), "{e}");
    }
}
