//! `lineside bench`: drive a server with frames and say whether this box keeps up with the
//! line (`--line-fps` frames per second, each within `--budget-ms`), with what margin, and
//! optionally with which of several arrangements of lanes and batching (`--try-settings`);
//! also the engine alone.
//!
//! Without `--url` lineside starts `lineside serve` as a child process on a free loopback
//! port (so its CPU time is read apart from the load generator's); with `--url` it drives a
//! running server. The load generator runs on this process's main thread.

use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

use anyhow::Context as _;
use axum::body::Bytes;

use super::{ConfigArg, Outcome};
use crate::batch::auto_lanes;
use crate::bench::chart;
use crate::bench::child::ChildServer;
use crate::bench::load::{self, Mode, Target};
use crate::bench::report::{self, EngineStep, Line, LineResult, Run, Settings, Step};
use crate::bench::{Machine, cpu_seconds, engine, summarize};
use crate::config::{Config, Lanes, ModelConfig, Overrides};
use crate::model::{EngineKind, load as model_load};
use crate::preprocess::Pipeline;
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
    /// `--engine` and the HTTP threads as flags for the `lineside serve` the bench starts:
    /// `http_threads` (an arrangement's) if given, else `--http-threads` (each flag at most
    /// once: the server refuses a repeated one).
    fn serve_flags(&self, http_threads: Option<usize>) -> Vec<String> {
        let engine = self.engine.iter().map(|e| format!("--engine={}", e.name()));
        engine.chain(http_threads.or(self.http_threads).map(|n| format!("--http-threads={n}"))).collect()
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

/// The server's settings for this model as `/models/{model}` reports them, with its HTTP
/// threads when known (a server this bench started).
fn settings_of(info: &serde_json::Value, http_threads: Option<usize>) -> Option<Settings> {
    let b = &info["batching"];
    Some(Settings {
        batch_cap: b["batch_cap"].as_u64()? as usize,
        gather_us: b["gather_us"].as_u64()?,
        lanes: b["lanes"].as_u64()? as usize,
        lane_threads: b["lane_threads"].as_u64()? as usize,
        http_threads,
    })
}

/// Run the bench.
///
/// # Errors
/// Bad arguments, a config or model that does not load, a server that does not start or
/// cannot be reached, files that cannot be written.
pub fn run(args: BenchArgs) -> anyhow::Result<Outcome> {
    if let Some(p) = &args.report {
        report_kind(p)?;
    }
    if let Some(b) = args.budget_ms {
        anyhow::ensure!(b > 0.0 && b.is_finite(), "--budget-ms {b}: expected a positive number of milliseconds");
    }
    anyhow::ensure!(
        args.concurrency.iter().all(|&c| (1..=4096).contains(&c)),
        "--concurrency {:?}: expected numbers 1 ..= 4096",
        args.concurrency
    );
    let overrides = Overrides { engine: args.engine, http_threads: args.http_threads, ..Overrides::default() };
    let config = Config::load(args.config.config.as_deref(), &overrides)?;
    let model_cfg = match &args.model {
        Some(name) => config.models.iter().find(|m| &m.name == name),
        None => config.models.first(),
    };
    let model_name = match (&args.model, model_cfg) {
        (Some(n), _) => n.clone(),
        (None, Some(m)) => m.name.clone(),
        (None, None) => anyhow::bail!("no model: give --model NAME"),
    };
    if args.url.is_none() && model_cfg.is_none() {
        anyhow::bail!("{}: no model named {model_name:?} (configured: {})", config.origin, names(&config));
    }
    let frames = frames(&args, model_cfg)?;
    // The server's HTTP threads are known when this bench starts it.
    let local_http = args.url.is_none().then_some(config.server.http_threads);
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build()?;

    let mut run = Run {
        lineside_version: env!("CARGO_PKG_VERSION").into(),
        unix_time: std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map_or(0, |d| d.as_secs()),
        machine: Machine::this(),
        url: String::new(),
        model: model_name.clone(),
        model_info: serde_json::Value::Null,
        config: args.url.is_none().then(|| config.origin.clone()),
        frames: frames.iter().map(|f| f.0.clone()).collect(),
        warmup_s: args.warmup.as_secs_f64(),
        duration_s: args.duration.as_secs_f64(),
        line: args.line(),
        steps: Vec::new(),
        engine: None,
        serving_ratio: None,
        tried: Vec::new(),
        verdict: report::judge(&[], &[], None, args.line()),
        caution: report::CAUTION.into(),
    };
    let bodies: Vec<Bytes> = frames.iter().map(|f| Bytes::from(f.1.clone())).collect();

    if !args.engine_only {
        let config_path = args.config.config.as_deref();
        let (server, target) = match &args.url {
            Some(url) => (None, target_of(url, &model_name)?),
            None => {
                let s = ChildServer::start(config_path, &args.serve_flags(None))?;
                let t = s.target(&model_name);
                (Some(s), t)
            }
        };
        run.url = format!("http://{}", target.host);
        run.model_info = rt.block_on(load::get_json(&target, &format!("/models/{model_name}"))).with_context(|| {
            format!("{}/models/{model_name}: cannot read the model's description (is it a lineside server serving {model_name:?}?)", run.url)
        })?;
        let configured = settings_of(&run.model_info, local_http);
        run.steps = match args.line_fps {
            Some(fps) => line_steps(&rt, &target, &bodies, fps, &args, server.as_ref(), configured.clone()),
            None => {
                let modes: Vec<Mode> = match args.rate {
                    Some(r) => vec![Mode::Open(r)],
                    None => args.concurrency.iter().map(|&c| Mode::Closed(c)).collect(),
                };
                let steps = modes
                    .into_iter()
                    .map(|m| measure(&rt, &target, &bodies, m, &args, server.as_ref(), configured.clone()));
                steps.collect()
            }
        };
        drop(server);
        if args.try_settings {
            run.tried = try_settings(&rt, &args, config_path, &model_name, &bodies, config.server.http_threads)?;
        }
    }
    if args.engine_only || args.url.is_none() {
        let m = model_cfg.context("the engine needs the model's config")?;
        run.engine = Some(engine_step(m, &frames, &args)?);
    }
    if let (Some(e), Some(best)) =
        (&run.engine, run.steps.iter().filter(|s| s.errors.is_empty()).map(|s| s.throughput).reduce(f64::max))
    {
        run.serving_ratio = Some(best / e.throughput);
    }
    let configured = settings_of(&run.model_info, local_http);
    run.verdict = report::judge(&run.steps, &run.tried, configured, run.line);

    print!("{}", report::table(&run));
    if !args.engine_only {
        println!("\nDoes this box keep up with the line? {}", run.verdict.text);
    }
    write_outputs(&args, &run)?;
    Ok(Outcome::Ok)
}

fn names(config: &Config) -> String {
    config.models.iter().map(|m| m.name.as_str()).collect::<Vec<_>>().join(", ")
}

fn target_of(url: &str, model: &str) -> anyhow::Result<Target> {
    let rest = url
        .strip_prefix("http://")
        .with_context(|| format!("--url {url}: expected http://host:port (lineside serves plain HTTP)"))?;
    let host = rest.trim_end_matches('/');
    anyhow::ensure!(!host.contains('/'), "--url {url}: give the server's root, e.g. http://10.0.0.5:8080");
    let with_port = if host.rsplit_once(':').is_some_and(|(_, p)| p.parse::<u16>().is_ok()) {
        host.to_string()
    } else {
        format!("{host}:80")
    };
    use std::net::ToSocketAddrs as _;
    let addr = with_port
        .to_socket_addrs()
        .with_context(|| format!("--url {url}: cannot resolve {with_port}"))?
        .next()
        .with_context(|| format!("--url {url}: {with_port} has no address"))?;
    Ok(Target { addr, host: host.to_string(), path: format!("/classify/{model}") })
}

/// One step, with a progress bar and the CPU time of both processes.
fn measure(
    rt: &tokio::runtime::Runtime,
    target: &Target,
    bodies: &[Bytes],
    mode: Mode,
    args: &BenchArgs,
    server: Option<&ChildServer>,
    settings: Option<Settings>,
) -> Step {
    let mut step = measure_once(rt, target, bodies, mode, args, server, settings);
    if let Some(b) = args.budget_ms {
        step.count_late(b);
    }
    step
}

/// The line's steps: frames due at the line's rate, then at each larger multiple of it
/// ([`report::LINE_MULTIPLES`]) until one breaks the budget.
fn line_steps(
    rt: &tokio::runtime::Runtime,
    target: &Target,
    bodies: &[Bytes],
    fps: f64,
    args: &BenchArgs,
    server: Option<&ChildServer>,
    settings: Option<Settings>,
) -> Vec<Step> {
    let budget = args.budget_ms.unwrap_or(f64::INFINITY);
    let mut steps = Vec::new();
    for m in report::LINE_MULTIPLES {
        let mut s = measure(rt, target, bodies, Mode::Open(fps * m), args, server, settings.clone());
        s.multiple = Some(m);
        let broke = !s.holds(budget);
        steps.push(s);
        if broke {
            break;
        }
    }
    steps
}

fn measure_once(
    rt: &tokio::runtime::Runtime,
    target: &Target,
    bodies: &[Bytes],
    mode: Mode,
    args: &BenchArgs,
    server: Option<&ChildServer>,
    settings: Option<Settings>,
) -> Step {
    let bar = indicatif::ProgressBar::new(1000);
    bar.set_style(
        indicatif::ProgressStyle::with_template("{prefix:>24} [{bar:40}] {elapsed}")
            .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar())
            .progress_chars("=> "),
    );
    bar.set_prefix(mode.to_string());
    let server_pid = server.map(ChildServer::pid);
    let cpu = |pid: &Option<String>| pid.as_deref().and_then(cpu_seconds);
    let (srv0, cli0, t0) = (cpu(&server_pid), cpu_seconds("self"), Instant::now());
    let progress = |f: f64| bar.set_position((f * 1000.0) as u64);
    let grace = Duration::from_secs(30);
    let m = rt.block_on(load::run_step(target, bodies, mode, args.warmup, args.duration, grace, &progress));
    let wall = t0.elapsed().as_secs_f64();
    let cores = |a: Option<f64>, b: Option<f64>| a.zip(b).map(|(a, b)| (b - a) / wall);
    let (srv1, cli1) = (cpu(&server_pid), cpu_seconds("self"));
    bar.finish_and_clear();
    let (concurrency, rate) = match mode {
        Mode::Closed(c) => (Some(c), None),
        Mode::Open(r) => (None, Some(r)),
    };
    Step {
        mode: if concurrency.is_some() { "closed" } else { "open" }.into(),
        concurrency,
        rate,
        multiple: None,
        settings,
        requests: m.total(),
        ok: m.ok,
        late: None,
        throughput: m.throughput(),
        duration_s: m.wall_s,
        latency: summarize(&m.samples_us),
        server_cpu_cores: cores(srv0, srv1),
        client_cpu_cores: cores(cli0, cli1),
        errors: m.errors,
        samples_us: m.samples_us,
    }
}

