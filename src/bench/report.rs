//! What a bench run found, and its forms: the plain table, the JSON, the SVG and HTML charts,
//! and the recommendation.

use std::collections::BTreeMap;
use std::fmt::Write as _;

use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};
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

/// One measured step.
#[derive(Debug, Clone, Serialize)]
pub struct Step {
    /// "closed" or "open".
    pub mode: String,
    /// Clients (closed loop).
    pub concurrency: Option<usize>,
    /// Frames due per second (open loop).
    pub rate: Option<f64>,
    /// Batching settings of the server, when lineside started it.
    pub settings: Option<Settings>,
    /// Requests with an outcome in the window: `ok` + every error.
    pub requests: u64,
    /// Answered 200.
    pub ok: u64,
    /// Failures by kind ("http 503", "connection", ...).
    pub errors: BTreeMap<String, u64>,
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
    /// A short name: "c=4" or "200/s".
    pub fn name(&self) -> String {
        match (self.concurrency, self.rate) {
            (Some(c), _) => format!("c={c}"),
            (_, Some(r)) => format!("{r}/s"),
            _ => "?".into(),
        }
    }

    /// Whether this step kept p99 within `budget_ms` with no errors.
    pub fn within(&self, budget_ms: f64) -> bool {
        self.errors.is_empty() && self.ok > 0 && self.latency.p99_ms <= budget_ms
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

/// One point of the `--tune` grid.
#[derive(Debug, Clone, Serialize)]
pub struct GridPoint {
    /// The server's settings.
    pub settings: Settings,
    /// Best throughput of a step that kept p99 within the budget, if any did.
    pub throughput_at_budget: Option<f64>,
    /// That step's p99.
    pub p99_ms: Option<f64>,
    /// That step's clients.
    pub concurrency: Option<usize>,
}

/// What to run the line with.
#[derive(Debug, Clone, Serialize)]
pub struct Recommendation {
    /// Settings (the configured ones, or the grid's best).
    pub settings: Option<Settings>,
    /// Frames per second expected within the p99 budget (None: no step met it).
    pub frames_per_s: Option<f64>,
    /// The p99 at that load.
    pub p99_ms: Option<f64>,
    /// Concurrent frames in flight at that load.
    pub concurrency: Option<usize>,
    /// Budget minus p99, ms.
    pub latency_headroom_ms: Option<f64>,
    /// Frames per second over the line's rate (`--line-rate`), if given.
    pub rate_headroom: Option<f64>,
    /// The same, in words.
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
    /// Warm-up and measured seconds per step.
    pub warmup_s: f64,
    /// Measured seconds per step.
    pub duration_s: f64,
    /// The p99 budget, ms.
    pub p99_budget_ms: f64,
    /// The line's rate, frames per second, if given.
    pub line_rate: Option<f64>,
    /// Closed-loop sweep and open-loop steps with the configured settings.
    pub steps: Vec<Step>,
    /// The engine alone, if measured.
    pub engine: Option<EngineStep>,
    /// Best served throughput over the engine's, if both were measured.
    pub serving_ratio: Option<f64>,
    /// The `--tune` grid.
    pub grid: Vec<GridPoint>,
    /// What to run with.
    pub recommendation: Recommendation,
    /// Figures hold for this machine only.
    pub caution: String,
}

/// The caution every report carries.
pub const CAUTION: &str = "These figures hold for this machine, this model file and these frames only; \
     re-measure on the target box. lineside assists inspection and does not replace the plant's \
     safety systems or qualified sign-off.";

/// The best step within the budget among `steps` (most throughput; ties to fewer clients).
pub fn best_within<'a>(steps: impl IntoIterator<Item = &'a Step>, budget_ms: f64) -> Option<&'a Step> {
    steps.into_iter().filter(|s| s.within(budget_ms)).max_by(|a, b| {
        a.throughput.total_cmp(&b.throughput).then(b.concurrency.unwrap_or(0).cmp(&a.concurrency.unwrap_or(0)))
    })
}

