//! Shared state of the HTTP side: readiness, the served models, metrics, the decode pool.
//!
//! Readiness lives in a `watch` channel whose only sender is held by `server::run`: it moves
//! from `Loading` to `Ready` (or `Failed`) once the loader finishes, and to `Draining` on
//! shutdown. Handlers read it without locks.

use std::collections::BTreeMap;
use std::sync::Arc;
use std::sync::atomic::{AtomicU64, AtomicUsize, Ordering};
use std::time::Duration;

use tokio::sync::watch;

use super::error::{ApiError, ErrorKind};
use crate::metrics::Metrics;
use crate::preprocess::pool::CpuPool;
pub use crate::served::ServedModel;

/// Every served model, by name.
pub type Served = BTreeMap<String, Arc<ServedModel>>;

/// Where the server is in its life.
#[derive(Clone)]
pub enum Readiness {
    /// Models are loading; the text says which step.
    Loading(String),
    /// Serving.
    Ready(Arc<Served>),
    /// Not serving: loading failed (the process is about to exit) or a self-test failed
    /// (the process stays up, never ready); the text says why.
    Failed(String),
    /// Shutting down: requests in flight are answered, `/readyz` says 503.
    Draining(Arc<Served>),
}

impl Readiness {
    /// The state in words (for messages).
    pub fn describe(&self) -> String {
        match self {
            Readiness::Loading(what) => format!("loading ({what})"),
            Readiness::Ready(_) => "ready".into(),
            Readiness::Failed(why) => format!("failed ({why})"),
            Readiness::Draining(_) => "draining".into(),
        }
    }

    /// The served models, for a handler that needs them: `not_ready` while loading or after
    /// a failure, and `draining` on shutdown unless `while_draining` (read-only endpoints).
    ///
    /// # Errors
    /// The `ApiError` the handler answers with.
    pub fn served(&self, while_draining: bool) -> Result<Arc<Served>, ApiError> {
        match self {
            Readiness::Ready(s) => Ok(s.clone()),
            Readiness::Draining(s) if while_draining => Ok(s.clone()),
            Readiness::Draining(_) => {
                Err(ApiError::new(ErrorKind::Draining, "the server is shutting down; retry on another instance"))
            }
            Readiness::Loading(what) => Err(ApiError::new(ErrorKind::NotReady, format!("not ready yet: {what}"))),
            Readiness::Failed(why) => Err(ApiError::new(ErrorKind::NotReady, format!("not ready: {why}"))),
        }
    }
}

/// The model called `name`, or 404 `unknown_model` listing the ones served.
///
/// # Errors
/// No model by that name.
pub fn find<'a>(served: &'a Served, name: &str) -> Result<&'a ServedModel, ApiError> {
    served.get(name).map(|m| &**m).ok_or_else(|| {
        let known: Vec<&str> = served.keys().map(String::as_str).collect();
        ApiError::new(ErrorKind::UnknownModel, format!("no model named {name:?}; this server has {known:?}"))
    })
}

/// State shared by all handlers; cheap to clone.
#[derive(Clone)]
pub struct AppState {
    /// Readiness, updated by `server::run`.
    pub readiness: watch::Receiver<Readiness>,
    /// The registry.
    pub metrics: Metrics,
    /// Decode and preprocess threads.
    pub pool: CpuPool,
    /// Limits and timeouts from `[server]`.
    pub limits: RequestLimits,
    /// Classify requests accepted and not yet answered (the drain waits for 0).
    pub in_flight: Arc<InFlight>,
    /// Source of generated request ids.
    pub request_ids: Arc<RequestIds>,
    /// Tokens, sessions, TLS: who may do what.
    pub access: Arc<crate::access::Access>,
    /// The running logger's filter (`None` where no logger is installed, e.g. in tests).
    pub log: Option<Arc<crate::logging::LogControl>>,
    /// Model reloads (`None` for an app without an accept loop, e.g. `ready_app`).
    pub reloader: Option<Arc<crate::reload::Reloader>>,
}

/// The `[server]` settings a request is held to.
#[derive(Debug, Clone, Copy)]
pub struct RequestLimits {
    /// `body_limit_bytes`.
    pub body_limit: usize,
    /// `body_timeout_ms`.
    pub body_timeout: Duration,
    /// `deadline_ms`: the longest a classify request may take.
    pub deadline: Duration,
    /// `stall_ms`: a pass running longer makes `/healthz` fail.
    pub stall: Duration,
    /// `ready_backlog`: the backlog share at which `/readyz` turns 503.
    pub ready_backlog: f64,
    /// `decode_inline_pixels`: frames this small are decoded on the HTTP thread.
    pub decode_inline_pixels: u64,
    /// `max_header_bytes`: the largest request line and headers together.
    pub max_header_bytes: usize,
    /// `max_parts`: most parts in one multipart request (and at most the model's backlog).
    pub max_parts: usize,
    /// `max_part_bytes`: the largest part of a multipart request.
    pub max_part_bytes: usize,
}

/// A count of classify requests in progress; [`InFlight::enter`] returns a guard that
/// decrements it when the request's future ends, however it ends.
#[derive(Debug, Default)]
pub struct InFlight(AtomicUsize);

/// Decrements the in-flight count when dropped.
pub struct InFlightGuard(Arc<InFlight>);

impl InFlight {
    /// Count one more request until the guard drops.
    pub fn enter(self: &Arc<Self>) -> InFlightGuard {
        self.0.fetch_add(1, Ordering::SeqCst);
        InFlightGuard(Arc::clone(self))
    }

    /// Requests in progress now.
    pub fn count(&self) -> usize {
        self.0.load(Ordering::SeqCst)
    }
}

impl Drop for InFlightGuard {
    fn drop(&mut self) {
        self.0.0.fetch_sub(1, Ordering::SeqCst);
    }
}

/// Request ids for requests that bring none: the process's start time and a counter, in hex
/// (unique within a process, and across restarts of it).
#[derive(Debug)]
pub struct RequestIds {
    prefix: u64,
    next: AtomicU64,
}

impl RequestIds {
    /// A generator whose ids start with the current time.
    pub fn new() -> RequestIds {
        let now = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap_or_default();
        RequestIds { prefix: now.as_micros() as u64 & 0xffff_ffff_ffff, next: AtomicU64::new(1) }
    }

    /// The next id.
    pub fn next(&self) -> String {
        format!("{:012x}-{:06x}", self.prefix, self.next.fetch_add(1, Ordering::Relaxed))
    }
}

impl Default for RequestIds {
    fn default() -> Self {
        RequestIds::new()
    }
}
