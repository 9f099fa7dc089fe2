//! Command-line types. Each subcommand's file turns its arguments into library calls.

pub mod bench;
pub mod check;
pub mod evaluate;
pub mod preprocess;
pub mod retained;
pub mod serve;

use std::path::PathBuf;

use crate::config::{Config, ModelConfig, Overrides};
use crate::model::EngineKind;

/// Environment variable naming the engine of models without an `engine` key.
pub const ENGINE_ENV: &str = "LINESIDE_ENGINE";
/// Environment variable naming the onnxruntime library when the config names none.
pub const ORT_LIBRARY_ENV: &str = "ORT_DYLIB_PATH";

/// Environment variable naming the config file when no `--config` is given.
pub const CONFIG_ENV: &str = "LINESIDE_CONFIG";

/// The overrides every subcommand starts from: what the environment says, read here once
/// (`LINESIDE_ENGINE`, `ORT_DYLIB_PATH`, `LINESIDE_CONFIG`, `LINESIDE_SERVER_*`,
/// `LINESIDE_MODEL_*`); no other module reads the environment.
///
/// # Errors
/// `LINESIDE_ENGINE` names no engine (the message lists the allowed ones).
pub fn base_overrides() -> anyhow::Result<Overrides> {
    let default_engine = match std::env::var(ENGINE_ENV) {
        Ok(v) if !v.is_empty() => v.parse::<EngineKind>().map_err(|e| anyhow::anyhow!("{ENGINE_ENV}={v}: {e}"))?,
        _ => EngineKind::Tract,
    };
    let onnxruntime_library = std::env::var_os(ORT_LIBRARY_ENV).filter(|v| !v.is_empty()).map(PathBuf::from);
    let config_file = std::env::var_os(CONFIG_ENV).filter(|v| !v.is_empty()).map(PathBuf::from);
    let mut env = Vec::new();
    for (name, value) in std::env::vars_os() {
        let Some(name) = name.to_str().filter(|n| crate::config::env::is_config_variable(n)) else { continue };
        let value = value.into_string().map_err(|_| anyhow::anyhow!("{name}: the value is not UTF-8"))?;
        env.push((name.to_owned(), value));
    }
    // In a stable order, so that an error names the same variable every time.
    env.sort();
    Ok(Overrides { default_engine, onnxruntime_library, config_file, env, ..Overrides::default() })
}

/// The model `name` of `config`, or its only one; `flag` is the option that names a model.
///
/// # Errors
/// No model by that name, or several and none named.
pub fn pick_model<'a>(config: &'a Config, name: Option<&str>, flag: &str) -> anyhow::Result<&'a ModelConfig> {
    match (name, config.models.as_slice()) {
        (Some(name), _) => config.named(name),
        (None, [only]) => Ok(only),
        (None, all) => {
            let names: Vec<&str> = all.iter().map(|m| m.name.as_str()).collect();
            anyhow::bail!("{} serves {} models ({names:?}): choose one with {flag}", config.origin, names.len())
        }
    }
}

/// lineside: serve a small ONNX image classifier on this CPU box.
#[derive(Debug, clap::Parser)]
#[command(name = "lineside", version, about, long_about = None)]
pub struct Cli {
    /// The subcommand.
    #[command(subcommand)]
    pub command: Command,
    /// Log format on stderr: text (plain lines, coloured at a terminal) or json (one object
    /// per line, for log collectors).
    #[arg(long, global = true, value_name = "FORMAT", default_value = "text", value_parser = ["text", "json"])]
    pub log_format: String,
    /// Log level or `tracing` filter (error, warn, info, debug, trace, or e.g.
    /// "info,lineside=debug"); the LINESIDE_LOG environment variable is used when this is absent.
    #[arg(long, global = true, value_name = "LEVEL")]
    pub log_level: Option<String>,
}

/// Subcommands.
#[derive(Debug, clap::Subcommand)]
pub enum Command {
    /// Serve the configured models over HTTP.
    Serve(serve::ServeArgs),
    /// Load the configured models, verify their contract and print it.
    Check(check::CheckArgs),
    /// Qualify a model on labelled line frames through its serving path: accuracy, per-class
    /// figures, confusion, calibration, the threshold trade-off, a candidate's comparison.
    Evaluate(evaluate::EvaluateArgs),
    /// Write the exact input tensor a model gets for one image (.npy), and a preview.
    Preprocess(preprocess::PreprocessArgs),
    /// Say whether this box keeps up with the line (its frames per second within its budget
    /// per frame) and with what margin; also throughput and latency sweeps and the engine alone.
    Bench(bench::BenchArgs),
    /// The frames kept for a person ([models.retain]): export the confirmed ones.
    Retained(retained::RetainedArgs),
}

/// Where the config comes from (shared by every subcommand).
#[derive(Debug, clap::Args)]
pub struct ConfigArg {
    /// Config file (TOML). Default: the file LINESIDE_CONFIG names, else
    /// ./config/lineside.toml if present, else the built-in washer demo. LINESIDE_SERVER_* and
    /// LINESIDE_MODEL_* variables override its keys (docs/configuration.md).
    #[arg(long, value_name = "FILE")]
    pub config: Option<PathBuf>,
}

/// How a subcommand ended, when it did not fail outright.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Outcome {
    /// Exit 0.
    Ok,
    /// Exit 1: a model would not serve.
    ModelUnservable,
    /// Exit 1: `evaluate` scored no frame (every one failed, or the set is empty).
    NothingEvaluated,
}