/// The grid point with the most frames/s within the budget, if any stayed within it.
pub fn best_point(grid: &[GridPoint]) -> Option<&GridPoint> {
    grid.iter()
        .filter(|g| g.throughput_at_budget.is_some())
        .max_by(|a, b| a.throughput_at_budget.unwrap_or(0.0).total_cmp(&b.throughput_at_budget.unwrap_or(0.0)))
}

/// The recommendation from the closed-loop steps (or the grid's best point).
pub fn recommend(
    steps: &[Step],
    grid: &[GridPoint],
    configured: Option<Settings>,
    budget_ms: f64,
    line_rate: Option<f64>,
) -> Recommendation {
    let grid_best = best_point(grid);
    let closed = steps.iter().filter(|s| s.concurrency.is_some());
    let (settings, fps, p99, conc) = match (grid_best, best_within(closed, budget_ms)) {
        (Some(g), s) if s.is_none_or(|s| g.throughput_at_budget.unwrap_or(0.0) > s.throughput) => {
            (Some(g.settings.clone()), g.throughput_at_budget, g.p99_ms, g.concurrency)
        }
        (_, Some(s)) => (s.settings.clone().or(configured), Some(s.throughput), Some(s.latency.p99_ms), s.concurrency),
        (_, None) => (configured, None, None, None),
    };
    let latency_headroom_ms = p99.map(|p| budget_ms - p);
    let rate_headroom = fps.zip(line_rate).map(|(f, r)| f / r);
    let text = match (fps, p99) {
        (Some(f), Some(p)) => {
            let mut t = format!(
                "Run with {}: about {f:.1} frames/s with p99 {p:.1} ms, within the {budget_ms} ms budget \
                 ({:.1} ms to spare), with {}.",
                settings.as_ref().map_or_else(|| "the server's settings".into(), |s| s.to_string()),
                budget_ms - p,
                match conc {
                    Some(1) => "one frame in flight at a time".to_string(),
                    Some(c) => format!("{c} frames in flight"),
                    None => "the open-loop rate".to_string(),
                }
            );
            if let (Some(r), Some(h)) = (line_rate, rate_headroom) {
                let verdict = if h >= 1.5 {
                    "comfortable"
                } else if h >= 1.0 {
                    "thin: a burst or a busier neighbour on the box can push p99 over"
                } else {
                    "not enough: this box cannot keep up with the line at this budget"
                };
                let _ = write!(t, " The line needs {r} frames/s: {h:.2}x headroom ({verdict}).");
            }
            t
        }
        _ => format!(
            "No step kept p99 within {budget_ms} ms without errors. Try fewer frames in flight, \
             lane_threads = cores with lanes = 1 (lower latency per frame on larger models), a \
             smaller model, or a faster box."
        ),
    };
    Recommendation {
        settings,
        frames_per_s: fps,
        p99_ms: p99,
        concurrency: conc,
        latency_headroom_ms,
        rate_headroom,
        text: format!("{text} {CAUTION}"),
    }
}

