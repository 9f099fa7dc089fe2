//! What a bench run found and what it means for the line: the steps, the settings tried, the
//! verdict ("does this box keep up with the line, with what margin, with which settings"),
//! the plain table and the JSON. The charts are in [`super::chart`].
//!
//! A line gives two numbers: the budget per frame (arrival to answer) and the frames per
//! second it must take. A late frame is an uninspected part, so a step holds the budget only
//! when its p99.9 *and* its maximum are within it and every frame was answered; medians and
//! p99 say little about the one part in a thousand that goes by uninspected.

use std::collections::BTreeMap;
use std::fmt::Write as _;

use serde::Serialize;

pub use super::verdict::{CAUTION, LineResult, Verdict, best_tried, judge};
use super::{Latency, Machine};

/// Batching settings a step ran with.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Settings {
    /// `batch_cap`.
    pub batch_cap: usize,
    /// `gather_us`.
    pub gather_us: u64,
    /// Lanes (resolved).
    pub lanes: usize,
    /// `lane_threads`.
    pub lane_threads: usize,
    /// `[server] http_threads`, when known (a server this bench started).
    pub http_threads: Option<usize>,
}

impl std::fmt::Display for Settings {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "batch_cap = {}, gather_us = {}, lanes = {}, lane_threads = {}",
            self.batch_cap, self.gather_us, self.lanes, self.lane_threads
        )?;
        match self.http_threads {
            Some(n) => write!(f, ", http_threads = {n}"),
            None => Ok(()),
        }
    }
}

/// The line the box must serve (`--budget-ms`, `--line-fps`).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Line {
    /// Longest a frame may take, arrival to answer, in milliseconds.
    pub budget_ms: Option<f64>,
    /// Frames per second the line sends.
    pub fps: Option<f64>,
}

/// Multiples of the line's rate measured when `--line-fps` is given, in order; the bench
/// stops after the first that breaks the budget.
pub const LINE_MULTIPLES: [f64; 5] = [1.0, 1.5, 2.0, 3.0, 4.0];

/// One measured step.
#[derive(Debug, Clone, Serialize)]
pub struct Step {
    /// "closed" or "open".
    pub mode: String,
    /// Clients (closed loop).
    pub concurrency: Option<usize>,
    /// Frames due per second (open loop).
    pub rate: Option<f64>,
    /// The rate as a multiple of the line's (`--line-fps`), for the line's steps.
    pub multiple: Option<f64>,
    /// Batching settings of the server, when lineside started it.
    pub settings: Option<Settings>,
    /// Requests with an outcome in the window: `ok` + every error.
    pub requests: u64,
    /// Answered 200.
    pub ok: u64,
    /// Failures by kind ("http 503", "connection", ...).
    pub errors: BTreeMap<String, u64>,
    /// Answers later than the budget (when a budget was given).
    pub late: Option<u64>,
    /// Answered frames per second.
    pub throughput: f64,
    /// Measured window, seconds (to the last answer).
    pub duration_s: f64,
    /// Latency of the 200 answers.
    pub latency: Latency,
    /// Cores the server process used (when lineside started it).
    pub server_cpu_cores: Option<f64>,
    /// Cores the load generator used.
    pub client_cpu_cores: Option<f64>,
    /// Every latency, microseconds (exported by `--samples`, not in the JSON).
    #[serde(skip)]
    pub samples_us: Vec<u64>,
}

impl Step {
    /// A short name: "c=4", "200/s", or "1.5x (37.5/s)" for a step of the line's rate.
    pub fn name(&self) -> String {
        match (self.concurrency, self.rate, self.multiple) {
            (Some(c), _, _) => format!("c={c}"),
            (_, Some(r), Some(m)) => format!("{m}x ({r}/s)"),
            (_, Some(r), None) => format!("{r}/s"),
            _ => "?".into(),
        }
    }

    /// Count the answers later than `budget_ms` (kept in `late`).
    pub fn count_late(&mut self, budget_ms: f64) {
        let limit_us = budget_ms * 1e3;
        self.late = Some(self.samples_us.iter().filter(|&&v| v as f64 > limit_us).count() as u64);
    }

    /// Whether every frame was answered, with p99.9 and the maximum within `budget_ms`.
    pub fn holds(&self, budget_ms: f64) -> bool {
        self.errors.is_empty() && self.ok > 0 && self.latency.p999_ms <= budget_ms && self.latency.max_ms <= budget_ms
    }
}

