//! `lineside bench`: drive a server with frames and say whether this box keeps up with the
//! line (`--line-fps` frames per second, each within `--budget-ms`), with what margin, and
//! optionally with which of several arrangements of lanes and batching (`--try-settings`);
//! also the engine alone.
//!
//! Without `--url` lineside starts `lineside serve` as a child process on a free loopback
//! port (so its CPU time is read apart from the load generator's); with `--url` it drives a
//! running server. The load generator runs on this process's main thread.

use std::path::{Path, PathBuf};
use std::time::Duration;

use anyhow::Context as _;
use axum::body::Bytes;

use super::{ConfigArg, Outcome};
use crate::bench::child::ChildServer;
use crate::bench::drive::{self, Drive};
use crate::bench::load::Mode;
use crate::bench::report::{self, Line, Run};
use crate::config::{Config, ModelConfig, Overrides};
use crate::model::EngineKind;
use crate::selftest::{self, Samples};

/// Arguments of `lineside bench`.
#[derive(Debug, clap::Args)]
pub struct BenchArgs {
    /// Config file (the server lineside starts uses it; also where the model and its sample
    /// frames come from).
    #[command(flatten)]
    pub config: ConfigArg,
    /// The model to drive (default: the config's first).
    #[arg(long, value_name = "NAME")]
    pub model: Option<String>,
    /// Drive this running server (http://host:port) instead of starting one.
    #[arg(long, value_name = "URL")]
    pub url: Option<String>,
    /// Frames to post, files or folders of images (default: the model's self-test samples).
    #[arg(long, value_name = "DIR|FILE", num_args = 1..)]
    pub images: Vec<PathBuf>,
    /// The line's budget per frame in milliseconds, arrival to answer: a frame answered later
    /// is an uninspected part. Judged on p99.9 and the slowest frame.
    #[arg(long, value_name = "MS")]
    pub budget_ms: Option<f64>,
    /// The frames per second the line sends (e.g. 25): the bench then posts frames at that
    /// rate and at multiples of it, and says whether the box keeps up and with what margin.
    #[arg(long, value_name = "RATE", value_parser = parse_rate, requires = "budget_ms", conflicts_with_all = ["rate", "concurrency"])]
    pub line_fps: Option<f64>,
    /// Closed loop: the numbers of concurrent clients to sweep.
    #[arg(long, value_name = "N,N,...", value_delimiter = ',', default_value = "1,2,4,8,16,32")]
    pub concurrency: Vec<usize>,
    /// Open loop instead: frames due at this rate (e.g. 200/s), latency from the due time.
    #[arg(long, value_name = "RATE", value_parser = parse_rate)]
    pub rate: Option<f64>,
    /// Restart the server with each arrangement of lanes x lane_threads and batch_cap, run the
    /// line's steps on each, and name the one that keeps up with the most margin.
    #[arg(long, requires = "line_fps", conflicts_with_all = ["url", "engine_only"])]
    pub try_settings: bool,
    /// Run the model through its engine only (no HTTP, no decoding): images per second.
    #[arg(long, conflicts_with_all = ["url", "rate"])]
    pub engine_only: bool,
    /// Engine for the model, overriding its `engine` key (tract, or onnxruntime in a build
    /// with that feature); passed on to the server lineside bench starts.
    #[arg(long, value_name = "NAME", conflicts_with = "url")]
    pub engine: Option<EngineKind>,
    /// Threads that run HTTP in the server lineside bench starts (overrides `[server]
    /// http_threads`); `--try-settings` also tries the other of 1 and 2 on its best arrangement.
    #[arg(long, value_name = "N", conflicts_with = "url")]
    pub http_threads: Option<usize>,
    /// Measured time per step (e.g. 10s, 500ms).
    #[arg(long, value_name = "TIME", value_parser = parse_duration, default_value = "10s")]
    pub duration: Duration,
    /// Unrecorded warm-up before each step.
    #[arg(long, value_name = "TIME", value_parser = parse_duration, default_value = "2s")]
    pub warmup: Duration,
    /// Write every figure, the machine, versions and the model's settings as JSON.
    #[arg(long, value_name = "FILE")]
    pub json: Option<PathBuf>,
    /// Write the charts: FILE.html (a page with the table) or FILE.svg.
    #[arg(long, value_name = "FILE")]
    pub report: Option<PathBuf>,
    /// Write every recorded latency (CSV: step,latency_us).
    #[arg(long, value_name = "FILE")]
    pub samples: Option<PathBuf>,
}

