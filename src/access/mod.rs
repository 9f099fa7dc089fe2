//! Who may do what: the admin token for actions that change state, the optional client token
//! for routes that run a model on a client's frame, the page's session cookie, and TLS.
//!
//! One rule for every admin action ([`Access::admin`]):
//! - with `admin_token_file`: `Authorization: Bearer <admin token>`, or a page session (the
//!   cookie from `POST /session`, plus the CSRF header on calls that change state);
//! - without it: only loopback peers (127.0.0.1 or ::1 exactly, judged by the peer's address,
//!   not the listen address), and never from another site's page (`Origin` must match
//!   `Host`; `Sec-Fetch-Site: cross-site` is refused).
//!
//! Missing or malformed credentials: 401 `unauthorized`; wrong ones, or a remote peer with no
//! token configured: 403 `forbidden`. Tokens are compared in constant time, never logged, and
//! re-read on SIGHUP ([`Access::reload`]). docs/security.md is the operator's view.

pub mod session;
pub mod tls;
pub mod token;

use std::net::{IpAddr, SocketAddr};
use std::path::PathBuf;
use std::sync::RwLock;
use std::time::Duration;

use axum::http::{HeaderMap, Method, header};

use token::Token;

/// `[server]` access settings, paths resolved against the config's folder.
#[derive(Debug, Clone, Default)]
pub struct AccessConfig {
    /// `admin_token_file`: the token admin actions need; `None`: loopback peers only.
    pub admin_token_file: Option<PathBuf>,
    /// `client_token_file`: when set, classify needs this token (or the admin token).
    pub client_token_file: Option<PathBuf>,
    /// `session_minutes`: how long a page session lasts.
    pub session: Duration,
    /// `tls_cert` + `tls_key` (+ `tls_client_ca`): serve HTTPS.
    pub tls: Option<tls::TlsFiles>,
}

/// The tokens in force.
#[derive(Debug, Default)]
struct Secrets {
    admin: Option<Token>,
    client: Option<Token>,
}

/// Access control, shared by every connection; the tokens and certificates inside are
/// replaced whole on a re-read.
#[derive(Debug)]
pub struct Access {
    config: AccessConfig,
    secrets: RwLock<Secrets>,
    tls: Option<tls::Tls>,
}

/// How an admin request was let in (for the audit line in the log).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Grant {
    /// The admin bearer token.
    Bearer,
    /// A page session cookie (with the CSRF header where needed).
    Session,
    /// A loopback peer, no admin token configured.
    Loopback,
}

impl Grant {
    /// As the log and `GET /session` name it.
    pub fn as_str(self) -> &'static str {
        match self {
            Grant::Bearer => "bearer",
            Grant::Session => "session",
            Grant::Loopback => "loopback",
        }
    }
}

/// Why a request is refused.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Denied {
    /// 401: no credentials, or malformed ones, or an expired session.
    Unauthorized(String),
    /// 403: the credentials are wrong, or the peer may not do this at all.
    Forbidden(String),
}

/// Where a request came from, put into each request by the accept loop. Requests without
/// one (tests that call the router directly) count as remote.
#[derive(Debug, Clone, Copy)]
pub struct Peer(pub SocketAddr);

/// Whether `ip` is this host's loopback address (127.0.0.1 or ::1, IPv4-mapped included).
/// Other 127.x addresses count as remote: the narrowest reading of "the same box".
pub fn is_loopback(ip: IpAddr) -> bool {
    match ip {
        IpAddr::V4(v4) => v4 == std::net::Ipv4Addr::LOCALHOST,
        IpAddr::V6(v6) => {
            v6 == std::net::Ipv6Addr::LOCALHOST || v6.to_ipv4_mapped() == Some(std::net::Ipv4Addr::LOCALHOST)
        }
    }
}

impl Access {
    /// Read the token files and certificates.
    ///
    /// # Errors
    /// A token file that is missing, world-readable, empty or malformed; TLS files that do
    /// not load ([`tls::Tls::load`]).
    pub fn load(config: AccessConfig) -> Result<Access, String> {
        let secrets = read_secrets(&config)?;
        let tls = config.tls.clone().map(tls::Tls::load).transpose()?;
        Ok(Access { config, secrets: RwLock::new(secrets), tls })
    }

    /// No tokens, no TLS: admin actions from loopback only (tests and `ready_app`).
    pub fn open() -> Access {
        Access { config: AccessConfig::default(), secrets: RwLock::new(Secrets::default()), tls: None }
    }