/// The engine alone.
#[derive(Debug, Clone, Serialize)]
pub struct EngineStep {
    /// Which engine (`tract`, `onnxruntime`).
    pub engine: String,
    /// Whether its passes were stacked.
    pub stacked_passes: bool,
    /// Lanes and threads it ran with.
    pub lanes: usize,
    /// Threads per lane.
    pub lane_threads: usize,
    /// Images per second.
    pub throughput: f64,
    /// Time per image run.
    pub latency: Latency,
}

/// A whole run.
#[derive(Debug, Clone, Serialize)]
pub struct Run {
    /// lineside's version.
    pub lineside_version: String,
    /// When (UTC, seconds since the Unix epoch).
    pub unix_time: u64,
    /// The machine.
    pub machine: Machine,
    /// The server's URL.
    pub url: String,
    /// The model benchmarked.
    pub model: String,
    /// The server's description of it (`GET /models/{model}`): version, engine, contract,
    /// preprocessing and batching.
    pub model_info: Option<crate::http::models::ModelInfo>,
    /// Config file (when lineside started the server).
    pub config: Option<String>,
    /// Frames posted (names).
    pub frames: Vec<String>,
    /// Warm-up seconds per step.
    pub warmup_s: f64,
    /// Measured seconds per step.
    pub duration_s: f64,
    /// The line's budget and rate, as given.
    pub line: Line,
    /// The steps with the configured settings.
    pub steps: Vec<Step>,
    /// The engine alone, if measured.
    pub engine: Option<EngineStep>,
    /// Best served throughput over the engine's, if both were measured.
    pub serving_ratio: Option<f64>,
    /// The arrangements `--try-settings` measured at the line's rate.
    pub tried: Vec<LineResult>,
    /// Does the box keep up.
    pub verdict: Verdict,
    /// Figures hold for this machine only.
    pub caution: String,
}

impl Run {
    /// A run of `model` at `line`, with nothing measured yet.
    pub fn new(model: &str, line: Line, warmup: std::time::Duration, duration: std::time::Duration) -> Run {
        Run {
            lineside_version: env!("CARGO_PKG_VERSION").into(),
            unix_time: std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map_or(0, |d| d.as_secs()),
            machine: Machine::this(),
            url: String::new(),
            model: model.into(),
            model_info: None,
            config: None,
            frames: Vec::new(),
            warmup_s: warmup.as_secs_f64(),
            duration_s: duration.as_secs_f64(),
            line,
            steps: Vec::new(),
            engine: None,
            serving_ratio: None,
            tried: Vec::new(),
            verdict: judge(&[], &[], None, line),
            caution: CAUTION.into(),
        }
    }

    /// With every step measured: the serving ratio and the verdict (`configured`: the
    /// server's settings).
    pub fn conclude(&mut self, configured: Option<Settings>) {
        // Only a sweep (closed loop, or an open-loop rate the user set) measures what the
        // server can take; steps paced at the line's rate take what the line sends.
        let sweep = self.steps.iter().filter(|s| s.multiple.is_none() && s.errors.is_empty());
        if let (Some(e), Some(best)) = (&self.engine, sweep.map(|s| s.throughput).reduce(f64::max)) {
            self.serving_ratio = Some(best / e.throughput);
        }
        self.verdict = judge(&self.steps, &self.tried, configured, self.line);
    }
}

