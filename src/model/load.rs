//! Loading: read the ONNX file, check its contract, have the configured engine plan it, warm it.
//!
//! The contract is read with tract's pipeline (load, type and declutter) whatever the engine,
//! so both engines serve exactly the same contract; then tract plans a concrete batch-1 shape
//! (a symbolic-batch plan ran MobileNetV2 5x slower here, FACTS.md), or onnxruntime builds a
//! session per lane from the same bytes.

use std::sync::Arc;
use std::time::Instant;

use anyhow::Context as _;
use sha2::{Digest, Sha256};
use tract_onnx::prelude::*;

use super::engine::{EngineKind, Planned};
use super::report::{self, Report};
use super::tract::{TractPlan, input_fact};
use super::{Model, Stacking, check, labels};
use crate::source::Source;

/// What loading a model needs to know: its files, what the config expects of it, its engine
/// and how its passes may run. The config builds one per model (`ModelConfig::spec`).
#[derive(Debug, Clone)]
pub struct Spec {
    /// Name from the config (the URL segment).
    pub name: String,
    /// The ONNX file.
    pub onnx: Source,
    /// The labels file (`None`: classes named by index, `lineside check model.onnx`).
    pub labels: Option<Source>,
    /// What the config asks of the model's input and output.
    pub expect: super::Expect,
    /// The engine that runs it.
    pub engine: EngineKind,
    /// Where the onnxruntime library comes from, if configured.
    pub onnxruntime_library: Option<Library>,
    /// `[models.batching] stack`.
    pub stack: StackMode,
    /// `[models.batching] batch_cap`: the pass size stacking is calibrated at.
    pub batch_cap: usize,
    /// `sha256`: the file must have this digest (lowercase hex).
    pub sha256: Option<String>,
    /// A stacking decision calibrated at an earlier load of this model (a reload keeps it
    /// instead of timing again under live load); used only where `stack` leaves it to calibration.
    pub kept_stacking: Option<super::Stacking>,
}

/// The onnxruntime shared library to load, and where its path came from (for messages).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Library {
    /// The file.
    pub path: std::path::PathBuf,
    /// `"[onnxruntime] library"` or `"ORT_DYLIB_PATH"`.
    pub from: &'static str,
}

/// `[models.batching] stack`: whether a formed pass runs as one stacked tensor.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum StackMode {
    /// Decided at load: never on an engine or model that cannot stack, else by calibration.
    Auto,
    /// Always stack (`stack = true`); refused where the engine or model cannot.
    Always,
    /// Never stack (`stack = false`).
    Never,
}

/// Load, check, plan and warm one model.
///
/// # Errors
/// Unreadable files, a file that is not ONNX, an operator tract cannot run, a contract
/// lineside cannot serve, or a labels file that does not match: each message names the
/// file and what to change.
pub fn load(cfg: &Spec) -> anyhow::Result<Model> {
    load_inner(cfg, false).map(|(m, _)| m)
}

/// Load as [`load`] does, and also build the layer report (what `lineside check` prints).
///
/// # Errors
/// As [`load`].
pub fn load_with_report(cfg: &Spec) -> anyhow::Result<(Model, Report)> {
    let (model, report) = load_inner(cfg, true)?;
    Ok((model, report.context("internal: the layer report was not built")?))
}

/// A model read, typed and checked, not yet planned.
struct Opened {
    file: String,
    version: String,
    labels: Option<Vec<String>>,
    bytes: Vec<u8>,
    proto: tract_onnx::pb::ModelProto,
    inference: InferenceModel,
    contract: super::Contract,
}

fn open(cfg: &Spec) -> anyhow::Result<Opened> {
    let file = cfg.onnx.display();
    let bytes = cfg.onnx.read()?;
    if let Some(pinned) = &cfg.sha256 {
        let digest: String = Sha256::digest(&bytes).iter().map(|b| format!("{b:02x}")).collect();
        anyhow::ensure!(
            &digest == pinned,
            "{file}: its SHA-256 is {digest}, but the config pins sha256 = {pinned:?}: this is not the file the config \
             names (a wrong or half-copied file); copy the right one, or update the pin"
        );
    }
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
    let contract =
        check::contract(&typed, &file, &cfg.expect, labels.as_ref().map(Vec::len)).map_err(anyhow::Error::msg)?;
    Ok(Opened { file, version, bytes, labels, proto, inference, contract })
}

