//! Retained frames: the frames a person must see (held for review, rejected, of chosen labels,
//! and a random share of the rest for unbiased checks), kept with what lineside answered.
//!
//! The request path only decides and offers ([`Retainer::offer`]): a bounded queue hands the
//! frame to one writer thread per model, so an answer never waits for the disk. A full queue
//! or a failed write loses the frame, not the answer: a counter says so, and the log says why
//! at most once a minute. The writer keeps the folder within `max_frames` and `max_bytes`
//! ([`store::Store`]), across restarts.

pub mod export;
pub mod store;

use std::path::PathBuf;
use std::sync::Mutex;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::{Duration, Instant};

use axum::body::Bytes;
use serde::{Deserialize, Serialize};

use crate::decision::Verdict;
use crate::metrics::RetainMetrics;

/// `[models.retain]`, validated; `dir` resolved against the config's folder.
#[derive(Debug, Clone, PartialEq)]
pub struct RetainConfig {
    /// The folder, one per model (the config refuses two models sharing one).
    pub dir: PathBuf,
    /// Frames with these verdicts are kept.
    pub verdicts: Vec<Verdict>,
    /// Frames with these top-1 labels are kept whatever the verdict.
    pub labels: Vec<String>,
    /// Share of all other frames kept too (0 ..= 1), drawn at random.
    pub sample_other: f64,
    /// Most frames kept; the oldest go first.
    pub max_frames: usize,
    /// Most bytes kept (frames and sidecars); the oldest go first.
    pub max_bytes: u64,
    /// Frames waiting for the writer before new ones are dropped.
    pub queue: usize,
}

/// Why a frame is kept (in its sidecar).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Reason {
    /// Its verdict is in `verdicts`.
    Verdict,
    /// Its label is in `labels`.
    Label,
    /// Drawn by `sample_other`.
    Sample,
}

/// A top class in a sidecar.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TopScore {
    /// Class.
    pub label: String,
    /// Score.
    pub score: f32,
}

/// The JSON written beside each kept frame. `confirmed` is null until a person sets the true
/// label (then `lineside retained export` picks the frame up).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Sidecar {
    /// Always "lineside-retained".
    pub format: String,
    /// 1.
    pub format_version: u32,
    /// The frame's file name, beside this sidecar.
    pub frame: String,
    /// Its size in bytes, as received.
    pub bytes: u64,
    /// The request's id (`X-Request-Id`, given or generated).
    pub request_id: String,
    /// The part's id from `X-Part-Id`, when sent.
    pub part_id: Option<String>,
    /// The camera's id from `X-Camera-Id`, when sent.
    pub camera_id: Option<String>,
    /// For a multipart request: the part's position and name.
    pub multipart: Option<MultipartRef>,
    /// When the request arrived, RFC 3339 UTC with milliseconds.
    pub received_at: String,
    /// Model name.
    pub model: String,
    /// Model version.
    pub version: String,
    /// Top-1 label.
    pub label: String,
    /// Its score.
    pub score: f32,
    /// The top classes, best first.
    pub top: Vec<TopScore>,
    /// The verdict answered (absent without a decision table).
    pub verdict: Option<Verdict>,
    /// Why it was kept.
    pub kept_because: Reason,
    /// Decode, preprocess, wait, infer and total milliseconds.
    pub timing_ms: serde_json::Value,
    /// The true label, once a person has looked.
    pub confirmed: Option<String>,
}

/// Where a frame sat in a multipart request.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct MultipartRef {
    /// Position, from 0.
    pub index: usize,
    /// File or field name.
    pub name: String,
}

/// The sidecar format's name.
pub const FORMAT: &str = "lineside-retained";

struct Job {
    frame: Bytes,
    sidecar: Sidecar,
    extension: &'static str,
}

/// One model's retainer: decides, and queues frames for its writer thread.
pub struct Retainer {
    config: RetainConfig,
    tx: crossbeam_channel::Sender<Job>,
    metrics: RetainMetrics,
    throttle: std::sync::Arc<Throttle>,
    random: AtomicU64,
    /// Bytes of frames waiting for the writer (bounded by [`QUEUE_BYTES`] besides `queue`).
    queued_bytes: std::sync::Arc<AtomicU64>,
}

/// Most bytes of frames waiting for the writer, whatever `queue` allows: 64 frames of the
/// largest body would otherwise hold 64 x `body_limit_bytes`.
pub const QUEUE_BYTES: u64 = 64 << 20;

impl std::fmt::Debug for Retainer {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Retainer").field("config", &self.config).finish_non_exhaustive()
    }
}

