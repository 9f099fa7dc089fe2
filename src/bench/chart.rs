//! The bench's pictures: for each step, the share of frames slower than each latency (log
//! scale, so the one frame in a thousand stays visible) with the line's budget marked; as SVG,
//! or inside a self-contained HTML page with the verdict and the table.

use plotters::prelude::*;

use super::report::{self, Run};

type DrawResult = Result<(), Box<dyn std::error::Error>>;

/// Points of the slower-than curve: (latency ms, share of frames that took at least that
/// long), from every frame down to the slowest one alone (1 in `n`), the shares spaced evenly
/// on the log scale. The curve ends at the slowest frame's latency, so a single late frame
/// is drawn where it happened.
pub fn slower_than(samples_us: &[u64]) -> Vec<(f64, f64)> {
    let n = samples_us.len();
    if n == 0 {
        return Vec::new();
    }
    let mut sorted = samples_us.to_vec();
    sorted.sort_unstable();
    let points = 120;
    let mut out: Vec<(f64, f64)> = Vec::with_capacity(points + 1);
    for i in 0..=points {
        // k frames of n are at least as slow as the k-th slowest one.
        let share = (1.0 / n as f64).powf(i as f64 / points as f64);
        let k = ((share * n as f64).round() as usize).clamp(1, n);
        let p = (sorted[n - k] as f64 / 1e3, k as f64 / n as f64);
        if out.last() != Some(&p) {
            out.push(p);
        }
    }
    out
}

/// The chart as one SVG document.
///
/// # Errors
/// When plotting fails (a bug, not a user error).
pub fn svg(run: &Run) -> anyhow::Result<String> {
    let mut out = String::new();
    {
        let root = SVGBackend::with_string(&mut out, (900, 460)).into_drawing_area();
        root.fill(&WHITE).map_err(|e| anyhow::anyhow!("{e}"))?;
        draw_slower_than(run, &root).map_err(|e| anyhow::anyhow!("latency chart: {e}"))?;
        root.present().map_err(|e| anyhow::anyhow!("{e}"))?;
    }
    Ok(out)
}

fn draw_slower_than(run: &Run, area: &DrawingArea<SVGBackend<'_>, plotters::coord::Shift>) -> DrawResult {
    let curves: Vec<(String, Vec<(f64, f64)>)> =
        run.steps.iter().filter(|s| !s.samples_us.is_empty()).map(|s| (s.name(), slower_than(&s.samples_us))).collect();
    let budget = run.line.budget_ms;
    // Wide enough for the slowest frame of any step, late or not, and the budget.
    let slowest = curves.iter().flat_map(|c| c.1.iter().map(|p| p.0)).fold(1.0, f64::max);
    let xmax = slowest.max(budget.unwrap_or(0.0)) * 1.08;
    let ymin = curves.iter().flat_map(|c| c.1.iter().map(|p| p.1)).fold(1.0, f64::min).min(1e-3) * 0.8;
    let mut c = ChartBuilder::on(area)
        .caption(format!("{}: share of frames slower than each latency", run.model), ("sans-serif", 18))
        .margin(12)
        .x_label_area_size(40)
        .y_label_area_size(70)
        .build_cartesian_2d(0.0..xmax, (ymin..1.0).log_scale())?;
    c.configure_mesh()
        .x_desc("latency, arrival to answer, ms")
        .y_desc("share of frames this slow or slower")
        .y_label_formatter(&|v| format!("{}%", trim(v * 100.0)))
        .draw()?;
    if let Some(b) = budget {
        let budget_style = BLACK.stroke_width(3);
        c.draw_series(LineSeries::new([(b, ymin), (b, 1.0)], budget_style))?
            .label(format!("budget {b} ms: frames right of it are late"))
            .legend(move |(x, y)| PathElement::new([(x, y), (x + 16, y)], budget_style));
    }
    for (i, (name, pts)) in curves.iter().enumerate() {
        let color = STEP_COLOURS[i % STEP_COLOURS.len()];
        let step = run.steps.iter().find(|s| &s.name() == name);
        let late = step.and_then(|s| s.late).map_or_else(String::new, |l| format!(", {l} late"));
        c.draw_series(LineSeries::new(pts.clone(), color.stroke_width(2)))?
            .label(format!("{name}{late}"))
            .legend(move |(x, y)| PathElement::new([(x, y), (x + 16, y)], color));
    }
    // Upper right: the curves start at the upper left and their tails (the late frames) run
    // along the bottom; the upper right is the one corner they leave empty.
    c.configure_series_labels()
        .position(SeriesLabelPosition::UpperRight)
        .border_style(BLACK)
        .background_style(WHITE.mix(0.9))
        .draw()?;
    Ok(())
}

/// Step colours, none of them black (the budget's): a colour-blind-safe set (common practice).
const STEP_COLOURS: [RGBColor; 6] = [
    RGBColor(0, 114, 178),
    RGBColor(230, 159, 0),
    RGBColor(0, 158, 115),
    RGBColor(204, 121, 167),
    RGBColor(86, 180, 233),
    RGBColor(213, 94, 0),
];

