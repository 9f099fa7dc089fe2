//! Command-line types. Each subcommand's file turns its arguments into library calls.

pub mod check;
pub mod preprocess;
pub mod serve;

use std::path::PathBuf;

/// lineside: serve a small ONNX image classifier on this CPU box.
#[derive(Debug, clap::Parser)]
#[command(name = "lineside", version, about, long_about = None)]
pub struct Cli {
    /// The subcommand.
    #[command(subcommand)]
    pub command: Command,
}

/// Subcommands.
#[derive(Debug, clap::Subcommand)]
pub enum Command {
    /// Serve the configured models over HTTP.
    Serve(serve::ServeArgs),
    /// Load the configured models, verify their contract and print it.
    Check(check::CheckArgs),
    /// Write the exact input tensor a model gets for one image (.npy), and a preview.
    Preprocess(preprocess::PreprocessArgs),
}

/// Where the config comes from (shared by every subcommand).
#[derive(Debug, clap::Args)]
pub struct ConfigArg {
    /// Config file (TOML). Default: ./config/lineside.toml if present, else the built-in
    /// washer demo.
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
}
