//! The access rules as route layers, the page's login (`GET /login`, `POST /session`,
//! `GET /session`, `DELETE /session`), and the first admin action, `PUT /log-filter`.
//!
//! Handlers stay thin: the rules live in [`crate::access`]; this module reads the request's
//! peer and headers, answers the error kinds, and writes the audit line (path, peer, how the
//! request was let in; never a token).

use std::sync::Arc;

use axum::Json;
use axum::extract::{Request, State};
use axum::http::{HeaderValue, StatusCode, header};
use axum::middleware::Next;
use axum::response::{Html, IntoResponse, Response};
use serde::{Deserialize, Serialize};

use super::error::{ApiError, ErrorKind};
use super::state::AppState;
use crate::access::{Grant, Peer, session};

/// Unix seconds now.
pub(crate) fn now() -> u64 {
    std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map(|d| d.as_secs()).unwrap_or(0)
}

fn peer_of(req: &Request) -> Option<Peer> {
    req.extensions().get::<Peer>().copied()
}

fn shown(peer: Option<Peer>) -> String {
    peer.map_or_else(|| "unknown".to_owned(), |p| p.0.to_string())
}

/// Route layer: the admin rule. Lets the request through with its [`Grant`] in the
/// extensions, or answers 401/403.
pub async fn require_admin(State(state): State<AppState>, mut req: Request, next: Next) -> Response {
    let peer = peer_of(&req);
    // HTTP/2 carries the host as the URI's authority, not a Host header (RFC 9113, 8.3.1):
    // the same-origin check compares `Origin` with it either way.
    if !req.headers().contains_key(header::HOST)
        && let Some(host) = req.uri().authority().and_then(|a| HeaderValue::from_str(a.as_str()).ok())
    {
        req.headers_mut().insert(header::HOST, host);
    }
    let path = req.uri().path().to_owned();
    match state.access.admin(req.headers(), req.method(), peer.map(|p| p.0.ip()), now()) {
        Ok(grant) => {
            tracing::info!(%path, method = %req.method(), peer = %shown(peer), via = grant.as_str(), "admin action");
            req.extensions_mut().insert(grant);
            next.run(req).await
        }
        Err(denied) => {
            let e = ApiError::from(denied);
            tracing::warn!(%path, method = %req.method(), peer = %shown(peer), reason = %e.message, "admin action refused");
            refuse(&state, req, e).await
        }
    }
}

/// Route layer: the client rule (routes that run a model on a client's frame).
pub async fn require_client(State(state): State<AppState>, req: Request, next: Next) -> Response {
    match state.access.client(req.headers(), now()) {
        Ok(()) => next.run(req).await,
        Err(denied) => {
            let e = ApiError::from(denied);
            tracing::info!(path = %req.uri().path(), peer = %shown(peer_of(&req)), reason = %e.message, "request refused");
            refuse(&state, req, e).await
        }
    }
}

/// Answer a refused request after reading (and dropping) its body, within the usual body
/// limit and timeout: a client still sending its frame would otherwise see the connection
/// close under it (a broken pipe) instead of the 401/403 that says what to fix.
async fn refuse(state: &AppState, req: Request, e: ApiError) -> Response {
    super::discard_body(&state.limits, req.into_body()).await;
    e.into_response()
}

/// `POST /session`'s body: a form field or JSON.
#[derive(Deserialize)]
struct Login {
    token: String,
}

/// A session as the page sees it.
#[derive(Serialize)]
struct SessionView {
    /// How this request was let in: `session`, `bearer` or `loopback`.
    via: &'static str,
    /// Unix seconds when the session ends (sessions only).
    #[serde(skip_serializing_if = "Option::is_none")]
    expires_at: Option<u64>,
    /// The token to send as `X-CSRF-Token` on calls that change state (sessions only).
    #[serde(skip_serializing_if = "Option::is_none")]
    csrf_token: Option<String>,
}