/// A percentage without trailing zeros: 10, 1, 0.1, 0.01.
fn trim(pct: f64) -> String {
    let s = format!("{pct:.4}");
    s.trim_end_matches('0').trim_end_matches('.').to_string()
}

/// A self-contained HTML page: the verdict, the table and the chart inline (no scripts, no
/// external resources).
///
/// # Errors
/// As [`svg`].
pub fn html(run: &Run) -> anyhow::Result<String> {
    let esc = |s: &str| s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;");
    let chart = svg(run)?;
    let line = match (run.line.budget_ms, run.line.fps) {
        (Some(b), Some(f)) => format!("the line: {f} frames/s, {b} ms per frame"),
        (Some(b), None) => format!("budget {b} ms per frame"),
        _ => "no budget given".into(),
    };
    let tried = if run.tried.is_empty() {
        String::new()
    } else {
        let rows: String = run.tried.iter().map(|r| format!("<li>{}</li>", esc(&report::tried_line(r)))).collect();
        format!("<h2>Settings tried</h2>\n<ul>{rows}</ul>\n")
    };
    Ok(format!(
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head><meta charset=\"utf-8\"><title>lineside bench: {model}</title>\n\
         <style>body{{font-family:sans-serif;max-width:960px;margin:2em auto}}pre{{background:#f4f4f4;padding:1em;overflow-x:auto}}</style>\n\
         </head>\n<body>\n<h1>lineside bench: {model}</h1>\n<p>{machine} ({cores} cores; {simd}); lineside {version}; \
         {warm} s warm-up and {dur} s per step; {line}.</p>\n<h2>Does this box keep up with the line?</h2>\n<p>{verdict}</p>\n\
         {tried}<h2>Steps</h2>\n<pre>{table}</pre>\n<h2>Late frames</h2>\n{chart}\n</body>\n</html>\n",
        model = esc(&run.model),
        machine = esc(&run.machine.cpu),
        cores = run.machine.cores,
        simd = esc(&run.machine.simd.join(" ")),
        version = esc(&run.lineside_version),
        warm = run.warmup_s,
        dur = run.duration_s,
        line = esc(&line),
        verdict = esc(&run.verdict.text),
        table = esc(&report::table(run)),
        chart = chart.trim_start_matches(|c| c != '<'),
    ))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::bench::Machine;
    use crate::bench::report::{CAUTION, Line, judge, tests::step};

    #[test]
    fn the_slower_than_curve_falls_from_all_frames_to_the_slowest_alone() {
        // 1..=1000 ms, shuffled: every frame took at least 1 ms, 100 of them (10%) at least
        // 901 ms, and the slowest alone (0.1%) 1000 ms: the curve ends there.
        let mut samples: Vec<u64> = (1..=1000).map(|ms| ms * 1000).collect();
        samples.reverse();
        let pts = slower_than(&samples);
        assert_eq!(pts[0], (1.0, 1.0));
        assert_eq!(*pts.last().unwrap(), (1000.0, 0.001));
        assert!(pts.windows(2).all(|w| w[0].0 <= w[1].0 && w[0].1 > w[1].1), "latency rises as the share falls");
        let at_10 = pts.iter().find(|p| (p.1 - 0.1).abs() < 0.004).expect("a point near 10%");
        assert_eq!(at_10.0, 1000.0 - (at_10.1 * 1000.0).round() + 1.0, "{at_10:?}");
        // One late frame among fast ones shows at its own latency.
        let mut one_late = vec![5_000u64; 999];
        one_late.push(37_760);
        assert_eq!(*slower_than(&one_late).last().unwrap(), (37.76, 0.001));
        assert!(slower_than(&[]).is_empty());
    }

    #[test]
    fn the_page_has_the_verdict_the_budget_and_no_scripts() {
        let mut steps = vec![step(Some(1.0), 10.0, 8.0, 0), step(Some(1.5), 15.0, 40.0, 0)];
        for s in &mut steps {
            s.samples_us = (1..=500).map(|v| v * 70).collect();
            s.count_late(30.0);
        }
        let line = Line { budget_ms: Some(30.0), fps: Some(10.0) };
        let run = Run {
            lineside_version: "0".into(),
            unix_time: 0,
            machine: Machine::this(),
            url: String::new(),
            model: "m".into(),
            model_info: None,
            config: None,
            frames: vec![],
            warmup_s: 0.0,
            duration_s: 1.0,
            line,
            verdict: judge(&steps, &[], None, line),
            steps,
            engine: None,
            serving_ratio: None,
            tried: vec![],
            caution: CAUTION.into(),
        };
        let svg = svg(&run).unwrap();
        assert!(svg.starts_with("<svg") && svg.trim_end().ends_with("</svg>"));
        for text in ["budget 30 ms", "1x (10/s)", "1.5x (15/s)", "72 late", "share of frames slower"] {
            assert!(svg.contains(text), "the chart lacks {text:?}");
        }
        let page = html(&run).unwrap();
        assert!(page.contains("Does this box keep up with the line?") && page.contains("<svg"));
        assert!(!page.contains("<script"));
    }
}
