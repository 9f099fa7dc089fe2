//! The model: an ONNX classifier loaded once, checked against its config, planned by its
//! engine, and run by one [`Runner`] per inference lane.
//!
//! Engine types stay inside this folder (tract calls its internal crates "not stable
//! surface"). [`load::load`] reads the file, [`check`] derives the input/output
//! [`Contract`] (with tract's ONNX front end, whatever the engine) and refuses what lineside
//! cannot serve, the configured engine ([`engine`]: [`tract`], or `onnxruntime` when built)
//! plans it, and the result is one [`Model`] shared through an `Arc`. Each lane calls
//! [`Model::runner_with_threads`] once for its own engine state over the shared plan.

pub mod check;
pub mod contract;
pub mod engine;
pub mod labels;
pub mod load;
#[cfg(feature = "onnxruntime")]
pub mod onnxruntime;
pub mod report;
pub mod tract;

use std::sync::Arc;
use std::time::Duration;

pub use contract::{
    BatchAxis, Contract, Expect, Input, InputType, Layout, ScoreTransform, ScoresMode, Tensor, softmax, top_k,
};
pub use engine::{EngineKind, EngineState, Planned, StateWrap};
pub use load::{Library, Spec, StackMode};

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
    /// How passes run, decided at load.
    pub stacking: Stacking,
    /// The engine's plan (one per model; each lane spawns its own state from it).
    plan: Arc<dyn Planned>,
}

/// Whether lanes stack a formed pass into one tensor, and why (decided at load).
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Stacking {
    /// Stacked (`true`) or image by image.
    pub stacked: bool,
    /// Why: `"engine"` (it cannot stack), `"model"` (the batch axis is fixed at 1),
    /// `"config"` (`stack = true | false`), `"calibrated"` (timed at load), `"kept"` (timed at
    /// an earlier load and kept by a reload).
    pub decided_by: std::borrow::Cow<'static, str>,
    /// The calibration's time per image run one at a time, in ms.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub single_ms_per_image: Option<f64>,
    /// The calibration's time per image in a stacked pass of `batch_cap`, in ms.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub stacked_ms_per_image: Option<f64>,
}

impl Stacking {
    /// Image by image, for `reason`.
    pub fn single(decided_by: &'static str) -> Stacking {
        Stacking {
            stacked: false,
            decided_by: decided_by.into(),
            single_ms_per_image: None,
            stacked_ms_per_image: None,
        }
    }
}

impl std::fmt::Debug for Model {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Model")
            .field("name", &self.name)
            .field("version", &self.version)
            .field("engine", &self.engine().name())
            .finish_non_exhaustive()
    }
}

/// An engine state for one lane: runs images on the shared plan, one at a time or stacked.
pub struct Runner {
    state: Box<dyn EngineState>,
    image_len: usize,
    transform: ScoreTransform,
    classes: usize,
    input_type: InputType,
    stacks: bool,
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
    /// The input's element type is not the model's (a bug upstream of the engine).
    #[error("the model takes {expected} input")]
    InputType {
        /// The model's element type.
        expected: &'static str,
    },
    /// The engine failed.
    #[error("engine: {0}")]
    Engine(String),
}

impl Model {
    /// Number of f32 values in one image's input tensor.
    pub fn input_len(&self) -> usize {
        self.contract.input_shape(1).iter().product()
    }

    /// The engine that runs this model.
    pub fn engine(&self) -> EngineKind {
        self.plan.kind()
    }

    /// Whether lanes run a formed pass as one stacked tensor ([`Model::stacking`]).
    pub fn stacks(&self) -> bool {
        self.stacking.stacked
    }

    /// Whether the engine and the model's batch axis allow stacking at all.
    pub fn can_stack(&self) -> bool {
        self.plan.can_stack() && self.contract.batch != BatchAxis::Fixed(1)
    }

    /// One image's input with every value `level` on the 0..1 scale of a normalised float
    /// input (a uint8 model gets `level x 255` as bytes): for warm-ups and timings.
    pub fn constant_input(&self, level: f32) -> Tensor {
        match self.contract.input_type {
            InputType::Float32 => Tensor::F32(vec![level; self.input_len()]),
            InputType::Uint8 => Tensor::U8(vec![(level * 255.0).round().clamp(0.0, 255.0) as u8; self.input_len()]),
        }
    }

    /// A fresh single-threaded engine state over the shared plan.
    ///
    /// # Errors
    /// When the engine cannot allocate the state.
    pub fn runner(&self) -> Result<Runner, RunError> {
        self.runner_with_threads(1)
    }

    /// The engine's own state on `threads` threads, without a runner's checks and score
    /// transform (for the engine benchmark).
    ///
    /// # Errors
    /// As [`Model::runner_with_threads`].
    pub fn engine_state(&self, threads: usize) -> Result<Box<dyn EngineState>, RunError> {
        self.plan.state(threads)
    }

    /// A fresh engine state running on `threads` threads (a lane's `lane_threads`).
    ///
    /// # Errors
    /// When the engine cannot allocate the state or start its threads.
    pub fn runner_with_threads(&self, threads: usize) -> Result<Runner, RunError> {
        self.runner_wrapped(threads, None)
    }

