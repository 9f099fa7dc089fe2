//! What `lineside check` finds out about a model: loaded through the one loading path,
//! self-tested, timed, with its contract and layer report, as JSON or as text. The CLI only
//! turns its arguments into model configs and calls these.

use std::fmt::Write as _;
use std::time::{Duration, Instant};

use anyhow::Context as _;
use serde::Serialize;

use crate::config::{ModelConfig, PreprocessConfig, ResizeMode, Source};
use crate::model::report::Report;
use crate::model::{BatchAxis, Contract, EngineKind, InputType, Model, ScoreTransform, Stacking, load};
use crate::selftest;
use crate::served::{LoadOptions, Loaded};

/// One model's findings.
#[derive(Debug, Serialize)]
pub struct ModelCheck {
    /// Model name.
    pub name: String,
    /// Whether lineside would serve it.
    pub would_serve: bool,
    /// Why not, when it would not.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub error: Option<String>,
    /// The details, when it loaded.
    #[serde(flatten, skip_serializing_if = "Option::is_none")]
    pub details: Option<Details>,
}

/// What a loaded model looks like.
#[derive(Debug, Serialize)]
pub struct Details {
    /// The ONNX file.
    pub file: String,
    /// SHA-256 prefix of the file.
    pub version: String,
    /// The engine that runs it.
    pub engine: EngineKind,
    /// Whether lanes stack a formed pass into one tensor (else run it image by image).
    pub stacked_passes: bool,
    /// How that was decided.
    pub stacking: Stacking,
    /// Class names in output order.
    pub labels: Vec<String>,
    /// Input/output contract.
    pub contract: Contract,
    /// The preprocessing in force (channels resolved against the model's input).
    pub preprocess: PreprocessConfig,
    /// Layers and totals.
    pub report: Report,
    /// Time to parse, check, plan and warm, in ms.
    pub load_ms: f64,
    /// Median single-image inference, in ms.
    pub single_ms: Option<f64>,
    /// `batch_cap` images run the way a lane runs a full pass, in ms per image.
    pub pass_ms_per_image: Option<f64>,
    /// The pass size timed.
    pub pass_size: usize,
    /// The same pass stacked into one tensor (not how lineside serves with tract), in ms per image.
    pub stacked_ms_per_image: Option<f64>,
    /// The self-test, when the model has one.
    pub selftest: Option<selftest::Outcome>,
}

/// Rewrite a model's `expected.json` from what the model gives now.
///
/// # Errors
/// No self-test folder, a read-only (built-in) one, a model that does not load, an
/// unwritable file.
pub fn write_expected(mc: &ModelConfig) -> anyhow::Result<()> {
    let Some(st) = &mc.selftest else {
        anyhow::bail!("model {:?} has no [models.selftest] folder to write expected.json into", mc.name);
    };
    let Source::File(dir) = &st.samples else {
        anyhow::bail!("model {:?}: the built-in samples are read-only; use a config file", mc.name);
    };
    let loaded = Loaded::load(mc, &LoadOptions::single())?;
    let expected = selftest::expectations(&loaded.model, &loaded.pipeline, &selftest::Samples::images_only(st)?)?;
    let path = dir.join("expected.json");
    std::fs::write(&path, serde_json::to_string_pretty(&expected)? + "\n")
        .with_context(|| format!("cannot write {}", path.display()))?;
    eprintln!("wrote {} ({} samples)", path.display(), expected.len());
    Ok(())
}

/// Load one model through the serving path, self-test and time it: what `lineside check`
/// reports (a model that fails to load is a finding, not an error).
pub fn check_one(mc: &ModelConfig) -> ModelCheck {
    match Loaded::load(mc, &LoadOptions { report: true, ..LoadOptions::single() }) {
        Ok(mut loaded) => {
            let selftest = loaded
                .selftest()
                .unwrap_or_else(|e| Some(selftest::Outcome { samples: 0, failures: vec![format!("{e:#}")] }));
            let Some(report) = loaded.report.take() else {
                let error = Some("internal: the layer report was not built".to_string());
                return ModelCheck { name: mc.name.clone(), would_serve: false, error, details: None };
            };
            let model = &loaded.model;
            let passed = selftest.as_ref().is_none_or(selftest::Outcome::passed);
            let cap = mc.batching.batch_cap;
            let single_ms = time_runs(model, 1, 15).map(ms);
            let pass_ms_per_image = time_runs(model, cap, 5).map(|d| ms(d) / cap as f64);
            let stacked_ms_per_image = match load::time_stacked(&mc.spec(), model, cap) {
                Ok(d) => d.map(ms),
                Err(e) => {
                    tracing::warn!(model = %mc.name, cause = %format!("{e:#}"), "cannot time a stacked pass");
                    None
                }
            };
            ModelCheck {
                name: mc.name.clone(),
                would_serve: passed,
                error: (!passed).then(|| "the self-test failed".to_string()),
                details: Some(Details {
                    file: model.file.clone(),
                    version: model.version.clone(),
                    engine: model.engine(),
                    stacked_passes: model.stacks(),
                    stacking: model.stacking.clone(),
                    labels: model.labels.clone(),
                    contract: model.contract.clone(),
                    preprocess: loaded.pipeline.config().clone(),
                    report,
                    load_ms: ms(model.load_time),
                    single_ms,
                    pass_ms_per_image,
                    pass_size: cap,
                    stacked_ms_per_image,
                    selftest,
                }),
            }
        }
        Err(e) => {
            ModelCheck { name: mc.name.clone(), would_serve: false, error: Some(format!("{e:#}")), details: None }
        }
    }
}

