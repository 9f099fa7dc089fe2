//! `multipart/form-data` bodies: the boundary from a content type, then the parts.
//!
//! Properties: no panic; at most `max_parts` parts; every part's bytes are a slice of the
//! body that sits between two delimiters (RFC 2046 section 5.1.1: the body part is what lies
//! between the CRLF before one delimiter and the previous delimiter line's end), in order.
#![no_main]

use axum::body::Bytes;
use libfuzzer_sys::fuzz_target;
use lineside_fuzz::http::multipart;

fuzz_target!(|data: &[u8]| {
    // First line: the content type; the rest: the body.
    let split = data.iter().position(|&b| b == b'\n').unwrap_or(data.len());
    let content_type = String::from_utf8_lossy(&data[..split]);
    let body = Bytes::copy_from_slice(data.get(split + 1..).unwrap_or_default());
    let boundary = match multipart::boundary(&content_type) {
        Some(Ok(b)) => b,
        Some(Err(_)) => return,
        None => "lineside-fuzz".to_string(),
    };
    assert!((1..=70).contains(&boundary.len()), "boundary of {} bytes", boundary.len());
    let max_parts = 8;
    let Ok(parts) = multipart::parse(&body, &boundary, max_parts) else { return };
    assert!(!parts.is_empty() && parts.len() <= max_parts, "{} parts", parts.len());
    let base = body.as_ptr() as usize;
    let delim = format!("\r\n--{boundary}");
    let mut last_end = 0;
    for p in &parts {
        let start = p.data.as_ptr() as usize - base;
        let end = start + p.data.len();
        assert!(end <= body.len() && start >= last_end, "part outside the body or out of order");
        assert!(body[end..].starts_with(delim.as_bytes()), "a part does not end at a delimiter");
        assert!(!p.name.is_empty(), "a part without a name");
        last_end = end;
    }
});