    /// As [`Model::runner_with_threads`], with the engine state wrapped by `wrap` if given
    /// (a lane's state under a test's fault-injecting engine).
    ///
    /// # Errors
    /// As [`Model::runner_with_threads`].
    pub fn runner_wrapped(&self, threads: usize, wrap: Option<&StateWrap>) -> Result<Runner, RunError> {
        let state = self.plan.state(threads)?;
        let state = match wrap {
            Some(w) => w(state),
            None => state,
        };
        let c = &self.contract;
        Ok(Runner {
            state,
            image_len: self.input_len(),
            transform: c.scores,
            classes: c.classes,
            input_type: c.input_type,
            stacks: self.stacks(),
        })
    }
}

impl Runner {
    /// Run one image (already in the model's layout) and return its class probabilities.
    ///
    /// # Errors
    /// A wrong input length, or an engine failure.
    pub fn run<'a>(&mut self, input: impl Into<Input<'a>>) -> Result<Vec<f32>, RunError> {
        self.run_raw(input).map(|raw| self.transform.apply(&raw))
    }

    /// Run one image and return the model's raw outputs (logits, or the graph's own scores).
    ///
    /// # Errors
    /// A wrong input length, or an engine failure.
    pub fn run_raw<'a>(&mut self, input: impl Into<Input<'a>>) -> Result<Vec<f32>, RunError> {
        first(self.run_stacked_raw(&[input.into()])?)
    }

    /// Run several images as one stacked tensor when the model's passes are stacked, else
    /// one after the other, and return each image's class probabilities in order.
    ///
    /// # Errors
    /// A wrong input length, or an engine failure (for the whole pass).
    pub fn run_pass(&mut self, inputs: &[Input<'_>]) -> Result<Vec<Vec<f32>>, RunError> {
        self.run_pass_as(inputs, self.stacks)
    }

    /// As [`Runner::run_pass`], stacked or not as `stacked` says (the calibration's two ways;
    /// `stacked` needs an engine and a model that can stack).
    ///
    /// # Errors
    /// As [`Runner::run_pass`].
    pub fn run_pass_as(&mut self, inputs: &[Input<'_>], stacked: bool) -> Result<Vec<Vec<f32>>, RunError> {
        let raw = if stacked {
            self.run_stacked_raw(inputs)?
        } else {
            let mut out = Vec::with_capacity(inputs.len());
            for x in inputs {
                out.push(first(self.run_stacked_raw(std::slice::from_ref(x))?)?);
            }
            out
        };
        Ok(raw.iter().map(|r| self.transform.apply(r)).collect())
    }

    /// Whether [`Runner::run_pass`] stacks.
    pub fn stacks(&self) -> bool {
        self.stacks
    }

    fn run_stacked_raw(&mut self, inputs: &[Input<'_>]) -> Result<Vec<Vec<f32>>, RunError> {
        // (`n * classes` values were checked below, and classes > 0, so one image gives one
        // output: [`first`] never meets an empty pass.)
        let n = inputs.len();
        if let Some(bad) = inputs.iter().find(|x| x.len() != self.image_len) {
            return Err(RunError::InputSize { expected: self.image_len, found: bad.len() });
        }
        let raw = match (self.input_type, inputs) {
            (_, [one]) if one.matches(self.input_type) => self.state.run(*one, 1)?,
            (InputType::Float32, _) => {
                let all: Option<Vec<&[f32]>> =
                    inputs.iter().map(|x| if let Input::F32(v) = x { Some(*v) } else { None }).collect();
                self.state.run(Input::F32(&all.ok_or(RunError::InputType { expected: "float32" })?.concat()), n)?
            }
            (InputType::Uint8, _) => {
                let all: Option<Vec<&[u8]>> =
                    inputs.iter().map(|x| if let Input::U8(v) = x { Some(*v) } else { None }).collect();
                self.state.run(Input::U8(&all.ok_or(RunError::InputType { expected: "uint8" })?.concat()), n)?
            }
        };
        if self.classes == 0 || raw.len() != n * self.classes {
            return Err(RunError::Engine(format!(
                "output has {} values for {n} image(s), expected {}",
                raw.len(),
                n * self.classes
            )));
        }
        Ok(raw.chunks(self.classes).map(<[f32]>::to_vec).collect())
    }
}

/// The one image's output of a one-image pass.
fn first(pass: Vec<Vec<f32>>) -> Result<Vec<f32>, RunError> {
    pass.into_iter().next().ok_or_else(|| RunError::Engine("a one-image pass gave no output".into()))
}

#[cfg(test)]
impl Model {
    /// A model over a test engine `plan`: one float input of `input_len` values (1 x 1 x 1 x
    /// `input_len`, NCHW), `classes` scores used as they are, stacked passes as `stacked` says.
    pub(crate) fn stub(plan: Arc<dyn Planned>, input_len: u32, classes: usize, stacked: bool) -> Model {
        let contract = Contract {
            input_name: "x".into(),
            input_shape: vec!["N".into(), "1".into(), "1".into(), input_len.to_string()],
            layout: Layout::Nchw,
            channels: 1,
            height: 1,
            width: input_len,
            input_type: InputType::Float32,
            batch: BatchAxis::Dynamic("N".into()),
            output_name: "y".into(),
            output_shape: vec!["N".into(), classes.to_string()],
            classes,
            scores: ScoreTransform::AsIs,
            ends_in: None,
        };
        Model {
            name: "stub".into(),
            version: "0".into(),
            labels: (0..classes).map(|i| i.to_string()).collect(),
            contract,
            file: "stub.onnx".into(),
            load_time: Duration::ZERO,
            stacking: Stacking { stacked, ..Stacking::single("config") },
            plan,
        }
    }
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
