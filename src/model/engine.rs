//! The engine abstraction: what the rest of lineside needs from an inference engine.
//!
//! An engine turns a checked ONNX file into a [`Planned`] model (built once, shared by the
//! lanes), and each lane asks it for its own [`EngineState`] with the lane's thread count.
//! The engine also says whether it can stack a formed pass into one tensor at all; whether
//! a model's passes are stacked is decided at load (`load::decide_stacking`): never on
//! tract (slower per image stacked, the engine table in docs/performance.md), by config or calibration on
//! onnxruntime.
//!
//! Engines: `tract` (pure Rust, always built, the default) and `onnxruntime` (cargo feature
//! `onnxruntime`; the shared library is loaded at run time).

use serde::{Deserialize, Serialize};

use super::RunError;

/// Which engine runs a model (`engine = "tract" | "onnxruntime"` in a model's config).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum EngineKind {
    /// tract (pure Rust, part of every build).
    #[default]
    Tract,
    /// onnxruntime through the `ort` crate, with the library loaded at run time.
    Onnxruntime,
}

impl EngineKind {
    /// The name used in the config, the metrics and the reports.
    pub fn name(self) -> &'static str {
        match self {
            EngineKind::Tract => "tract",
            EngineKind::Onnxruntime => "onnxruntime",
        }
    }

    /// Whether this build of lineside includes the engine.
    pub fn built(self) -> bool {
        match self {
            EngineKind::Tract => true,
            EngineKind::Onnxruntime => cfg!(feature = "onnxruntime"),
        }
    }

    /// This engine, if this build includes it; else the message that says how to rebuild.
    ///
    /// # Errors
    /// The engine is not in this build.
    pub fn require_built(self) -> Result<EngineKind, String> {
        if self.built() {
            return Ok(self);
        }
        Err(format!(
            "engine {:?}: this lineside was built without it; rebuild with \
             `cargo build --release --features {}`, or use engine \"tract\"",
            self.name(),
            self.name()
        ))
    }
}

impl std::str::FromStr for EngineKind {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        match s {
            "tract" => Ok(EngineKind::Tract),
            "onnxruntime" => Ok(EngineKind::Onnxruntime),
            other => Err(format!("unknown engine {other:?}: expected \"tract\" or \"onnxruntime\"")),
        }
    }
}

/// One image input, in the element type the model takes.
#[derive(Debug, Clone, Copy)]
pub enum Input<'a> {
    /// Normalised floats.
    F32(&'a [f32]),
    /// Raw 8-bit pixels.
    U8(&'a [u8]),
}

impl Input<'_> {
    /// Whether this is the element type `t`.
    pub fn matches(&self, t: super::InputType) -> bool {
        matches!((self, t), (Input::F32(_), super::InputType::Float32) | (Input::U8(_), super::InputType::Uint8))
    }

    /// Values in the input.
    pub fn len(&self) -> usize {
        match self {
            Input::F32(x) => x.len(),
            Input::U8(x) => x.len(),
        }
    }

    /// Whether it has no values.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

impl<'a> From<&'a [f32]> for Input<'a> {
    fn from(x: &'a [f32]) -> Self {
        Input::F32(x)
    }
}

impl<'a> From<&'a Vec<f32>> for Input<'a> {
    fn from(x: &'a Vec<f32>) -> Self {
        Input::F32(x)
    }
}

impl<'a> From<&'a Tensor> for Input<'a> {
    fn from(t: &'a Tensor) -> Self {
        t.input()
    }
}

/// One image's input tensor, owned, in the element type the model takes: a uint8 model's
/// pixels stay bytes from the decoder to the engine.
#[derive(Debug, Clone, PartialEq)]
pub enum Tensor {
    /// Normalised floats.
    F32(Vec<f32>),
    /// Raw 8-bit pixels.
    U8(Vec<u8>),
}

impl Tensor {
    /// Borrowed, for a run.
    pub fn input(&self) -> Input<'_> {
        match self {
            Tensor::F32(x) => Input::F32(x),
            Tensor::U8(x) => Input::U8(x),
        }
    }

    /// Values in the tensor.
    pub fn len(&self) -> usize {
        self.input().len()
    }

    /// Whether it has no values.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The values as floats (for reports and comparisons; bytes convert exactly).
    pub fn to_f32(&self) -> Vec<f32> {
        match self {
            Tensor::F32(x) => x.clone(),
            Tensor::U8(x) => x.iter().map(|&v| f32::from(v)).collect(),
        }
    }
}

/// A model planned by an engine, shared by every lane that serves it.
pub trait Planned: Send + Sync {
    /// Which engine this is.
    fn kind(&self) -> EngineKind;

    /// Whether the engine can run a formed pass as one stacked tensor at all. Whether it
    /// does is decided at load ([`super::load`]): never when it cannot, else by the config or
    /// a short calibration.
    fn can_stack(&self) -> bool;

    /// A fresh engine state for one lane, running on `threads` threads.
    ///
    /// # Errors
    /// When the engine cannot allocate the state or start its threads.
    fn state(&self, threads: usize) -> Result<Box<dyn EngineState>, RunError>;
}

/// Wraps a lane's engine state in another (tests put a fault-injecting engine around the
/// real one; nothing in production sets one).
pub type StateWrap = std::sync::Arc<dyn Fn(Box<dyn EngineState>) -> Box<dyn EngineState> + Send + Sync>;

/// One lane's engine state.
pub trait EngineState: Send {
    /// Run `images` images stacked along the batch axis (`input` holds them back to back, in
    /// the model's layout) and return the raw outputs, `images x classes` values. Engines
    /// that do not stack are only ever called with `images = 1`.
    ///
    /// # Errors
    /// An engine failure.
    fn run(&mut self, input: Input<'_>, images: usize) -> Result<Vec<f32>, RunError>;
}