impl BenchArgs {
    /// How the bench drives, from these arguments.
    fn drive<'a>(&'a self, rt: &'a tokio::runtime::Runtime, bodies: &'a [Bytes]) -> Drive<'a> {
        Drive {
            rt,
            bodies,
            warmup: self.warmup,
            duration: self.duration,
            budget_ms: self.budget_ms,
            engine: self.engine,
            http_threads: self.http_threads,
            config_path: self.config.config.as_deref(),
        }
    }

    /// The sweep's steps: one open-loop rate, or the closed-loop concurrencies.
    fn modes(&self) -> Vec<Mode> {
        match self.rate {
            Some(r) => vec![Mode::Open(r)],
            None => self.concurrency.iter().map(|&c| Mode::Closed(c)).collect(),
        }
    }

    /// The line as given on the command line.
    fn line(&self) -> Line {
        Line { budget_ms: self.budget_ms, fps: self.line_fps }
    }
}

/// "200/s", "200" or "12.5/s" → frames per second.
fn parse_rate(s: &str) -> Result<f64, String> {
    let n = s.trim().trim_end_matches("/s");
    match n.parse::<f64>() {
        Ok(r) if r > 0.0 && r.is_finite() => Ok(r),
        _ => Err(format!("{s:?}: expected a rate such as 200/s")),
    }
}

/// "10s", "500ms", "1.5s", "2m" → a duration.
fn parse_duration(s: &str) -> Result<Duration, String> {
    let t = s.trim();
    let (num, unit) = t.find(|c: char| c.is_ascii_alphabetic()).map_or((t, "s"), |i| t.split_at(i));
    let v: f64 = num.parse().map_err(|_| format!("{s:?}: expected a time such as 10s or 500ms"))?;
    let secs = match unit {
        "ms" => v / 1e3,
        "s" => v,
        "m" | "min" => v * 60.0,
        _ => return Err(format!("{s:?}: unknown unit {unit:?} (use ms, s or m)")),
    };
    if !(0.0..=86_400.0).contains(&secs) {
        return Err(format!("{s:?}: expected 0 .. 24 h"));
    }
    Ok(Duration::from_secs_f64(secs))
}

/// Frames to post: the given files and image files in the given folders, else the model's
/// self-test samples.
fn frames(args: &BenchArgs, model: Option<&ModelConfig>) -> anyhow::Result<Vec<(String, Vec<u8>)>> {
    let is_image = |p: &Path| p.file_name().is_some_and(|n| selftest::is_image_name(&n.to_string_lossy()));
    let mut out = Vec::new();
    for p in &args.images {
        if p.is_dir() {
            let mut files: Vec<PathBuf> = std::fs::read_dir(p)
                .with_context(|| format!("{}: cannot read the folder", p.display()))?
                .filter_map(|e| e.ok().map(|e| e.path()))
                .filter(|p| is_image(p))
                .collect();
            files.sort();
            for f in files {
                out.push((f.display().to_string(), std::fs::read(&f).with_context(|| format!("{}", f.display()))?));
            }
        } else {
            out.push((
                p.display().to_string(),
                std::fs::read(p).with_context(|| format!("{}: cannot read", p.display()))?,
            ));
        }
    }
    if args.images.is_empty() {
        let st = model.and_then(|m| m.selftest.as_ref()).context(
            "no frames: give --images DIR|FILE (the model has no [models.selftest] samples to fall back on)",
        )?;
        out = Samples::images_only(st)?;
    }
    anyhow::ensure!(!out.is_empty(), "no image files (png, jpg, bmp, tif, webp) among --images");
    Ok(out)
}

