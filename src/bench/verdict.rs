//! The verdict: does this box keep up with the line, with what margin, with which settings.
//!
//! A step holds the budget only when its p99.9 *and* its maximum are within it and every frame
//! was answered (a late frame is an uninspected part). The configured settings are judged on
//! the line's steps; an arrangement `--try-settings` measured wins only when it does better.

use std::fmt::Write as _;

use serde::Serialize;

use super::report::{Line, Settings, Step};

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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::bench::report::tests::{line, step};

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