    /// Re-read the token files and certificates (SIGHUP). Each part that reads cleanly
    /// replaces the old one; one that fails keeps the old one, and the error says which.
    ///
    /// # Errors
    /// Every part that failed, in one message.
    pub fn reload(&self) -> Result<(), String> {
        let c = &self.config;
        let admin = c.admin_token_file.as_deref().map(|p| token::read("admin_token_file", p));
        let client = c.client_token_file.as_deref().map(|p| token::read("client_token_file", p));
        let mut failed = Vec::new();
        {
            let mut s = self.write();
            let key_after = |new: &Option<Result<Token, String>>, old: &Option<Token>| match new {
                Some(Ok(t)) => Some(t.key().to_vec()),
                _ => old.as_ref().map(|t| t.key().to_vec()),
            };
            let same =
                key_after(&admin, &s.admin).is_some() && key_after(&admin, &s.admin) == key_after(&client, &s.client);
            if same {
                failed.push(
                    "server.admin_token_file and server.client_token_file would hold the same token: both previous \
                     tokens stay in force"
                        .to_owned(),
                );
            } else {
                let s = &mut *s;
                for (new, slot) in [(admin, &mut s.admin), (client, &mut s.client)] {
                    match new {
                        Some(Ok(t)) => *slot = Some(t),
                        Some(Err(e)) => failed.push(format!("{e} (the previous token stays in force)")),
                        None => {}
                    }
                }
            }
        }
        if let Some(tls) = &self.tls
            && let Err(e) = tls.reload()
        {
            failed.push(format!("{e} (the previous certificate stays in use)"));
        }
        if failed.is_empty() { Ok(()) } else { Err(failed.join("; ")) }
    }

    fn read(&self) -> std::sync::RwLockReadGuard<'_, Secrets> {
        self.secrets.read().unwrap_or_else(std::sync::PoisonError::into_inner)
    }

    fn write(&self) -> std::sync::RwLockWriteGuard<'_, Secrets> {
        self.secrets.write().unwrap_or_else(std::sync::PoisonError::into_inner)
    }

    /// TLS, when configured.
    pub fn tls(&self) -> Option<&tls::Tls> {
        self.tls.as_ref()
    }

    /// Whether an admin token is configured (else admin actions are loopback-only).
    pub fn has_admin_token(&self) -> bool {
        self.config.admin_token_file.is_some()
    }

    /// Whether classify needs a client token.
    pub fn has_client_token(&self) -> bool {
        self.config.client_token_file.is_some()
    }

    /// How long a page session lasts.
    pub fn session_length(&self) -> Duration {
        self.config.session
    }

    /// The admin rule, for a request with these headers and method from `peer`.
    ///
    /// # Errors
    /// [`Denied`] with a message that says what to send instead.
    pub fn admin(&self, headers: &HeaderMap, method: &Method, peer: Option<IpAddr>, now: u64) -> Result<Grant, Denied> {
        let secrets = self.read();
        let Some(admin) = &secrets.admin else {
            return loopback_only(headers, peer);
        };
        if let Some(presented) = bearer(headers)? {
            return if admin.matches(presented) {
                Ok(Grant::Bearer)
            } else {
                Err(Denied::Forbidden("the bearer token is not the admin token".into()))
            };
        }
        let Some(cookie) = cookie(headers, session::COOKIE) else {
            return Err(Denied::Unauthorized(
                "this action needs the admin token: send `Authorization: Bearer <token>`, or log in at /login".into(),
            ));
        };
        let s = session::verify(admin, cookie, now).map_err(|e| match e {
            session::Invalid::Expired => Denied::Unauthorized("the session has expired: log in again at /login".into()),
            session::Invalid::Forged => Denied::Unauthorized(
                "the session cookie is not valid (the admin token may have been rotated): log in again at /login"
                    .into(),
            ),
        })?;
        if changes_state(method) {
            let given = headers.get(session::CSRF_HEADER).and_then(|v| v.to_str().ok()).unwrap_or("");
            if !session::csrf_matches(&s, given) {
                return Err(Denied::Forbidden(format!(
                    "a session's {method} needs the `X-CSRF-Token` header with the token from GET /session"
                )));
            }
        }
        Ok(Grant::Session)
    }

    /// The client rule for routes that run a model on a client's frame: with
    /// `client_token_file`, the client token or the admin token (bearer, or a page session);
    /// without it, everyone.
    ///
    /// # Errors
    /// [`Denied`].
    pub fn client(&self, headers: &HeaderMap, now: u64) -> Result<(), Denied> {
        let secrets = self.read();
        let Some(client) = &secrets.client else { return Ok(()) };
        let admin = secrets.admin.as_ref();
        if let Some(presented) = bearer(headers)? {
            return if client.matches(presented) || admin.is_some_and(|a| a.matches(presented)) {
                Ok(())
            } else {
                Err(Denied::Forbidden("the bearer token is neither the client token nor the admin token".into()))
            };
        }
        if let (Some(a), Some(c)) = (admin, cookie(headers, session::COOKIE))
            && session::verify(a, c, now).is_ok()
        {
            return Ok(());
        }
        Err(Denied::Unauthorized("this route needs the client token: send `Authorization: Bearer <token>`".into()))
    }

    /// Log in with the admin token: a new session.
    ///
    /// # Errors
    /// [`Denied::Forbidden`] for a wrong token or when no admin token is configured; the
    /// OS's random source failing is reported the same way.
    pub fn login(&self, presented: &str, now: u64) -> Result<session::Session, Denied> {
        let secrets = self.read();
        let Some(admin) = &secrets.admin else {
            return Err(Denied::Forbidden(
                "no admin_token_file is configured: admin actions are open to loopback peers without logging in".into(),
            ));
        };
        if !admin.matches(presented) {
            return Err(Denied::Forbidden("that is not the admin token".into()));
        }
        session::issue(admin, now + self.config.session.as_secs()).map_err(Denied::Forbidden)
    }

    /// The session a request's cookie holds, if valid (for `GET /session`).
    pub fn session_of(&self, headers: &HeaderMap, now: u64) -> Option<session::Session> {
        let secrets = self.read();
        session::verify(secrets.admin.as_ref()?, cookie(headers, session::COOKIE)?, now).ok()
    }
}

