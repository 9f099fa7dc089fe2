//! One inference lane: an OS thread that forms passes from the model's backlog and runs them.
//!
//! A lane owns one engine state ([`Runner`]) over the model's shared plan. It blocks on the
//! backlog and the stop channel; a job arriving starts a pass, which takes what is already
//! queued (and, for stacking engines, waits up to the gathering window) before running. An
//! engine error or panic answers the affected job with [`BatchError::Inference`], is counted,
//! and the lane replaces its engine state and goes on serving.

use std::panic::{AssertUnwindSafe, catch_unwind};
use std::sync::Arc;
use std::time::Instant;

use crossbeam_channel::{Receiver, RecvTimeoutError, TryRecvError, select};

use super::{BatchError, Gather, Job, Scored};
use crate::metrics::ModelMetrics;
use crate::model::{Model, Runner};

/// A lane, ready to run on its own thread.
pub struct Lane {
    model: Arc<Model>,
    runner: Runner,
    jobs: Receiver<Job>,
    stop: Receiver<()>,
    gather: Gather,
    metrics: ModelMetrics,
}

impl Lane {
    /// Prepare a lane (its engine state is created here, so failures surface at start-up).
    ///
    /// # Errors
    /// When the engine state cannot be created.
    pub fn new(
        model: Arc<Model>,
        jobs: Receiver<Job>,
        stop: Receiver<()>,
        gather: Gather,
        metrics: ModelMetrics,
    ) -> anyhow::Result<Lane> {
        let runner = model.runner()?;
        Ok(Lane { model, runner, jobs, stop, gather, metrics })
    }

    /// Serve until the stop channel closes, then answer what is left and return.
    pub fn run(mut self) {
        loop {
            let first = select! {
                recv(self.jobs) -> job => match job {
                    Ok(job) => job,
                    Err(_) => return, // every Batcher handle is gone
                },
                recv(self.stop) -> _ => break,
            };
            let pass = self.form_pass(first);
            self.metrics.backlog_depth.set(self.jobs.len() as i64);
            self.run_pass(pass);
        }
        while let Ok(job) = self.jobs.try_recv() {
            let _ = job.reply.send(Err(BatchError::ShuttingDown));
        }
    }

    fn form_pass(&self, first: Job) -> Vec<Job> {
        let first_at = first.enqueued;
        let mut pass = vec![first];
        while pass.len() < self.gather.cap {
            match self.jobs.try_recv() {
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
            match self.jobs.recv_deadline(until) {
                Ok(job) => pass.push(job),
                Err(RecvTimeoutError::Timeout | RecvTimeoutError::Disconnected) => break,
            }
        }
        pass
    }

    fn run_pass(&mut self, pass: Vec<Job>) {
        let started = Instant::now();
        let size = pass.len();
        self.metrics.pass_size.observe(size as f64);
        let mut last = None;
        for (i, job) in pass.into_iter().enumerate() {
            // The client hung up while queued: do not spend the engine on it.
            if job.reply.is_closed() {
                self.metrics.abandoned.inc();
                continue;
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

    fn run_one(&mut self, job: &Job, started: Instant, size: usize) -> Result<Scored, BatchError> {
        let t = Instant::now();
        let result = catch_unwind(AssertUnwindSafe(|| self.runner.run(&job.tensor)));
        let infer = t.elapsed();
        match result {
            Ok(Ok(scores)) => Ok(Scored { scores, wait: started - job.enqueued, infer, pass_size: size }),
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

    fn replace_runner(&mut self) {
        match self.model.runner() {
            Ok(r) => self.runner = r,
            // Keep the old state: it may still work, and a lane with none cannot serve.
            Err(e) => {
                tracing::error!(model = %self.model.name, cause = %e, "cannot replace engine state")
            }
        }
    }
}
