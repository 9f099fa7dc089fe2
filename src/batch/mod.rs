//! Batching: a bounded backlog per model, drained by inference lanes that form passes.
//!
//! [`Batcher`] is the cloneable handle the HTTP side holds; [`Batcher::infer`] queues one
//! image and awaits its answer on a oneshot. Each lane ([`worker`]) is a plain OS thread with
//! its own engine state over the model's shared plan: it takes the first waiting job, forms a
//! pass of up to `batch_cap` jobs ([`Gather`] decides how long it may wait for company), runs
//! it and answers every job. Inference never runs on the async executor's threads.
//!
//! Ownership: every `Batcher` clone holds a sender of the backlog; the [`BatcherGuard`] holds
//! the only sender of the stop channel. Dropping the guard marks the batcher closed (new jobs
//! are refused at once) and stops the lanes: they answer whatever is still queued with
//! [`BatchError::ShuttingDown`] and exit.
//!
//! Background work (evaluation, occlusion maps, candidate trials, reload warm-ups) shares the
//! lanes with live requests through [`Batcher::infer_background`]: its jobs wait in a second,
//! small queue, and a lane takes them only when no live request waits. A live request that
//! arrives meanwhile waits for at most the one background pass in progress on that lane (up
//! to `batch_cap` images); at most `lanes x batch_cap` background jobs wait per model, and a
//! submitter beyond that waits for room instead of being refused (DEVELOPERS.md).
//!
//! Deadlines: every job carries the instant its request must be answered by; a lane that
//! picks up a job past it answers [`BatchError::DeadlineExpired`] without running it, and a job
//! whose client has gone (its reply channel closed) is skipped too.

#[cfg(test)]
mod lane_tests;
pub mod worker;

use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::time::{Duration, Instant};

use crossbeam_channel::{Receiver, Sender, TrySendError, bounded};
use tokio::sync::oneshot;

use crate::metrics::ModelMetrics;
use crate::model::{Model, StackMode, StateWrap, Tensor};

/// How many inference lanes a model gets.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Lanes {
    /// One lane per available core (see `batch` for the rule).
    Auto,
    /// Exactly this many.
    Fixed(usize),
}

/// Validated `[models.batching]`.
#[derive(Debug, Clone, PartialEq)]
pub struct BatchingConfig {
    /// Most requests one inference pass takes.
    pub batch_cap: usize,
    /// Longest the first request of a pass may wait for company (engines that stack only).
    pub gather: Duration,
    /// Requests waiting per model before new ones get 503 `overloaded`.
    pub backlog: usize,
    /// Parallel inference lanes.
    pub lanes: Lanes,
    /// Threads inside one lane's inference.
    pub lane_threads: usize,
    /// Whether passes are stacked into one tensor (`stack`).
    pub stack: StackMode,
}
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
    #[error("the server is shutting down; retry on another instance")]
    ShuttingDown,
    /// The request's deadline passed while it waited; it never reached the engine.
    #[error("the request's deadline passed after {waited_ms} ms waiting for an inference lane")]
    DeadlineExpired {
        /// Time spent waiting, in milliseconds.
        waited_ms: u64,
    },
    /// The engine failed or panicked on this pass.
    #[error("inference failed: {0}")]
    Inference(String),
}