/// The plain table of the steps (and the engine and the settings tried, if measured).
pub fn table(run: &Run) -> String {
    let mut t = String::new();
    let _ = writeln!(
        t,
        "{:<16} {:>9} {:>8} {:>8} {:>8} {:>8} {:>8} {:>8} {:>6} {:>7} {:>10} {:>10}",
        "step",
        "frames/s",
        "p50 ms",
        "p90 ms",
        "p99 ms",
        "p99.9",
        "max ms",
        "ok",
        "late",
        "errors",
        "server cpu",
        "client cpu"
    );
    let cores = |c: Option<f64>| c.map_or_else(|| "-".into(), |c| format!("{c:.2}"));
    let how = |stacked: bool| if stacked { "passes stacked" } else { "passes run image by image" };
    if let Some(info) = &run.model_info {
        let _ = writeln!(t, "served by: {} ({})", info.engine, how(info.stacked_passes));
    }
    for s in &run.steps {
        let _ = writeln!(
            t,
            "{:<16} {:>9.1} {:>8.2} {:>8.2} {:>8.2} {:>8.2} {:>8.2} {:>8} {:>6} {:>7} {:>10} {:>10}",
            s.name(),
            s.throughput,
            s.latency.p50_ms,
            s.latency.p90_ms,
            s.latency.p99_ms,
            s.latency.p999_ms,
            s.latency.max_ms,
            s.ok,
            s.late.map_or_else(|| "-".into(), |l| l.to_string()),
            s.errors.values().sum::<u64>(),
            cores(s.server_cpu_cores),
            cores(s.client_cpu_cores)
        );
    }
    for s in run.steps.iter().filter(|s| !s.errors.is_empty()) {
        let _ = writeln!(t, "  errors at {}: {:?}", s.name(), s.errors);
    }
    if let Some(e) = &run.engine {
        let _ = writeln!(
            t,
            "engine alone ({}, {}, {} lane(s) x {} thread(s), no HTTP, no decoding): {:.1} images/s, p50 {:.2} ms per image",
            e.engine,
            how(e.stacked_passes),
            e.lanes,
            e.lane_threads,
            e.throughput,
            e.latency.p50_ms
        );
    }
    if let Some(r) = run.serving_ratio {
        let _ = writeln!(t, "serving overhead: best served throughput = {r:.3}x the engine alone");
    }
    if !run.tried.is_empty() {
        let _ = writeln!(t, "settings tried at the line's rate:");
        for r in &run.tried {
            let _ = writeln!(t, "  {}", tried_line(r));
        }
    }
    t
}

/// One arrangement tried, in one line.
pub fn tried_line(r: &LineResult) -> String {
    let settings = r.settings.as_ref().map_or_else(|| "configured".into(), |s| s.to_string());
    let verdict = if r.keeps_up { "keeps up" } else { "does not keep up" };
    let margin = match (r.held_multiple, r.broke_multiple) {
        (Some(h), Some(b)) => format!("held to {h}x, broke at {b}x"),
        (Some(h), None) => format!("held to {h}x (all measured)"),
        (None, _) => "broke at 1x".into(),
    };
    format!(
        "{settings}: {verdict}; {margin}; at 1x p99.9 {:.1} ms, slowest {:.1} ms, {} late",
        r.p999_ms, r.max_ms, r.late
    )
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;

    /// A step whose latencies are `p50` and a tail at `tail` ms (p99, p99.9 and max).
    pub(crate) fn step(multiple: Option<f64>, fps: f64, tail: f64, errors: u64) -> Step {
        let mut e = BTreeMap::new();
        if errors > 0 {
            e.insert("http 503".into(), errors);
        }
        Step {
            mode: if multiple.is_some() { "open" } else { "closed" }.into(),
            concurrency: multiple.is_none().then_some(4),
            rate: multiple.map(|m| m * 10.0),
            multiple,
            settings: None,
            requests: 1000 + errors,
            ok: 1000,
            errors: e,
            late: None,
            throughput: fps,
            duration_s: 1.0,
            latency: Latency {
                count: 1000,
                mean_ms: tail / 2.0,
                p50_ms: tail / 2.0,
                p90_ms: tail / 2.0,
                p99_ms: tail,
                p999_ms: tail,
                max_ms: tail,
            },
            server_cpu_cores: None,
            client_cpu_cores: None,
            samples_us: vec![],
        }
    }

    pub(crate) fn line(budget: f64, fps: Option<f64>) -> Line {
        Line { budget_ms: Some(budget), fps }
    }

    #[test]
    fn a_step_holds_only_with_p999_and_max_within_budget_and_no_errors() {
        let mut s = step(Some(1.0), 10.0, 20.0, 0);
        assert!(s.holds(20.0) && !s.holds(19.9));
        // One slow frame in a thousand is beyond p99.9 but not beyond the maximum.
        s.latency.max_ms = 35.0;
        assert!(!s.holds(30.0), "the slowest frame decides");
        assert!(!step(Some(1.0), 10.0, 5.0, 1).holds(30.0), "an unanswered frame is an uninspected part");
        s.samples_us = vec![1_000, 29_000, 30_000, 30_001, 90_000];
        s.count_late(30.0);
        assert_eq!(s.late, Some(2), "strictly later than the budget");
    }
}
