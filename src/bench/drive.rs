//! Driving a server for `lineside bench`: the steps of a sweep or of the line's ladder (the
//! line's rate and its multiples), the arrangements `--try-settings` restarts the server with,
//! and the engine alone. The CLI turns its arguments into a [`Drive`] and calls these.

use std::path::Path;
use std::time::{Duration, Instant};

use anyhow::Context as _;
use axum::body::Bytes;

use super::child::ChildServer;
use super::load::{self, Mode, Target};
use super::report::{self, EngineStep, LINE_MULTIPLES, LineResult, Settings, Step, best_tried};
use super::{cpu_seconds, engine, summarize};
use crate::config::ModelConfig;
use crate::http::models::ModelInfo;
use crate::model::EngineKind;
use crate::served::{LoadOptions, Loaded};

/// How the bench drives: the frames, the time per step, the budget, and the flags of the
/// servers it starts.
pub struct Drive<'a> {
    /// The runtime the load generator runs on (this thread).
    pub rt: &'a tokio::runtime::Runtime,
    /// The frames, posted in turn.
    pub bodies: &'a [Bytes],
    /// Unrecorded warm-up before each step.
    pub warmup: Duration,
    /// Measured time per step.
    pub duration: Duration,
    /// The line's budget per frame, when given.
    pub budget_ms: Option<f64>,
    /// `--engine` for the servers the bench starts.
    pub engine: Option<EngineKind>,
    /// `--http-threads` for the servers the bench starts.
    pub http_threads: Option<usize>,
    /// The config the servers the bench starts use.
    pub config_path: Option<&'a Path>,
}

impl Drive<'_> {
    /// `--engine` and the HTTP threads as flags for a `lineside serve` the bench starts:
    /// `http_threads` (an arrangement's) if given, else `--http-threads` (each flag at most
    /// once: the server refuses a repeated one).
    pub fn serve_flags(&self, http_threads: Option<usize>) -> Vec<String> {
        let engine = self.engine.iter().map(|e| format!("--engine={}", e.name()));
        engine.chain(http_threads.or(self.http_threads).map(|n| format!("--http-threads={n}"))).collect()
    }

    /// The line's steps: frames due at the line's rate, then at each larger multiple of it
    /// ([`LINE_MULTIPLES`]) until one breaks the budget.
    pub fn line_steps(
        &self,
        target: &Target,
        fps: f64,
        server: Option<&ChildServer>,
        settings: Option<Settings>,
    ) -> Vec<Step> {
        let budget = self.budget_ms.unwrap_or(f64::INFINITY);
        let mut steps = Vec::new();
        for m in LINE_MULTIPLES {
            let mut s = self.measure(target, Mode::Open(fps * m), server, settings.clone());
            s.multiple = Some(m);
            let broke = !s.holds(budget);
            steps.push(s);
            if broke {
                break;
            }
        }
        steps
    }

    /// One step, with a progress bar, the CPU time of both processes and the late frames.
    pub fn measure(
        &self,
        target: &Target,
        mode: Mode,
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
        let m =
            self.rt.block_on(load::run_step(target, self.bodies, mode, self.warmup, self.duration, grace, &progress));
        let wall = t0.elapsed().as_secs_f64();
        let cores = |a: Option<f64>, b: Option<f64>| a.zip(b).map(|(a, b)| (b - a) / wall);
        let (srv1, cli1) = (cpu(&server_pid), cpu_seconds("self"));
        bar.finish_and_clear();
        let (concurrency, rate) = match mode {
            Mode::Closed(c) => (Some(c), None),
            Mode::Open(r) => (None, Some(r)),
        };
        let mut step = Step {
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
        };
        if let Some(b) = self.budget_ms {
            step.count_late(b);
        }
        step
    }

    /// The arrangements `--try-settings` measures: (lanes x lane_threads) {cores x 1, 1 x
    /// cores} x `batch_cap` {1, 8} (a cap of 8 gathers for up to 2 ms on an engine that
    /// stacks), each on a restarted server with the configured `http_threads`; on a box with
    /// more than one core the best is run once more with the other of 1 and 2 HTTP threads
    /// (which one wins depends on how the HTTP work compares with the inference:
    /// docs/performance.md).
    ///
    /// # Errors
    /// A server that does not start.
    pub fn try_settings(&self, model: &str, fps: f64, http_threads: usize) -> anyhow::Result<Vec<LineResult>> {
        let cores = std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1);
        let mut arrangements = vec![(cores, 1)];
        if cores > 1 {
            arrangements.push((1, cores));
        }
        let mut tried = Vec::new();
        for (lanes, lane_threads) in arrangements {
            for (batch_cap, gather_us) in [(1usize, 0u64), (8, 2000)] {
                let settings = Settings { batch_cap, gather_us, lanes, lane_threads, http_threads: Some(http_threads) };
                tried.push(self.trial(model, fps, settings)?);
            }
        }
        let best = best_tried(&tried).and_then(|b| b.settings.clone());
        if let (true, Some(best)) = (cores > 1, best) {
            let other = if http_threads == 1 { 2 } else { 1 };
            tried.push(self.trial(model, fps, Settings { http_threads: Some(other), ..best })?);
        }
        Ok(tried)
    }

    /// One arrangement: a server with `settings`, driven at the line's rate and its multiples.
    fn trial(&self, model: &str, fps: f64, settings: Settings) -> anyhow::Result<LineResult> {
        eprintln!("trying: {settings}");
        let mut flags = vec![
            format!("--batch-cap={}", settings.batch_cap),
            format!("--gather-us={}", settings.gather_us),
            format!("--lanes={}", settings.lanes),
            format!("--lane-threads={}", settings.lane_threads),
        ];
        flags.extend(self.serve_flags(settings.http_threads));
        let server = ChildServer::start(self.config_path, &flags)?;
        let target = server.target(model);
        let steps = self.line_steps(&target, fps, Some(&server), Some(settings.clone()));
        let ladder: Vec<&Step> = steps.iter().collect();
        LineResult::of(&ladder, self.budget_ms.unwrap_or(0.0), Some(settings)).context("no step ran at the line's rate")
    }

    /// The engine alone, with the model's configured lanes and threads.
    ///
    /// # Errors
    /// A model that does not load, a frame that does not decode.
    pub fn engine_step(&self, m: &ModelConfig, frames: &[(String, Vec<u8>)]) -> anyhow::Result<EngineStep> {
        let loaded = Loaded::load(m, &LoadOptions::single())?;
        let tensors = frames
            .iter()
            .map(|(name, bytes)| {
                loaded.pipeline.run(bytes).map(|p| p.tensor).with_context(|| format!("{name}: cannot prepare"))
            })
            .collect::<anyhow::Result<Vec<_>>>()?;
        let (model, lanes, lane_threads) = (&loaded.model, loaded.lanes, m.batching.lane_threads);
        eprintln!("engine alone: {lanes} lane(s) x {lane_threads} thread(s) for {:?}", self.duration);
        let r = engine::run(model, &tensors, lanes, lane_threads, m.batching.batch_cap, self.warmup, self.duration)?;
        Ok(EngineStep {
            engine: model.engine().name().into(),
            stacked_passes: model.stacks(),
            lanes,
            lane_threads,
            throughput: r.throughput(),
            latency: summarize(&r.samples_us),
        })
    }

    /// The server's description of `model` (`GET /models/{model}`).
    ///
    /// # Errors
    /// The server cannot be reached or is not a lineside serving `model`.
    pub fn model_info(&self, target: &Target, model: &str) -> anyhow::Result<ModelInfo> {
        let info = self
            .rt
            .block_on(load::get_json(target, &format!("/models/{model}")))
            .and_then(|v| serde_json::from_value::<ModelInfo>(v).context("not the description lineside gives"));
        info.with_context(|| {
            format!(
                "http://{}/models/{model}: cannot read the model's description (is it a lineside server serving {model:?}?)",
                target.host
            )
        })
    }
}