/// The arrangements `--try-settings` measures: (lanes x lane_threads) {cores x 1, 1 x cores}
/// x `batch_cap` {1, 8} (a cap of 8 gathers for up to 2 ms on an engine that stacks), each on a
/// restarted server with the configured `http_threads`; on a box with more than one core the
/// best is run once more with the other of 1 and 2 HTTP threads (which one wins depends on how
/// the HTTP work compares with the inference: docs/performance.md).
fn try_settings(
    rt: &tokio::runtime::Runtime,
    args: &BenchArgs,
    config_path: Option<&Path>,
    model: &str,
    bodies: &[Bytes],
    http_threads: usize,
) -> anyhow::Result<Vec<LineResult>> {
    let cores = std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1);
    let mut arrangements = vec![(cores, 1)];
    if cores > 1 {
        arrangements.push((1, cores));
    }
    let mut tried = Vec::new();
    for (lanes, lane_threads) in arrangements {
        for (batch_cap, gather_us) in [(1usize, 0u64), (8, 2000)] {
            let settings = Settings { batch_cap, gather_us, lanes, lane_threads, http_threads: Some(http_threads) };
            tried.push(trial(rt, args, config_path, model, bodies, settings)?);
        }
    }
    let best = report::best_tried(&tried).and_then(|b| b.settings.clone());
    if let (true, Some(best)) = (cores > 1, best) {
        let other = if http_threads == 1 { 2 } else { 1 };
        let settings = Settings { http_threads: Some(other), ..best };
        tried.push(trial(rt, args, config_path, model, bodies, settings)?);
    }
    Ok(tried)
}