/// Read and check a model's contract without planning it (what `lineside preprocess` needs).
///
/// # Errors
/// As [`load`], except planning and warm-up errors.
pub fn contract(cfg: &Spec) -> anyhow::Result<super::Contract> {
    open(cfg).map(|o| o.contract)
}

fn load_inner(cfg: &Spec, want_report: bool) -> anyhow::Result<(Model, Option<Report>)> {
    let start = Instant::now();
    let Opened { file, version, bytes, labels, proto, inference, contract } = open(cfg)?;
    // Without a labels file (`lineside check model.onnx`), classes are named by index.
    let labels = labels.unwrap_or_else(|| (0..contract.classes).map(|i| i.to_string()).collect());

    let shape = contract.input_shape(1);
    let report = if want_report {
        let at_b1 = inference
            .clone()
            .with_input_fact(0, input_fact(contract.input_type, shape))
            .and_then(|m| m.into_typed())
            .with_context(|| format!("{file}: tract cannot type the graph for input shape {shape:?}"))?;
        Some(report::build(&proto, &at_b1, bytes.len() as u64))
    } else {
        None
    };
    let plan: Arc<dyn Planned> = match cfg.engine {
        EngineKind::Tract => Arc::new(TractPlan::build(inference, contract.input_type, shape, &file)?),
        EngineKind::Onnxruntime => onnxruntime_plan(cfg, &bytes, &contract, &file)?,
    };

    let mut model = Model {
        name: cfg.name.clone(),
        version,
        labels,
        contract,
        file,
        load_time: start.elapsed(),
        stacking: Stacking::single("engine"),
        plan,
    };
    // Warm the plan once (first runs allocate scratch space) and prove it runs.
    let zeros = model.constant_input(0.0);
    model
        .runner()
        .and_then(|mut r| r.run(&zeros))
        .with_context(|| format!("{}: warm-up inference failed", model.file))?;
    model.stacking = decide_stacking(&model, cfg.stack, cfg.batch_cap, cfg.kept_stacking.as_ref())?;
    model.load_time = start.elapsed();
    if model.contract.batch == super::BatchAxis::Fixed(1) && cfg.batch_cap > 1 {
        // Passes run as consecutive batch-1 runs, so gathering still works; only stacking
        // (which tract does not use here) would need a dynamic batch axis.
        tracing::warn!(
            model = %cfg.name,
            "the model fixes its batch at 1: passes run image by image, and no engine can stack them"
        );
    }
    Ok((model, report))
}

/// Time a stacked pass on tract: `batch` images in one tensor on a concrete plan for that
/// size, which lineside does not serve with on tract but `check` reports so the choice can be
/// re-measured on each box; per image. `None` when the model fixes its batch at 1 or runs on
/// another engine (whose stacking is calibrated at load and reported with it).
///
/// # Errors
/// When tract cannot plan or run the stacked shape.
pub fn time_stacked(cfg: &Spec, model: &Model, batch: usize) -> anyhow::Result<Option<std::time::Duration>> {
    if model.contract.batch == super::BatchAxis::Fixed(1) || batch < 2 || model.engine() != EngineKind::Tract {
        return Ok(None);
    }
    let c = &model.contract;
    let bytes = cfg.onnx.read()?;
    super::tract::time_stacked(&bytes, c.input_type, c.input_shape(batch), &model.file)
        .with_context(|| format!("{}: tract cannot run a stacked batch of {batch}", model.file))
        .map(Some)
}