/// `POST /session`: log in with the admin token, as JSON `{"token": ...}` (answered with JSON)
/// or as the login page's form (answered with a redirect to its `next` path, or the page
/// again with the reason). Sets the session cookie; the JSON answer carries the CSRF token.
pub async fn login(State(state): State<AppState>, req: Request) -> Result<Response, ApiError> {
    let peer = peer_of(&req);
    let secure = req.extensions().get::<Transport>().is_some_and(|t| t.tls);
    let json = req
        .headers()
        .get(header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .is_some_and(|v| v.starts_with("application/json"));
    let body = tokio::time::timeout(state.limits.body_timeout, axum::body::to_bytes(req.into_body(), 4096))
        .await
        .map_err(|_| {
            ApiError::new(ErrorKind::BodyTimeout, "the login body did not arrive within server.body_timeout_ms")
        })?
        .map_err(|_| ApiError::new(ErrorKind::BadRequest, "the login body must be under 4 kB"))?;
    let (token, next) = if json {
        let login: Login = serde_json::from_slice(&body)
            .map_err(|_| ApiError::new(ErrorKind::BadRequest, "expected JSON {\"token\": \"...\"}"))?;
        (login.token, None)
    } else {
        let token = form_field(&body, "token")
            .ok_or_else(|| ApiError::new(ErrorKind::BadRequest, "expected a form with the field `token`"))?;
        (token, Some(next_path(form_field(&body, "next").as_deref())))
    };
    let s = match state.access.login(token.trim(), now()) {
        Ok(s) => s,
        Err(d) => {
            let e = ApiError::from(d);
            tracing::warn!(peer = %shown(peer), reason = %e.message, "login refused");
            return Ok(match next {
                None => e.into_response(),
                Some(next) => {
                    let page = login_html(&next, &format!("<p class=error>{}</p>", html_escape(&e.message)));
                    (e.kind.status(), page).into_response()
                }
            });
        }
    };
    tracing::info!(peer = %shown(peer), expires_at = s.expires, "logged in");
    let max_age = state.access.session_length().as_secs();
    let cookie = format!(
        "{}={}; Path=/; HttpOnly; SameSite=Strict; Max-Age={max_age}{}",
        session::COOKIE,
        s.cookie,
        if secure { "; Secure" } else { "" }
    );
    let mut resp = match next {
        Some(next) => (StatusCode::SEE_OTHER, [(header::LOCATION, header_value(&next)?)]).into_response(),
        None => {
            Json(SessionView { via: Grant::Session.as_str(), expires_at: Some(s.expires), csrf_token: Some(s.csrf) })
                .into_response()
        }
    };
    resp.headers_mut().insert(header::SET_COOKIE, header_value(&cookie)?);
    resp.headers_mut().insert(header::CACHE_CONTROL, HeaderValue::from_static("no-store"));
    Ok(resp)
}

/// Where the login form sends the browser afterwards: a path on this server, else the
/// login page (never another site: `//host` and schemes are refused).
fn next_path(next: Option<&str>) -> String {
    match next {
        // Visible ASCII only: browsers drop tabs and newlines from URLs, so "/\t/host" would
        // become "//host", another site.
        Some(p)
            if p.starts_with('/')
                && !p.starts_with("//")
                && !p.contains('\\')
                && p.len() <= 512
                && p.bytes().all(|b| b.is_ascii_graphic()) =>
        {
            p.to_owned()
        }
        _ => "/login".to_owned(),
    }
}

/// `GET /session` (admin): how this request was let in, and for a session its CSRF token.
pub async fn current(State(state): State<AppState>, req: Request) -> Result<Response, ApiError> {
    let grant = req.extensions().get::<Grant>().copied().unwrap_or(Grant::Loopback);
    let s = (grant == Grant::Session).then(|| state.access.session_of(req.headers(), now())).flatten();
    let view =
        SessionView { via: grant.as_str(), expires_at: s.as_ref().map(|s| s.expires), csrf_token: s.map(|s| s.csrf) };
    let mut resp = Json(view).into_response();
    resp.headers_mut().insert(header::CACHE_CONTROL, HeaderValue::from_static("no-store"));
    Ok(resp)
}

/// `DELETE /session` (admin): the browser forgets the cookie. Sessions are not stored, so
/// a copied cookie stays valid until it expires; rotating the admin token ends them all.
pub async fn logout() -> Result<Response, ApiError> {
    let cookie = format!("{}=; Path=/; HttpOnly; SameSite=Strict; Max-Age=0", session::COOKIE);
    let mut resp = StatusCode::NO_CONTENT.into_response();
    resp.headers_mut().insert(header::SET_COOKIE, header_value(&cookie)?);
    Ok(resp)
}

/// `GET /login?next=/path`: the login form (no script); with a valid session it says until
/// when, and without an admin token configured it says that this box needs no login.
pub async fn login_page(
    State(state): State<AppState>,
    axum::extract::Query(q): axum::extract::Query<std::collections::HashMap<String, String>>,
    headers: axum::http::HeaderMap,
) -> Response {
    let note = match state.access.session_of(&headers, now()) {
        Some(s) => format!(
            "<p class=ok>Logged in: this browser's session ends in {} minutes.</p>",
            s.expires.saturating_sub(now()).div_ceil(60)
        ),
        None if !state.access.has_admin_token() => NO_TOKEN_NOTE.to_owned(),
        None => String::new(),
    };
    login_html(&next_path(q.get("next").map(String::as_str)), &note)
}

fn login_html(next: &str, note: &str) -> Response {
    let page = LOGIN_PAGE.replace("{{NEXT}}", &html_escape(next)).replace("{{NOTE}}", note);
    let mut resp = Html(page).into_response();
    resp.headers_mut().insert(
        header::CONTENT_SECURITY_POLICY,
        HeaderValue::from_static(
            "default-src 'none'; style-src 'unsafe-inline'; form-action 'self'; frame-ancestors 'none'; base-uri 'none'",
        ),
    );
    resp.headers_mut().insert(header::CACHE_CONTROL, HeaderValue::from_static("no-store"));
    resp
}

fn html_escape(text: &str) -> String {
    text.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;").replace('"', "&quot;").replace('\'', "&#39;")
}

