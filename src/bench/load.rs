//! The load generator: keep-alive HTTP/1.1 clients posting frames, closed or open loop, with
//! every latency recorded.
//!
//! Closed loop: `concurrency` clients, each sending its next frame when the previous answer
//! arrives. Open loop: frames are due at a fixed rate whatever the server does, and latency is
//! measured from the moment a frame was *due*, not from when it could be sent: a stalled
//! server then shows in the percentiles instead of silently slowing the sender down (the
//! "coordinated omission" the HdrHistogram documentation describes).
//!
//! The generator runs on the calling thread (a current-thread runtime), so its CPU time is
//! one core's at most and is read apart from the server's.

use std::collections::BTreeMap;
use std::net::SocketAddr;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use axum::body::Bytes;
use http_body_util::{BodyExt, Full};
use hyper::client::conn::http1::SendRequest;
use hyper_util::rt::TokioIo;
use tokio::sync::Semaphore;

/// Where the frames go.
#[derive(Debug, Clone)]
pub struct Target {
    /// The server's address.
    pub addr: SocketAddr,
    /// `Host` header value.
    pub host: String,
    /// Request path, e.g. `/classify/washers`.
    pub path: String,
}

/// How requests are issued in one step.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Mode {
    /// This many clients, each waiting for its answer before sending again.
    Closed(usize),
    /// Frames due at this many per second, each on a free connection (opened as needed, at
    /// most `MAX_OPEN_CONNECTIONS`).
    Open(f64),
}

impl std::fmt::Display for Mode {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Mode::Closed(1) => write!(f, "closed loop, 1 client"),
            Mode::Closed(c) => write!(f, "closed loop, {c} clients"),
            Mode::Open(r) => write!(f, "open loop, {r}/s"),
        }
    }
}

/// Most connections an open-loop step opens; frames due while all are busy wait for one
/// (and that wait counts in their latency).
pub const MAX_OPEN_CONNECTIONS: usize = 512;

/// What one step measured.
#[derive(Debug, Clone)]
pub struct Measured {
    /// Latency of every answered frame due in the measured window, in microseconds, in
    /// completion order.
    pub samples_us: Vec<u64>,
    /// Frames answered 200.
    pub ok: u64,
    /// Failures by kind: `"http 503"`, `"connection"`, ...
    pub errors: BTreeMap<String, u64>,
    /// From the start of the measured window to the last answer, in seconds.
    pub wall_s: f64,
}

impl Measured {
    /// Answered frames per second (200s only).
    pub fn throughput(&self) -> f64 {
        if self.wall_s > 0.0 { self.ok as f64 / self.wall_s } else { 0.0 }
    }

    /// Every request that got an outcome in the window.
    pub fn total(&self) -> u64 {
        self.ok + self.errors.values().sum::<u64>()
    }
}

/// Shared tally of one step.
#[derive(Default)]
struct Tally {
    samples_us: Vec<u64>,
    ok: u64,
    errors: BTreeMap<String, u64>,
    last: Option<Instant>,
}

impl Tally {
    fn record(&mut self, due: Instant, outcome: Result<u16, String>, now: Instant) {
        match outcome {
            Ok(200) => {
                self.ok += 1;
                self.samples_us.push((now - due).as_micros() as u64);
            }
            Ok(status) => *self.errors.entry(format!("http {status}")).or_default() += 1,
            Err(kind) => *self.errors.entry(kind).or_default() += 1,
        }
        self.last = Some(self.last.map_or(now, |l| l.max(now)));
    }
}

/// One keep-alive connection.
struct Conn {
    sender: SendRequest<Full<Bytes>>,
}

impl Conn {
    async fn open(target: &Target) -> Result<Conn, String> {
        let stream = tokio::net::TcpStream::connect(target.addr).await.map_err(|_| "connection".to_string())?;
        let _ = stream.set_nodelay(true);
        let (sender, conn) =
            hyper::client::conn::http1::handshake(TokioIo::new(stream)).await.map_err(|_| "connection".to_string())?;
        tokio::spawn(async move {
            let _ = conn.await;
        });
        Ok(Conn { sender })
    }