/// One arrangement: a server with `settings`, driven at the line's rate and its multiples.
fn trial(
    rt: &tokio::runtime::Runtime,
    args: &BenchArgs,
    config_path: Option<&Path>,
    model: &str,
    bodies: &[Bytes],
    settings: Settings,
) -> anyhow::Result<LineResult> {
    eprintln!("trying: {settings}");
    let mut flags = vec![
        format!("--batch-cap={}", settings.batch_cap),
        format!("--gather-us={}", settings.gather_us),
        format!("--lanes={}", settings.lanes),
        format!("--lane-threads={}", settings.lane_threads),
    ];
    flags.extend(args.serve_flags(settings.http_threads));
    let server = ChildServer::start(config_path, &flags)?;
    let target = server.target(model);
    let (fps, budget) = (args.line_fps.context("--try-settings needs --line-fps")?, args.budget_ms.unwrap_or(0.0));
    let steps = line_steps(rt, &target, bodies, fps, args, Some(&server), Some(settings.clone()));
    let ladder: Vec<&Step> = steps.iter().collect();
    LineResult::of(&ladder, budget, Some(settings)).context("no step ran at the line's rate")
}

/// The engine alone, with the model's configured lanes and threads.
fn engine_step(m: &ModelConfig, frames: &[(String, Vec<u8>)], args: &BenchArgs) -> anyhow::Result<EngineStep> {
    let model = Arc::new(model_load::load(m)?);
    let pipeline = Pipeline::new(m.preprocess.clone(), &model.contract, u64::MAX);
    let tensors = frames
        .iter()
        .map(|(name, bytes)| pipeline.run(bytes).map(|p| p.tensor).with_context(|| format!("{name}: cannot prepare")))
        .collect::<anyhow::Result<Vec<_>>>()?;
    let lane_threads = m.batching.lane_threads;
    let lanes = match m.batching.lanes {
        Lanes::Auto => auto_lanes(lane_threads),
        Lanes::Fixed(n) => n,
    };
    eprintln!("engine alone: {lanes} lane(s) x {lane_threads} thread(s) for {:?}", args.duration);
    let r = engine::run(&model, &tensors, lanes, lane_threads, m.batching.batch_cap, args.warmup, args.duration)?;
    Ok(EngineStep {
        engine: model.engine().name().into(),
        stacked_passes: model.stacks(),
        lanes,
        lane_threads,
        throughput: r.throughput(),
        latency: summarize(&r.samples_us),
    })
}

