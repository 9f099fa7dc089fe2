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

/// How one arrangement of settings did at the line's rate and its multiples.
#[derive(Debug, Clone, Serialize)]
pub struct LineResult {
    /// The server's settings (None: as configured, unknown to the bench).
    pub settings: Option<Settings>,
    /// Whether the step at the line's own rate held the budget.
    pub keeps_up: bool,
    /// The largest multiple of the line's rate that held, counting up from 1x (None: not even 1x).
    pub held_multiple: Option<f64>,
    /// The first multiple that broke the budget (None: all measured multiples held).
    pub broke_multiple: Option<f64>,
    /// p99.9 at the line's rate, ms.
    pub p999_ms: f64,
    /// Slowest answer at the line's rate, ms.
    pub max_ms: f64,
    /// Frames later than the budget at the line's rate.
    pub late: u64,
    /// Frames sent at the line's rate (answered or not).
    pub frames: u64,
}

impl LineResult {
    /// Judge a ladder of steps at multiples of the line's rate (in the order measured).
    pub fn of(steps: &[&Step], budget_ms: f64, settings: Option<Settings>) -> Option<LineResult> {
        let first = steps.iter().find(|s| s.multiple == Some(1.0))?;
        let mut held = None;
        let mut broke = None;
        for s in steps {
            if s.holds(budget_ms) && broke.is_none() {
                held = s.multiple;
            } else if broke.is_none() {
                broke = s.multiple;
            }
        }
        let failed: u64 = first.errors.values().sum();
        Some(LineResult {
            settings,
            keeps_up: first.holds(budget_ms),
            held_multiple: held,
            broke_multiple: broke,
            p999_ms: first.latency.p999_ms,
            max_ms: first.latency.max_ms,
            late: first.late.unwrap_or(0) + failed,
            frames: first.requests,
        })
    }

    /// Order for choosing settings: keeping up first, then the margin, then the tail.
    fn better_than(&self, other: &LineResult) -> bool {
        let key = |r: &LineResult| (r.keeps_up, r.held_multiple.unwrap_or(0.0));
        match key(self).partial_cmp(&key(other)) {
            Some(std::cmp::Ordering::Greater) => true,
            Some(std::cmp::Ordering::Equal) => self.p999_ms < other.p999_ms,
            _ => false,
        }
    }
}