    /// Post one frame; the answer's status, or the kind of failure. The body is read to
    /// its end, as a real client would.
    async fn post(&mut self, target: &Target, body: Bytes) -> Result<u16, String> {
        self.sender.ready().await.map_err(|_| "connection".to_string())?;
        let req = hyper::Request::post(target.path.as_str())
            .header(hyper::header::HOST, target.host.as_str())
            .header(hyper::header::CONTENT_TYPE, "application/octet-stream")
            .body(Full::new(body))
            .map_err(|e| format!("request: {e}"))?;
        let resp = self.sender.send_request(req).await.map_err(|_| "connection".to_string())?;
        let status = resp.status().as_u16();
        resp.into_body().collect().await.map_err(|_| "connection".to_string())?;
        Ok(status)
    }
}

/// GET `path` from the target and parse the answer as JSON.
///
/// # Errors
/// When the server cannot be reached, answers other than 200, or not with JSON.
pub async fn get_json(target: &Target, path: &str) -> anyhow::Result<serde_json::Value> {
    let stream = tokio::net::TcpStream::connect(target.addr)
        .await
        .map_err(|e| anyhow::anyhow!("cannot connect to {}: {e}", target.addr))?;
    let (sender, conn) = hyper::client::conn::http1::handshake(TokioIo::new(stream)).await?;
    tokio::spawn(async move {
        let _ = conn.await;
    });
    let mut conn = Conn { sender };
    conn.sender.ready().await?;
    let req =
        hyper::Request::get(path).header(hyper::header::HOST, target.host.as_str()).body(Full::new(Bytes::new()))?;
    let resp = conn.sender.send_request(req).await?;
    let status = resp.status();
    let body = resp.into_body().collect().await?.to_bytes();
    anyhow::ensure!(status == 200, "GET {path} answered {status}: {}", String::from_utf8_lossy(&body));
    Ok(serde_json::from_slice(&body)?)
}

/// A benchmark's step (`benches/`): half a second of warm-up, `secs` recorded, up to 30 s for
/// the last answers, no progress display.
pub async fn bench_step(target: &Target, frames: &[Bytes], mode: Mode, secs: f64) -> Measured {
    let (warmup, grace) = (Duration::from_millis(500), Duration::from_secs(30));
    run_step(target, frames, mode, warmup, Duration::from_secs_f64(secs), grace, &|_| {}).await
}

