//! `lineside evaluate`: arguments into calls. The work is in [`crate::evaluate`].

use std::path::PathBuf;
use std::sync::Arc;

use anyhow::{Context as _, bail};

use super::{ConfigArg, Outcome};
use crate::config::{Config, ModelConfig, Overrides};
use crate::evaluate::{self, dataset::Dataset, html, report, summary, verdicts};
use crate::metrics::Metrics;
use crate::model::EngineKind;
use crate::served::{LoadOptions, Loaded, ServedModel};
use crate::source::Source;

/// Arguments of `lineside evaluate`.
#[derive(Debug, clap::Args)]
pub struct EvaluateArgs {
    /// Config file.
    #[command(flatten)]
    pub config: ConfigArg,
    /// The configured model to evaluate (optional when the config has one).
    #[arg(long, value_name = "NAME")]
    pub model: Option<String>,
    /// Engine, overriding the model's `engine` key: tract, or onnxruntime in builds with it.
    #[arg(long, value_name = "NAME")]
    pub engine: Option<EngineKind>,
    /// The labelled frames: a folder with one sub-folder per class (named as in the labels
    /// file), or a CSV file with the header `file,label` (paths relative to the CSV).
    #[arg(value_name = "DIR")]
    pub set: PathBuf,
    /// Write every figure and every frame's prediction as JSON.
    #[arg(long, value_name = "FILE")]
    pub json: Option<PathBuf>,
    /// Write a self-contained HTML report (charts, thumbnails of the wrong frames).
    #[arg(long, value_name = "FILE.html")]
    pub report: Option<PathBuf>,
    /// Write the baseline that drift monitoring compares live frames with.
    #[arg(long, value_name = "FILE")]
    pub baseline_out: Option<PathBuf>,
    /// Copy the wrong frames into OUTDIR/<true>/<predicted>/.
    #[arg(long, value_name = "OUTDIR")]
    pub misclassified: Option<PathBuf>,
    /// The residual error rate to reach (e.g. 0.01): suggests the min_score that reaches it
    /// with the least review, if the frames support it.
    #[arg(long, value_name = "RATE", value_parser = parse_rate)]
    pub target_error: Option<f64>,
    /// A candidate ONNX file, evaluated on the same frames with the same preprocessing.
    #[arg(long, value_name = "FILE.onnx", conflicts_with = "against_config")]
    pub against: Option<PathBuf>,
    /// A candidate with its own config (e.g. a retrain with another input size).
    #[arg(long, value_name = "FILE")]
    pub against_config: Option<PathBuf>,
    /// The model of --against-config to use (optional when it has one).
    #[arg(long, value_name = "NAME", requires = "against_config")]
    pub against_model: Option<String>,
}

fn parse_rate(s: &str) -> Result<f64, String> {
    match s.parse::<f64>() {
        Ok(v) if v > 0.0 && v < 1.0 => Ok(v),
        _ => Err(format!("{s:?}: expected a rate between 0 and 1 (e.g. 0.01 for 1%)")),
    }
}

/// Evaluate the model on the set and write what was asked for.
///
/// # Errors
/// Config errors, a model that does not load, a set whose folders or labels are not the
/// model's classes, a candidate with other labels, an unwritable output.
pub fn run(args: EvaluateArgs) -> anyhow::Result<Outcome> {
    let overrides = Overrides { engine: args.engine, ..super::base_overrides()? };
    let config = Config::load(args.config.config.as_deref(), &overrides)?;
    let mc = super::pick_model(&config, args.model.as_deref(), "--model")?;
    let mut configs = vec![mc.clone()];
    if let Some(onnx) = &args.against {
        let name = onnx.file_stem().map_or("candidate".into(), |s| s.to_string_lossy().into_owned());
        configs.push(ModelConfig { name, onnx: Source::File(onnx.clone()), selftest: None, ..mc.clone() });
    } else if let Some(path) = &args.against_config {
        // The station's LINESIDE_SERVER_* / LINESIDE_MODEL_* variables describe the serving
        // model, not the candidate: a variable setting `onnx` would compare the model with itself.
        let other = Config::load(Some(path), &crate::config::Overrides { env: Vec::new(), ..overrides.clone() })?;
        configs.push(super::pick_model(&other, args.against_model.as_deref(), "--against-model")?.clone());
    }
    let opts = LoadOptions {
        limits: config.server.decode_limits(),
        models: configs.len(),
        report: false,
        kept_stacking: None,
    };
    let loaded = configs.iter().map(|c| Loaded::load(c, &opts)).collect::<anyhow::Result<Vec<_>>>()?;
    let labels = loaded[0].model.labels.clone();
    if let Some(cand) = loaded.get(1)
        && cand.model.labels != labels
    {
        bail!(
            "the candidate {:?} has the labels {:?}, the model {:?} has {:?}: a comparison needs the same classes in the same order",
            cand.config.name,
            cand.model.labels,
            mc.name,
            labels
        );
    }
    let set = Dataset::open(&args.set, &labels)?;
    let doc = score(&args, &set, loaded)?;
    print!("{}", report::render(&doc));
    write_outputs(&args, &set, &doc)?;
    Ok(if doc.summary.frames == 0 { Outcome::NothingEvaluated } else { Outcome::Ok })
}