/// Whether the lanes stack passes: never when the engine or the model cannot; as the config
/// says when it says; else by a short calibration: stacked when a stacked pass of `cap`
/// images takes at most 0.9x the time per image of `cap` single runs (a stacked pass delays
/// its first answer, so it must pay for itself). The two ways alternate after a warm-up of
/// each, and each keeps its best round (2 to 5 rounds, about 1.5 s at most); one thread.
/// A decision calibrated at an earlier load (`kept`: a reload) is kept, marked `"kept"`.
fn decide_stacking(model: &Model, mode: StackMode, cap: usize, kept: Option<&Stacking>) -> anyhow::Result<Stacking> {
    if !model.plan.can_stack() {
        anyhow::ensure!(
            mode != StackMode::Always,
            "{}: stack = true, but the {} engine runs passes image by image (it is slower per image \
             stacked); remove the key or use engine = \"onnxruntime\"",
            model.file,
            model.engine().name()
        );
        return Ok(Stacking::single("engine"));
    }
    if !model.can_stack() {
        anyhow::ensure!(
            mode != StackMode::Always,
            "{}: stack = true, but the model fixes its batch axis at 1; re-export it with a dynamic batch axis",
            model.file
        );
        return Ok(Stacking::single("model"));
    }
    match mode {
        StackMode::Always => return Ok(Stacking { stacked: true, ..Stacking::single("config") }),
        StackMode::Never => return Ok(Stacking::single("config")),
        StackMode::Auto if cap < 2 => return Ok(Stacking::single("config")),
        StackMode::Auto => {}
    }
    if let Some(k) = kept.filter(|k| k.decided_by == "calibrated" || k.decided_by == "kept") {
        tracing::info!(model = %model.name, stacked = k.stacked, "kept the stacking decision of the previous load");
        return Ok(Stacking { decided_by: "kept".into(), ..k.clone() });
    }
    let mut runner = model.runner()?;
    let input = model.constant_input(0.5);
    let pass = vec![input.input(); cap];
    let mut time = |stacked: bool| -> anyhow::Result<f64> {
        let t = Instant::now();
        runner.run_pass_as(&pass, stacked).with_context(|| {
            let how = if stacked { "a stacked pass" } else { "single runs" };
            format!("{}: calibration ({how} of {cap}) failed", model.file)
        })?;
        Ok(t.elapsed().as_secs_f64() * 1e3 / cap as f64)
    };
    // Warm both ways, then alternate them (so that a busy moment on the box hits both) and
    // keep each one's best: at least 2 rounds, at most 5, stopping after 1.5 s.
    time(false)?;
    time(true)?;
    let (mut single, mut stacked) = (f64::INFINITY, f64::INFINITY);
    let started = Instant::now();
    for round in 0..5 {
        if round >= 2 && started.elapsed().as_secs_f64() > 1.5 {
            break;
        }
        single = single.min(time(false)?);
        stacked = stacked.min(time(true)?);
    }
    let decision = Stacking {
        stacked: stacking_pays(single, stacked),
        decided_by: "calibrated".into(),
        single_ms_per_image: Some(single),
        stacked_ms_per_image: Some(stacked),
    };
    tracing::info!(
        model = %model.name,
        stacked_ms_per_image = stacked,
        single_ms_per_image = single,
        stacked = decision.stacked,
        "calibrated how passes run"
    );
    Ok(decision)
}

/// The calibration's rule: a stacked pass pays for the delay of its first answer when it
/// takes at most 0.9x the time per image of single runs (a margin against the noise of a
/// short measurement: common practice, not a measured constant).
pub fn stacking_pays(single_ms_per_image: f64, stacked_ms_per_image: f64) -> bool {
    stacked_ms_per_image <= 0.9 * single_ms_per_image
}

#[cfg(feature = "onnxruntime")]
fn onnxruntime_plan(
    cfg: &Spec,
    bytes: &[u8],
    contract: &super::Contract,
    file: &str,
) -> anyhow::Result<Arc<dyn Planned>> {
    Ok(Arc::new(super::onnxruntime::OrtPlan::build(bytes, contract, cfg.onnxruntime_library.as_ref(), file)?))
}

#[cfg(not(feature = "onnxruntime"))]
fn onnxruntime_plan(
    cfg: &Spec,
    _bytes: &[u8],
    _contract: &super::Contract,
    file: &str,
) -> anyhow::Result<Arc<dyn Planned>> {
    anyhow::bail!(
        "{file}: model {:?} asks for engine = \"onnxruntime\", but this lineside was built without it; \
         rebuild with `cargo build --release --features onnxruntime`, or set engine = \"tract\"",
        cfg.name
    )
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
    fn stacking_pays_only_at_a_tenth_faster_per_image() {
        assert!(super::stacking_pays(20.0, 18.0));
        assert!(super::stacking_pays(20.0, 10.0));
        assert!(!super::stacking_pays(20.0, 18.1));
        assert!(!super::stacking_pays(20.0, 20.0));
    }

    #[test]
    fn sha12_is_the_sha256_prefix() {
        // SHA-256("abc") from FIPS 180-2, appendix B.1:
        // ba7816bf 8f01cfea 414140de 5dae2223 b00361a3 96177a9c b410ff61 f20015ad
        assert_eq!(sha12(b"abc"), "ba7816bf8f01");
    }
}
