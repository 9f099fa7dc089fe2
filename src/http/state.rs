//! Shared state of the HTTP side: readiness, the served models, metrics, the decode pool.
//!
//! Readiness lives in a `watch` channel whose only sender is held by `server::run`: it moves
//! from `Loading` to `Ready` (or `Failed`) once the loader finishes, and to `Draining` on
//! shutdown. Handlers read it without locks.

use std::collections::BTreeMap;
use std::sync::Arc;

use tokio::sync::watch;

use crate::batch::Batcher;
use crate::metrics::{Metrics, ModelMetrics};
use crate::model::Model;
use crate::preprocess::Pipeline;
use crate::preprocess::pool::CpuPool;

/// One model as the handlers see it.
pub struct ServedModel {
    /// The loaded model (contract, labels, version).
    pub model: Arc<Model>,
    /// Its preprocessing.
    pub pipeline: Arc<Pipeline>,
    /// Its backlog.
    pub batcher: Batcher,
    /// Its metric handles.
    pub metrics: ModelMetrics,
}

/// Every served model, by name.
pub type Served = BTreeMap<String, ServedModel>;

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

/// State shared by all handlers; cheap to clone.
#[derive(Clone)]
pub struct AppState {
    /// Readiness, updated by `server::run`.
    pub readiness: watch::Receiver<Readiness>,
    /// The registry.
    pub metrics: Metrics,
    /// Decode and preprocess threads.
    pub pool: CpuPool,
    /// `[server] body_limit_bytes`.
    pub body_limit: usize,
}