/// Whether `--report FILE` asks for HTML (true) or SVG (false); checked before any step runs.
fn report_kind(p: &Path) -> anyhow::Result<bool> {
    match p.extension().map(|e| e.to_string_lossy().to_ascii_lowercase()).as_deref() {
        Some("html" | "htm") => Ok(true),
        Some("svg") => Ok(false),
        _ => anyhow::bail!("--report {}: expected a file ending in .html or .svg", p.display()),
    }
}

fn write_outputs(args: &BenchArgs, run: &Run) -> anyhow::Result<()> {
    if let Some(p) = &args.json {
        let text = serde_json::to_string_pretty(run)?;
        std::fs::write(p, text).with_context(|| format!("{}: cannot write the JSON report", p.display()))?;
    }
    if let Some(p) = &args.report {
        let text = if report_kind(p)? { chart::html(run)? } else { chart::svg(run)? };
        std::fs::write(p, text).with_context(|| format!("{}: cannot write the report", p.display()))?;
    }
    if let Some(p) = &args.samples {
        let mut text = String::from("step,latency_us\n");
        for s in &run.steps {
            let name = s.name();
            for v in &s.samples_us {
                text.push_str(&format!("{name},{v}\n"));
            }
        }
        std::fs::write(p, text).with_context(|| format!("{}: cannot write the samples", p.display()))?;
    }
    Ok(())
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
        assert_eq!(args.serve_flags(None), ["--engine=tract", "--http-threads=2"]);
        // An arrangement's own count replaces the flag instead of repeating it.
        assert_eq!(args.serve_flags(Some(1)), ["--engine=tract", "--http-threads=1"]);
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

    #[test]
    fn urls_name_a_server_root() {
        let t = target_of("http://127.0.0.1:9000/", "washers").unwrap();
        assert_eq!(t.addr.port(), 9000);
        assert_eq!(t.path, "/classify/washers");
        assert!(target_of("https://127.0.0.1:9000", "m").unwrap_err().to_string().contains("plain HTTP"));
        assert!(target_of("http://127.0.0.1:9000/classify/m", "m").is_err());
    }
}