/// The plain table of the steps (and the engine and grid, if measured).
pub fn table(run: &Run) -> String {
    let mut t = String::new();
    let _ = writeln!(
        t,
        "{:<10} {:>9} {:>8} {:>8} {:>8} {:>8} {:>8} {:>8} {:>7} {:>10} {:>10}",
        "step", "frames/s", "p50 ms", "p90 ms", "p99 ms", "p99.9", "max ms", "ok", "errors", "server cpu", "client cpu"
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
            "{:<10} {:>9.1} {:>8.2} {:>8.2} {:>8.2} {:>8.2} {:>8.2} {:>8} {:>7} {:>10} {:>10}",
            s.name(),
            s.throughput,
            s.latency.p50_ms,
            s.latency.p90_ms,
            s.latency.p99_ms,
            s.latency.p999_ms,
            s.latency.max_ms,
            s.ok,
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
    if !run.grid.is_empty() {
        let _ = writeln!(t, "tuning grid (best frames/s with p99 <= {} ms):", run.p99_budget_ms);
        for g in &run.grid {
            let v = g.throughput_at_budget.map_or_else(
                || "none within budget".into(),
                |f| {
                    format!("{f:.1} frames/s (p99 {:.1} ms, c={})", g.p99_ms.unwrap_or(0.0), g.concurrency.unwrap_or(0))
                },
            );
            let _ = writeln!(t, "  {}: {v}", g.settings);
        }
    }
    t
}

/// Quantiles drawn in the latency-distribution chart: 0 to 99.99%, denser in the tail.
pub const CURVE_QUANTILES: [f64; 12] = [0.0, 0.25, 0.5, 0.75, 0.9, 0.95, 0.99, 0.995, 0.999, 0.9995, 0.9999, 1.0];

type DrawResult = Result<(), Box<dyn std::error::Error>>;

/// The charts as one SVG document: throughput against p99 over the sweep, the latency
/// distribution of each step, and (after `--tune`) the grid as a heatmap.
///
/// # Errors
/// When plotting fails (a bug, not a user error).
pub fn svg(run: &Run) -> anyhow::Result<String> {
    let panels = if run.grid.is_empty() { 2 } else { 3 };
    let mut out = String::new();
    {
        let root = SVGBackend::with_string(&mut out, (900, 380 * panels)).into_drawing_area();
        root.fill(&WHITE).map_err(|e| anyhow::anyhow!("{e}"))?;
        let areas = root.split_evenly((panels as usize, 1));
        draw_curve(run, &areas[0]).map_err(|e| anyhow::anyhow!("throughput chart: {e}"))?;
        draw_distribution(run, &areas[1]).map_err(|e| anyhow::anyhow!("latency chart: {e}"))?;
        if panels == 3 {
            draw_grid(run, &areas[2]).map_err(|e| anyhow::anyhow!("grid chart: {e}"))?;
        }
        root.present().map_err(|e| anyhow::anyhow!("{e}"))?;
    }
    Ok(out)
}

fn draw_curve(run: &Run, area: &DrawingArea<SVGBackend<'_>, plotters::coord::Shift>) -> DrawResult {
    let pts: Vec<(f64, f64, String)> = run
        .steps
        .iter()
        .filter(|s| s.concurrency.is_some() && s.ok > 0)
        .map(|s| (s.throughput, s.latency.p99_ms, s.name()))
        .collect();
    let xmax = pts.iter().map(|p| p.0).fold(1.0, f64::max) * 1.15;
    let ymax = pts.iter().map(|p| p.1).fold(run.p99_budget_ms, f64::max) * 1.15;
    let mut c = ChartBuilder::on(area)
        .caption(format!("{}: throughput vs p99 latency (closed loop)", run.model), ("sans-serif", 18))
        .margin(12)
        .x_label_area_size(40)
        .y_label_area_size(60)
        .build_cartesian_2d(0.0..xmax, 0.0..ymax)?;
    c.configure_mesh().x_desc("answered frames per second").y_desc("p99 latency, ms").draw()?;
    c.draw_series(LineSeries::new([(0.0, run.p99_budget_ms), (xmax, run.p99_budget_ms)], RED.stroke_width(1)))?
        .label(format!("p99 budget {} ms", run.p99_budget_ms))
        .legend(|(x, y)| PathElement::new([(x, y), (x + 16, y)], RED));
    c.draw_series(LineSeries::new(pts.iter().map(|p| (p.0, p.1)), BLUE.stroke_width(2)))?
        .label("closed-loop sweep")
        .legend(|(x, y)| PathElement::new([(x, y), (x + 16, y)], BLUE));
    c.draw_series(pts.iter().map(|p| {
        EmptyElement::at((p.0, p.1))
            + Circle::new((0, 0), 4, BLUE.filled())
            + Text::new(p.2.clone(), (6, -14), ("sans-serif", 12))
    }))?;
    c.configure_series_labels().border_style(BLACK).background_style(WHITE.mix(0.8)).draw()?;
    Ok(())
}

fn draw_distribution(run: &Run, area: &DrawingArea<SVGBackend<'_>, plotters::coord::Shift>) -> DrawResult {
    // x: "nines" = -log10(1 - q), so 0.9 -> 1, 0.99 -> 2, 0.999 -> 3 (the tail spread out).
    let nines = |q: f64| -(1.0 - q).max(1e-4).log10();
    let curves: Vec<(String, Vec<(f64, f64)>)> = run
        .steps
        .iter()
        .filter(|s| !s.samples_us.is_empty())
        .map(|s| {
            let ys = super::quantile_curve(&s.samples_us, &CURVE_QUANTILES);
            (s.name(), CURVE_QUANTILES.iter().map(|&q| nines(q)).zip(ys).collect())
        })
        .collect();
    let ymax = curves.iter().flat_map(|c| c.1.iter().map(|p| p.1)).fold(1.0, f64::max) * 1.1;
    let mut c = ChartBuilder::on(area)
        .caption("latency distribution per step", ("sans-serif", 18))
        .margin(12)
        .x_label_area_size(40)
        .y_label_area_size(60)
        .build_cartesian_2d(0.0..4.0f64, 0.0..ymax)?;
    // Ticks at whole "nines" only: 0%, 90%, 99%, 99.9%, 99.99%.
    c.configure_mesh()
        .x_desc("percentile (the tail spread out)")
        .y_desc("latency, ms")
        .x_labels(5)
        .x_label_formatter(&|x| {
            let n = x.round() as i32;
            if (x - f64::from(n)).abs() > 1e-9 {
                return String::new();
            }
            let pct = 100.0 - 100.0 * 10f64.powi(-n);
            format!("{}%", (pct * 100.0).round() / 100.0)
        })
        .draw()?;
    for (i, (name, pts)) in curves.iter().enumerate() {
        let color = Palette99::pick(i).to_rgba();
        c.draw_series(LineSeries::new(pts.clone(), color.stroke_width(2)))?
            .label(name.clone())
            .legend(move |(x, y)| PathElement::new([(x, y), (x + 16, y)], color));
    }
    c.configure_series_labels().border_style(BLACK).background_style(WHITE.mix(0.8)).draw()?;
    Ok(())
}

fn draw_grid(run: &Run, area: &DrawingArea<SVGBackend<'_>, plotters::coord::Shift>) -> DrawResult {
    // Columns: batch_cap x gather_us; rows: lanes x lane_threads. Colour: frames/s within budget.
    let mut cols: Vec<(usize, u64)> = run.grid.iter().map(|g| (g.settings.batch_cap, g.settings.gather_us)).collect();
    let row_of = |s: &Settings| (s.lanes, s.lane_threads, s.http_threads);
    let mut rows: Vec<(usize, usize, Option<usize>)> = run.grid.iter().map(|g| row_of(&g.settings)).collect();
    if run.grid.is_empty() {
        return Ok(());
    }
    cols.sort_unstable();
    cols.dedup();
    rows.sort_unstable();
    rows.dedup();
    let best = run.grid.iter().filter_map(|g| g.throughput_at_budget).fold(0.0, f64::max).max(1e-9);
    let mut c = ChartBuilder::on(area)
        .caption(format!("tuning grid: frames/s with p99 <= {} ms", run.p99_budget_ms), ("sans-serif", 18))
        .margin(12)
        .x_label_area_size(40)
        .y_label_area_size(110)
        // A segmented 0..n has segments for 0..=n: one fewer keeps the last cell at the edge.
        .build_cartesian_2d((0..cols.len() - 1).into_segmented(), (0..rows.len() - 1).into_segmented())?;
    c.configure_mesh()
        .disable_mesh()
        .x_labels(cols.len())
        .y_labels(rows.len())
        .x_label_formatter(&|v| match v {
            SegmentValue::CenterOf(i) => cols.get(*i).map_or_else(String::new, |(b, g)| format!("cap {b}, {g} us")),
            _ => String::new(),
        })
        .y_label_formatter(&|v| match v {
            SegmentValue::CenterOf(i) => rows.get(*i).map_or_else(String::new, |(l, t, h)| match h {
                Some(h) => format!("{l} lane(s) x {t} thr, http {h}"),
                None => format!("{l} lane(s) x {t} thr"),
            }),
            _ => String::new(),
        })
        .x_desc("batch_cap, gather_us")
        .y_desc("lanes x lane_threads, http_threads")
        .draw()?;
    for g in &run.grid {
        let x = cols.iter().position(|c| *c == (g.settings.batch_cap, g.settings.gather_us)).unwrap_or(0);
        let y = rows.iter().position(|r| *r == row_of(&g.settings)).unwrap_or(0);
        let (fill, label) = match g.throughput_at_budget {
            Some(f) => (shade(f / best).to_rgba(), format!("{f:.0}/s")),
            None => (RGBColor(200, 200, 200).to_rgba(), "over budget".into()),
        };
        let corner = |x: usize, y: usize| (SegmentValue::Exact(x), SegmentValue::Exact(y));
        c.draw_series([Rectangle::new([corner(x, y), corner(x + 1, y + 1)], fill.filled())])?;
        let centre = (SegmentValue::CenterOf(x), SegmentValue::CenterOf(y));
        let style = ("sans-serif", 16).into_font().color(&BLACK).pos(Pos::new(HPos::Center, VPos::Center));
        c.draw_series([Text::new(label, centre, style)])?;
    }
    Ok(())
}

/// Pale yellow (0) to deep green (1).
fn shade(t: f64) -> RGBColor {
    let t = t.clamp(0.0, 1.0);
    let mix = |a: f64, b: f64| (a + (b - a) * t).round() as u8;
    RGBColor(mix(255.0, 26.0), mix(247.0, 152.0), mix(188.0, 80.0))
}

/// A self-contained HTML page: the table, the recommendation and the charts inline (no
/// scripts, no external resources).
///
/// # Errors
/// As [`svg`].
pub fn html(run: &Run) -> anyhow::Result<String> {
    let esc = |s: &str| s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;");
    let chart = svg(run)?;
    Ok(format!(
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head><meta charset=\"utf-8\"><title>lineside bench: {model}</title>\n\
         <style>body{{font-family:sans-serif;max-width:960px;margin:2em auto}}pre{{background:#f4f4f4;padding:1em;overflow-x:auto}}</style>\n\
         </head>\n<body>\n<h1>lineside bench: {model}</h1>\n<p>{machine} ({cores} cores; {simd}); lineside {version}; \
         {warm} s warm-up and {dur} s per step; p99 budget {budget} ms.</p>\n<h2>Recommendation</h2>\n<p>{rec}</p>\n\
         <h2>Steps</h2>\n<pre>{table}</pre>\n<h2>Charts</h2>\n{chart}\n</body>\n</html>\n",
        model = esc(&run.model),
        machine = esc(&run.machine.cpu),
        cores = run.machine.cores,
        simd = esc(&run.machine.simd.join(" ")),
        version = esc(&run.lineside_version),
        warm = run.warmup_s,
        dur = run.duration_s,
        budget = run.p99_budget_ms,
        rec = esc(&run.recommendation.text),
        table = esc(&table(run)),
        chart = chart.trim_start_matches(|c| c != '<'),
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn step(c: usize, fps: f64, p99: f64, errors: u64) -> Step {
        let mut e = BTreeMap::new();
        if errors > 0 {
            e.insert("http 503".into(), errors);
        }
        Step {
            mode: "closed".into(),
            concurrency: Some(c),
            rate: None,
            settings: None,
            requests: 100 + errors,
            ok: 100,
            errors: e,
            throughput: fps,
            duration_s: 1.0,
            latency: Latency {
                count: 100,
                mean_ms: p99 / 2.0,
                p50_ms: p99 / 2.0,
                p90_ms: p99,
                p99_ms: p99,
                p999_ms: p99,
                max_ms: p99,
            },
            server_cpu_cores: None,
            client_cpu_cores: None,
            samples_us: vec![],
        }
    }

    #[test]
    fn charts_are_drawn_for_a_sweep_and_a_one_row_grid() {
        let mut steps = vec![step(1, 100.0, 5.0, 0), step(4, 300.0, 20.0, 0)];
        steps[1].samples_us = (1..=500).map(|v| v * 40).collect();
        let settings = |batch_cap| Settings { batch_cap, gather_us: 0, lanes: 1, lane_threads: 1, http_threads: None };
        let grid = vec![
            GridPoint {
                settings: settings(1),
                throughput_at_budget: Some(90.0),
                p99_ms: Some(9.0),
                concurrency: Some(1),
            },
            GridPoint { settings: settings(8), throughput_at_budget: None, p99_ms: None, concurrency: None },
            // The grid's best point re-run with another HTTP thread count: a row of its own.
            GridPoint {
                settings: Settings { http_threads: Some(2), ..settings(1) },
                throughput_at_budget: Some(120.0),
                p99_ms: Some(8.0),
                concurrency: Some(1),
            },
        ];
        let run = Run {
            lineside_version: "0".into(),
            unix_time: 0,
            machine: Machine::this(),
            url: String::new(),
            model: "m".into(),
            model_info: serde_json::Value::Null,
            config: None,
            frames: vec![],
            warmup_s: 0.0,
            duration_s: 1.0,
            p99_budget_ms: 40.0,
            line_rate: None,
            recommendation: recommend(&steps, &grid, None, 40.0, None),
            steps,
            engine: None,
            serving_ratio: None,
            grid,
            caution: CAUTION.into(),
        };
        let svg = svg(&run).unwrap();
        assert!(svg.starts_with("<svg") && svg.trim_end().ends_with("</svg>"));
        for text in ["c=4", "90/s", "120/s", "over budget", "99.9%", "cap 8, 0 us", "1 lane(s) x 1 thr, http 2"] {
            assert!(svg.contains(text), "the chart lacks {text:?}");
        }
        assert_eq!(run.recommendation.frames_per_s, Some(300.0), "the sweep's best beats the grid's");
        let grid_only = recommend(&[], &run.grid, None, 40.0, None);
        assert_eq!(grid_only.frames_per_s, Some(120.0));
        assert!(grid_only.text.contains("lane_threads = 1, http_threads = 2"), "{}", grid_only.text);
        let page = html(&run).unwrap();
        assert!(page.contains("<svg") && !page.contains("<script"));
    }

    #[test]
    fn the_recommendation_is_the_fastest_step_within_budget_without_errors() {
        let steps =
            [step(1, 100.0, 5.0, 0), step(4, 300.0, 20.0, 0), step(8, 350.0, 45.0, 0), step(16, 400.0, 30.0, 3)];
        let r = recommend(&steps, &[], None, 40.0, Some(150.0));
        assert_eq!(r.concurrency, Some(4));
        assert_eq!(r.frames_per_s, Some(300.0));
        assert_eq!(r.latency_headroom_ms, Some(20.0));
        assert_eq!(r.rate_headroom, Some(2.0));
        assert!(r.text.contains("this machine"), "{}", r.text);
        let none = recommend(&steps, &[], None, 1.0, None);
        assert_eq!(none.frames_per_s, None);
        assert!(none.text.contains("No step kept p99 within 1 ms"), "{}", none.text);
    }
}