impl Retainer {
    /// Start the writer thread of `model`'s folder. The folder is scanned (and created) by
    /// the writer, off the caller's path; failures there are counted and logged like a
    /// failed write, and never stop serving.
    ///
    /// # Errors
    /// The thread cannot be started.
    pub fn start(config: RetainConfig, model: &str, metrics: RetainMetrics) -> std::io::Result<Retainer> {
        let (tx, rx) = crossbeam_channel::bounded::<Job>(config.queue);
        let throttle = std::sync::Arc::new(Throttle::default());
        let queued_bytes = std::sync::Arc::new(AtomicU64::new(0));
        let writer = Writer {
            config: config.clone(),
            metrics: metrics.clone(),
            throttle: throttle.clone(),
            queued_bytes: queued_bytes.clone(),
        };
        let name = format!("lineside-retain-{model}");
        std::thread::Builder::new().name(name.chars().take(15).collect()).spawn(move || writer.run(&rx))?;
        let mut seed = [0u8; 8];
        let _ = getrandom::fill(&mut seed);
        Ok(Retainer {
            config,
            tx,
            metrics,
            throttle,
            random: AtomicU64::new(u64::from_le_bytes(seed) | 1),
            queued_bytes,
        })
    }

    /// The settings.
    pub fn config(&self) -> &RetainConfig {
        &self.config
    }

    /// Whether a frame with this verdict and label is kept, and why.
    pub fn wants(&self, verdict: Option<Verdict>, label: &str) -> Option<Reason> {
        if verdict.is_some_and(|v| self.config.verdicts.contains(&v)) {
            return Some(Reason::Verdict);
        }
        if self.config.labels.iter().any(|l| l == label) {
            return Some(Reason::Label);
        }
        (self.config.sample_other > 0.0 && self.uniform() < self.config.sample_other).then_some(Reason::Sample)
    }

    /// A uniform draw in [0, 1) (xorshift64*, seeded from the OS: the sample must not
    /// follow the line's rhythm; not for secrets).
    fn uniform(&self) -> f64 {
        let mut x = self.random.load(Ordering::Relaxed);
        x ^= x >> 12;
        x ^= x << 25;
        x ^= x >> 27;
        self.random.store(x, Ordering::Relaxed);
        (x.wrapping_mul(0x2545_f491_4f6c_dd1d) >> 11) as f64 / (1u64 << 53) as f64
    }

    /// Hand a frame to the writer without waiting: when its queue is full (in frames or in
    /// bytes), the frame is not kept (counted, and logged at most once a minute).
    pub fn offer(&self, frame: Bytes, sidecar: Sidecar) {
        let extension = extension_of(&frame);
        let len = frame.len() as u64;
        if self.queued_bytes.fetch_add(len, Ordering::SeqCst) + len > QUEUE_BYTES {
            self.queued_bytes.fetch_sub(len, Ordering::SeqCst);
            return self.queue_full();
        }
        match self.tx.try_send(Job { frame, sidecar, extension }) {
            Ok(()) => {}
            Err(crossbeam_channel::TrySendError::Full(_)) => {
                self.queued_bytes.fetch_sub(len, Ordering::SeqCst);
                self.queue_full();
            }
            Err(crossbeam_channel::TrySendError::Disconnected(_)) => {
                self.queued_bytes.fetch_sub(len, Ordering::SeqCst);
                self.metrics.writer_stopped.inc();
                self.throttle.warn("stopped", || {
                    tracing::error!(dir = %self.config.dir.display(), "the retain writer has stopped: frames are not being kept");
                });
            }
        }
    }

    fn queue_full(&self) {
        self.metrics.queue_full.inc();
        self.throttle.warn("queue", || {
            tracing::warn!(
                dir = %self.config.dir.display(),
                queue = self.config.queue,
                "retain queue full: frames are not being kept (the disk is slower than the line); answers are unaffected"
            );
        });
    }
}

/// The file extension for a frame's bytes (its format as sniffed; `bin` when unknown).
fn extension_of(bytes: &[u8]) -> &'static str {
    match image::guess_format(bytes) {
        Ok(image::ImageFormat::Png) => "png",
        Ok(image::ImageFormat::Jpeg) => "jpg",
        Ok(image::ImageFormat::Bmp) => "bmp",
        Ok(image::ImageFormat::Tiff) => "tif",
        Ok(image::ImageFormat::WebP) => "webp",
        _ => "bin",
    }
}

/// At most one log line a minute per kind of trouble.
#[derive(Default)]
struct Throttle {
    last: Mutex<Vec<(&'static str, Instant)>>,
}

impl Throttle {
    const EVERY: Duration = Duration::from_secs(60);

