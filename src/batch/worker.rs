//! One inference lane: an OS thread that forms passes from the model's backlog and runs them.
//!
//! A lane owns one engine state ([`Runner`]) over the model's shared plan, with the lane's
//! thread count. It blocks on the backlog and the stop channel; a job arriving starts a
//! pass, which takes what is already queued (and, when passes are stacked and a burst is
//! under way, waits up to the gathering window) before running. Jobs
//! past their deadline or whose client has gone are answered or dropped without running. An
//! engine error or panic answers the affected job with [`BatchError::Inference`], is counted,
//! and after a panic the lane replaces its engine state (a restart) and goes on serving.

use std::panic::{AssertUnwindSafe, catch_unwind};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Instant;

use crossbeam_channel::{Receiver, RecvTimeoutError, TryRecvError, select};

use super::{BatchError, BusyClock, Gather, Job, Scored};
use crate::metrics::ModelMetrics;
use crate::model::{Model, RunError, Runner, StateWrap};

/// The next unit of work a lane found.
enum Next {
    /// A live request: it starts a pass that may gather company.
    Live(Job),
    /// Background work: it starts a pass of what background work is queued.
    Background(Job),
}

/// What connects a lane to its batcher.
pub struct LaneEnds {
    /// The model's backlog.
    pub jobs: Receiver<Job>,
    /// The model's background queue, taken from only when `jobs` is empty.
    pub background: Receiver<Job>,
    /// Closes when the batcher's guard is dropped.
    pub stop: Receiver<()>,
    /// Where the lane marks its passes, for the stall check.
    pub busy: Arc<BusyClock>,
    /// The lane's slot in `busy`.
    pub index: usize,
    /// Set when the batcher closes: jobs not yet run are answered `ShuttingDown`.
    pub closed: Arc<AtomicBool>,
}

/// A lane, ready to run on its own thread.
pub struct Lane {
    model: Arc<Model>,
    runner: Runner,
    ends: LaneEnds,
    gather: Gather,
    /// Threads of the lane's engine state (`lane_threads`), kept for a restart.
    threads: usize,
    metrics: ModelMetrics,
    /// Wraps the lane's engine state (tests only; kept for a restart).
    wrap: Option<StateWrap>,
}

impl Lane {
    /// Prepare a lane (its engine state is created here, so failures surface at start-up).
    ///
    /// # Errors
    /// When the engine state cannot be created.
    pub fn new(
        model: Arc<Model>,
        ends: LaneEnds,
        gather: Gather,
        threads: usize,
        metrics: ModelMetrics,
        wrap: Option<StateWrap>,
    ) -> anyhow::Result<Lane> {
        let runner = model.runner_wrapped(threads, wrap.as_ref())?;
        Ok(Lane { model, runner, ends, gather, threads, metrics, wrap })
    }

    /// Serve until the stop channel closes, then answer what is left and return.
    ///
    /// Live jobs first: a background job is run only when no live job waits; one taken from
    /// the queue while waiting for work is kept aside until the live queue is checked again.
    pub fn run(mut self) {
        let mut set_aside: Option<Job> = None;
        loop {
            // Stop before taking more work once closed (select! picks among ready arms at random).
            if self.ends.closed.load(Ordering::SeqCst) {
                break;
            }
            let next = if let Ok(job) = self.ends.jobs.try_recv() {
                Next::Live(job)
            } else if let Some(job) = set_aside.take().or_else(|| self.ends.background.try_recv().ok()) {
                Next::Background(job)
            } else {
                select! {
                    recv(self.ends.jobs) -> job => match job {
                        Ok(job) => Next::Live(job),
                        Err(_) => return, // every Batcher handle is gone
                    },
                    recv(self.ends.background) -> job => match job {
                        Ok(job) => {
                            set_aside = Some(job);
                            continue; // look at the live queue once more first
                        }
                        Err(_) => return,
                    },
                    recv(self.ends.stop) -> _ => break,
                }
            };
            let (pass, live) = match next {
                Next::Live(first) => (self.form_pass(first), true),
                Next::Background(first) => (self.form_background_pass(first), false),
            };
            self.ends.busy.start(self.ends.index);
            self.run_pass(pass, live);
            self.ends.busy.stop(self.ends.index);
        }
        if let Some(job) = set_aside {
            let _ = job.reply.send(Err(BatchError::ShuttingDown));
        }
        // A job sent in the instant before the guard closed the batcher is answered here.
        super::refuse_queued(&self.ends.jobs);
        super::refuse_queued(&self.ends.background);
    }

    /// A background pass: what is already queued, up to `batch_cap`, without waiting.
    fn form_background_pass(&self, first: Job) -> Vec<Job> {
        let mut pass = vec![first];
        while pass.len() < self.gather.cap {
            match self.ends.background.try_recv() {
                Ok(job) => pass.push(job),
                Err(_) => break,
            }
        }
        pass
    }

    fn form_pass(&self, first: Job) -> Vec<Job> {
        let first_at = first.enqueued;
        let mut pass = vec![first];
        while pass.len() < self.gather.cap {
            match self.ends.jobs.try_recv() {
                Ok(job) => {
                    pass.push(job);
                    continue;
                }
                Err(TryRecvError::Disconnected) => break,
                Err(TryRecvError::Empty) => {}
            }
            let Some(until) = self.gather.wait_until(first_at, pass.len(), Instant::now()) else {
                break;
            };
            match self.ends.jobs.recv_deadline(until) {
                Ok(job) => pass.push(job),
                Err(RecvTimeoutError::Timeout | RecvTimeoutError::Disconnected) => break,
            }
        }
        pass
    }

