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

use super::{Input, RunError};

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
