//! Loading: read the ONNX file, check its contract, build the concrete plan, warm it.
//!
//! Follows tract's pipeline: load, type and declutter (to read the contract), fix the input
//! fact to a concrete batch-1 shape, optimise, make runnable. A symbolic-batch plan ran
//! MobileNetV2 5x slower than a concrete one here (FACTS.md), so lineside never runs one.

use std::sync::Arc;
use std::time::Instant;

use anyhow::Context as _;
use sha2::{Digest, Sha256};
use tract_onnx::prelude::*;

use super::report::{self, Report};
use super::{InputType, Model, check, labels};
use crate::config::ModelConfig;

/// Load, check, plan and warm one model.
///
/// # Errors
/// Unreadable files, a file that is not ONNX, an operator tract cannot run, a contract
/// lineside cannot serve, or a labels file that does not match: each message names the
/// file and what to change.
pub fn load(cfg: &ModelConfig) -> anyhow::Result<Model> {
    load_inner(cfg, false).map(|(m, _)| m)
}

/// Load as [`load`] does, and also build the layer report (what `lineside check` prints).
///
/// # Errors
/// As [`load`].
pub fn load_with_report(cfg: &ModelConfig) -> anyhow::Result<(Model, Report)> {
    let (model, report) = load_inner(cfg, true)?;
    Ok((model, report.context("internal: the layer report was not built")?))
}

/// A model read, typed and checked, not yet planned.
struct Opened {
    file: String,
    version: String,
    bytes_len: u64,
    labels: Option<Vec<String>>,
    proto: tract_onnx::pb::ModelProto,
    inference: InferenceModel,
    contract: super::Contract,
}

fn open(cfg: &ModelConfig) -> anyhow::Result<Opened> {
    let file = cfg.onnx.display();
    let bytes = cfg.onnx.read()?;
    let version = sha12(&bytes);
    let labels = match &cfg.labels {
        Some(src) => Some(labels::parse(&src.read()?, &src.display()).map_err(anyhow::Error::msg)?),
        None => None,
    };
    let onnx = tract_onnx::onnx();
    let proto = onnx
        .proto_model_for_read(&mut &bytes[..])
        .with_context(|| format!("{file}: not a loadable ONNX model (truncated, or not ONNX at all)"))?;
    let inference = onnx.model_for_proto_model(&proto).with_context(|| format!("{file}: not a loadable ONNX model"))?;
    let typed = inference
        .clone()
        .into_typed()
        .and_then(|m| m.into_decluttered())
        .with_context(|| format!("{file}: tract cannot type this graph (an unsupported operator or shape)"))?;
    let contract = check::contract(&typed, &file, &cfg.preprocess, labels.as_ref().map(Vec::len), cfg.scores)
        .map_err(anyhow::Error::msg)?;
    Ok(Opened { file, version, bytes_len: bytes.len() as u64, labels, proto, inference, contract })
}

/// Read and check a model's contract without planning it (what `lineside preprocess` needs).
///
/// # Errors
/// As [`load`], except planning and warm-up errors.
pub fn contract(cfg: &ModelConfig) -> anyhow::Result<super::Contract> {
    open(cfg).map(|o| o.contract)
}