    /// Whether a job may still run now; if not, it is answered (or dropped) here.
    fn admit(&self, job: Job, now: Instant) -> Option<Job> {
        // The client hung up while queued: do not spend the engine on it.
        if job.reply.is_closed() {
            self.metrics.abandoned.inc();
            return None;
        }
        if self.ends.closed.load(Ordering::SeqCst) {
            let _ = job.reply.send(Err(BatchError::ShuttingDown));
            return None;
        }
        if now >= job.deadline {
            let waited_ms = (now - job.enqueued).as_millis() as u64;
            let _ = job.reply.send(Err(BatchError::DeadlineExpired { waited_ms }));
            return None;
        }
        Some(job)
    }

    /// Run a formed pass; `live` passes feed the backlog's metrics, background ones are
    /// counted apart.
    fn run_pass(&mut self, pass: Vec<Job>, live: bool) {
        let started = Instant::now();
        let pass: Vec<Job> = pass.into_iter().filter_map(|j| self.admit(j, started)).collect();
        let size = pass.len();
        if size == 0 {
            return;
        }
        if live {
            self.metrics.pass_size.observe(size as f64);
        } else {
            self.metrics.background_frames.inc_by(size as u64);
        }
        if self.runner.stacks() {
            self.run_stacked(pass, started, live);
            return;
        }
        let mut last = None;
        for (i, job) in pass.into_iter().enumerate() {
            // Runs are consecutive: a later job may expire, or its client go, meanwhile.
            let Some(job) = (if i == 0 { Some(job) } else { self.admit(job, Instant::now()) }) else {
                continue;
            };
            if live {
                self.metrics.backlog_wait.observe((Instant::now() - job.enqueued).as_secs_f64());
            }
            let answer = self.run_one(&job, started, size);
            if i + 1 == size {
                last = Some((job, answer));
            } else {
                let _ = job.reply.send(answer);
            }
        }
        // Record the pass before its last answer leaves, so that a client that reads
        // /metrics right after its answer sees its pass counted.
        self.metrics.inference_duration.observe(started.elapsed().as_secs_f64());
        if let Some((job, answer)) = last {
            let _ = job.reply.send(answer);
        }
    }

    /// Run the admitted pass as one stacked tensor (engines that stack): every job gets the
    /// pass's time as its inference time, and one failure fails the pass.
    fn run_stacked(&mut self, pass: Vec<Job>, started: Instant, live: bool) {
        let size = pass.len();
        let now = Instant::now();
        for job in pass.iter().filter(|_| live) {
            self.metrics.backlog_wait.observe((now - job.enqueued).as_secs_f64());
        }
        let inputs: Vec<_> = pass.iter().map(|j| j.tensor.input()).collect();
        let result = self.guarded(|runner| runner.run_pass(&inputs));
        let infer = now.elapsed();
        self.metrics.inference_duration.observe(started.elapsed().as_secs_f64());
        match result {
            Ok(all) => {
                for (job, scores) in pass.into_iter().zip(all) {
                    let _ = job.reply.send(Ok(Scored { scores, wait: started - job.enqueued, infer, pass_size: size }));
                }
            }
            Err(e) => {
                for job in pass {
                    let _ = job.reply.send(Err(e.clone()));
                }
            }
        }
    }

    /// Run `f` on the engine state; a failure is counted and logged, and after a panic the
    /// engine state is replaced.
    fn guarded<T>(&mut self, f: impl FnOnce(&mut Runner) -> Result<T, RunError>) -> Result<T, BatchError> {
        let runner = &mut self.runner;
        let result = catch_unwind(AssertUnwindSafe(|| f(runner)));
        match result {
            Ok(Ok(v)) => Ok(v),
            Ok(Err(e)) => {
                self.metrics.lane_failures.inc();
                tracing::error!(model = %self.model.name, cause = %e, "inference failed");
                Err(BatchError::Inference(e.to_string()))
            }
            Err(_) => {
                self.metrics.lane_failures.inc();
                tracing::error!(model = %self.model.name, "inference panicked; replacing the lane's engine state");
                self.replace_runner();
                Err(BatchError::Inference("the engine panicked".into()))
            }
        }
    }

    fn run_one(&mut self, job: &Job, started: Instant, size: usize) -> Result<Scored, BatchError> {
        let t = Instant::now();
        let result = self.guarded(|runner| runner.run(&job.tensor));
        let infer = t.elapsed();
        result.map(|scores| Scored { scores, wait: started - job.enqueued, infer, pass_size: size })
    }

    fn replace_runner(&mut self) {
        match self.model.runner_wrapped(self.threads, self.wrap.as_ref()) {
            Ok(r) => {
                self.runner = r;
                self.metrics.lane_restarts.inc();
            }
            // Keep the old state: it may still work, and a lane with none cannot serve.
            Err(e) => {
                tracing::error!(model = %self.model.name, cause = %e, "cannot replace engine state")
            }
        }
    }
}
