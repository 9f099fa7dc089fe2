//! A fixed pool of OS threads for CPU-heavy request work (decoding, resizing), fed by a
//! bounded queue, each job answered on a oneshot.
//!
//! Tokio's `spawn_blocking` pool is large and meant for blocking I/O; running decodes there
//! would let a burst take every core and starve `/healthz`. Here the thread count is fixed
//! (`[server] decode_threads`) and a full queue is refused at once.
//!
//! Ownership: the [`CpuPool`] handle holds the only sender. When the last clone is dropped
//! the channel closes and each worker exits after its current job.

use std::panic::{AssertUnwindSafe, catch_unwind};
use std::sync::Arc;

use crossbeam_channel::{Sender, TrySendError, bounded};
use tokio::sync::oneshot;

type Job = Box<dyn FnOnce() + Send + 'static>;

/// Why a job did not run.
#[derive(Debug, thiserror::Error, PartialEq, Eq)]
pub enum PoolError {
    /// The queue is full.
    #[error("the decode queue is full ({0} waiting)")]
    Full(usize),
    /// The pool has shut down.
    #[error("the decode pool has shut down")]
    Closed,
    /// The job panicked (the worker survives).
    #[error("the decode job panicked")]
    Panicked,
}

/// Handle to the pool; cheap to clone.
#[derive(Clone)]
pub struct CpuPool {
    tx: Arc<Sender<Job>>,
    capacity: usize,
}

impl CpuPool {
    /// Start `threads` workers behind a queue of `capacity` jobs.
    ///
    /// # Errors
    /// When the OS refuses to start a thread.
    pub fn new(name: &str, threads: usize, capacity: usize) -> std::io::Result<CpuPool> {
        let (tx, rx) = bounded::<Job>(capacity);
        for i in 0..threads {
            let rx = rx.clone();
            std::thread::Builder::new().name(format!("{name}-{i}")).spawn(move || {
                // Ends when every sender is gone.
                for job in rx {
                    job();
                }
            })?;
        }
        Ok(CpuPool { tx: Arc::new(tx), capacity })
    }

    /// Run `f` on a pool thread and await its result.
    ///
    /// # Errors
    /// `Full` at once when the queue is full; `Closed` after shutdown; `Panicked` if `f` panicked.
    pub async fn run<T, F>(&self, f: F) -> Result<T, PoolError>
    where
        T: Send + 'static,
        F: FnOnce() -> T + Send + 'static,
    {
        let (reply, answer) = oneshot::channel();
        let job: Job = Box::new(move || {
            let out = catch_unwind(AssertUnwindSafe(f));
            // The caller may have gone away (client disconnected): nothing to tell.
            let _ = reply.send(out);
        });
        match self.tx.try_send(job) {
            Ok(()) => {}
            Err(TrySendError::Full(_)) => return Err(PoolError::Full(self.capacity)),
            Err(TrySendError::Disconnected(_)) => return Err(PoolError::Closed),
        }
        match answer.await {
            Ok(Ok(v)) => Ok(v),
            Ok(Err(_panic)) => Err(PoolError::Panicked),
            Err(_) => Err(PoolError::Closed),
        }
    }

    /// Run `f` here, on the caller's thread, with the same panic guard as a pool job: for
    /// work small enough that handing it to a pool thread and back costs more than the work.
    ///
    /// # Errors
    /// `Panicked` if `f` panicked.
    pub fn run_here<T>(f: impl FnOnce() -> T) -> Result<T, PoolError> {
        catch_unwind(AssertUnwindSafe(f)).map_err(|_| PoolError::Panicked)
    }

    /// Jobs waiting for a thread now.
    pub fn queued(&self) -> usize {
        self.tx.len()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[tokio::test]
    async fn runs_jobs_and_survives_a_panic() {
        let pool = CpuPool::new("t", 1, 4).unwrap();
        assert_eq!(pool.run(|| 2 + 2).await, Ok(4));
        let boom: Result<(), _> = pool.run(|| panic!("boom")).await;
        assert_eq!(boom, Err(PoolError::Panicked));
        assert_eq!(pool.run(|| "still here").await, Ok("still here"));
        assert_eq!(CpuPool::run_here(|| 3), Ok(3));
        let boom: Result<(), _> = CpuPool::run_here(|| panic!("boom here"));
        assert_eq!(boom, Err(PoolError::Panicked));
    }

    // Multi-threaded: the test thread blocks on a std channel while a task submits the job.
    #[tokio::test(flavor = "multi_thread", worker_threads = 2)]
    async fn full_queue_is_refused_at_once() {
        let pool = CpuPool::new("t", 1, 1).unwrap();
        let (hold_tx, hold_rx) = std::sync::mpsc::channel::<()>();
        let (started_tx, started_rx) = std::sync::mpsc::channel::<()>();
        // Occupy the only worker until we say so.
        let busy = {
            let pool = pool.clone();
            tokio::spawn(async move {
                pool.run(move || {
                    started_tx.send(()).unwrap();
                    hold_rx.recv().unwrap();
                })
                .await
            })
        };
        started_rx.recv_timeout(std::time::Duration::from_secs(10)).unwrap();
        // One job fits in the queue...
        let queued = {
            let pool = pool.clone();
            tokio::spawn(async move { pool.run(|| 1).await })
        };
        while pool.queued() < 1 {
            tokio::task::yield_now().await;
        }
        // ...the next is refused without waiting.
        assert_eq!(pool.run(|| 2).await, Err(PoolError::Full(1)));
        hold_tx.send(()).unwrap();
        assert_eq!(busy.await.unwrap(), Ok(()));
        assert_eq!(queued.await.unwrap(), Ok(1));
    }
}