fn read_secrets(config: &AccessConfig) -> Result<Secrets, String> {
    let admin = config.admin_token_file.as_deref().map(|p| token::read("admin_token_file", p)).transpose()?;
    let client = config.client_token_file.as_deref().map(|p| token::read("client_token_file", p)).transpose()?;
    if let (Some(a), Some(c)) = (&admin, &client)
        && a.key() == c.key()
    {
        return Err("server.admin_token_file and server.client_token_file hold the same token: give cameras a token \
                    of their own, so that one leaked from a camera PC cannot change the models"
            .into());
    }
    Ok(Secrets { admin, client })
}

/// No admin token: loopback peers only, and not from another site's page.
fn loopback_only(headers: &HeaderMap, peer: Option<IpAddr>) -> Result<Grant, Denied> {
    match peer {
        Some(ip) if is_loopback(ip) => {}
        Some(ip) => {
            return Err(Denied::Forbidden(format!(
                "admin actions from {ip} need an admin token: set [server] admin_token_file (without one, only \
                 127.0.0.1 and ::1 may use them)"
            )));
        }
        None => {
            return Err(Denied::Forbidden("the peer's address is unknown; admin actions need an admin token".into()));
        }
    }
    if cross_site(headers) {
        return Err(Denied::Forbidden("a page of another site may not use admin actions".into()));
    }
    // A page served under another name that resolves to 127.0.0.1 (DNS rebinding) is
    // same-origin to itself: only requests addressed to this box by a loopback name pass.
    if let Some(host) = headers.get(header::HOST) {
        let host = host.to_str().unwrap_or("");
        if !loopback_host(host) {
            return Err(Denied::Forbidden(format!(
                "admin actions without an admin token must be addressed to 127.0.0.1, [::1] or localhost, not {host:?}"
            )));
        }
    }
    Ok(Grant::Loopback)
}

/// Whether a `Host` value names this box's loopback (with or without a port).
fn loopback_host(host: &str) -> bool {
    let name = match host.strip_prefix('[') {
        Some(rest) => rest.split(']').next().unwrap_or(""),
        None => {
            host.rsplit_once(':').filter(|(_, port)| port.bytes().all(|b| b.is_ascii_digit())).map_or(host, |(h, _)| h)
        }
    };
    name == "127.0.0.1" || name == "::1" || name.eq_ignore_ascii_case("localhost")
}

/// A browser's request started by a page of another origin.
fn cross_site(headers: &HeaderMap) -> bool {
    let fetch_site = headers.get("sec-fetch-site").and_then(|v| v.to_str().ok());
    if fetch_site.is_some_and(|s| s.eq_ignore_ascii_case("cross-site")) {
        return true;
    }
    let Some(origin) = headers.get(header::ORIGIN) else { return false };
    let host = headers.get(header::HOST).and_then(|v| v.to_str().ok());
    let origin_host = origin.to_str().ok().and_then(|o| o.split_once("://")).map(|(_, h)| h.trim_end_matches('/'));
    origin_host.is_none() || origin_host != host
}

fn changes_state(method: &Method) -> bool {
    !matches!(*method, Method::GET | Method::HEAD | Method::OPTIONS)
}

/// The bearer token of an `Authorization` header: `None` without the header.
fn bearer(headers: &HeaderMap) -> Result<Option<&str>, Denied> {
    let Some(value) = headers.get(header::AUTHORIZATION) else { return Ok(None) };
    let malformed = || Denied::Unauthorized("malformed Authorization header: expected `Bearer <token>`".into());
    let text = value.to_str().map_err(|_| malformed())?;
    let (scheme, token) = text.split_once(' ').ok_or_else(malformed)?;
    let token = token.trim_start_matches(' ');
    if !scheme.eq_ignore_ascii_case("bearer") || token.is_empty() || token.contains(' ') {
        return Err(malformed());
    }
    Ok(Some(token))
}

/// The value of cookie `name`, if the request carries it.
fn cookie<'h>(headers: &'h HeaderMap, name: &str) -> Option<&'h str> {
    headers
        .get_all(header::COOKIE)
        .iter()
        .filter_map(|v| v.to_str().ok())
        .flat_map(|v| v.split(';'))
        .filter_map(|pair| pair.trim().split_once('='))
        .find(|(k, _)| *k == name)
        .map(|(_, v)| v)
}

#[cfg(test)]
mod tests;
