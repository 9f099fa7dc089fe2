//! The classify request's query string and headers: `?top=`, `X-Deadline-Ms`, `X-Part-Id`,
//! `X-Camera-Id`.
//!
//! Properties: no panic; `top` is between 1 and the label count; the deadline never passes
//! the server's; an accepted id holds only the characters docs/http-api.md allows.
#![no_main]

use std::time::{Duration, Instant};

use arbitrary::{Arbitrary, Unstructured};
use axum::http::{HeaderMap, HeaderValue};
use libfuzzer_sys::fuzz_target;
use lineside_fuzz::http::request::{self, CAMERA_ID_HEADER, DEADLINE_HEADER, MAX_ID_LEN, PART_ID_HEADER};

#[derive(Debug, Arbitrary)]
struct Asked<'a> {
    query: Option<&'a str>,
    labels: u8,
    server_ms: u32,
    deadline: Option<&'a [u8]>,
    part: Option<&'a [u8]>,
    camera: Option<&'a [u8]>,
}

fuzz_target!(|data: &[u8]| {
    let Ok(a) = Asked::arbitrary_take_rest(Unstructured::new(data)) else { return };
    let labels = usize::from(a.labels.max(1));
    if let Ok(k) = request::top(a.query, labels) {
        assert!((1..=labels).contains(&k), "top = {k} for {labels} labels");
    }
    let mut headers = HeaderMap::new();
    for (name, value) in [(DEADLINE_HEADER, a.deadline), (PART_ID_HEADER, a.part), (CAMERA_ID_HEADER, a.camera)] {
        // Only values HTTP can carry reach the handler.
        if let Some(v) = value.and_then(|v| HeaderValue::from_bytes(v).ok()) {
            headers.insert(name, v);
        }
    }
    let now = Instant::now();
    let server = Duration::from_millis(u64::from(a.server_ms));
    if let Ok(until) = request::deadline(&headers, server, now) {
        assert!(until <= now + server, "the deadline header lengthened the server's");
    }
    if let Ok(ids) = request::ids(&headers) {
        for id in [ids.part, ids.camera].into_iter().flatten() {
            assert!((1..=MAX_ID_LEN).contains(&id.len()));
            assert!(id.bytes().all(|b| b.is_ascii_alphanumeric() || b"-_.:/#".contains(&b)), "{id:?}");
        }
    }
});
