//! A mixed-abuse load: the kinds of client a plant network produces, all at once against one
//! server, each with the answer it must get. The soak test (tests/it/soak.rs, about a minute)
//! and the soak benchmark (benches/soak.rs, ten minutes) drive it and then check the server's
//! memory, descriptors and `/metrics` themselves.
//!
//! Every client speaks raw HTTP/1.1 over its own TCP connections on loopback, so that it can
//! misbehave at any byte: stop halfway through its headers or body, hang up before the
//! answer, send a head or a body over the limits.

use std::collections::BTreeMap;
use std::net::SocketAddr;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use tokio::io::{AsyncReadExt as _, AsyncWriteExt as _};
use tokio::net::TcpStream;

/// What the load needs to know about the server and its model.
#[derive(Debug, Clone)]
pub struct Setup {
    /// The server.
    pub addr: SocketAddr,
    /// The model's name.
    pub model: String,
    /// Good frames, each with the scores (`?top=all`, label -> score) the server gave it
    /// alone ([`reference`]).
    pub frames: Vec<(Vec<u8>, BTreeMap<String, f64>)>,
    /// The server's `body_limit_bytes`.
    pub body_limit: usize,
    /// A PNG the server must refuse from its header (over `max_pixels` or `max_decode_bytes`).
    pub bombs: Vec<Vec<u8>>,
}

/// The kinds of client, each a task of its own (`good` and `hang_up` run two each).
pub const KINDS: [&str; 13] = [
    "good",
    "multipart",
    "bad_body",
    "big_header",
    "big_body",
    "bomb",
    "slow_header",
    "slow_body",
    "cut_body",
    "hang_up",
    "past_deadline",
    "unknown_route",
    "cut_answer",
];

/// The washer config's lines the soak changes (`config/lineside.toml` text, from -> to): small
/// limits, so that every kind of abuse meets one; the bombs below are sized against them.
pub const SOAK_CONFIG: [(&str, &str); 4] = [
    ("max_pixels = 40000000", "max_pixels = 4000000"),
    ("max_decode_bytes = 536870912", "max_decode_bytes = 16777216"),
    ("body_limit_bytes = 16777216", "body_limit_bytes = 1048576"),
    ("header_timeout_ms = 5000", "header_timeout_ms = 1000\nbody_timeout_ms = 1000"),
];

/// The soak's `body_limit_bytes` ([`SOAK_CONFIG`]).
pub const SOAK_BODY_LIMIT: usize = 1 << 20;

/// PNGs the soak config refuses from their header alone: 3000 x 3000 gray (9 M pixels >
/// max_pixels) and 1000 x 1000 16-bit RGBA (28 MB > max_decode_bytes); a few kB each.
pub fn soak_bombs() -> Vec<Vec<u8>> {
    use image::ImageEncoder as _;
    let bomb = |w: u32, h: u32, color: image::ExtendedColorType| {
        let data = vec![0u8; w as usize * h as usize * color.bits_per_pixel() as usize / 8];
        let mut png = Vec::new();
        let written = image::codecs::png::PngEncoder::new(&mut png).write_image(&data, w, h, color);
        written.map(|()| png)
    };
    [bomb(3000, 3000, image::ExtendedColorType::L8), bomb(1000, 1000, image::ExtendedColorType::Rgba16)]
        .into_iter()
        .flatten()
        .collect()
}

/// Largest difference allowed between a score under load and the frame's answer alone (a
/// pass of several frames may run a different kernel than a pass of one).
pub const SCORE_TOLERANCE: f64 = 1e-4;

/// What the clients saw.
#[derive(Debug, Default, Clone)]
pub struct Outcome {
    /// Requests sent, by kind.
    pub sent: BTreeMap<&'static str, u64>,
    /// Answers read, by kind and status (0: the server closed the connection without one).
    pub answers: BTreeMap<(&'static str, u16), u64>,
    /// Answers that were wrong: an unexpected status or wrong scores (the first 20).
    pub wrong: Vec<String>,
    /// Good frames whose 200 was checked against their answer alone.
    pub checked: u64,
}

impl Outcome {
    /// Answers read with `status` by clients that wait for them.
    pub fn answered(&self, status: u16) -> u64 {
        self.answers.iter().filter(|((_, s), _)| *s == status).map(|(_, n)| n).sum()
    }

