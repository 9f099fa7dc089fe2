//! `multipart/form-data` bodies (RFC 7578 on RFC 2046 section 5.1): several images in one
//! request, one part each, in order.
//!
//! A small parser over an already size-limited body: it finds the boundary delimiters, reads
//! each part's headers for its name (and file name), and hands back the part's bytes as
//! slices of the body (no copies). Anything malformed is an error naming what was wrong; the
//! caller answers 400.

use axum::body::Bytes;

/// Longest part name (file name or field name) taken; a longer one refuses the request.
pub const MAX_NAME_LEN: usize = 255;

/// One part of the body.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Part {
    /// The part's file name, else its field name, else `part-<index>`.
    pub name: String,
    /// The part's content.
    pub data: Bytes,
}

/// The boundary of a `multipart/form-data` content type, or `None` for other types.
///
/// # Errors
/// A multipart content type without a usable boundary parameter.
pub fn boundary(content_type: &str) -> Option<Result<String, String>> {
    let mut fields = content_type.split(';');
    let mime = fields.next()?.trim();
    if !mime.eq_ignore_ascii_case("multipart/form-data") {
        return None;
    }
    let b = fields.filter_map(|f| f.split_once('=')).find(|(k, _)| k.trim().eq_ignore_ascii_case("boundary"));
    Some(match b {
        None => Err("multipart/form-data without a boundary parameter".into()),
        Some((_, v)) => {
            let v = v.trim().trim_matches('"');
            // RFC 2046: 1 to 70 characters.
            if v.is_empty() || v.len() > 70 {
                Err(format!("multipart boundary of {} characters: expected 1 to 70", v.len()))
            } else {
                Ok(v.to_string())
            }
        }
    })
}

fn find(hay: &[u8], needle: &[u8], from: usize) -> Option<usize> {
    if needle.is_empty() || from > hay.len() {
        return None;
    }
    hay[from..].windows(needle.len()).position(|w| w == needle).map(|i| i + from)
}

/// Split `body` into its parts.
///
/// # Errors
/// No opening delimiter, a part without the blank line after its headers, a missing closing
/// delimiter, no parts at all, or more than `max_parts` parts.
pub fn parse(body: &Bytes, boundary: &str, max_parts: usize) -> Result<Vec<Part>, String> {
    let open = format!("--{boundary}");
    let delim = format!("\r\n--{boundary}");
    // The preamble before the first delimiter is ignored (RFC 2046).
    let first = find(body, open.as_bytes(), 0)
        .ok_or_else(|| format!("the multipart body has no opening delimiter \"--{boundary}\""))?;
    let mut pos = first + open.len();
    let mut parts = Vec::new();
    loop {
        if body[pos..].starts_with(b"--") {
            break; // closing delimiter
        }
        // Rest of the delimiter line (transport padding), then CRLF.
        let line_end = find(body, b"\r\n", pos).ok_or("a multipart delimiter line does not end with CRLF")?;
        let head_start = line_end + 2;
        // A part without headers starts with the blank line at once.
        let head_end = if body[head_start..].starts_with(b"\r\n") {
            (head_start, head_start + 2)
        } else {
            find(body, b"\r\n\r\n", head_start)
                .map(|i| (i, i + 4))
                .ok_or_else(|| format!("multipart part {} has no blank line after its headers", parts.len()))?
        };
        let data_start = head_end.1;
        let data_end = find(body, delim.as_bytes(), data_start)
            .ok_or_else(|| format!("multipart part {} is not closed by \"--{boundary}\"", parts.len()))?;
        if parts.len() == max_parts {
            return Err(format!(
                "more than {max_parts} parts in one request (server.max_parts, and at most the model's batching.backlog)"
            ));
        }
        let headers = String::from_utf8_lossy(&body[head_start..head_end.0]);
        let index = parts.len();
        let name = part_name(&headers).unwrap_or_else(|| format!("part-{index}"));
        // The name is echoed in the answer and kept with a retained frame.
        if name.len() > MAX_NAME_LEN {
            return Err(format!(
                "multipart part {index} has a name of {} bytes: at most {MAX_NAME_LEN} (its filename or name parameter)",
                name.len()
            ));
        }
        parts.push(Part { name, data: body.slice(data_start..data_end) });
        pos = data_end + delim.len();
    }
    if parts.is_empty() {
        return Err("the multipart body has no parts".into());
    }
    Ok(parts)
}

