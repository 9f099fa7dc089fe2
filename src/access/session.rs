//! The page's session: a cookie derived from the admin token, and its CSRF token.
//!
//! A page cannot put a bearer header on `<img>` tags or navigation, so a person logs in once
//! with the admin token (`POST /session`) and gets a cookie: `v1.<expiry>.<nonce>.<mac>`,
//! where the MAC is HMAC-SHA256 keyed with the admin token over the expiry and a random
//! nonce. Nothing is stored on the server: a cookie is valid while its MAC checks and its
//! expiry is ahead, so rotating the token ends every session at once. The cookie is
//! `HttpOnly` (scripts cannot read it) and `SameSite=Strict` (other sites' pages cannot send
//! it); calls that change state must also carry the CSRF token, a second MAC over the cookie
//! that the login answer and `GET /session` give to the page's own scripts.

use hmac::{Hmac, Mac as _};
use sha2::Sha256;

use super::token::Token;

/// The cookie's name.
pub const COOKIE: &str = "lineside_session";
/// The header a page's state-changing calls carry the CSRF token in.
pub const CSRF_HEADER: &str = "x-csrf-token";

/// A session's cookie value, its CSRF token and when it ends (Unix seconds).
#[derive(Clone)]
pub struct Session {
    /// The cookie's value.
    pub cookie: String,
    /// The CSRF token for this cookie.
    pub csrf: String,
    /// Expiry, Unix seconds.
    pub expires: u64,
}

impl std::fmt::Debug for Session {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "Session(expires {})", self.expires)
    }
}

/// Why a cookie is not a session.
#[derive(Debug, PartialEq, Eq)]
pub enum Invalid {
    /// Not a cookie lineside made, or made with another token (rotated since).
    Forged,
    /// Its time is over.
    Expired,
}

fn mac(token: &Token, parts: &[&[u8]]) -> [u8; 32] {
    // HMAC accepts keys of any length: this cannot fail.
    let mut m = <Hmac<Sha256>>::new_from_slice(token.key()).unwrap_or_else(|_| unreachable!("HMAC takes any key"));
    for p in parts {
        m.update(p);
        m.update(b"\0");
    }
    m.finalize().into_bytes().into()
}

pub(crate) fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

fn unhex32(text: &str) -> Option<[u8; 32]> {
    if text.len() != 64 {
        return None;
    }
    let mut out = [0u8; 32];
    for (i, o) in out.iter_mut().enumerate() {
        *o = u8::from_str_radix(text.get(2 * i..2 * i + 2)?, 16).ok()?;
    }
    Some(out)
}

/// A new session ending at `expires` (Unix seconds).
///
/// # Errors
/// The OS's random source failed.
pub fn issue(token: &Token, expires: u64) -> Result<Session, String> {
    let mut nonce = [0u8; 16];
    getrandom::fill(&mut nonce).map_err(|e| format!("no random numbers from the OS: {e}"))?;
    let body = format!("v1.{expires}.{}", hex(&nonce));
    let cookie = format!("{body}.{}", hex(&mac(token, &[b"lineside session", body.as_bytes()])));
    let csrf = csrf(token, &cookie);
    Ok(Session { cookie, csrf, expires })
}

/// The CSRF token belonging to `cookie`.
pub fn csrf(token: &Token, cookie: &str) -> String {
    hex(&mac(token, &[b"lineside csrf", cookie.as_bytes()]))
}

/// Check a cookie at time `now` (Unix seconds): its session, or why not.
///
/// # Errors
/// [`Invalid`].
pub fn verify(token: &Token, cookie: &str, now: u64) -> Result<Session, Invalid> {
    let (body, given) = cookie.rsplit_once('.').ok_or(Invalid::Forged)?;
    let given = unhex32(given).ok_or(Invalid::Forged)?;
    let expected = mac(token, &[b"lineside session", body.as_bytes()]);
    if !super::token::constant_time_eq(&expected, &given) {
        return Err(Invalid::Forged);
    }
    let mut parts = body.split('.');
    let (Some("v1"), Some(expires), Some(_nonce), None) = (parts.next(), parts.next(), parts.next(), parts.next())
    else {
        return Err(Invalid::Forged);
    };
    let expires: u64 = expires.parse().map_err(|_| Invalid::Forged)?;
    if expires <= now {
        return Err(Invalid::Expired);
    }
    Ok(Session { cookie: cookie.to_owned(), csrf: csrf(token, cookie), expires })
}

/// Whether `given` is the CSRF token of `session`, in constant time.
pub fn csrf_matches(session: &Session, given: &str) -> bool {
    match (unhex32(&session.csrf), unhex32(given)) {
        (Some(a), Some(b)) => super::token::constant_time_eq(&a, &b),
        _ => false,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_session_verifies_until_it_expires_and_only_with_its_token() {
        let t = Token::new("abcdefghijklmnop0123");
        let s = issue(&t, 1000).unwrap();
        assert!(s.cookie.starts_with("v1.1000."));
        let back = verify(&t, &s.cookie, 999).unwrap();
        assert_eq!(back.csrf, s.csrf);
        assert!(csrf_matches(&back, &s.csrf));
        assert!(!csrf_matches(&back, &csrf(&t, "v1.1000.other")));
        assert_eq!(verify(&t, &s.cookie, 1000).unwrap_err(), Invalid::Expired);
        // Rotated token: every session ends.
        assert_eq!(verify(&Token::new("another-token-0123456"), &s.cookie, 999).unwrap_err(), Invalid::Forged);
        // A longer life written into the cookie breaks its MAC.
        let forged = s.cookie.replacen("v1.1000.", "v1.9000.", 1);
        assert_eq!(verify(&t, &forged, 999).unwrap_err(), Invalid::Forged);
        for junk in ["", ".", "v1", "v1.1000.x.y", &"a".repeat(64)] {
            assert_eq!(verify(&t, junk, 999).unwrap_err(), Invalid::Forged, "{junk}");
        }
    }

    #[test]
    fn the_mac_is_hmac_sha256_as_rfc_4231_defines_it() {
        // RFC 4231, test case 2: key "Jefe", data "what do ya want for nothing?".
        let t = Token::new("Jefe");
        let m = <Hmac<Sha256>>::new_from_slice(t.key()).unwrap().chain_update(b"what do ya want for nothing?");
        assert_eq!(hex(&m.finalize().into_bytes()), "5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843");
    }

    #[test]
    fn two_sessions_differ() {
        let t = Token::new("abcdefghijklmnop0123");
        assert_ne!(issue(&t, 5).unwrap().cookie, issue(&t, 5).unwrap().cookie);
    }
}