const LOGIN_PAGE: &str = include_str!("login.html");
const NO_TOKEN_NOTE: &str = "<p class=note>This server has no admin token configured: admin actions are open to \
     this box (127.0.0.1) without logging in, and refused from other machines.</p>";

/// Whether the connection is TLS, put into each request by the accept loop.
#[derive(Debug, Clone, Copy)]
pub struct Transport {
    /// The request came over HTTPS.
    pub tls: bool,
}

/// `PUT /log-filter`'s body.
#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SetFilter {
    /// A tracing filter, e.g. `info,lineside::http=debug`.
    filter: String,
    /// How long before the startup filter comes back (default 15, at most 240).
    minutes: Option<u64>,
}

fn log_control(state: &AppState) -> Result<&Arc<crate::logging::LogControl>, ApiError> {
    state.log.as_ref().ok_or_else(|| ApiError::new(ErrorKind::NotFound, "this process has no log filter to change"))
}

/// `GET /log-filter`: the filter in force, the startup one, and when it comes back.
pub async fn get_log_filter(State(state): State<AppState>) -> Result<Response, ApiError> {
    Ok(Json(log_control(&state)?.view()).into_response())
}

/// `PUT /log-filter` (admin): a filter for a while; the startup filter comes back after
/// `minutes`.
pub async fn put_log_filter(State(state): State<AppState>, body: axum::body::Bytes) -> Result<Response, ApiError> {
    let control = Arc::clone(log_control(&state)?);
    let set: SetFilter = serde_json::from_slice(&body).map_err(|e| {
        ApiError::new(
            ErrorKind::BadRequest,
            format!("expected JSON {{\"filter\": \"info,lineside=debug\", \"minutes\": 15}}: {e}"),
        )
    })?;
    let minutes = set.minutes.unwrap_or(15);
    if minutes == 0 || minutes > crate::logging::MAX_MINUTES {
        return Err(ApiError::new(
            ErrorKind::BadRequest,
            format!("minutes = {minutes}: expected 1 ..= {}", crate::logging::MAX_MINUTES),
        ));
    }
    let duration = std::time::Duration::from_secs(minutes * 60);
    let generation = control
        .set(&set.filter, duration, now())
        .map_err(|e| ApiError::new(ErrorKind::BadRequest, format!("filter {:?}: {e}", set.filter)))?;
    tracing::warn!(filter = %set.filter, minutes, "log filter changed");
    let later = Arc::clone(&control);
    tokio::spawn(async move {
        tokio::time::sleep(duration).await;
        later.revert(generation);
        tracing::warn!(filter = %later.view().filter, "log filter put back");
    });
    Ok(Json(control.view()).into_response())
}

fn header_value(text: &str) -> Result<HeaderValue, ApiError> {
    HeaderValue::from_str(text).map_err(|e| ApiError::internal(format!("header value: {e}")))
}

/// Field `name` of an `application/x-www-form-urlencoded` body.
fn form_field(body: &[u8], name: &str) -> Option<String> {
    let text = std::str::from_utf8(body).ok()?;
    text.split('&')
        .filter_map(|pair| pair.split_once('='))
        .find(|(k, _)| *k == name)
        .and_then(|(_, v)| percent_decode(&v.replace('+', " ")))
}

fn percent_decode(text: &str) -> Option<String> {
    let bytes = text.as_bytes();
    let mut out = Vec::with_capacity(bytes.len());
    let mut i = 0;
    while i < bytes.len() {
        if bytes[i] == b'%' {
            let hex = text.get(i + 1..i + 3)?;
            out.push(u8::from_str_radix(hex, 16).ok()?);
            i += 3;
        } else {
            out.push(bytes[i]);
            i += 1;
        }
    }
    String::from_utf8(out).ok()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn form_bodies_decode_as_browsers_encode_them() {
        // WHATWG URL standard, application/x-www-form-urlencoded: '+' is a space, %XX a byte.
        assert_eq!(form_field(b"token=a%2Bb%3D%3D&x=1", "token").unwrap(), "a+b==");
        assert_eq!(form_field(b"x=1&token=abc+def", "token").unwrap(), "abc def");
        assert!(form_field(b"token=%zz", "token").is_none());
        assert!(form_field(b"other=1", "token").is_none());
    }

    #[test]
    fn only_paths_of_this_server_are_followed_after_login() {
        assert_eq!(next_path(Some("/review?x=1")), "/review?x=1");
        for outside in
            ["//evil.example/", "https://evil.example/", "/\\evil.example", "review", "", "/\t/evil.example", "/\n/x"]
        {
            assert_eq!(next_path(Some(outside)), "/login", "{outside}");
        }
        assert_eq!(next_path(None), "/login");
    }
}
