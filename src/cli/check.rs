//! `lineside check`: load models, verify their contract, report their layers and time them.
//!
//! `lineside check [--config FILE] [--model NAME] [--json]` checks configured models;
//! `lineside check PATH.onnx --width W --height H` checks a bare file with default
//! preprocessing and classes named by index. Exit 0 when every model would serve, 1 when one
//! would not (the message says why), 2 for usage and config errors.

use std::path::PathBuf;

use super::{ConfigArg, Outcome};
use crate::config::{Channels, Config, ModelConfig, Overrides};
use crate::model::EngineKind;
use crate::verify::{ModelCheck, check_one, render, write_expected};

/// Arguments of `lineside check`.
#[derive(Debug, clap::Args)]
pub struct CheckArgs {
    /// Config file.
    #[command(flatten)]
    pub config: ConfigArg,
    /// Check this ONNX file instead of the configured models (default preprocessing).
    #[arg(value_name = "PATH.onnx", conflicts_with_all = ["config", "model"])]
    pub onnx: Option<PathBuf>,
    /// Input width for PATH.onnx (needed when the model leaves it dynamic).
    #[arg(long, requires = "onnx")]
    pub width: Option<u32>,
    /// Input height for PATH.onnx (needed when the model leaves it dynamic).
    #[arg(long, requires = "onnx")]
    pub height: Option<u32>,
    /// Channels for PATH.onnx: rgb, bgr or gray (default: as the model's input has them, one
    /// channel gray, three rgb).
    #[arg(long, requires = "onnx", value_parser = ["rgb", "bgr", "gray"])]
    pub channels: Option<String>,
    /// Check only the configured model with this name.
    #[arg(long, value_name = "NAME")]
    pub model: Option<String>,
    /// Print one JSON document instead of the text report.
    #[arg(long)]
    pub json: bool,
    /// Write each model's self-test `expected.json` from the current model (labels and
    /// scores), to refresh a retrained model's bundle deliberately.
    #[arg(long, conflicts_with = "onnx")]
    pub write_expected: bool,
    /// Engine for every model checked, overriding its `engine` key: tract, or onnxruntime in
    /// a build with that feature.
    #[arg(long, value_name = "NAME")]
    pub engine: Option<EngineKind>,
}

/// Check the models and print the report.
///
/// # Errors
/// Only usage and config errors; a model that fails gives `Outcome::ModelUnservable`.
pub fn run(args: CheckArgs) -> anyhow::Result<Outcome> {
    let (origin, models) = match &args.onnx {
        Some(path) => {
            let channels = args.channels.as_deref().map(|c| match c {
                "gray" => Channels::Gray,
                "bgr" => Channels::Bgr,
                _ => Channels::Rgb,
            });
            let overrides = Overrides { engine: args.engine, ..super::base_overrides()? };
            let mc = ModelConfig::bare(path.clone(), args.width, args.height, channels, &overrides);
            mc.engine.require_built().map_err(|e| anyhow::anyhow!("engine: {e}"))?;
            (path.display().to_string(), vec![mc])
        }
        None => {
            let overrides = Overrides { engine: args.engine, ..super::base_overrides()? };
            let config = Config::load(args.config.config.as_deref(), &overrides)?;
            let models = match &args.model {
                Some(name) => vec![config.named(name)?.clone()],
                None => config.models.clone(),
            };
            (config.origin, models)
        }
    };
    if args.write_expected {
        for mc in &models {
            write_expected(mc)?;
        }
    }
    let checks: Vec<ModelCheck> = models.iter().map(check_one).collect();
    if args.json {
        let doc = serde_json::json!({ "config": origin, "models": checks });
        println!("{}", serde_json::to_string_pretty(&doc)?);
    } else {
        println!("config: {origin}");
        for c in &checks {
            print!("{}", render(c));
        }
    }
    Ok(if checks.iter().all(|c| c.would_serve) { Outcome::Ok } else { Outcome::ModelUnservable })
}