fn load_inner(cfg: &ModelConfig, want_report: bool) -> anyhow::Result<(Model, Option<Report>)> {
    let start = Instant::now();
    let Opened { file, version, bytes_len, labels, proto, inference, contract } = open(cfg)?;
    // Without a labels file (`lineside check model.onnx`), classes are named by index.
    let labels = labels.unwrap_or_else(|| (0..contract.classes).map(|i| i.to_string()).collect());

    let shape = contract.input_shape(1);
    let report = if want_report {
        let at_b1 = inference
            .clone()
            .with_input_fact(0, input_fact(contract.input_type, shape))
            .and_then(|m| m.into_typed())
            .with_context(|| format!("{file}: tract cannot type the graph for input shape {shape:?}"))?;
        Some(report::build(&proto, &at_b1, bytes_len))
    } else {
        None
    };
    let plan = inference
        .with_input_fact(0, input_fact(contract.input_type, shape))
        .and_then(|m| m.into_optimized())
        .and_then(|m| m.into_runnable())
        .with_context(|| format!("{file}: tract cannot plan the graph for input shape {shape:?}"))?;

    let mut model = Model {
        name: cfg.name.clone(),
        version,
        labels,
        contract,
        file,
        load_time: start.elapsed(),
        plan: Arc::clone(&plan),
    };
    // Warm the plan once (first runs allocate scratch space) and prove it runs.
    let zeros = vec![0.0f32; model.input_len()];
    model
        .runner()
        .and_then(|mut r| r.run(&zeros))
        .with_context(|| format!("{}: warm-up inference failed", model.file))?;
    model.load_time = start.elapsed();
    if model.contract.batch == super::BatchAxis::Fixed(1) && cfg.batching.batch_cap > 1 {
        // Passes run as consecutive batch-1 runs, so gathering still works; only stacking
        // (which tract does not use here) would need a dynamic batch axis.
        tracing::warn!(
            model = %cfg.name,
            "the model fixes its batch at 1: passes run image by image, and no engine can stack them"
        );
    }
    Ok((model, report))
}

/// Time a stacked pass: `batch` images in one tensor on a concrete plan for that size, which
/// lineside does not serve with (tract is slower per image stacked) but `check` reports so
/// the choice can be re-measured on each box. Median of 5 runs after one warm-up, per image.
/// `None` when the model fixes its batch at 1.
///
/// # Errors
/// When tract cannot plan or run the stacked shape.
pub fn time_stacked(cfg: &ModelConfig, model: &Model, batch: usize) -> anyhow::Result<Option<std::time::Duration>> {
    if model.contract.batch == super::BatchAxis::Fixed(1) || batch < 2 {
        return Ok(None);
    }
    let c = &model.contract;
    let shape = c.input_shape(batch);
    let bytes = cfg.onnx.read()?;
    let plan = tract_onnx::onnx()
        .model_for_read(&mut &bytes[..])
        .and_then(|m| m.with_input_fact(0, input_fact(c.input_type, shape)))
        .and_then(|m| m.into_optimized())
        .and_then(|m| m.into_runnable())
        .with_context(|| format!("{}: tract cannot plan a stacked batch of {batch}", model.file))?;
    let mut state = plan.spawn()?;
    let input: Tensor = match c.input_type {
        InputType::Float32 => Tensor::from_shape(&shape, &vec![0.5f32; shape.iter().product()])?,
        InputType::Uint8 => Tensor::from_shape(&shape, &vec![128u8; shape.iter().product()])?,
    };
    state.run(tvec![input.clone().into()])?;
    let mut times = Vec::new();
    for _ in 0..5 {
        let t = Instant::now();
        state.run(tvec![input.clone().into()])?;
        times.push(t.elapsed());
    }
    times.sort();
    Ok(Some(times[2] / batch as u32))
}

fn input_fact(t: InputType, shape: [usize; 4]) -> InferenceFact {
    match t {
        InputType::Float32 => f32::fact(shape).into(),
        InputType::Uint8 => u8::fact(shape).into(),
    }
}

/// First 12 hex digits of the SHA-256 of `bytes`.
pub fn sha12(bytes: &[u8]) -> String {
    let digest = Sha256::digest(bytes);
    digest.iter().take(6).map(|b| format!("{b:02x}")).collect()
}

#[cfg(test)]
mod tests {
    use super::sha12;

    #[test]
    fn sha12_is_the_sha256_prefix() {
        // SHA-256("abc") from FIPS 180-2, appendix B.1:
        // ba7816bf 8f01cfea 414140de 5dae2223 b00361a3 96177a9c b410ff61 f20015ad
        assert_eq!(sha12(b"abc"), "ba7816bf8f01");
    }
}
