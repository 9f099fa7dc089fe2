//! The onnxruntime engine (cargo feature `onnxruntime`), through the `ort` crate with the
//! shared library loaded at run time.
//!
//! The library is found, in order: `[onnxruntime] library` in the config, the environment
//! variable `ORT_DYLIB_PATH` (read once, by the command line), the system's `libonnxruntime.so`. It is loaded once per process
//! (the runtime allows one environment); every model using this engine shares it. Each lane
//! builds its own session from the model's bytes with `intra_op_num_threads = lane_threads`
//! (the runtime's default graph optimisations, as a Python `InferenceSession` gets). It can
//! stack a pass along the batch axis; whether it does is calibrated at load (on the machine
//! of the engine table in docs/performance.md it gained nothing per core, so passes ran image by image).

use std::path::PathBuf;
use std::sync::Arc;

use anyhow::Context as _;
use ort::session::Session;
use ort::value::TensorRef;

use super::Input;
use super::engine::{EngineKind, EngineState, Planned};
use super::load::Library;
use super::{Contract, RunError};

/// Where the runtime's shared library is looked for when neither the config nor the
/// environment names one (the dynamic loader's search path).
const SYSTEM_LIBRARY: &str = "libonnxruntime.so";

/// A model for onnxruntime: its bytes, from which each lane builds a session.
pub struct OrtPlan {
    bytes: Arc<[u8]>,
    shape: [usize; 4],
    file: String,
}

impl OrtPlan {
    /// Load the runtime (once per process) and check that it accepts the model.
    ///
    /// # Errors
    /// The library cannot be loaded (the message says where it looked and how to name it), or
    /// the runtime refuses the model.
    pub fn build(bytes: &[u8], contract: &Contract, library: Option<&Library>, file: &str) -> anyhow::Result<OrtPlan> {
        load_library(library)?;
        let plan = OrtPlan { bytes: bytes.into(), shape: contract.input_shape(1), file: file.to_string() };
        let session = plan.session(1).map_err(|e| anyhow::anyhow!("{file}: onnxruntime cannot load the model: {e}"))?;
        let inputs: Vec<&str> = session.inputs().iter().map(|i| i.name()).collect();
        anyhow::ensure!(
            inputs.first() == Some(&contract.input_name.as_str()),
            "{file}: onnxruntime sees inputs {inputs:?}, lineside's contract expects {:?} first",
            contract.input_name
        );
        Ok(plan)
    }

    fn session(&self, threads: usize) -> ort::Result<Session> {
        Session::builder()?.with_intra_threads(threads.max(1))?.with_inter_threads(1)?.commit_from_memory(&self.bytes)
    }
}

impl Planned for OrtPlan {
    fn kind(&self) -> EngineKind {
        EngineKind::Onnxruntime
    }

    fn can_stack(&self) -> bool {
        true
    }

    fn state(&self, threads: usize) -> Result<Box<dyn EngineState>, RunError> {
        let session = self
            .session(threads)
            .map_err(|e| RunError::Engine(format!("{}: onnxruntime cannot start a session: {e}", self.file)))?;
        Ok(Box::new(OrtState { session, shape: self.shape }))
    }
}

/// One lane's session.
struct OrtState {
    session: Session,
    shape: [usize; 4],
}

impl EngineState for OrtState {
    fn run(&mut self, input: Input<'_>, images: usize) -> Result<Vec<f32>, RunError> {
        let err = |e: ort::Error| RunError::Engine(e.to_string());
        let mut shape = self.shape;
        shape[0] = images;
        let outputs = match input {
            Input::F32(x) => {
                let t = TensorRef::from_array_view((shape, x)).map_err(err)?;
                self.session.run(ort::inputs![t])
            }
            Input::U8(x) => {
                let t = TensorRef::from_array_view((shape, x)).map_err(err)?;
                self.session.run(ort::inputs![t])
            }
        }
        .map_err(err)?;
        let first =
            outputs.values().next().ok_or_else(|| RunError::Engine("the session returned no outputs".into()))?;
        let (_, data) = first.try_extract_tensor::<f32>().map_err(err)?;
        Ok(data.to_vec())
    }
}

/// Load the runtime's library once; later calls (more models, more lanes) reuse it.
fn load_library(configured: Option<&Library>) -> anyhow::Result<()> {
    let (path, source) = match configured {
        Some(l) => (l.path.clone(), l.from),
        None => (PathBuf::from(SYSTEM_LIBRARY), "the system's library search path"),
    };
    let builder = ort::init_from(&path).with_context(|| {
        format!(
            "cannot load onnxruntime from {} (from {source}); point `[onnxruntime] library` in the \
             config or ORT_DYLIB_PATH at libonnxruntime.so (e.g. from `pip install onnxruntime`: \
             .../site-packages/onnxruntime/capi/libonnxruntime.so.1.*)",
            path.display()
        )
    })?;
    // false when already committed by an earlier model: the first environment stays.
    let _ = builder.with_name("lineside").commit();
    Ok(())
}
