//! What a classify request asks for besides its image: `?top=`, `X-Deadline-Ms`, `X-Part-Id`
//! and `X-Camera-Id`, read from the query string and the headers.
//!
//! Engine-free on purpose, like `model::contract`: the fuzz targets (fuzz/) compile this file
//! on its own. Errors are plain messages naming the parameter and what it may hold; the
//! handler answers them 400 `bad_request`.

use std::time::{Duration, Instant};

use axum::http::HeaderMap;
use serde::Deserialize;

/// The request header that may shorten the server's deadline, in milliseconds.
pub const DEADLINE_HEADER: &str = "x-deadline-ms";
/// The request header naming the physical part (echoed, and stored with a retained frame).
pub const PART_ID_HEADER: &str = "x-part-id";
/// The request header naming the camera that took the frame.
pub const CAMERA_ID_HEADER: &str = "x-camera-id";
/// Longest part or camera id.
pub const MAX_ID_LEN: usize = 64;
/// Classes answered without `?top=`.
pub const DEFAULT_TOP: usize = 3;

/// The part and camera ids a request carries.
#[derive(Debug, Clone, Default)]
pub struct Ids {
    /// `X-Part-Id`.
    pub part: Option<String>,
    /// `X-Camera-Id`.
    pub camera: Option<String>,
}

/// Whether `id` may be a part or camera id: 1 to 64 of letters, digits and `-_.:/#`.
pub fn valid_id(id: &str) -> bool {
    (1..=MAX_ID_LEN).contains(&id.len()) && id.bytes().all(|b| b.is_ascii_alphanumeric() || b"-_.:/#".contains(&b))
}

/// Read `X-Part-Id` and `X-Camera-Id`.
///
/// # Errors
/// The header's name and what it may hold.
pub fn ids(headers: &HeaderMap) -> Result<Ids, String> {
    let one = |name: &str, shown: &str| -> Result<Option<String>, String> {
        let Some(v) = headers.get(name) else { return Ok(None) };
        match v.to_str() {
            Ok(t) if valid_id(t) => Ok(Some(t.to_owned())),
            _ => Err(format!("{shown}: expected 1 to {MAX_ID_LEN} characters of letters, digits and - _ . : / #")),
        }
    };
    Ok(Ids { part: one(PART_ID_HEADER, "X-Part-Id")?, camera: one(CAMERA_ID_HEADER, "X-Camera-Id")? })
}

/// Query parameters (any other is refused).
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct Params {
    /// `?top=K` (1 ..; clamped to the number of labels) or `?top=all`.
    top: Option<String>,
}

/// The number of classes to answer, from the query string: `?top=K` (a positive integer,
/// clamped to `labels`), `?top=all`, or [`DEFAULT_TOP`] (clamped too).
///
/// # Errors
/// An unknown or repeated parameter, or a `top` that is not a positive integer or `all`.
pub fn top(query: Option<&str>, labels: usize) -> Result<usize, String> {
    let params: Params = serde_urlencoded::from_str(query.unwrap_or(""))
        .map_err(|e| format!("query string {:?}: {e} (the only parameter is top)", query.unwrap_or("")))?;
    parse_top(params.top.as_deref(), labels)
}

/// Parse `?top=`: default 3, `all`, or a positive integer clamped to `labels`.
///
/// # Errors
/// A value that is not a positive integer or `all`.
pub fn parse_top(raw: Option<&str>, labels: usize) -> Result<usize, String> {
    let k = match raw {
        None => DEFAULT_TOP,
        Some("all") => labels,
        Some(s) => match s.parse::<usize>() {
            Ok(0) | Err(_) => return Err(format!("top = {s:?}: expected a positive integer or \"all\"")),
            Ok(k) => k,
        },
    };
    Ok(k.min(labels))
}

/// The request's deadline: `arrived` plus the server's `deadline_ms`, shortened by
/// `X-Deadline-Ms` (never lengthened).
///
/// # Errors
/// An `X-Deadline-Ms` that is not a positive whole number of milliseconds.
pub fn deadline(headers: &HeaderMap, server: Duration, arrived: Instant) -> Result<Instant, String> {
    let allowed = match headers.get(DEADLINE_HEADER) {
        None => server,
        Some(v) => {
            let ms = v.to_str().ok().and_then(|s| s.trim().parse::<u64>().ok()).filter(|&ms| ms > 0);
            let ms = ms.ok_or_else(|| format!("X-Deadline-Ms = {v:?}: expected a positive number of milliseconds"))?;
            server.min(Duration::from_millis(ms))
        }
    };
    // checked_add: a server deadline too far out for the clock is refused, not a panic.
    arrived.checked_add(allowed).ok_or_else(|| format!("a deadline of {} ms is beyond the clock", allowed.as_millis()))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn top_defaults_clamps_and_refuses_zero() {
        assert_eq!(parse_top(None, 5).unwrap(), 3);
        assert_eq!(parse_top(None, 2).unwrap(), 2);
        assert_eq!(parse_top(Some("all"), 5).unwrap(), 5);
        assert_eq!(parse_top(Some("9"), 5).unwrap(), 5);
        assert_eq!(parse_top(Some("1"), 5).unwrap(), 1);
        for bad in ["0", "-1", "two", ""] {
            let e = parse_top(Some(bad), 5).unwrap_err();
            assert!(e.starts_with("top = "), "{bad}: {e}");
        }
    }

    #[test]
    fn query_string_names_unknown_and_repeated_parameters() {
        assert_eq!(top(None, 5).unwrap(), 3);
        assert_eq!(top(Some("top=all"), 5).unwrap(), 5);
        assert_eq!(top(Some("top=%32"), 5).unwrap(), 2, "percent-decoded (WHATWG URL form encoding)");
        assert!(top(Some("k=2"), 5).unwrap_err().contains("unknown field"));
        assert!(top(Some("top=1&top=2"), 5).unwrap_err().contains("duplicate field"));
        assert!(top(Some("top=0"), 5).is_err());
    }

    #[test]
    fn deadline_header_may_only_shorten() {
        let t0 = Instant::now();
        let server = Duration::from_millis(2000);
        let mut h = HeaderMap::new();
        assert_eq!(deadline(&h, server, t0).unwrap(), t0 + server);
        h.insert(DEADLINE_HEADER, "150".parse().unwrap());
        assert_eq!(deadline(&h, server, t0).unwrap(), t0 + Duration::from_millis(150));
        h.insert(DEADLINE_HEADER, "60000".parse().unwrap());
        assert_eq!(deadline(&h, server, t0).unwrap(), t0 + server);
        for bad in ["0", "-5", "soon", "", "18446744073709551616"] {
            h.insert(DEADLINE_HEADER, bad.parse().unwrap());
            assert!(deadline(&h, server, t0).is_err(), "{bad}");
        }
        assert!(deadline(&HeaderMap::new(), Duration::MAX, t0).is_err(), "beyond the clock: an error, not a panic");
    }

    #[test]
    fn ids_are_short_and_plain() {
        let mut h = HeaderMap::new();
        h.insert(PART_ID_HEADER, "W-0042:a/b#1".parse().unwrap());
        assert_eq!(ids(&h).unwrap().part.as_deref(), Some("W-0042:a/b#1"));
        for bad in ["", "a b", "é", &"x".repeat(65)] {
            h.insert(CAMERA_ID_HEADER, axum::http::HeaderValue::from_bytes(bad.as_bytes()).unwrap());
            assert!(ids(&h).unwrap_err().starts_with("X-Camera-Id"), "{bad:?}");
        }
    }
}