    /// Requests whose client left before the answer (so the server may count them or not).
    pub fn left(&self) -> u64 {
        ["hang_up", "cut_body", "cut_answer"].iter().map(|k| self.sent.get(k).copied().unwrap_or(0)).sum()
    }

    /// A one-line summary per kind.
    pub fn table(&self) -> String {
        let mut out = String::new();
        for kind in KINDS {
            let statuses: Vec<String> = self
                .answers
                .iter()
                .filter(|((k, _), _)| *k == kind)
                .map(|((_, s), n)| if *s == 0 { format!("closed {n}") } else { format!("{s} {n}") })
                .collect();
            let sent = self.sent.get(kind).copied().unwrap_or(0);
            out.push_str(&format!("{kind:>14}: {sent:>7} sent; {}\n", statuses.join(", ")));
        }
        out
    }
}

type Shared = Arc<Mutex<Outcome>>;

fn note(shared: &Shared, kind: &'static str, status: Option<u16>, wrong: Option<String>) {
    let mut o = shared.lock().unwrap_or_else(|p| p.into_inner());
    if let Some(s) = status {
        *o.answers.entry((kind, s)).or_default() += 1;
    }
    if let Some(w) = wrong
        && o.wrong.len() < 20
    {
        o.wrong.push(format!("{kind}: {w}"));
    }
}

fn sent(shared: &Shared, kind: &'static str) {
    *shared.lock().unwrap_or_else(|p| p.into_inner()).sent.entry(kind).or_default() += 1;
}

/// One HTTP/1.1 request's bytes.
fn request(method: &str, path: &str, headers: &[(&str, String)], body: &[u8]) -> Vec<u8> {
    let mut out = format!("{method} {path} HTTP/1.1\r\nhost: lineside\r\ncontent-length: {}\r\n", body.len());
    for (k, v) in headers {
        out.push_str(&format!("{k}: {v}\r\n"));
    }
    out.push_str("\r\n");
    let mut out = out.into_bytes();
    out.extend_from_slice(body);
    out
}

/// Read one answer: its status and body, or `None` when the connection closed first.
async fn read_answer(s: &mut TcpStream, buf: &mut Vec<u8>) -> Option<(u16, Vec<u8>)> {
    read_answer_and_close(s, buf).await.map(|(status, body, _)| (status, body))
}

/// As [`read_answer`], and whether the server said it closes the connection
/// (`Connection: close`, RFC 9112 section 9.6).
async fn read_answer_and_close(s: &mut TcpStream, buf: &mut Vec<u8>) -> Option<(u16, Vec<u8>, bool)> {
    let head_end = loop {
        if let Some(i) = buf.windows(4).position(|w| w == b"\r\n\r\n") {
            break i + 4;
        }
        let mut chunk = [0u8; 8192];
        match s.read(&mut chunk).await {
            Ok(0) | Err(_) => return None,
            Ok(n) => buf.extend_from_slice(&chunk[..n]),
        }
    };
    let head = String::from_utf8_lossy(&buf[..head_end]).to_string();
    let status = head.split(' ').nth(1).and_then(|s| s.parse().ok())?;
    let length = head
        .lines()
        .filter_map(|l| l.split_once(':'))
        .find(|(k, _)| k.trim().eq_ignore_ascii_case("content-length"))
        .and_then(|(_, v)| v.trim().parse::<usize>().ok())
        .unwrap_or(0);
    while buf.len() < head_end + length {
        let mut chunk = [0u8; 8192];
        match s.read(&mut chunk).await {
            Ok(0) | Err(_) => return None,
            Ok(n) => buf.extend_from_slice(&chunk[..n]),
        }
    }
    let body = buf[head_end..head_end + length].to_vec();
    buf.drain(..head_end + length);
    let close = head
        .lines()
        .filter_map(|l| l.split_once(':'))
        .any(|(k, v)| k.trim().eq_ignore_ascii_case("connection") && v.trim().eq_ignore_ascii_case("close"));
    Some((status, body, close))
}

/// A keep-alive connection that reconnects after the server closes it.
struct Conn {
    addr: SocketAddr,
    stream: Option<TcpStream>,
    buf: Vec<u8>,
}

impl Conn {
    fn new(addr: SocketAddr) -> Conn {
        Conn { addr, stream: None, buf: Vec::new() }
    }