/// Start the models, score the set, summarise.
fn score(args: &EvaluateArgs, set: &Dataset, loaded: Vec<Loaded>) -> anyhow::Result<report::Document> {
    let cores = std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1);
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(cores)
        .enable_all()
        .build()
        .context("cannot start the runtime")?;
    let metrics = Metrics::new();
    let mut models = Vec::new();
    let mut guards = Vec::new();
    let mut room = 2 * cores;
    for mut l in loaded {
        // Evaluation frames are not the line's: nothing is retained, and the folder is not touched.
        l.config.retain = None;
        room += l.lanes * l.config.batching.batch_cap;
        let (served, guard) = l.start(&metrics, None, None)?;
        models.push(Arc::new(served));
        guards.push(guard);
    }
    let bar = indicatif::ProgressBar::new(set.items.len() as u64);
    bar.set_style(
        indicatif::ProgressStyle::with_template(
            "evaluating [{bar:40}] {pos}/{len} frames ({percent}%), {elapsed} so far, {eta} left",
        )
        .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar())
        .progress_chars("=> "),
    );
    let tick = || bar.inc(1);
    let scored = rt.block_on(evaluate::score_all(&models, &set.items, room, &tick));
    bar.finish_and_clear();
    let labels: Vec<Vec<String>> = models.iter().map(|m| m.model.labels.clone()).collect();
    let (mut preds, failed) = evaluate::predictions(&set.items, scored, &labels);
    let id = |m: &ServedModel| report::ModelId {
        model: m.model.name.clone(),
        version: m.model.version.clone(),
        engine: m.model.engine().name().to_string(),
    };
    let summarise = |i: usize, m: &ServedModel| {
        let mut s = summary::summarise(&preds[i], &labels[i], evaluate::calibrated(m));
        s.verdicts = m.decision.as_ref().map(|d| verdicts::figures(&preds[i], d, m.min_score));
        s
    };
    let summary = summarise(0, &models[0]);
    let against = models.get(1).map(|m| report::Against {
        id: id(m),
        summary: summarise(1, m),
        comparison: summary::compare(&preds[0], &preds[1]),
    });
    drop(guards);
    Ok(report::Document {
        id: id(&models[0]),
        set: args.set.display().to_string(),
        suggestion: args.target_error.map(|t| summary::suggest(&preds[0], t)),
        summary,
        failed,
        absent: set.absent.clone(),
        predictions: preds.swap_remove(0),
        against,
    })
}

fn write_outputs(args: &EvaluateArgs, set: &Dataset, doc: &report::Document) -> anyhow::Result<()> {
    if let Some(path) = &args.json {
        report::write_json(path, doc)?;
        println!("wrote {}", path.display());
    }
    if let Some(path) = &args.baseline_out {
        report::write_json(path, &report::Baseline::of(doc))?;
        println!("wrote the baseline {}", path.display());
    }
    if let Some(path) = &args.report {
        std::fs::write(path, html::page(doc, &set.root)).with_context(|| format!("cannot write {}", path.display()))?;
        println!("wrote the report {}", path.display());
    }
    if let Some(out) = &args.misclassified {
        let n = report::copy_misclassified(&set.root, &doc.predictions, out)?;
        println!("copied {n} wrong frames into {}/<true>/<predicted>/", out.display());
    }
    Ok(())
}