    fn warn(&self, kind: &'static str, log: impl FnOnce()) {
        let mut last = self.last.lock().unwrap_or_else(std::sync::PoisonError::into_inner);
        let now = Instant::now();
        match last.iter_mut().find(|(k, _)| *k == kind) {
            Some((_, at)) if now.duration_since(*at) < Self::EVERY => return,
            Some((_, at)) => *at = now,
            None => last.push((kind, now)),
        }
        drop(last);
        log();
    }
}

struct Writer {
    config: RetainConfig,
    metrics: RetainMetrics,
    throttle: std::sync::Arc<Throttle>,
    queued_bytes: std::sync::Arc<AtomicU64>,
}

impl Writer {
    /// Open the folder, applying the bounds to what is there (counted as evicted).
    fn open(&self) -> std::io::Result<store::Store> {
        let s = store::Store::open(&self.config.dir, self.config.max_frames, self.config.max_bytes)?;
        self.metrics.evicted.inc_by(s.evicted_at_open() as u64);
        self.metrics.frames.set(s.frames() as i64);
        self.metrics.bytes.set(s.bytes() as i64);
        Ok(s)
    }

    fn run(self, rx: &crossbeam_channel::Receiver<Job>) {
        let mut store = match self.open() {
            Ok(s) => {
                tracing::info!(dir = %self.config.dir.display(), frames = s.frames(), bytes = s.bytes(), "retained frames found");
                Some(s)
            }
            Err(e) => {
                tracing::error!(dir = %self.config.dir.display(), cause = %e, "cannot use the retain folder; frames will not be kept until it works");
                None
            }
        };
        for job in rx {
            self.queued_bytes.fetch_sub(job.frame.len() as u64, Ordering::SeqCst);
            // A folder that failed at start is tried again with each frame (it may have been
            // mounted or fixed since).
            if store.is_none() {
                store = self.open().ok();
            }
            let result = match store.as_mut() {
                Some(s) => s.write(&job.frame, job.sidecar, job.extension),
                None => Err(std::io::Error::other("the retain folder could not be opened")),
            };
            match result {
                Ok(evicted) => {
                    self.metrics.written.inc();
                    self.metrics.evicted.inc_by(evicted as u64);
                }
                Err(e) => {
                    self.metrics.write_failed.inc();
                    self.throttle.warn("write", || {
                        tracing::error!(dir = %self.config.dir.display(), cause = %e, "a retained frame could not be written; answers are unaffected");
                    });
                }
            }
            if let Some(s) = &store {
                self.metrics.frames.set(s.frames() as i64);
                self.metrics.bytes.set(s.bytes() as i64);
            }
        }
    }
}

/// RFC 3339 UTC with milliseconds for a time since the Unix epoch.
pub fn rfc3339(since_epoch: Duration) -> String {
    let secs = since_epoch.as_secs();
    let (days, rem) = (secs / 86_400, secs % 86_400);
    // Days to a civil date (proleptic Gregorian), after the algorithm in H. Hinnant's
    // "chrono-Compatible Low-Level Date Algorithms" (public domain).
    let z = days as i64 + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let day = doy - (153 * mp + 2) / 5 + 1;
    let month = if mp < 10 { mp + 3 } else { mp - 9 };
    let year = yoe + era * 400 + i64::from(month <= 2);
    format!(
        "{year:04}-{month:02}-{day:02}T{:02}:{:02}:{:02}.{:03}Z",
        rem / 3600,
        rem % 3600 / 60,
        rem % 60,
        since_epoch.subsec_millis()
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn times_are_rfc_3339_utc() {
        // Reference instants: each checked with Python's datetime.fromtimestamp(t, timezone.utc).
        assert_eq!(rfc3339(Duration::ZERO), "1970-01-01T00:00:00.000Z");
        assert_eq!(rfc3339(Duration::from_millis(951_782_400_123)), "2000-02-29T00:00:00.123Z");
        assert_eq!(rfc3339(Duration::from_secs(1_796_292_077)), "2026-12-03T10:01:17.000Z");
        assert_eq!(rfc3339(Duration::from_secs(4_107_542_399)), "2100-02-28T23:59:59.000Z");
    }

    #[test]
    fn formats_get_their_extension() {
        assert_eq!(extension_of(b"\x89PNG\r\n\x1a\n...."), "png");
        assert_eq!(extension_of(b"\xff\xd8\xff\xe0...."), "jpg");
        assert_eq!(extension_of(b"hello"), "bin");
    }
}