/// The server's settings for this model as `/models/{model}` reports them, with its HTTP
/// threads when known (a server this bench started).
pub fn settings_of(info: Option<&ModelInfo>, http_threads: Option<usize>) -> Option<Settings> {
    let b = &info?.batching;
    Some(Settings {
        batch_cap: b.batch_cap,
        gather_us: b.gather_us,
        lanes: b.lanes,
        lane_threads: b.lane_threads,
        http_threads,
    })
}

/// The classify target of `model` on the server at `url` (`http://host[:port]`).
///
/// # Errors
/// Not a plain-HTTP server root, or a host that does not resolve.
pub fn target_of(url: &str, model: &str) -> anyhow::Result<Target> {
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

/// Where `lineside bench` writes its results.
#[derive(Debug, Default)]
pub struct Outputs<'a> {
    /// `--json`.
    pub json: Option<&'a Path>,
    /// `--report` (.html or .svg).
    pub report: Option<&'a Path>,
    /// `--samples` (CSV).
    pub samples: Option<&'a Path>,
}

/// Whether `--report FILE` asks for HTML (true) or SVG (false); checked before any step runs.
///
/// # Errors
/// Neither.
pub fn report_kind(p: &Path) -> anyhow::Result<bool> {
    match p.extension().map(|e| e.to_string_lossy().to_ascii_lowercase()).as_deref() {
        Some("html" | "htm") => Ok(true),
        Some("svg") => Ok(false),
        _ => anyhow::bail!("--report {}: expected a file ending in .html or .svg", p.display()),
    }
}

/// Write the run's JSON, report and samples where asked.
///
/// # Errors
/// A file that cannot be written.
pub fn write_outputs(out: &Outputs<'_>, run: &report::Run) -> anyhow::Result<()> {
    if let Some(p) = out.json {
        let text = serde_json::to_string_pretty(run)?;
        std::fs::write(p, text).with_context(|| format!("{}: cannot write the JSON report", p.display()))?;
    }
    if let Some(p) = out.report {
        let text = if report_kind(p)? { super::chart::html(run)? } else { super::chart::svg(run)? };
        std::fs::write(p, text).with_context(|| format!("{}: cannot write the report", p.display()))?;
    }
    if let Some(p) = out.samples {
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
    fn urls_name_a_server_root() {
        let t = target_of("http://127.0.0.1:9000/", "washers").unwrap();
        assert_eq!(t.addr.port(), 9000);
        assert_eq!(t.path, "/classify/washers");
        assert!(target_of("https://127.0.0.1:9000", "m").unwrap_err().to_string().contains("plain HTTP"));
        assert!(target_of("http://127.0.0.1:9000/classify/m", "m").is_err());
    }
}
