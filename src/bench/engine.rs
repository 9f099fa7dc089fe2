//! The engine alone: the model's lanes running preprocessed frames back to back, no HTTP and
//! no decoding, for the serving-overhead ratio.

use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

use crate::model::{Model, Tensor};

/// What the engine did in the measured window.
#[derive(Debug, Clone)]
pub struct EngineRun {
    /// Time of each run (one image), in microseconds.
    pub samples_us: Vec<u64>,
    /// Length of the measured window, in seconds.
    pub wall_s: f64,
}

impl EngineRun {
    /// Images per second over all lanes.
    pub fn throughput(&self) -> f64 {
        if self.wall_s > 0.0 { self.samples_us.len() as f64 / self.wall_s } else { 0.0 }
    }
}

/// Run `lanes` lanes of `threads` threads, each cycling through `tensors`, for `warmup`
/// (not recorded) and then `duration`. An engine that stacks runs passes of `pass` images
/// (every image of a pass is recorded with the pass's time); others run image by image.
///
/// # Errors
/// When an engine state or a lane's thread pool cannot be made, or a run fails.
pub fn run(
    model: &Arc<Model>,
    tensors: &[Tensor],
    lanes: usize,
    threads: usize,
    pass: usize,
    warmup: Duration,
    duration: Duration,
) -> anyhow::Result<EngineRun> {
    anyhow::ensure!(!tensors.is_empty(), "no frames to run the engine on");
    let stop = Arc::new(AtomicBool::new(false));
    let start = Instant::now();
    let window = start + warmup;
    let window_end = window + duration;
    let handles: Vec<_> = (0..lanes)
        .map(|i| {
            let (model, stop, tensors) = (Arc::clone(model), Arc::clone(&stop), tensors.to_vec());
            std::thread::Builder::new().name(format!("bench-engine-{i}")).spawn(move || -> anyhow::Result<Vec<u64>> {
                let mut runner = model.runner_with_threads(threads)?;
                let mut samples = Vec::new();
                let size = if runner.stacks() { pass.max(1) } else { 1 };
                let mut n = i;
                while !stop.load(Ordering::Relaxed) {
                    let inputs: Vec<_> = (n..n + size).map(|k| tensors[k % tensors.len()].input()).collect();
                    let t = Instant::now();
                    std::hint::black_box(runner.run_pass(&inputs)?);
                    let done = Instant::now();
                    if t >= window && done <= window_end {
                        samples.extend(std::iter::repeat_n((done - t).as_micros() as u64, size));
                    }
                    n += size;
                }
                Ok(samples)
            })
        })
        .collect::<Result<_, _>>()?;
    std::thread::sleep(window_end.saturating_duration_since(Instant::now()));
    stop.store(true, Ordering::Relaxed);
    let mut samples_us = Vec::new();
    for h in handles {
        samples_us.extend(h.join().map_err(|_| anyhow::anyhow!("an engine lane panicked"))??);
    }
    // Only runs that started and ended inside the window count (at most one run per lane is
    // cut off at each edge).
    Ok(EngineRun { samples_us, wall_s: duration.as_secs_f64() })
}