/// Run one step: `warmup` unrecorded, then `duration` recorded; requests due in the recorded
/// window are waited for (up to `grace` after it) so that none is left out. `progress` is
/// called about ten times a second with the fraction of the step done.
///
/// Must run inside a tokio runtime (the caller's thread drives it).
pub async fn run_step(
    target: &Target,
    frames: &[Bytes],
    mode: Mode,
    warmup: Duration,
    duration: Duration,
    grace: Duration,
    progress: &(dyn Fn(f64) + Sync),
) -> Measured {
    let start = Instant::now();
    let window = start + warmup;
    let end = window + duration;
    let tally = Arc::new(Mutex::new(Tally::default()));
    let frames: Arc<Vec<Bytes>> = Arc::new(frames.to_vec());
    let work = async {
        match mode {
            Mode::Closed(c) => closed(target, &frames, c, window, end, grace, &tally).await,
            Mode::Open(rate) => open(target, &frames, rate, window, end, grace, &tally).await,
        }
    };
    let ticker = async {
        let total = (end - start).as_secs_f64();
        loop {
            progress(((Instant::now() - start).as_secs_f64() / total).min(1.0));
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
    };
    tokio::select! {
        () = work => {},
        () = ticker => {},
    }
    progress(1.0);
    let t = std::mem::take(&mut *tally.lock().unwrap_or_else(|e| e.into_inner()));
    let wall_s = t.last.map_or(0.0, |l| l.saturating_duration_since(window).as_secs_f64());
    Measured { samples_us: t.samples_us, ok: t.ok, errors: t.errors, wall_s }
}

/// Post `body` on `conn`, or on a new connection when there is none; the connection comes
/// back if it is still usable.
async fn post_on(conn: Option<Conn>, target: &Target, body: Bytes) -> (Option<Conn>, Result<u16, String>) {
    let mut c = match conn {
        Some(c) => c,
        None => match Conn::open(target).await {
            Ok(c) => c,
            Err(e) => return (None, Err(e)),
        },
    };
    let outcome = c.post(target, body).await;
    (outcome.is_ok().then_some(c), outcome)
}

async fn closed(
    target: &Target,
    frames: &Arc<Vec<Bytes>>,
    clients: usize,
    window: Instant,
    end: Instant,
    grace: Duration,
    tally: &Arc<Mutex<Tally>>,
) {
    let tasks: Vec<_> = (0..clients)
        .map(|i| {
            let (target, frames, tally) = (target.clone(), Arc::clone(frames), Arc::clone(tally));
            tokio::spawn(async move {
                let mut conn: Option<Conn> = None;
                let mut n = i;
                while Instant::now() < end {
                    let sent = Instant::now();
                    let (kept, outcome) = post_on(conn.take(), &target, frames[n % frames.len()].clone()).await;
                    conn = kept;
                    n += clients;
                    if sent >= window {
                        tally.lock().unwrap_or_else(|e| e.into_inner()).record(sent, outcome, Instant::now());
                    } else if conn.is_none() {
                        // Refused during warm-up: do not spin on a dead server.
                        tokio::time::sleep(Duration::from_millis(10)).await;
                    }
                }
            })
        })
        .collect();
    let all = futures_util::future::join_all(tasks);
    let _ = tokio::time::timeout_at((end + grace).into(), all).await;
}

async fn open(
    target: &Target,
    frames: &Arc<Vec<Bytes>>,
    rate: f64,
    window: Instant,
    end: Instant,
    grace: Duration,
    tally: &Arc<Mutex<Tally>>,
) {
    let idle: Arc<Mutex<Vec<Conn>>> = Arc::new(Mutex::new(Vec::new()));
    let slots = Arc::new(Semaphore::new(MAX_OPEN_CONNECTIONS));
    let gap = Duration::from_secs_f64(1.0 / rate.max(1e-3));
    let first = Instant::now();
    let mut handles = Vec::new();
    for i in 0u64.. {
        let due = first + gap.mul_f64(i as f64);
        if due >= end {
            break;
        }
        tokio::time::sleep_until(due.into()).await;
        let (target, frames, tally, idle, slots) =
            (target.clone(), Arc::clone(frames), Arc::clone(tally), Arc::clone(&idle), Arc::clone(&slots));
        handles.push(tokio::spawn(async move {
            let Ok(_slot) = slots.acquire().await else { return };
            let reuse = idle.lock().unwrap_or_else(|e| e.into_inner()).pop();
            let (kept, outcome) = post_on(reuse, &target, frames[i as usize % frames.len()].clone()).await;
            if let Some(c) = kept {
                idle.lock().unwrap_or_else(|e| e.into_inner()).push(c);
            }
            if due >= window {
                // Latency from when the frame was due, not from when a connection was free.
                tally.lock().unwrap_or_else(|e| e.into_inner()).record(due, outcome, Instant::now());
            }
        }));
        // Finished tasks need not be kept.
        if handles.len() > 4 * MAX_OPEN_CONNECTIONS {
            handles.retain(|h| !h.is_finished());
        }
    }
    let all = futures_util::future::join_all(handles);
    let _ = tokio::time::timeout_at((end + grace).into(), all).await;
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn tally_counts_latency_from_the_due_time_and_errors_by_kind() {
        let mut t = Tally::default();
        let due = Instant::now();
        t.record(due, Ok(200), due + Duration::from_millis(250));
        t.record(due, Ok(503), due + Duration::from_millis(1));
        t.record(due, Err("connection".into()), due + Duration::from_millis(2));
        assert_eq!(t.samples_us, vec![250_000]);
        assert_eq!(t.ok, 1);
        assert_eq!(t.errors["http 503"], 1);
        assert_eq!(t.errors["connection"], 1);
        assert_eq!(t.last, Some(due + Duration::from_millis(250)));
    }
}