    /// Send `bytes` and read the answer (`None`: closed without one, or no connection).
    async fn exchange(&mut self, bytes: &[u8]) -> Option<(u16, Vec<u8>)> {
        if self.stream.is_none() {
            self.stream = TcpStream::connect(self.addr).await.ok();
            self.buf.clear();
        }
        let s = self.stream.as_mut()?;
        let answer = match s.write_all(bytes).await {
            Ok(()) => read_answer_and_close(s, &mut self.buf).await,
            Err(_) => None,
        };
        match answer {
            Some((status, body, close)) => {
                if close {
                    self.stream = None;
                }
                Some((status, body))
            }
            None => {
                self.stream = None;
                None
            }
        }
    }
}

/// The scores (`?top=all`) in an answer: label -> score.
fn scores(top: &serde_json::Value) -> Option<BTreeMap<String, f64>> {
    top.as_array()?.iter().map(|t| Some((t["label"].as_str()?.to_owned(), t["score"].as_f64()?))).collect()
}

/// Where `got` differs from `want` by more than [`SCORE_TOLERANCE`], if anywhere.
fn differs(got: &BTreeMap<String, f64>, want: &BTreeMap<String, f64>) -> Option<String> {
    if got.len() != want.len() {
        return Some(format!("{} scores, expected {}", got.len(), want.len()));
    }
    want.iter().find_map(|(label, w)| match got.get(label) {
        Some(g) if (g - w).abs() <= SCORE_TOLERANCE => None,
        g => Some(format!("{label}: {g:?}, alone {w}")),
    })
}

/// Each frame's scores when it is sent alone, one request at a time.
///
/// # Errors
/// A frame that is not answered 200 with scores.
pub async fn reference(
    addr: SocketAddr,
    model: &str,
    frames: &[Vec<u8>],
) -> anyhow::Result<Vec<BTreeMap<String, f64>>> {
    let mut conn = Conn::new(addr);
    let mut out = Vec::new();
    for f in frames {
        let path = format!("/classify/{model}?top=all");
        match conn.exchange(&request("POST", &path, &[], f)).await {
            Some((200, body)) => {
                let v: serde_json::Value = serde_json::from_slice(&body)?;
                out.push(scores(&v["top"]).ok_or_else(|| anyhow::anyhow!("no scores in {v}"))?);
            }
            other => anyhow::bail!("a reference frame was answered {:?}", other.map(|(s, _)| s)),
        }
    }
    Ok(out)
}

/// Run every kind of client for `duration`, then wait for them to finish (each stops at the
/// end of its current request; the slow ones within the server's timeouts).
pub async fn run(setup: Setup, duration: Duration) -> Outcome {
    let shared: Shared = Arc::default();
    let until = Instant::now() + duration;
    let setup = Arc::new(setup);
    let mut tasks = Vec::new();
    for (i, kind) in KINDS.iter().chain(["good", "hang_up"].iter()).enumerate() {
        let (setup, shared) = (setup.clone(), shared.clone());
        tasks.push(tokio::spawn(async move { client(kind, i, &setup, &shared, until).await }));
    }
    for t in tasks {
        let _ = t.await;
    }
    shared.lock().unwrap_or_else(|p| p.into_inner()).clone()
}

/// A `multipart/form-data` body of `frames` with `boundary`, one file part each, laid out
/// as RFC 7578 says (part `i` named `cam<i>`, file `f<i>.png`).
pub fn multipart(boundary: &str, frames: &[&[u8]]) -> Vec<u8> {
    let mut body = Vec::new();
    for (i, f) in frames.iter().enumerate() {
        body.extend_from_slice(
            format!("--{boundary}\r\nContent-Disposition: form-data; name=\"cam{i}\"; filename=\"f{i}.png\"\r\n\r\n")
                .as_bytes(),
        );
        body.extend_from_slice(f);
        body.extend_from_slice(b"\r\n");
    }
    body.extend_from_slice(format!("--{boundary}--\r\n").as_bytes());
    body
}

/// Check a 200 answer's scores against the frame's answer alone.
fn check_scores(shared: &Shared, kind: &'static str, top: &serde_json::Value, want: &BTreeMap<String, f64>) {
    match scores(top) {
        Some(got) => match differs(&got, want) {
            None => shared.lock().unwrap_or_else(|p| p.into_inner()).checked += 1,
            Some(d) => note(shared, kind, None, Some(format!("wrong scores: {d}"))),
        },
        None => note(shared, kind, None, Some(format!("a 200 without scores: {top}"))),
    }
}

/// Record an answer and whether its status is one `kind` may get: one of `allowed`, or a 503
/// that says `too_many_connections` (a new connection while `max_connections` are open) or
/// `overloaded` (a full backlog), which any request may get from a saturated server. (A
/// client that reads only the head of its answer passes an empty body.)
fn expect(shared: &Shared, kind: &'static str, answer: &Option<(u16, Vec<u8>)>, allowed: &[u16]) {
    let status = answer.as_ref().map_or(0, |(s, _)| *s);
    let busy = answer.as_ref().is_some_and(|(s, body)| {
        let body = String::from_utf8_lossy(body);
        *s == 503 && (body.is_empty() || body.contains("\"too_many_connections\"") || body.contains("\"overloaded\""))
    });
    let wrong = (!busy && !allowed.contains(&status)).then(|| {
        let body = answer.as_ref().map(|(_, b)| String::from_utf8_lossy(b).chars().take(200).collect::<String>());
        format!("status {status}, expected one of {allowed:?}: {body:?}")
    });
    note(shared, kind, Some(status), wrong);
}

async fn client(kind: &'static str, seed: usize, setup: &Setup, shared: &Shared, until: Instant) {
    let path = format!("/classify/{}", setup.model);
    let all = format!("{path}?top=all");
    let mut conn = Conn::new(setup.addr);
    let mut n = seed;
    while Instant::now() < until {
        n += 1;
        let (frame, want) = &setup.frames[n % setup.frames.len()];
        sent(shared, kind);
        match kind {
            "good" => {
                let a = conn.exchange(&request("POST", &all, &[], frame)).await;
                expect(shared, kind, &a, &[200, 504]);
                if let Some((200, body)) = &a {
                    let v: serde_json::Value = serde_json::from_slice(body).unwrap_or_default();
                    check_scores(shared, kind, &v["top"], want);
                }
            }
            "multipart" => {
                let picks: Vec<usize> = (0..4).map(|i| (n + i) % setup.frames.len()).collect();
                let parts: Vec<&[u8]> = picks.iter().map(|&i| setup.frames[i].0.as_slice()).collect();
                let ct = [("content-type", "multipart/form-data; boundary=soak".to_string())];
                let a = conn.exchange(&request("POST", &all, &ct, &multipart("soak", &parts))).await;
                expect(shared, kind, &a, &[200, 504]);
                if let Some((200, body)) = &a {
                    let v: serde_json::Value = serde_json::from_slice(body).unwrap_or_default();
                    let results = v["results"].as_array().cloned().unwrap_or_default();
                    if results.len() != picks.len() {
                        note(shared, kind, None, Some(format!("{} results for {} parts", results.len(), picks.len())));
                    }
                    for (at, (r, &i)) in results.iter().zip(&picks).enumerate() {
                        if r["index"].as_u64() != Some(at as u64) {
                            note(shared, kind, None, Some(format!("result {at} has index {}", r["index"])));
                        }
                        match r["error"]["kind"].as_str() {
                            None => check_scores(shared, kind, &r["top"], &setup.frames[i].1),
                            Some("overloaded" | "deadline") => {}
                            Some(e) => note(shared, kind, None, Some(format!("part error {e}"))),
                        }
                    }
                }
            }
            "bad_body" => {
                let junk: Vec<u8> = (0..(n % 4096) + 1).map(|i| (i * 31 + n) as u8).collect();
                let a = conn.exchange(&request("POST", &path, &[], &junk)).await;
                expect(shared, kind, &a, &[400, 415]);
            }
            "big_header" => {
                let h = [("x-padding", "p".repeat(20_000))];
                let a = conn.exchange(&request("POST", &path, &h, frame)).await;
                // 431; or the connection closed under the unread body.
                expect(shared, kind, &a, &[431, 0]);
                conn = Conn::new(setup.addr);
            }
            "big_body" => {
                let a = conn.exchange(&request("POST", &path, &[], &vec![0u8; setup.body_limit + 1])).await;
                // 413; or the connection closed under the rest of the upload; or 408 when the
                // megabyte did not arrive within body_timeout_ms on a loaded box.
                expect(shared, kind, &a, &[413, 408, 0]);
                conn = Conn::new(setup.addr);
            }
            "bomb" => {
                let bomb = &setup.bombs[n % setup.bombs.len()];
                let a = conn.exchange(&request("POST", &path, &[], bomb)).await;
                expect(shared, kind, &a, &[413]);
            }
            "past_deadline" => {
                let h = [("x-deadline-ms", "1".to_string())];
                let a = conn.exchange(&request("POST", &all, &h, frame)).await;
                expect(shared, kind, &a, &[200, 504]);
                if let Some((200, body)) = &a {
                    let v: serde_json::Value = serde_json::from_slice(body).unwrap_or_default();
                    check_scores(shared, kind, &v["top"], want);
                }
            }
            "unknown_route" => {
                let a = conn.exchange(&request("GET", &format!("/nowhere/{n}"), &[], b"")).await;
                expect(shared, kind, &a, &[404]);
            }
            "slow_header" => {
                // Half a head, then nothing: the server closes it after header_timeout_ms.
                if let Ok(mut s) = TcpStream::connect(setup.addr).await {
                    let _ = s.write_all(format!("POST {path} HTTP/1.1\r\nhost: lineside\r\n").as_bytes()).await;
                    let a = read_answer(&mut s, &mut Vec::new()).await;
                    expect(shared, kind, &a, &[0, 408]);
                }
            }
            "slow_body" => {
                // A body promised and trickled: 408 body_timeout.
                if let Ok(mut s) = TcpStream::connect(setup.addr).await {
                    let head = format!("POST {path} HTTP/1.1\r\nhost: lineside\r\ncontent-length: 100000\r\n\r\n");
                    let _ = s.write_all(head.as_bytes()).await;
                    let (mut r, mut w) = s.into_split();
                    let trickle = async {
                        while w.write_all(b"x").await.is_ok() {
                            tokio::time::sleep(Duration::from_millis(100)).await;
                        }
                    };
                    let mut buf = Vec::new();
                    let read = async {
                        let mut chunk = [0u8; 4096];
                        loop {
                            match r.read(&mut chunk).await {
                                Ok(0) | Err(_) => break,
                                Ok(k) => buf.extend_from_slice(&chunk[..k]),
                            }
                            if buf.windows(4).any(|x| x == b"\r\n\r\n") {
                                break;
                            }
                        }
                    };
                    tokio::select! { _ = trickle => {}, _ = read => {} }
                    let head = String::from_utf8_lossy(&buf);
                    let status = head.split(' ').nth(1).and_then(|s| s.parse().ok()).unwrap_or(0);
                    let answer = (status != 0).then(|| (status, Vec::new()));
                    expect(shared, kind, &answer, &[408]);
                }
            }
            "cut_body" => {
                // Headers and half the body, then hang up.
                if let Ok(mut s) = TcpStream::connect(setup.addr).await {
                    let req = request("POST", &path, &[], frame);
                    let _ = s.write_all(&req[..req.len() - frame.len() / 2]).await;
                }
            }
            "hang_up" => {
                // The whole request, then hang up before the answer.
                if let Ok(mut s) = TcpStream::connect(setup.addr).await {
                    let _ = s.write_all(&request("POST", &path, &[], frame)).await;
                }
            }
            "cut_answer" => {
                // Read the first bytes of the answer, then hang up.
                if let Ok(mut s) = TcpStream::connect(setup.addr).await {
                    let _ = s.write_all(&request("POST", &all, &[], frame)).await;
                    let _ = s.read(&mut [0u8; 16]).await;
                }
            }
            _ => {}
        }
    }
}
