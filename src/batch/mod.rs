//! Batching: a bounded backlog per model, drained by inference lanes that form passes.
//!
//! [`Batcher`] is the cloneable handle the HTTP side holds; [`Batcher::infer`] queues one
//! image and awaits its answer on a oneshot. Each lane ([`worker`]) is a plain OS thread with
//! its own engine state over the model's shared plan: it takes the first waiting job, forms a
//! pass of up to `batch_cap` jobs ([`Gather`] decides how long it may wait for company), runs
//! it and answers every job. Inference never runs on the async executor's threads.
//!
//! Ownership: every `Batcher` clone holds a sender of the backlog; the [`BatcherGuard`] holds
//! the only sender of the stop channel. Dropping the guard stops the lanes: they answer
//! whatever is still queued with [`BatchError::ShuttingDown`] and exit.

pub mod worker;

use std::sync::Arc;
use std::time::{Duration, Instant};

use crossbeam_channel::{Sender, TrySendError, bounded};
use tokio::sync::oneshot;

use crate::config::{BatchingConfig, Lanes};
use crate::metrics::ModelMetrics;
use crate::model::Model;

/// Why a request got no scores from the batcher.
#[derive(Debug, Clone, thiserror::Error, PartialEq, Eq)]
pub enum BatchError {
    /// The backlog is full.
    #[error("model {model:?} has {backlog} requests waiting (batching.backlog); retry shortly")]
    QueueFull {
        /// The model.
        model: String,
        /// Its backlog size.
        backlog: usize,
    },
    /// The server is stopping.
    #[error("the server is shutting down")]
    ShuttingDown,
    /// The engine failed or panicked on this pass.
    #[error("inference failed: {0}")]
    Inference(String),
}

/// One image waiting for inference.
pub struct Job {
    /// Input tensor, in the model's layout.
    pub tensor: Vec<f32>,
    /// When it joined the backlog.
    pub enqueued: Instant,
    /// Where the answer goes.
    pub reply: oneshot::Sender<Result<Scored, BatchError>>,
}

/// One image's answer from a lane.
#[derive(Debug, Clone)]
pub struct Scored {
    /// Class probabilities, in label order.
    pub scores: Vec<f32>,
    /// Time from joining the backlog to the start of its pass.
    pub wait: Duration,
    /// Time the engine spent on this image.
    pub infer: Duration,
    /// Number of jobs in its pass.
    pub pass_size: usize,
}

/// How a lane forms a pass: a pure function of the arrivals and the clock, so that it is
/// unit-tested without real time.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Gather {
    /// Most jobs in one pass.
    pub cap: usize,
    /// Longest the first job of a pass may wait for company.
    pub window: Duration,
    /// Whether the engine runs a pass as one stacked tensor. When it does not (tract runs
    /// consecutive batch-1 runs: faster per image here), waiting for company gains nothing,
    /// so the lane takes only what is already queued and never waits.
    pub stacks: bool,
}

impl Gather {
    /// With `taken` jobs in the pass so far, the first of which arrived at `first`, may the
    /// lane wait for another job, and until when? `None` closes the pass (after the lane has
    /// taken whatever is already queued).
    pub fn wait_until(&self, first: Instant, taken: usize, now: Instant) -> Option<Instant> {
        if taken >= self.cap || !self.stacks {
            return None;
        }
        let close = first + self.window;
        (now < close).then_some(close)
    }
}

/// Handle to a model's backlog; cheap to clone.
#[derive(Clone)]
pub struct Batcher {
    tx: Sender<Job>,
    model: String,
    backlog: usize,
    metrics: ModelMetrics,
}

/// Stops the lanes when dropped (after answering what is still queued).
pub struct BatcherGuard {
    _stop: Sender<()>,
}

/// Lanes for `Lanes::Auto`: one single-threaded lane per core. Two lanes x 1 thread used
/// 1.95 of 2 cores here, against 1.2-1.8 for one 2-thread plan (FACTS.md).
pub fn auto_lanes() -> usize {
    std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1)
}

impl Batcher {
    /// Start the lanes for `model`.
    ///
    /// # Errors
    /// When a lane's engine state or thread cannot be created.
    pub fn start(
        model: Arc<Model>,
        cfg: &BatchingConfig,
        metrics: ModelMetrics,
    ) -> anyhow::Result<(Batcher, BatcherGuard)> {
        let (tx, rx) = bounded::<Job>(cfg.backlog);
        let (stop_tx, stop_rx) = bounded::<()>(0);
        let lanes = match cfg.lanes {
            Lanes::Auto => auto_lanes(),
            Lanes::Fixed(n) => n,
        };
        let gather = Gather { cap: cfg.batch_cap, window: cfg.gather, stacks: false };
        for i in 0..lanes {
            let lane = worker::Lane::new(Arc::clone(&model), rx.clone(), stop_rx.clone(), gather, metrics.clone())?;
            std::thread::Builder::new().name(format!("lane-{}-{i}", model.name)).spawn(move || lane.run())?;
        }
        metrics.lanes.set(lanes as i64);
        let batcher = Batcher { tx, model: model.name.clone(), backlog: cfg.backlog, metrics };
        Ok((batcher, BatcherGuard { _stop: stop_tx }))
    }

    /// Queue one image and await its scores.
    ///
    /// # Errors
    /// `QueueFull` at once when the backlog is full; `ShuttingDown`; `Inference`.
    pub async fn infer(&self, tensor: Vec<f32>) -> Result<Scored, BatchError> {
        let (reply, answer) = oneshot::channel();
        let job = Job { tensor, enqueued: Instant::now(), reply };
        match self.tx.try_send(job) {
            Ok(()) => {}
            Err(TrySendError::Full(_)) => {
                return Err(BatchError::QueueFull { model: self.model.clone(), backlog: self.backlog });
            }
            Err(TrySendError::Disconnected(_)) => return Err(BatchError::ShuttingDown),
        }
        self.metrics.backlog_depth.set(self.tx.len() as i64);
        // A dropped reply means the lane went away without answering: only at shutdown.
        answer.await.unwrap_or(Err(BatchError::ShuttingDown))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn at(base: Instant, us: u64) -> Instant {
        base + Duration::from_micros(us)
    }

    #[test]
    fn non_stacking_engine_never_waits() {
        let g = Gather { cap: 8, window: Duration::from_micros(2000), stacks: false };
        let t0 = Instant::now();
        assert_eq!(g.wait_until(t0, 1, t0), None);
    }

    #[test]
    fn stacking_engine_waits_until_window_closes_after_first_arrival() {
        let g = Gather { cap: 4, window: Duration::from_micros(2000), stacks: true };
        let t0 = Instant::now();
        assert_eq!(g.wait_until(t0, 1, at(t0, 100)), Some(at(t0, 2000)));
        assert_eq!(g.wait_until(t0, 3, at(t0, 1999)), Some(at(t0, 2000)));
        // window measured from the first job's arrival, not from when the lane saw it
        assert_eq!(g.wait_until(t0, 1, at(t0, 2000)), None);
        assert_eq!(g.wait_until(t0, 1, at(t0, 5000)), None);
    }

    #[test]
    fn full_pass_closes_at_once() {
        let g = Gather { cap: 4, window: Duration::from_secs(1), stacks: true };
        let t0 = Instant::now();
        assert_eq!(g.wait_until(t0, 4, t0), None);
    }
}