use crate::millis as ms;

/// Median over `repeats` of running a pass of `images` images as a lane runs it (stacked or
/// image by image, as the engine says), after the warm-up `load` already did.
fn time_runs(model: &Model, images: usize, repeats: usize) -> Option<Duration> {
    let mut runner = model.runner().ok()?;
    let input = model.constant_input(0.5);
    let pass = vec![input.input(); images];
    let mut times = Vec::with_capacity(repeats);
    for _ in 0..repeats {
        let t = Instant::now();
        runner.run_pass(&pass).ok()?;
        times.push(t.elapsed());
    }
    times.sort();
    Some(times[times.len() / 2])
}

/// Thousands separated by spaces, for counts in the table.
fn grouped(n: u64) -> String {
    let s = n.to_string();
    let mut out = String::new();
    for (i, c) in s.chars().enumerate() {
        if i > 0 && (s.len() - i).is_multiple_of(3) {
            out.push(' ');
        }
        out.push(c);
    }
    out
}

fn dims(d: &[usize]) -> String {
    let v: Vec<String> = d.iter().map(usize::to_string).collect();
    format!("[{}]", v.join(", "))
}

/// One line on what a frame goes through: resize, filter, channels, normalisation.
fn preprocess_summary(p: &PreprocessConfig, k: &Contract) -> String {
    let (w, h) = (k.width, k.height);
    let resize = match p.resize {
        ResizeMode::Stretch => format!("stretch to {w}x{h}"),
        ResizeMode::Crop => format!("short side to {}, centre {w}x{h}", p.short_side.unwrap_or(w)),
        ResizeMode::Letterbox => format!("letterbox into {w}x{h} on level {}", p.pad_value),
    };
    let roi = p.roi.map_or_else(String::new, |r| format!("roi [{}, {}, {}, {}], ", r.x, r.y, r.w, r.h));
    let channels = format!("{:?}", p.channels).to_lowercase();
    let filter = format!("{:?}", p.filter).to_lowercase();
    let list = |v: &[f32]| v.iter().map(|x| format!("{x}")).collect::<Vec<_>>().join(", ");
    let norm = match k.input_type {
        InputType::Uint8 => "raw levels (uint8 input)".to_string(),
        InputType::Float32 => {
            format!("x = (pixel / {} - [{}]) / [{}]", p.divisor, list(&p.mean), list(&p.std))
        }
    };
    format!("{roi}{resize}, {filter}, {channels}; {norm}")
}

/// The text report of one model.
pub fn render(c: &ModelCheck) -> String {
    let mut s = String::new();
    let Some(d) = &c.details else {
        let _ =
            writeln!(s, "\nmodel {:?}: WOULD NOT SERVE\n  {}", c.name, c.error.as_deref().unwrap_or("unknown error"));
        return s;
    };
    let verdict = if c.would_serve { "ok, would serve" } else { "WOULD NOT SERVE (self-test failed)" };
    let _ = writeln!(s, "\nmodel {:?}: {verdict}", c.name);
    let _ = writeln!(s, "  file        {}", d.file);
    let _ = writeln!(s, "  version     {} (SHA-256 prefix)", d.version);
    render_contract(&mut s, d);
    render_layers(&mut s, &d.report);
    render_runs(&mut s, d);
    s
}