/// The answer to "does this box keep up with the line?".
#[derive(Debug, Clone, Serialize)]
pub struct Verdict {
    /// Whether it keeps up at the line's rate (None: no `--line-fps` to judge against).
    pub keeps_up: Option<bool>,
    /// The settings the verdict is for (the best tried, or the configured ones).
    pub settings: Option<Settings>,
    /// The line steps' result with those settings.
    pub at_line_rate: Option<LineResult>,
    /// Budget minus the slowest answer at the line's rate, ms.
    pub latency_margin_ms: Option<f64>,
    /// Without a line rate: the most frames per second a step took within the budget.
    pub most_fps_within_budget: Option<f64>,
    /// The same, in words, with the caution.
    pub text: String,
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
    pub model_info: serde_json::Value,
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

/// The caution every report carries.
pub const CAUTION: &str = "These figures hold for this machine, this model file and these frames only; \
     re-measure on the target box. lineside assists inspection and does not replace the plant's \
     safety systems or qualified sign-off.";

/// The best of the arrangements tried, if any.
pub fn best_tried(tried: &[LineResult]) -> Option<&LineResult> {
    tried.iter().fold(None, |best: Option<&LineResult>, r| match best {
        Some(b) if !r.better_than(b) => Some(b),
        _ => Some(r),
    })
}

/// Judge the run: the configured settings' line steps, or the best arrangement tried when it
/// does better; without a line rate, the most frames per second within the budget.
pub fn judge(steps: &[Step], tried: &[LineResult], configured: Option<Settings>, line: Line) -> Verdict {
    let configured_settings = configured.clone();
    let none = |text: String| Verdict {
        keeps_up: None,
        settings: configured_settings.clone(),
        at_line_rate: None,
        latency_margin_ms: None,
        most_fps_within_budget: None,
        text: format!("{text} {CAUTION}"),
    };
    let Some(budget) = line.budget_ms else {
        return none(
            "No budget given: give --budget-ms (the line's time per frame) and --line-fps (the frames \
             per second it sends) to judge whether this box keeps up."
                .into(),
        );
    };
    let Some(fps) = line.fps else {
        let best = steps.iter().filter(|s| s.holds(budget)).max_by(|a, b| a.throughput.total_cmp(&b.throughput));
        let mut v = none(match best {
            Some(s) => format!(
                "Within the {budget} ms budget (p99.9 and maximum, every frame answered), this box took up to \
                 {:.1} frames/s (step {}). Give --line-fps to judge it against the line's rate.",
                s.throughput,
                s.name()
            ),
            None => format!(
                "No step answered every frame within the {budget} ms budget (p99.9 and maximum). Try fewer \
                 frames in flight, lanes = 1 with lane_threads = cores (lower latency per frame on larger \
                 models), a smaller model or a faster box."
            ),
        });
        v.most_fps_within_budget = best.map(|s| s.throughput);
        return v;
    };
    let ladder: Vec<&Step> = steps.iter().filter(|s| s.multiple.is_some()).collect();
    let configured_result = LineResult::of(&ladder, budget, configured);
    let chosen = match (best_tried(tried), configured_result) {
        (Some(t), Some(c)) if !t.better_than(&c) => c,
        (Some(t), _) => t.clone(),
        (None, Some(c)) => c,
        (None, None) => return none("No step ran at the line's rate.".into()),
    };
    let text = line_text(&chosen, budget, fps);
    Verdict {
        keeps_up: Some(chosen.keeps_up),
        settings: chosen.settings.clone(),
        latency_margin_ms: Some(budget - chosen.max_ms),
        at_line_rate: Some(chosen),
        most_fps_within_budget: None,
        text: format!("{text} {CAUTION}"),
    }
}

/// The verdict in words.
fn line_text(r: &LineResult, budget: f64, fps: f64) -> String {
    let with = r.settings.as_ref().map_or_else(|| "the server's settings".into(), |s| s.to_string());
    let mut t = if r.keeps_up {
        format!(
            "Keeps up, with {with}: at the line's {fps} frames/s every frame was answered within the {budget} ms \
             budget (p99.9 {:.1} ms, slowest {:.1} ms: {:.1} ms to spare).",
            r.p999_ms,
            r.max_ms,
            budget - r.max_ms
        )
    } else {
        let share = if r.frames > 0 { 100.0 * r.late as f64 / r.frames as f64 } else { 0.0 };
        format!(
            "Does not keep up, with {with}: at the line's {fps} frames/s, {} of {} frames ({share:.2}%) were late \
             or unanswered against the {budget} ms budget (p99.9 {:.1} ms, slowest {:.1} ms). Each late frame \
             is an uninspected part.",
            r.late, r.frames, r.p999_ms, r.max_ms
        )
    };
    match (r.keeps_up, r.held_multiple, r.broke_multiple) {
        (true, Some(h), Some(b)) => {
            let _ = write!(t, " Margin: the budget held up to {h}x the line's rate and broke at {b}x.");
            if h < 1.5 {
                t.push_str(" That margin is thin: a burst or a busier neighbour on the box can make frames late.");
            }
        }
        (true, Some(h), None) => {
            let _ = write!(t, " Margin: the budget held at every rate measured, up to {h}x the line's.");
        }
        _ => t.push_str(
            " Try --try-settings, fewer frames in flight, lanes = 1 with lane_threads = cores (lower latency per \
             frame on larger models), a smaller model or a faster box.",
        ),
    }
    t
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
    let served = (run.model_info["engine"].as_str(), run.model_info["stacked_passes"].as_bool());
    if let (Some(engine), Some(stacked)) = served {
        let _ = writeln!(t, "served by: {engine} ({})", how(stacked));
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

    fn line(budget: f64, fps: Option<f64>) -> Line {
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

    #[test]
    fn the_verdict_reads_the_line_steps_and_the_margin() {
        // Held at 1x, 1.5x and 2x; broke at 3x.
        let steps = [
            step(Some(1.0), 10.0, 8.0, 0),
            step(Some(1.5), 15.0, 12.0, 0),
            step(Some(2.0), 20.0, 25.0, 0),
            step(Some(3.0), 28.0, 90.0, 0),
        ];
        let v = judge(&steps, &[], None, line(30.0, Some(10.0)));
        assert_eq!(v.keeps_up, Some(true));
        let r = v.at_line_rate.as_ref().unwrap();
        assert_eq!((r.held_multiple, r.broke_multiple), (Some(2.0), Some(3.0)));
        assert_eq!(v.latency_margin_ms, Some(22.0));
        assert!(v.text.starts_with("Keeps up") && v.text.contains("held up to 2x"), "{}", v.text);
        assert!(v.text.contains("this machine"), "{}", v.text);
        // Too slow at the line's own rate.
        let slow = [step(Some(1.0), 10.0, 45.0, 0)];
        let v = judge(&slow, &[], None, line(30.0, Some(10.0)));
        assert_eq!(v.keeps_up, Some(false));
        assert!(v.text.starts_with("Does not keep up") && v.text.contains("uninspected"), "{}", v.text);
        // A thin margin is called thin.
        let thin = [step(Some(1.0), 10.0, 8.0, 0), step(Some(1.5), 15.0, 40.0, 0)];
        assert!(judge(&thin, &[], None, line(30.0, Some(10.0))).text.contains("thin"));
    }

    #[test]
    fn without_a_line_rate_the_verdict_gives_the_most_frames_within_budget() {
        let steps = [step(None, 100.0, 5.0, 0), step(None, 300.0, 20.0, 0), step(None, 400.0, 35.0, 0)];
        let v = judge(&steps, &[], None, line(30.0, None));
        assert_eq!((v.keeps_up, v.most_fps_within_budget), (None, Some(300.0)));
        let v = judge(&steps, &[], None, Line { budget_ms: None, fps: None });
        assert!(v.text.contains("--budget-ms"), "{}", v.text);
    }

    #[test]
    fn tried_settings_win_only_when_they_do_better() {
        let settings = |lanes| Settings { batch_cap: 1, gather_us: 0, lanes, lane_threads: 1, http_threads: None };
        let result = |lanes, keeps_up, held: Option<f64>, p999| LineResult {
            settings: Some(settings(lanes)),
            keeps_up,
            held_multiple: held,
            broke_multiple: None,
            p999_ms: p999,
            max_ms: p999,
            late: 0,
            frames: 100,
        };
        let tried = [result(1, true, Some(1.5), 9.0), result(2, true, Some(3.0), 12.0), result(3, false, None, 1.0)];
        assert_eq!(best_tried(&tried).and_then(|r| r.settings.as_ref()).map(|s| s.lanes), Some(2));
        // Same margin: the shorter tail wins.
        let tie = [result(1, true, Some(3.0), 9.0), result(2, true, Some(3.0), 12.0)];
        assert_eq!(best_tried(&tie).and_then(|r| r.settings.as_ref()).map(|s| s.lanes), Some(1));
        let steps = [step(Some(1.0), 10.0, 8.0, 0), step(Some(1.5), 15.0, 40.0, 0)];
        let v = judge(&steps, &tried, None, line(30.0, Some(10.0)));
        assert_eq!(v.settings.map(|s| s.lanes), Some(2), "{}", v.text);
    }
}
