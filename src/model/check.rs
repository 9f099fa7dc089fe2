//! The input/output contract: what a model takes and gives, derived from its typed graph
//! and checked against the config and the labels file.
//!
//! lineside serves classifiers with one image input of rank 4 (NCHW or NHWC, 1 or 3
//! channels, float32) and one output `[N, K]` or `[N, K, 1, 1]` with K = number of labels.
//! Anything else is refused here with a message that names the file, the input or output,
//! and what was expected.

use tract_onnx::prelude::*;

use super::contract::{BatchAxis, Contract, Expect, InputType, Layout, ScoreTransform, ScoresMode};

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
pub fn contract(model: &TypedModel, file: &str, expect: &Expect, labels: Option<usize>) -> Result<Contract, String> {
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
    let input = input_side(model, file, expect)?;
    let output = output_side(model, file, expect.scores, labels)?;
    Ok(Contract {
        input_name: input.name,
        input_shape: input.shape,
        layout: input.layout,
        channels: input.channels,
        height: input.height,
        width: input.width,
        input_type: input.input_type,
        batch: input.batch,
        output_name: output.name,
        output_shape: output.shape,
        classes: output.classes,
        scores: output.scores,
        ends_in: output.ends_in,
    })
}

/// The input half of a contract.
struct InputSide {
    name: String,
    shape: Vec<String>,
    layout: Layout,
    channels: usize,
    height: u32,
    width: u32,
    input_type: InputType,
    batch: BatchAxis,
}

fn input_side(model: &TypedModel, file: &str, expect: &Expect) -> Result<InputSide, String> {
    let name = model.node(model.inputs[0].node).name.clone();
    let fact = model.input_fact(0).map_err(|e| format!("{file}: input {name:?}: {e}"))?;
    let shape = dims(&fact.shape);
    let at = |what: &str| format!("{file}: input {name:?} (shape [{}])", shape.join(", ")) + what;
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
    let layout = layout(&d, expect.layout).map_err(|e| at(&e))?;
    let (c, h, w) = match layout {
        Layout::Nchw => (d[1], d[2], d[3]),
        Layout::Nhwc => (d[3], d[1], d[2]),
    };
    let channels = fixed(c).unwrap_or(0);
    if let Some(given) = expect.channels.filter(|&n| n != channels) {
        return Err(at(&format!(
            ": takes {channels} channel(s) but preprocess.channels gives {given}; use channels = {} (--channels for a bare file)",
            if channels == 1 { "\"gray\"" } else { "\"rgb\" or \"bgr\"" }
        )));
    }
    let [height, width] = size(h, w, expect).map_err(|e| at(&e))?;
    let batch = match fixed(d[0]) {
        Some(1) => BatchAxis::Fixed(1),
        Some(n) => {
            return Err(at(&format!(
                ": batch axis fixed at {n}; lineside needs a dynamic batch axis or a batch of 1 (re-export with a dynamic axis)"
            )));
        }
        None => BatchAxis::Dynamic(d[0].to_string()),
    };
    Ok(InputSide { name, shape, layout, channels, height, width, input_type, batch })
}

/// The layout the input's dimensions show, or the config's where they do not decide it.
fn layout(d: &[&TDim], want: Option<Layout>) -> Result<Layout, String> {
    let is_chan = |x: &TDim| matches!(fixed(x), Some(1 | 3));
    let detected = match (is_chan(d[1]), is_chan(d[3])) {
        (true, false) => Some(Layout::Nchw),
        (false, true) => Some(Layout::Nhwc),
        (true, true) => None, // e.g. [N, 3, 3, 3]: ambiguous, the config decides
        (false, false) => {
            return Err(": no channel axis of size 1 or 3 at position 1 (NCHW) or 3 (NHWC); \
                        lineside serves gray or colour image models"
                .into());
        }
    };
    match (detected, want) {
        (Some(found), Some(want)) if found != want => Err(format!(
            ": the model is {found} but the config says layout = \"{want}\"; remove the key or set it to \"{found}\""
        )),
        (Some(found), _) => Ok(found),
        (None, Some(want)) => Ok(want),
        (None, None) => Ok(Layout::Nchw),
    }
}

/// The served [height, width]: the model's where it fixes them (the config must agree), else
/// the config's.
fn size(h: &TDim, w: &TDim, expect: &Expect) -> Result<[u32; 2], String> {
    let mut size = [0u32; 2];
    let mut missing = Vec::new();
    for (i, (dim, want, key)) in [(h, expect.height, "height"), (w, expect.width, "width")].into_iter().enumerate() {
        size[i] = match (fixed(dim), want) {
            (Some(v), Some(want)) if v != want as usize => {
                return Err(format!(
                    ": {key} is fixed at {v} but preprocess.{key} = {want}; set {key} = {v} or remove it"
                ));
            }
            (Some(v), _) => u32::try_from(v).map_err(|_| format!(": {key} {v} is too large"))?,
            (None, Some(want)) => want,
            (None, None) => {
                missing.push(key);
                0
            }
        };
    }
    if missing.is_empty() {
        return Ok(size);
    }
    let keys: Vec<String> = missing.iter().map(|k| format!("preprocess.{k}")).collect();
    let what = match missing.as_slice() {
        [_, _] => "height and width are",
        ["height"] => "height is",
        _ => "width is",
    };
    Err(format!(
        ": {what} dynamic in the model; set {} (--{} for a bare file)",
        keys.join(" and "),
        missing.join(" and --")
    ))
}

/// The output half of a contract.
struct OutputSide {
    name: String,
    shape: Vec<String>,
    classes: usize,
    scores: ScoreTransform,
    ends_in: Option<String>,
}

fn output_side(model: &TypedModel, file: &str, mode: ScoresMode, labels: Option<usize>) -> Result<OutputSide, String> {
    let out_outlet = model.outputs[0];
    let name = model.outlet_label(out_outlet).unwrap_or(&model.node(out_outlet.node).name).to_string();
    let ofact = model.outlet_fact(out_outlet).map_err(|e| format!("{file}: output {name:?}: {e}"))?;
    let shape = dims(&ofact.shape);
    let oat = |what: &str| format!("{file}: output {name:?} (shape [{}])", shape.join(", ")) + what;
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
    Ok(OutputSide { name, shape, classes, scores, ends_in })
}