/// `filename`, else `name`, from a part's `Content-Disposition` header.
fn part_name(headers: &str) -> Option<String> {
    let line = headers
        .split("\r\n")
        .find(|l| l.split_once(':').is_some_and(|(k, _)| k.trim().eq_ignore_ascii_case("content-disposition")))?;
    let params: Vec<(String, String)> = line
        .split(';')
        .skip(1)
        .filter_map(|p| p.split_once('='))
        .map(|(k, v)| (k.trim().to_ascii_lowercase(), v.trim().trim_matches('"').to_string()))
        .collect();
    let get = |key: &str| params.iter().find(|(k, _)| k == key).map(|(_, v)| v.clone()).filter(|v| !v.is_empty());
    get("filename").or_else(|| get("name"))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn boundary_from_content_type() {
        assert_eq!(boundary("image/png"), None);
        assert_eq!(boundary("multipart/form-data; boundary=abc").unwrap().unwrap(), "abc");
        assert_eq!(boundary("Multipart/Form-Data; charset=x; BOUNDARY=\"a b\"").unwrap().unwrap(), "a b");
        assert!(boundary("multipart/form-data").unwrap().is_err());
        assert!(boundary(&format!("multipart/form-data; boundary={}", "x".repeat(71))).unwrap().is_err());
    }

    #[test]
    fn parts_in_order_with_names_and_binary_data() {
        // The shape of RFC 7578 section 4's example, with binary content containing CR LF.
        let body = Bytes::from_static(
            b"preamble\r\n--XyZ\r\nContent-Disposition: form-data; name=\"a\"; filename=\"cam1.png\"\r\n\
              Content-Type: image/png\r\n\r\n\x89PNG\r\n\x00\x01\r\n--XyZ\r\n\
              content-disposition: form-data; name=\"second\"\r\n\r\nBM..\r\n--XyZ\r\n\r\nraw\r\n--XyZ--\r\nepilogue",
        );
        let parts = parse(&body, "XyZ", 10).unwrap();
        assert_eq!(parts.len(), 3);
        assert_eq!((parts[0].name.as_str(), &parts[0].data[..]), ("cam1.png", &b"\x89PNG\r\n\x00\x01"[..]));
        assert_eq!((parts[1].name.as_str(), &parts[1].data[..]), ("second", &b"BM.."[..]));
        assert_eq!((parts[2].name.as_str(), &parts[2].data[..]), ("part-2", &b"raw"[..]));
    }

    #[test]
    fn malformed_bodies_are_errors_not_panics() {
        for (body, needle) in [
            (&b""[..], "no opening delimiter"),
            (b"--b--\r\n", "no parts"),
            (b"--b\r\nContent-Disposition: form-data; name=x\r\n", "no blank line"),
            (b"--b\r\n\r\ndata without end", "not closed"),
            (b"--b", "does not end with CRLF"),
        ] {
            let err = parse(&Bytes::from_static(body), "b", 10).unwrap_err();
            assert!(err.contains(needle), "{body:?}: {err}");
        }
        let many = Bytes::from("--b\r\n\r\nx\r\n".repeat(3) + "--b--");
        assert!(parse(&many, "b", 2).unwrap_err().contains("more than 2 parts"));
        let long = format!("--b\r\nContent-Disposition: form-data; name=\"{}\"\r\n\r\nx\r\n--b--", "n".repeat(256));
        assert!(parse(&Bytes::from(long), "b", 2).unwrap_err().contains("name of 256 bytes"));
    }
}
