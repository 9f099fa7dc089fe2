//! `lineside check`: load every configured model, verify its contract, time one inference
//! and print what a deployment needs to know.

use std::fmt::Write as _;
use std::time::{Duration, Instant};

use super::{ConfigArg, Outcome};
use crate::config::{Config, ModelConfig, Overrides};
use crate::model::{BatchAxis, Model, ScoreTransform, load};

/// Arguments of `lineside check`.
#[derive(Debug, clap::Args)]
pub struct CheckArgs {
    /// Config file.
    #[command(flatten)]
    pub config: ConfigArg,
}

/// Check every model and print a report on stdout.
///
/// # Errors
/// Only config errors; a model that fails its checks gives `Outcome::ModelUnservable`.
pub fn run(args: CheckArgs) -> anyhow::Result<Outcome> {
    let config = Config::load(args.config.config.as_deref(), &Overrides::default())?;
    println!("config: {}", config.origin);
    let mut outcome = Outcome::Ok;
    for mc in &config.models {
        match load::load(mc) {
            Ok(model) => print!("{}", report(mc, &model, time_inference(&model))),
            Err(e) => {
                println!("\nmodel {:?}: WOULD NOT SERVE\n  {e:#}", mc.name);
                outcome = Outcome::ModelUnservable;
            }
        }
    }
    Ok(outcome)
}

/// Median of 15 single-image runs (after the warm-up `load` already did).
fn time_inference(model: &Model) -> Option<Duration> {
    let mut runner = model.runner().ok()?;
    let input = vec![0.5f32; model.input_len()];
    let mut times: Vec<Duration> = (0..15)
        .map(|_| {
            let t = Instant::now();
            runner.run(&input).map(|_| t.elapsed())
        })
        .collect::<Result<_, _>>()
        .ok()?;
    times.sort();
    Some(times[times.len() / 2])
}

/// The human-readable contract of one model.
pub fn report(mc: &ModelConfig, model: &Model, single: Option<Duration>) -> String {
    let c = &model.contract;
    let p = &mc.preprocess;
    let mut s = String::new();
    let _ = writeln!(s, "\nmodel {:?}: ok, would serve", model.name);
    let _ = writeln!(s, "  file        {}", model.file);
    let _ = writeln!(s, "  version     {} (SHA-256 prefix)", model.version);
    let batch = match &c.batch {
        BatchAxis::Dynamic(sym) => format!("dynamic ({sym})"),
        BatchAxis::Fixed(n) => format!("fixed at {n}"),
    };
    let _ = writeln!(
        s,
        "  input       {:?} [{}] float32, {} layout, {} channel(s), {}x{} served, batch {batch}",
        c.input_name,
        c.input_shape.join(", "),
        c.layout,
        c.channels,
        c.width,
        c.height
    );
    let scores = match c.scores {
        ScoreTransform::FromGraph => "graph ends in Softmax: used as they are",
        ScoreTransform::Softmax => "logits: lineside applies softmax",
    };
    let _ = writeln!(
        s,
        "  output      {:?} [{}], {} classes; {scores}",
        c.output_name,
        c.output_shape.join(", "),
        c.classes
    );
    let _ = writeln!(s, "  labels      {}", model.labels.join(", "));
    let word = |d: &dyn std::fmt::Debug| format!("{d:?}").to_lowercase();
    let _ = writeln!(
        s,
        "  preprocess  resize = \"{}\" to {}x{}, filter = \"{}\", channels = \"{}\", x = (pixel / {} - mean) / std, mean {:?}, std {:?}",
        word(&p.resize),
        p.width,
        p.height,
        word(&p.filter),
        word(&p.channels),
        p.divisor,
        p.mean,
        p.std
    );
    let _ = writeln!(s, "  load        {:.0} ms (parse, check, plan, warm)", model.load_time.as_secs_f64() * 1e3);
    match single {
        Some(d) => {
            let _ = writeln!(
                s,
                "  inference   {:.3} ms per image on this machine (batch 1, one thread, median of 15)",
                d.as_secs_f64() * 1e3
            );
        }
        None => {
            let _ = writeln!(s, "  inference   could not be timed");
        }
    }
    s
}
