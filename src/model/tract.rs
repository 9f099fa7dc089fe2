//! The tract engine: a concrete batch-1 plan shared by the lanes, one `SimpleState` per lane.
//!
//! tract runs a formed pass image by image on the batch-1 plan: it is slower per image on
//! stacked batches here (at batch > 1 it stops folding im2col into the matrix multiply) and
//! much slower on a symbolic batch axis (MobileNetV2 5x), so lineside never builds either for
//! serving (`benches/engines.rs` measures all three). A lane with `lane_threads > 1` runs
//! tract's matrix products on its own rayon pool (tract-linalg's `multithread-mm`), set for
//! the duration of each run.

use std::panic::catch_unwind;
use std::sync::Arc;
use std::time::{Duration, Instant};

use anyhow::Context as _;
use tract_linalg::multithread::{Executor, multithread_tract_scope};
use tract_onnx::prelude::*;

use super::Input;
use super::engine::{EngineKind, EngineState, Planned};
use super::{InputType, RunError};

/// A concrete plan for one input shape.
pub struct TractPlan {
    plan: Arc<TypedRunnableModel>,
    shape: [usize; 4],
}

impl TractPlan {
    /// Plan `inference` for the concrete `shape` (batch first).
    ///
    /// # Errors
    /// When tract cannot type or optimise the graph for that shape; the message names `file`.
    pub fn build(inference: InferenceModel, t: InputType, shape: [usize; 4], file: &str) -> anyhow::Result<TractPlan> {
        let plan = inference
            .with_input_fact(0, input_fact(t, shape))
            .and_then(|m| m.into_optimized())
            .and_then(|m| m.into_runnable())
            .with_context(|| format!("{file}: tract cannot plan the graph for input shape {shape:?}"))?;
        Ok(TractPlan { plan, shape })
    }

    /// Plan with a symbolic batch axis (what a server would need to stack any pass size in one
    /// plan): kept for the engine benchmark, never served.
    ///
    /// # Errors
    /// As [`TractPlan::build`].
    pub fn build_symbolic(
        inference: InferenceModel,
        t: InputType,
        shape: [usize; 4],
        file: &str,
    ) -> anyhow::Result<TractPlan> {
        let n = inference.symbols.sym("N");
        let dims: TVec<TDim> = std::iter::once(n.into()).chain(shape[1..].iter().map(|&d| d.into())).collect();
        let fact = match t {
            InputType::Float32 => f32::fact(dims),
            InputType::Uint8 => u8::fact(dims),
        };
        let plan = inference
            .with_input_fact(0, fact.into())
            .and_then(|m| m.into_optimized())
            .and_then(|m| m.into_runnable())
            .with_context(|| format!("{file}: tract cannot plan the graph with a symbolic batch"))?;
        Ok(TractPlan { plan, shape })
    }
}

impl Planned for TractPlan {
    fn kind(&self) -> EngineKind {
        EngineKind::Tract
    }

    fn can_stack(&self) -> bool {
        false
    }

    fn state(&self, threads: usize) -> Result<Box<dyn EngineState>, RunError> {
        let state = self.plan.spawn().map_err(|e| RunError::Engine(format!("{e:#}")))?;
        let executor = executor(threads).map_err(|e| RunError::Engine(format!("{e:#}")))?;
        Ok(Box::new(TractState { state, shape: self.shape, executor }))
    }
}

/// One lane's tract state and executor.
struct TractState {
    state: TypedSimpleState,
    shape: [usize; 4],
    /// `SingleThread` for one thread (never `Executor::multithread(1)`: that uses rayon's
    /// global pool, i.e. every core), else the lane's own pool.
    executor: Executor,
}

impl EngineState for TractState {
    fn run(&mut self, input: Input<'_>, images: usize) -> Result<Vec<f32>, RunError> {
        let err = |e: TractError| RunError::Engine(format!("{e:#}"));
        // A symbolic plan (the engine benchmark) takes any batch; a concrete one its own.
        let mut shape = self.shape;
        shape[0] = images;
        let tensor = match input {
            Input::F32(x) => Tensor::from_shape(&shape, x),
            Input::U8(x) => Tensor::from_shape(&shape, x),
        }
        .map_err(err)?;
        let state = &mut self.state;
        let out = multithread_tract_scope(self.executor.clone(), || state.run(tvec![tensor.into()])).map_err(err)?;
        let first = out.first().ok_or_else(|| RunError::Engine("the plan returned no outputs".into()))?;
        let view = first.to_plain_array_view::<f32>().map_err(err)?;
        Ok(view.iter().copied().collect())
    }
}

/// The executor for `threads` threads: tract's default single-threaded one for 1, else a
/// private rayon pool.
///
/// # Errors
/// When the pool's threads cannot be started.
fn executor(threads: usize) -> anyhow::Result<Executor> {
    if threads <= 1 {
        return Ok(Executor::SingleThread);
    }
    // tract panics when the pool cannot be built; that is an error here, not a crash.
    // Named "lane-…" so per-thread CPU readings count the pool as the lane's.
    catch_unwind(|| Executor::multithread_with_name(threads, "lane-pool"))
        .map_err(|_| anyhow::anyhow!("cannot start {threads} inference threads"))
}

/// Time a stacked pass: `batch` images in one tensor on a concrete plan for that size, which
/// lineside does not serve with on tract but `check` reports so the choice can be re-measured
/// on each box. Median of 5 runs after one warm-up, per image.
///
/// # Errors
/// When tract cannot plan or run the stacked shape.
pub fn time_stacked(bytes: &[u8], t: InputType, shape: [usize; 4], file: &str) -> anyhow::Result<Duration> {
    let batch = shape[0];
    let inference = tract_onnx::onnx().model_for_read(&mut &bytes[..])?;
    let plan = TractPlan::build(inference, t, shape, file)?;
    let mut state = plan.state(1)?;
    let (floats, bytes) = (vec![0.5f32; shape.iter().product()], vec![128u8; shape.iter().product()]);
    let input = match t {
        InputType::Float32 => Input::F32(&floats),
        InputType::Uint8 => Input::U8(&bytes),
    };
    state.run(input, batch)?;
    let mut times = Vec::new();
    for _ in 0..5 {
        let t = Instant::now();
        state.run(input, batch)?;
        times.push(t.elapsed());
    }
    times.sort();
    Ok(times[2] / batch as u32)
}

/// tract's input fact for a concrete shape.
pub fn input_fact(t: InputType, shape: [usize; 4]) -> InferenceFact {
    match t {
        InputType::Float32 => f32::fact(shape).into(),
        InputType::Uint8 => u8::fact(shape).into(),
    }
}
