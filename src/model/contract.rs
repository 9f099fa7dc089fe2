//! What a model takes and gives, as the rest of lineside sees it: the input/output contract's
//! types, one image's input tensor, and the score arithmetic (softmax, top K).
//!
//! Engine-free on purpose: nothing here may use the engine or another lineside module. The
//! fuzz targets (fuzz/) compile this file with the preprocessing and the request parsers on
//! their own, without building the engine. [`super::check`] derives a [`Contract`] from a
//! model's graph.

use serde::{Deserialize, Serialize};

/// Memory layout of the input tensor.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Layout {
    /// Batch, channels, height, width.
    Nchw,
    /// Batch, height, width, channels.
    Nhwc,
}

impl std::fmt::Display for Layout {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            Layout::Nchw => "nchw",
            Layout::Nhwc => "nhwc",
        })
    }
}

/// How a model's outputs become scores (`[[models]] scores`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum ScoresMode {
    /// Use the outputs as they are when the graph ends in Softmax or Sigmoid, else softmax them.
    Auto,
    /// Apply softmax.
    Softmax,
    /// Apply the sigmoid to each output.
    Sigmoid,
    /// Use the outputs as they are.
    None,
}

/// What the config asks of a model's input and output, checked against what the model
/// declares (each `None`: whatever the model says).
#[derive(Debug, Clone, PartialEq)]
pub struct Expect {
    /// `preprocess.layout`.
    pub layout: Option<Layout>,
    /// The channel count the preprocessing gives, when the config fixes it.
    pub channels: Option<usize>,
    /// `preprocess.width`.
    pub width: Option<u32>,
    /// `preprocess.height`.
    pub height: Option<u32>,
    /// `scores`.
    pub scores: ScoresMode,
}

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
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum InputType {
    /// Normalised floats: x = (pixel / divisor - mean) / std.
    Float32,
    /// Raw 8-bit pixels; the model normalises inside (mean/std in the config do not apply).
    Uint8,
}

/// How raw outputs become the answer's scores.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
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
            ScoreTransform::Softmax => softmax(raw),
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
    pub fn matches(&self, t: InputType) -> bool {
        matches!((self, t), (Input::F32(_), InputType::Float32) | (Input::U8(_), InputType::Uint8))
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