/// One image waiting for inference.
pub struct Job {
    /// Input tensor, in the model's layout and element type.
    pub tensor: Tensor,
    /// When it joined the backlog.
    pub enqueued: Instant,
    /// Past this instant it is answered `DeadlineExpired` instead of run.
    pub deadline: Instant,
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
    /// With `taken` jobs in the pass so far (the lane has already taken everything queued),
    /// the first of which arrived at `first`, may the lane wait for another job, and until
    /// when? `None` closes the pass.
    ///
    /// The policy: never wait when the engine does not stack (nothing to gain), and never
    /// when the lane found a single job (an idle line: no gathering delay for one frame).
    /// When it found two or more, a burst is under way (several stations triggered
    /// together): wait for the rest until the window closes, `window` after the first one's
    /// arrival, or the pass is full.
    pub fn wait_until(&self, first: Instant, taken: usize, now: Instant) -> Option<Instant> {
        if taken >= self.cap || !self.stacks || taken < 2 {
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
    /// The background queue; `background_room` holds one permit per free place in it.
    background: Sender<Job>,
    background_room: Arc<tokio::sync::Semaphore>,
    model: String,
    backlog: usize,
    closed: Arc<AtomicBool>,
    busy: Arc<BusyClock>,
}

/// Stops the lanes when dropped: new jobs are refused, queued ones answered `ShuttingDown`
/// at once (a lane busy with a long pass would reach them late), and the lanes exit after the
/// run in progress.
pub struct BatcherGuard {
    closed: Arc<AtomicBool>,
    queued: Receiver<Job>,
    background: Receiver<Job>,
    background_room: Arc<tokio::sync::Semaphore>,
    _stop: Sender<()>,
}

impl Drop for BatcherGuard {
    fn drop(&mut self) {
        // Refuse new jobs first, so that none is queued behind the sweep below.
        self.closed.store(true, Ordering::SeqCst);
        self.background_room.close();
        refuse_queued(&self.queued);
        refuse_queued(&self.background);
    }
}

/// Answer every job still in a closing backlog `ShuttingDown`.
fn refuse_queued(jobs: &Receiver<Job>) {
    while let Ok(job) = jobs.try_recv() {
        let _ = job.reply.send(Err(BatchError::ShuttingDown));
    }
}

/// When each lane's current pass started, for the stall check of `/healthz`.
///
/// One slot per lane: microseconds since `epoch` plus one when the lane started its pass,
/// 0 while it is idle. Lanes write their own slot; readers only load.
pub struct BusyClock {
    epoch: Instant,
    slots: Vec<AtomicU64>,
}

impl BusyClock {
    fn new(lanes: usize) -> BusyClock {
        BusyClock { epoch: Instant::now(), slots: (0..lanes).map(|_| AtomicU64::new(0)).collect() }
    }

    /// Mark lane `i` busy from now.
    pub fn start(&self, i: usize) {
        let us = self.epoch.elapsed().as_micros() as u64 + 1;
        self.slots[i].store(us, Ordering::Relaxed);
    }

    /// Mark lane `i` idle.
    pub fn stop(&self, i: usize) {
        self.slots[i].store(0, Ordering::Relaxed);
    }

    /// How long the longest-running current pass has been running, if any lane is busy.
    pub fn longest(&self, now: Instant) -> Option<Duration> {
        let now_us = now.saturating_duration_since(self.epoch).as_micros() as u64 + 1;
        self.slots
            .iter()
            .map(|s| s.load(Ordering::Relaxed))
            .filter(|&v| v != 0)
            .map(|v| Duration::from_micros(now_us.saturating_sub(v)))
            .max()
    }
}

impl Batcher {
    /// Start `lanes` lanes for `model` (`lanes = "auto"` is resolved by the caller:
    /// `served::share_lanes`).
    ///
    /// # Errors
    /// When a lane's engine state or thread cannot be created.
    pub fn start(
        model: Arc<Model>,
        cfg: &BatchingConfig,
        lanes: usize,
        metrics: ModelMetrics,
        wrap: Option<&StateWrap>,
    ) -> anyhow::Result<(Batcher, BatcherGuard)> {
        let (tx, rx) = bounded::<Job>(cfg.backlog);
        let background_cap = lanes * cfg.batch_cap;
        let (bg_tx, bg_rx) = bounded::<Job>(background_cap);
        let background_room = Arc::new(tokio::sync::Semaphore::new(background_cap));
        let (stop_tx, stop_rx) = bounded::<()>(0);
        let gather = Gather { cap: cfg.batch_cap, window: cfg.gather, stacks: model.stacks() };
        let busy = Arc::new(BusyClock::new(lanes));
        let closed = Arc::new(AtomicBool::new(false));
        for i in 0..lanes {
            let ends = worker::LaneEnds {
                jobs: rx.clone(),
                background: bg_rx.clone(),
                stop: stop_rx.clone(),
                busy: Arc::clone(&busy),
                index: i,
                closed: Arc::clone(&closed),
            };
            let threads = cfg.lane_threads;
            let lane = worker::Lane::new(Arc::clone(&model), ends, gather, threads, metrics.clone(), wrap.cloned())?;
            std::thread::Builder::new().name(format!("lane-{}-{i}", model.name)).spawn(move || lane.run())?;
        }
        metrics.lanes.set(lanes as i64);
        let batcher = Batcher {
            tx,
            background: bg_tx,
            background_room: Arc::clone(&background_room),
            model: model.name.clone(),
            backlog: cfg.backlog,
            closed: Arc::clone(&closed),
            busy,
        };
        let guard = BatcherGuard { closed, queued: rx, background: bg_rx, background_room, _stop: stop_tx };
        Ok((batcher, guard))
    }

    /// Lanes serving this model.
    pub fn lanes(&self) -> usize {
        self.busy.slots.len()
    }

    /// Requests waiting in the backlog now, and its size.
    pub fn depth(&self) -> (usize, usize) {
        (self.tx.len(), self.backlog)
    }

    /// How long the longest-running current pass of this model's lanes has been running.
    pub fn longest_pass(&self, now: Instant) -> Option<Duration> {
        self.busy.longest(now)
    }

    /// Queue one image and await its scores; past `deadline` it is not run.
    ///
    /// # Errors
    /// `QueueFull` at once when the backlog is full; `ShuttingDown`; `DeadlineExpired`;
    /// `Inference`.
    pub async fn infer(&self, tensor: Tensor, deadline: Instant) -> Result<Scored, BatchError> {
        if self.closed.load(Ordering::SeqCst) {
            return Err(BatchError::ShuttingDown);
        }
        let (reply, answer) = oneshot::channel();
        let job = Job { tensor, enqueued: Instant::now(), deadline, reply };
        match self.tx.try_send(job) {
            Ok(()) => {}
            Err(TrySendError::Full(_)) => {
                return Err(BatchError::QueueFull { model: self.model.clone(), backlog: self.backlog });
            }
            Err(TrySendError::Disconnected(_)) => return Err(BatchError::ShuttingDown),
        }
        // A dropped reply means the lane went away without answering: only at shutdown.
        answer.await.unwrap_or(Err(BatchError::ShuttingDown))
    }

    /// Run one image as background work: it waits until a lane finds no live request
    /// waiting, and never delays a live request by more than the one background pass a lane
    /// may be running. When `lanes x batch_cap` background images already wait, this waits
    /// for room (it is never refused for being full). Background work has no deadline.
    ///
    /// # Errors
    /// `ShuttingDown` when the batcher closes first; `Inference`.
    pub async fn infer_background(&self, tensor: Tensor) -> Result<Scored, BatchError> {
        let _room = self.background_room.acquire().await.map_err(|_| BatchError::ShuttingDown)?;
        if self.closed.load(Ordering::SeqCst) {
            return Err(BatchError::ShuttingDown);
        }
        let (reply, answer) = oneshot::channel();
        let now = Instant::now();
        let job = Job { tensor, enqueued: now, deadline: now + NO_DEADLINE, reply };
        // Holding a permit guarantees a free place: Full cannot happen.
        self.background.try_send(job).map_err(|_| BatchError::ShuttingDown)?;
        answer.await.unwrap_or(Err(BatchError::ShuttingDown))
    }

    /// Background images waiting now, and the most that may wait.
    pub fn background_depth(&self) -> (usize, usize) {
        (self.background.len(), self.background.capacity().unwrap_or(0))
    }
}

/// The deadline of background work: none in practice (a day).
const NO_DEADLINE: Duration = Duration::from_secs(24 * 3600);

#[cfg(test)]
mod tests {
    use super::*;

    fn at(base: Instant, us: u64) -> Instant {
        base + Duration::from_micros(us)
    }

    #[test]
    fn non_stacking_engine_never_waits() {
        // A burst under way (3 taken, room for more, inside the window): a stacking engine
        // waits for the rest until the window closes, one that does not stack never waits.
        let t0 = Instant::now();
        let stacking = Gather { cap: 8, window: Duration::from_micros(2000), stacks: true };
        assert_eq!(stacking.wait_until(t0, 3, at(t0, 100)), Some(at(t0, 2000)));
        let single = Gather { stacks: false, ..stacking };
        assert_eq!(single.wait_until(t0, 3, at(t0, 100)), None);
    }

    #[test]
    fn stacking_engine_waits_until_window_closes_after_first_arrival() {
        let g = Gather { cap: 4, window: Duration::from_micros(2000), stacks: true };
        let t0 = Instant::now();
        assert_eq!(g.wait_until(t0, 2, at(t0, 100)), Some(at(t0, 2000)));
        assert_eq!(g.wait_until(t0, 3, at(t0, 1999)), Some(at(t0, 2000)));
        // window measured from the first job's arrival, not from when the lane saw it
        assert_eq!(g.wait_until(t0, 2, at(t0, 2000)), None);
        assert_eq!(g.wait_until(t0, 3, at(t0, 5000)), None);
    }

    #[test]
    fn a_single_waiting_job_runs_at_once_even_when_the_engine_stacks() {
        let g = Gather { cap: 8, window: Duration::from_micros(2000), stacks: true };
        let t0 = Instant::now();
        assert_eq!(g.wait_until(t0, 1, t0), None, "an idle lane with one job must not wait");
        assert_eq!(g.wait_until(t0, 1, at(t0, 100)), None);
        assert_eq!(g.wait_until(t0, 2, at(t0, 100)), Some(at(t0, 2000)), "a burst waits for the rest");
    }

    #[test]
    fn busy_clock_reports_the_longest_current_pass() {
        let c = BusyClock::new(2);
        assert_eq!(c.longest(Instant::now()), None);
        c.start(1);
        let later = Instant::now() + Duration::from_millis(50);
        let d = c.longest(later).unwrap();
        assert!(d >= Duration::from_millis(50) && d < Duration::from_secs(5), "{d:?}");
        c.stop(1);
        assert_eq!(c.longest(later), None);
    }

    #[test]
    fn full_pass_closes_at_once() {
        let g = Gather { cap: 4, window: Duration::from_secs(1), stacks: true };
        let t0 = Instant::now();
        assert_eq!(g.wait_until(t0, 4, t0), None);
    }
}