/// Input, output, labels and preprocessing.
fn render_contract(s: &mut String, d: &Details) {
    let k = &d.contract;
    let batch = match &k.batch {
        BatchAxis::Dynamic(sym) => format!("dynamic ({sym})"),
        BatchAxis::Fixed(n) => format!("fixed at {n}"),
    };
    let _ = writeln!(
        s,
        "  input       {:?} [{}] {}, {} layout, {} channel(s), {}x{} served, batch {batch}",
        k.input_name,
        k.input_shape.join(", "),
        match k.input_type {
            InputType::Float32 => "float32",
            InputType::Uint8 => "uint8 (raw pixels; mean/std not applied)",
        },
        k.layout,
        k.channels,
        k.width,
        k.height
    );
    let ends = k.ends_in.as_deref().map_or_else(String::new, |op| format!("graph ends in {op}; "));
    let scores = match k.scores {
        ScoreTransform::AsIs => format!("{ends}scores used as they are"),
        ScoreTransform::Softmax => format!("{ends}lineside applies softmax"),
        ScoreTransform::Sigmoid => format!("{ends}lineside applies sigmoid (independent scores)"),
    };
    let _ = writeln!(
        s,
        "  output      {:?} [{}], {} classes; {scores}",
        k.output_name,
        k.output_shape.join(", "),
        k.classes
    );
    let _ = writeln!(s, "  labels      {}", d.labels.join(", "));
    let _ = writeln!(s, "  preprocess  {}", preprocess_summary(&d.preprocess, k));
}

/// The layer table and totals.
fn render_layers(s: &mut String, r: &Report) {
    let _ = writeln!(
        s,
        "\n  {:>3}  {:<18} {:<20} {:<18} {:>11} {:>13} {:>5} {:>6}",
        "#", "op", "name", "output", "params", "MACs", "RF", "stride"
    );
    for l in &r.layers {
        let opt = |v: Option<u64>| v.map_or_else(|| "-".to_string(), |v| v.to_string());
        let mut name = l.name.clone();
        if name.chars().count() > 20 {
            name = name.chars().take(19).collect::<String>() + "…";
        }
        let _ = writeln!(
            s,
            "  {:>3}  {:<18} {:<20} {:<18} {:>11} {:>13} {:>5} {:>6}",
            l.index,
            l.op,
            name,
            dims(&l.output_shape),
            grouped(l.params),
            grouped(l.macs),
            opt(l.receptive_field),
            opt(l.stride)
        );
    }
    let _ = writeln!(
        s,
        "\n  totals      {} parameters, {} MACs per image, {:.1}% of parameters in fully connected layers, {:.2} MB file",
        grouped(r.params),
        grouped(r.macs_per_image),
        100.0 * r.fc_share(),
        r.model_bytes as f64 / 1e6
    );
}

/// Engine, load, self-test and inference times.
fn render_runs(s: &mut String, d: &Details) {
    let how = if d.stacked_passes { "passes stacked into one tensor" } else { "passes run image by image" };
    let why = match (d.stacking.decided_by.as_ref(), d.stacking.single_ms_per_image, d.stacking.stacked_ms_per_image) {
        ("calibrated", Some(one), Some(stacked)) => {
            format!("calibrated at load: {stacked:.3} ms per image stacked, {one:.3} one by one")
        }
        ("engine", ..) => "the engine's rule".to_string(),
        ("model", ..) => "the model fixes its batch at 1".to_string(),
        _ => "[models.batching] stack".to_string(),
    };
    let _ = writeln!(s, "  engine      {} ({how}; {why})", d.engine.name());
    let _ = writeln!(s, "  load        {:.0} ms (parse, check, plan, warm)", d.load_ms);
    match &d.selftest {
        None => {
            let _ = writeln!(s, "  self-test   none configured ([models.selftest])");
        }
        Some(t) if t.passed() => {
            let _ = writeln!(s, "  self-test   passed: {} samples give their expected label and scores", t.samples);
        }
        Some(t) => {
            let _ = writeln!(s, "  self-test   FAILED on {} of {} samples:", t.failures.len(), t.samples);
            for f in &t.failures {
                let _ = writeln!(s, "                {f}");
            }
        }
    }
    match (d.single_ms, d.pass_ms_per_image) {
        (Some(one), Some(pass)) => {
            let _ = writeln!(
                s,
                "  inference   {one:.3} ms for one image; {pass:.3} ms per image in a pass of {} {} (one thread, this machine)",
                d.pass_size,
                if d.stacked_passes { "stacked" } else { "run image by image" }
            );
        }
        _ => {
            let _ = writeln!(s, "  inference   could not be timed");
        }
    }
    if let (Some(stacked), Some(pass)) = (d.stacked_ms_per_image, d.pass_ms_per_image) {
        let _ = writeln!(
            s,
            "              {stacked:.3} ms per image stacked into one batch of {} ({:.2}x the consecutive runs lineside uses)",
            d.pass_size,
            stacked / pass
        );
    }
}

#[cfg(test)]
mod tests {
    use super::grouped;

    #[test]
    fn groups_thousands() {
        assert_eq!(grouped(0), "0");
        assert_eq!(grouped(999), "999");
        assert_eq!(grouped(1000), "1 000");
        assert_eq!(grouped(11_689_512), "11 689 512");
    }
}
