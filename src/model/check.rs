//! The input/output contract: what a model takes and gives, derived from its typed graph
//! and checked against the config and the labels file.
//!
//! lineside serves classifiers with one image input of rank 4 (NCHW or NHWC, 1 or 3
//! channels, float32) and one output `[N, K]` or `[N, K, 1, 1]` with K = number of labels.
//! Anything else is refused here with a message that names the file, the input or output,
//! and what was expected.

use serde::Serialize;
use tract_onnx::prelude::*;

use crate::config::{Layout, PreprocessConfig, ScoresMode};

/// What the model's batch axis allows.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum BatchAxis {
    /// Symbolic (any batch size), with the symbol's name.
    Dynamic(String),
    /// Fixed by the model.
    Fixed(usize),
}

/// Element type of the image input.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum InputType {
    /// Normalised floats: x = (pixel / divisor - mean) / std.
    Float32,
    /// Raw 8-bit pixels; the model normalises inside (mean/std in the config do not apply).
    Uint8,
}

/// How raw outputs become the answer's scores.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum ScoreTransform {
    /// Used as they are: the graph ends in Softmax or Sigmoid, or the config says `scores = "none"`.
    AsIs,
    /// lineside applies softmax (logits; one class per image).
    Softmax,
    /// lineside applies the logistic sigmoid to each output (independent, multi-label scores).
    Sigmoid,
}

impl ScoreTransform {
    /// Turn one image's raw output into probabilities.
    pub fn apply(self, raw: &[f32]) -> Vec<f32> {
        match self {
            ScoreTransform::AsIs => raw.to_vec(),
            ScoreTransform::Softmax => super::softmax(raw),
            ScoreTransform::Sigmoid => raw.iter().map(|&z| 1.0 / (1.0 + (-z).exp())).collect(),
        }
    }
}

/// A model's checked input/output contract.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Contract {
    /// Name of the image input.
    pub input_name: String,
    /// Input shape as the model declares it (symbols by name).
    pub input_shape: Vec<String>,
    /// Layout of the image input.
    pub layout: Layout,
    /// Channels the model takes (1 or 3).
    pub channels: usize,
    /// Input height served.
    pub height: u32,
    /// Input width served.
    pub width: u32,
    /// Element type of the input.
    pub input_type: InputType,
    /// The batch axis.
    pub batch: BatchAxis,
    /// Name of the scores output.
    pub output_name: String,
    /// Output shape as the model declares it.
    pub output_shape: Vec<String>,
    /// Number of classes (K).
    pub classes: usize,
    /// How outputs become the answer's scores.
    pub scores: ScoreTransform,
    /// The graph's final operator, when it is Softmax or Sigmoid.
    pub ends_in: Option<String>,
}

impl Contract {
    /// The concrete input shape for a batch of `batch` images, in the model's layout.
    pub fn input_shape(&self, batch: usize) -> [usize; 4] {
        let (h, w, c) = (self.height as usize, self.width as usize, self.channels);
        match self.layout {
            Layout::Nchw => [batch, c, h, w],
            Layout::Nhwc => [batch, h, w, c],
        }
    }
}

fn dims(shape: &ShapeFact) -> Vec<String> {
    shape.iter().map(|d| d.to_string()).collect()
}

fn fixed(d: &TDim) -> Option<usize> {
    d.to_i64().ok().and_then(|v| usize::try_from(v).ok())
}

