//! The model: an ONNX classifier loaded once, checked against its config, planned for
//! concrete shapes, and run by one [`Runner`] per inference lane.
//!
//! tract types stay inside this folder (tract calls its internal crates "not stable
//! surface"). [`load::load`] reads the file, [`check`] derives the input/output
//! [`Contract`] and refuses what lineside cannot serve, and the result is one [`Model`]
//! shared through an `Arc`. Each lane calls [`Model::runner`] once for its own engine state
//! over the shared plan.

pub mod check;
pub mod labels;
pub mod load;
pub mod report;

use std::sync::Arc;
use std::time::Duration;

use tract_onnx::prelude::*;

pub use check::{BatchAxis, Contract, InputType, ScoreTransform};

/// A loaded, checked and planned model, shared by every lane that serves it.
pub struct Model {
    /// Name from the config (the URL segment).
    pub name: String,
    /// First 12 hex digits of the ONNX file's SHA-256.
    pub version: String,
    /// Class names, in output order.
    pub labels: Vec<String>,
    /// What the model takes and gives.
    pub contract: Contract,
    /// Where the file came from, for messages.
    pub file: String,
    /// Time to load, check, plan and warm the model.
    pub load_time: Duration,
    /// Concrete batch-1 plan. Formed passes run as consecutive batch-1 runs on it: tract is
    /// slower per image on stacked batches (FACTS.md: a 96x96 CNN 346 img/s at b1 vs 252 at b8).
    plan: Arc<TypedRunnableModel>,
}

impl std::fmt::Debug for Model {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Model").field("name", &self.name).field("version", &self.version).finish_non_exhaustive()
    }
}

/// An engine state for one lane: runs one image at a time on the shared plan.
pub struct Runner {
    state: TypedSimpleState,
    shape: [usize; 4],
    transform: ScoreTransform,
    classes: usize,
    input_type: InputType,
}

/// Why a run failed.
#[derive(Debug, thiserror::Error)]
pub enum RunError {
    /// The input tensor has the wrong number of values (a bug upstream of the engine).
    #[error("input has {found} values, the model takes {expected}")]
    InputSize {
        /// Values the plan expects.
        expected: usize,
        /// Values given.
        found: usize,
    },
    /// tract failed.
    #[error("engine: {0}")]
    Engine(String),
}

impl Model {
    /// Number of f32 values in one image's input tensor.
    pub fn input_len(&self) -> usize {
        self.contract.input_shape(1).iter().product()
    }

    /// A fresh engine state over the shared plan.
    ///
    /// # Errors
    /// When tract cannot allocate the state.
    pub fn runner(&self) -> Result<Runner, RunError> {
        let state = self.plan.spawn().map_err(|e| RunError::Engine(format!("{e:#}")))?;
        let c = &self.contract;
        let shape = c.input_shape(1);
        Ok(Runner { state, shape, transform: c.scores, classes: c.classes, input_type: c.input_type })
    }
}

impl Runner {
    /// Run one image (already in the model's layout) and return its class probabilities.
    ///
    /// # Errors
    /// A wrong input length, or an engine failure.
    pub fn run(&mut self, input: &[f32]) -> Result<Vec<f32>, RunError> {
        self.run_raw(input).map(|raw| self.transform.apply(&raw))
    }

    /// Run one image and return the model's raw outputs (logits, or the graph's own scores).
    ///
    /// # Errors
    /// A wrong input length, or an engine failure.
    pub fn run_raw(&mut self, input: &[f32]) -> Result<Vec<f32>, RunError> {
        let expected: usize = self.shape.iter().product();
        if input.len() != expected {
            return Err(RunError::InputSize { expected, found: input.len() });
        }
        let tensor = match self.input_type {
            InputType::Float32 => Tensor::from_shape(&self.shape, input),
            // The pipeline gives raw pixel values (exact integers 0..=255) for uint8 models.
            InputType::Uint8 => {
                let bytes: Vec<u8> = input.iter().map(|&v| v.round().clamp(0.0, 255.0) as u8).collect();
                Tensor::from_shape(&self.shape, &bytes)
            }
        }
        .map_err(|e| RunError::Engine(format!("{e:#}")))?;
        let out = self.state.run(tvec![tensor.into()]).map_err(|e| RunError::Engine(format!("{e:#}")))?;
        let view = out[0].to_plain_array_view::<f32>().map_err(|e| RunError::Engine(format!("{e:#}")))?;
        let raw: Vec<f32> = view.iter().copied().collect();
        if raw.len() != self.classes {
            return Err(RunError::Engine(format!("output has {} values, expected {}", raw.len(), self.classes)));
        }
        Ok(raw)
    }
}

/// Numerically stable softmax.
pub fn softmax(logits: &[f32]) -> Vec<f32> {
    let max = logits.iter().copied().fold(f32::NEG_INFINITY, f32::max);
    let exps: Vec<f32> = logits.iter().map(|&z| (z - max).exp()).collect();
    let sum: f32 = exps.iter().sum();
    exps.into_iter().map(|e| e / sum).collect()
}

/// Indices of the `k` highest scores, highest first (ties keep output order).
pub fn top_k(scores: &[f32], k: usize) -> Vec<usize> {
    let mut idx: Vec<usize> = (0..scores.len()).collect();
    // total_cmp: NaN cannot panic the sort.
    idx.sort_by(|&a, &b| scores[b].total_cmp(&scores[a]).then(a.cmp(&b)));
    idx.truncate(k);
    idx
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn softmax_matches_closed_form() {
        // exp(x_i) / sum exp(x_j), computed by hand for [1, 2, 3]:
        // e^1 = 2.718282, e^2 = 7.389056, e^3 = 20.085537, sum = 30.192875
        let p = softmax(&[1.0, 2.0, 3.0]);
        let want = [0.090_030_57, 0.244_728_47, 0.665_240_96];
        for (a, b) in p.iter().zip(want) {
            assert!((a - b).abs() < 1e-6, "{p:?}");
        }
        // shift invariance keeps large logits finite
        let big = softmax(&[1000.0, 1001.0, 1002.0]);
        assert!((big[2] - want[2]).abs() < 1e-6, "{big:?}");
    }

    #[test]
    fn sigmoid_transform_matches_closed_form() {
        // 1 / (1 + e^-z): z = 0 -> 0.5; z = 2 -> 0.8807971; z = -3 -> 0.0474259
        let s = ScoreTransform::Sigmoid.apply(&[0.0, 2.0, -3.0]);
        for (a, b) in s.iter().zip([0.5, 0.880_797_1, 0.047_425_87]) {
            assert!((a - b).abs() < 1e-6, "{s:?}");
        }
        assert_eq!(ScoreTransform::AsIs.apply(&[0.25, 3.0]), vec![0.25, 3.0]);
    }

    #[test]
    fn top_k_orders_by_score_then_index() {
        assert_eq!(top_k(&[0.1, 0.5, 0.2, 0.5], 3), vec![1, 3, 2]);
        assert_eq!(top_k(&[0.1, 0.5], 9), vec![1, 0]);
        assert_eq!(top_k(&[f32::NAN, 0.5], 1).len(), 1);
    }
}