/// Run the bench.
///
/// # Errors
/// Bad arguments, a config or model that does not load, a server that does not start or
/// cannot be reached, files that cannot be written.
pub fn run(args: BenchArgs) -> anyhow::Result<Outcome> {
    if let Some(p) = &args.report {
        drive::report_kind(p)?;
    }
    if let Some(b) = args.budget_ms {
        anyhow::ensure!(b > 0.0 && b.is_finite(), "--budget-ms {b}: expected a positive number of milliseconds");
    }
    anyhow::ensure!(
        args.concurrency.iter().all(|&c| (1..=4096).contains(&c)),
        "--concurrency {:?}: expected numbers 1 ..= 4096",
        args.concurrency
    );
    let overrides = Overrides { engine: args.engine, http_threads: args.http_threads, ..super::base_overrides()? };
    let config = Config::load(args.config.config.as_deref(), &overrides)?;
    let model_cfg = match &args.model {
        // A running server may serve a model this config does not name.
        Some(name) if args.url.is_some() => config.model(name),
        Some(name) => Some(config.named(name)?),
        None => config.models.first(),
    };
    let model_name = match (&args.model, model_cfg) {
        (Some(n), _) => n.clone(),
        (None, Some(m)) => m.name.clone(),
        (None, None) => anyhow::bail!("no model: give --model NAME"),
    };
    let frames = frames(&args, model_cfg)?;
    let bodies: Vec<Bytes> = frames.iter().map(|f| Bytes::from(f.1.clone())).collect();
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build()?;
    let drive = args.drive(&rt, &bodies);
    let mut run = Run::new(&model_name, args.line(), args.warmup, args.duration);
    run.config = args.url.is_none().then(|| config.origin.clone());
    run.frames = frames.iter().map(|f| f.0.clone()).collect();
    // The server's HTTP threads are known when this bench starts it.
    let local_http = args.url.is_none().then_some(config.server.http_threads);
    let mut configured = None;
    if !args.engine_only {
        let (server, target) = match &args.url {
            Some(url) => (None, drive::target_of(url, &model_name)?),
            None => {
                let s = ChildServer::start(drive.config_path, &drive.serve_flags(None))?;
                let t = s.target(&model_name);
                (Some(s), t)
            }
        };
        run.url = format!("http://{}", target.host);
        run.model_info = Some(drive.model_info(&target, &model_name)?);
        configured = drive::settings_of(run.model_info.as_ref(), local_http);
        run.steps = match args.line_fps {
            Some(fps) => drive.line_steps(&target, fps, server.as_ref(), configured.clone()),
            None => args
                .modes()
                .into_iter()
                .map(|m| drive.measure(&target, m, server.as_ref(), configured.clone()))
                .collect(),
        };
        drop(server);
        if let (true, Some(fps)) = (args.try_settings, args.line_fps) {
            run.tried = drive.try_settings(&model_name, fps, config.server.http_threads)?;
        }
    }
    if args.engine_only || args.url.is_none() {
        let m = model_cfg.context("the engine needs the model's config")?;
        run.engine = Some(drive.engine_step(m, &frames)?);
    }
    run.conclude(configured);
    print!("{}", report::table(&run));
    if !args.engine_only {
        println!("\nDoes this box keep up with the line? {}", run.verdict.text);
    }
    let outputs =
        drive::Outputs { json: args.json.as_deref(), report: args.report.as_deref(), samples: args.samples.as_deref() };
    drive::write_outputs(&outputs, &run)?;
    Ok(Outcome::Ok)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_child_server_gets_each_flag_once() {
        use clap::Parser as _;
        let cli =
            crate::cli::Cli::try_parse_from(["lineside", "bench", "--engine", "tract", "--http-threads", "2"]).unwrap();
        let crate::cli::Command::Bench(args) = cli.command else { panic!("not bench") };
        let rt = tokio::runtime::Builder::new_current_thread().build().unwrap();
        let drive = args.drive(&rt, &[]);
        assert_eq!(drive.serve_flags(None), ["--engine=tract", "--http-threads=2"]);
        // An arrangement's own count replaces the flag instead of repeating it.
        assert_eq!(drive.serve_flags(Some(1)), ["--engine=tract", "--http-threads=1"]);
        // ... which `lineside serve` would refuse.
        let twice = ["lineside", "serve", "--http-threads=2", "--http-threads=1"];
        assert!(crate::cli::Cli::try_parse_from(twice).is_err());
    }

    #[test]
    fn rates_and_durations_parse_with_units() {
        assert_eq!(parse_rate("200/s"), Ok(200.0));
        assert_eq!(parse_rate("12.5"), Ok(12.5));
        assert!(parse_rate("0/s").is_err());
        assert!(parse_rate("fast").is_err());
        assert_eq!(parse_duration("10s"), Ok(Duration::from_secs(10)));
        assert_eq!(parse_duration("500ms"), Ok(Duration::from_millis(500)));
        assert_eq!(parse_duration("2m"), Ok(Duration::from_secs(120)));
        assert_eq!(parse_duration("3"), Ok(Duration::from_secs(3)));
        assert!(parse_duration("3h").unwrap_err().contains("unknown unit"));
    }
}