/// Derive and check the contract of a typed (decluttered) model.
///
/// # Errors
/// A message naming `file` and the offending input or output, saying what was expected.
pub fn contract(
    model: &TypedModel,
    file: &str,
    pre: &PreprocessConfig,
    labels: Option<usize>,
    mode: ScoresMode,
) -> Result<Contract, String> {
    if model.inputs.len() != 1 {
        let names: Vec<&str> = model.inputs.iter().map(|o| model.node(o.node).name.as_str()).collect();
        return Err(format!(
            "{file}: has {} inputs {names:?}; lineside serves models with exactly one image input",
            names.len()
        ));
    }
    if model.outputs.len() != 1 {
        return Err(format!(
            "{file}: has {} outputs; lineside serves models with exactly one scores output",
            model.outputs.len()
        ));
    }
    let input_name = model.node(model.inputs[0].node).name.clone();
    let fact = model.input_fact(0).map_err(|e| format!("{file}: input {input_name:?}: {e}"))?;
    let shape = dims(&fact.shape);
    let at = |what: &str| format!("{file}: input {input_name:?} (shape [{}])", shape.join(", ")) + what;
    let input_type = if fact.datum_type == f32::datum_type() {
        InputType::Float32
    } else if fact.datum_type == u8::datum_type() {
        InputType::Uint8
    } else {
        return Err(at(&format!(": element type {:?}, expected float32 or uint8", fact.datum_type)));
    };
    if fact.rank() != 4 {
        return Err(at(&format!(": rank {}, expected 4 ([N, C, H, W] or [N, H, W, C])", fact.rank())));
    }
    let d: Vec<&TDim> = fact.shape.iter().collect();
    let is_chan = |x: &TDim| matches!(fixed(x), Some(1 | 3));
    let detected = match (is_chan(d[1]), is_chan(d[3])) {
        (true, false) => Some(Layout::Nchw),
        (false, true) => Some(Layout::Nhwc),
        (true, true) => None, // e.g. [N, 3, 3, 3]: ambiguous, the config decides
        (false, false) => {
            return Err(at(": no channel axis of size 1 or 3 at position 1 (NCHW) or 3 (NHWC); \
                           lineside serves gray or colour image models"));
        }
    };
    let layout = match (detected, pre.layout) {
        (Some(found), Some(want)) if found != want => {
            return Err(at(&format!(
                ": the model is {found} but the config says layout = \"{want}\"; remove the key or set it to \"{found}\""
            )));
        }
        (Some(found), _) => found,
        (None, Some(want)) => want,
        (None, None) => Layout::Nchw,
    };
    let (c, h, w) = match layout {
        Layout::Nchw => (d[1], d[2], d[3]),
        Layout::Nhwc => (d[3], d[1], d[2]),
    };
    let channels = fixed(c).unwrap_or(0);
    if pre.channels_given && channels != pre.channels.count() {
        return Err(at(&format!(
            ": takes {channels} channel(s) but preprocess.channels gives {}; use channels = {} (--channels for a bare file)",
            pre.channels.count(),
            if channels == 1 { "\"gray\"" } else { "\"rgb\" or \"bgr\"" }
        )));
    }
    let mut size = [0u32; 2];
    let mut missing = Vec::new();
    for (i, (dim, want, key)) in [(h, pre.height, "height"), (w, pre.width, "width")].into_iter().enumerate() {
        size[i] = match (fixed(dim), want) {
            (Some(v), Some(want)) if v != want as usize => {
                return Err(at(&format!(
                    ": {key} is fixed at {v} but preprocess.{key} = {want}; set {key} = {v} or remove it"
                )));
            }
            (Some(v), _) => u32::try_from(v).map_err(|_| at(&format!(": {key} {v} is too large")))?,
            (None, Some(want)) => want,
            (None, None) => {
                missing.push(key);
                0
            }
        };
    }
    if !missing.is_empty() {
        let keys: Vec<String> = missing.iter().map(|k| format!("preprocess.{k}")).collect();
        return Err(at(&format!(
            ": {} dynamic in the model; set {} (--{} for a bare file)",
            if missing.len() == 2 {
                "height and width are"
            } else if missing[0] == "height" {
                "height is"
            } else {
                "width is"
            },
            keys.join(" and "),
            missing.join(" and --")
        )));
    }
    let [height, width] = size;
    if pre.resize == crate::config::ResizeMode::Crop && height != width {
        return Err(format!(
            "{file}: input {width}x{height} (width x height) is not square, and preprocess.resize = \"crop\" \
             (resize the short side, then crop the centre square) needs a square input; \
             use resize = \"stretch\" or \"letterbox\""
        ));
    }
    if let Some(s) = pre.short_side.filter(|&s| s < width) {
        return Err(format!("{file}: {}", crate::config::short_side_below_crop(s, width)));
    }
    let batch = match fixed(d[0]) {
        Some(1) => BatchAxis::Fixed(1),
        Some(n) => {
            return Err(at(&format!(
                ": batch axis fixed at {n}; lineside needs a dynamic batch axis or a batch of 1 (re-export with a dynamic axis)"
            )));
        }
        None => BatchAxis::Dynamic(d[0].to_string()),
    };

    let out_outlet = model.outputs[0];
    let output_name = model.outlet_label(out_outlet).unwrap_or(&model.node(out_outlet.node).name).to_string();
    let ofact = model.outlet_fact(out_outlet).map_err(|e| format!("{file}: output {output_name:?}: {e}"))?;
    let output_shape = dims(&ofact.shape);
    let oat = |what: &str| format!("{file}: output {output_name:?} (shape [{}])", output_shape.join(", ")) + what;
    let od: Vec<&TDim> = ofact.shape.iter().collect();
    let trailing_ones = od.len() == 4 && fixed(od[2]) == Some(1) && fixed(od[3]) == Some(1);
    if !(od.len() == 2 || trailing_ones) {
        return Err(oat(": expected [N, K] or [N, K, 1, 1] class scores"));
    }
    let classes = fixed(od[1]).ok_or_else(|| oat(": the class axis is not fixed"))?;
    if let Some(labels) = labels.filter(|&l| l != classes) {
        return Err(oat(&format!(": gives {classes} class scores but the labels file has {labels} labels")));
    }
    let last_op = model.node(out_outlet.node).op.name();
    let ends_in = ["Softmax", "Sigmoid"].into_iter().find(|op| last_op.contains(op)).map(String::from);
    let scores = match (mode, &ends_in) {
        (ScoresMode::Auto, Some(_)) | (ScoresMode::None, _) => ScoreTransform::AsIs,
        (ScoresMode::Auto, None) | (ScoresMode::Softmax, _) => ScoreTransform::Softmax,
        (ScoresMode::Sigmoid, _) => ScoreTransform::Sigmoid,
    };

    Ok(Contract {
        input_name,
        input_shape: shape,
        layout,
        channels,
        height,
        width,
        input_type,
        batch,
        output_name,
        output_shape,
        classes,
        scores,
        ends_in,
    })
}
