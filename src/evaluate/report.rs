//! What `evaluate` writes: the JSON document (`--json`), the terminal text, the baseline for
//! drift monitoring (`--baseline-out`) and the copies of wrong frames (`--misclassified`).

use std::fmt::Write as _;
use std::path::Path;

use anyhow::Context as _;
use serde::Serialize;

use super::Failure;
use super::summary::{Comparison, Prediction, Suggestion, Summary};

/// Which model was evaluated.
#[derive(Debug, Clone, Serialize)]
pub struct ModelId {
    /// Its configured name.
    pub model: String,
    /// Its version (the ONNX file's digest prefix unless configured).
    pub version: String,
    /// The engine that ran it.
    pub engine: String,
}

/// The whole evaluation, as `--json` writes it.
#[derive(Debug, Clone, Serialize)]
pub struct Document {
    /// The model.
    #[serde(flatten)]
    pub id: ModelId,
    /// The set's path as given.
    pub set: String,
    /// Its figures.
    #[serde(flatten)]
    pub summary: Summary,
    /// Frames that could not be scored.
    pub failed: Vec<Failure>,
    /// Classes with no frame in the set.
    pub absent: Vec<String>,
    /// The `--target-error` conclusion.
    pub suggestion: Option<Suggestion>,
    /// Every scored frame.
    pub predictions: Vec<Prediction>,
    /// The candidate (`--against`).
    pub against: Option<Against>,
}

/// A candidate's figures on the same frames, and the comparison.
#[derive(Debug, Clone, Serialize)]
pub struct Against {
    /// The candidate.
    #[serde(flatten)]
    pub id: ModelId,
    /// Its figures.
    #[serde(flatten)]
    pub summary: Summary,
    /// Agreement, discordant counts, McNemar's p, the frames where they disagree.
    #[serde(flatten)]
    pub comparison: Comparison,
}

fn pct(x: f64) -> String {
    format!("{:.1}%", x * 100.0)
}

/// The terminal text.
pub fn render(doc: &Document) -> String {
    let mut o = String::new();
    let s = &doc.summary;
    let _ = writeln!(
        o,
        "{} {} ({}) on {}: {} frames evaluated, {} failed",
        doc.id.model,
        doc.id.version,
        doc.id.engine,
        doc.set,
        s.frames,
        doc.failed.len()
    );
    if s.frames == 0 {
        let _ = writeln!(o, "  no frame was scored: nothing to report but the failures below");
    } else {
        figures(&mut o, s);
        trade_off(&mut o, s);
        if let Some(v) = &s.verdicts {
            verdict_lines(&mut o, v);
        }
    }
    if !doc.absent.is_empty() {
        let _ = writeln!(o, "  absent from the set (no frames): {}", doc.absent.join(", "));
    }
    if let Some(sug) = &doc.suggestion {
        let _ = writeln!(o, "  target error {}: {}", pct(sug.target_error), sug.statement);
    }
    if let Some(a) = &doc.against {
        let c = &a.comparison;
        let _ = writeln!(
            o,
            "\nagainst {} {} ({}) on the same {} frames:",
            a.id.model, a.id.version, a.id.engine, c.compared
        );
        figures(&mut o, &a.summary);
        let _ = writeln!(
            o,
            "  agreement {}; only {} right: {}, only the candidate right: {}; McNemar exact p = {:.4}",
            pct(c.agreement),
            doc.id.model,
            c.only_model_right,
            c.only_candidate_right,
            c.mcnemar_p
        );
        for d in c.disagreements.iter().take(20) {
            let _ = writeln!(
                o,
                "    {} (truth {}): {} {:.3} vs {} {:.3}",
                d.file, d.truth, d.label, d.score, d.against_label, d.against_score
            );
        }
        if c.disagreements.len() > 20 {
            let _ = writeln!(o, "    ... {} more in the JSON", c.disagreements.len() - 20);
        }
    }
    if !doc.failed.is_empty() {
        let _ = writeln!(o, "\nfailed frames ({}):", doc.failed.len());
        for f in doc.failed.iter().take(20) {
            let _ = writeln!(o, "  {}: {}: {}", f.file, f.kind, f.message);
        }
        if doc.failed.len() > 20 {
            let _ = writeln!(o, "  ... {} more in the JSON", doc.failed.len() - 20);
        }
    }
    o
}

fn figures(o: &mut String, s: &Summary) {
    let a = &s.accuracy_interval;
    let tops: Vec<String> = s.top_k.iter().map(|(k, v)| format!("{} {:.4}", k.replace('_', "-"), v)).collect();
    let _ = writeln!(
        o,
        "  accuracy {:.4} (95% CI {:.4}-{:.4}), balanced accuracy {:.4}{}{}",
        s.accuracy,
        a.low,
        a.high,
        s.balanced_accuracy,
        if tops.is_empty() { String::new() } else { format!(", {}", tops.join(", ")) },
        match s.ece {
            Some(e) => format!(", ECE {e:.4} (15 bins)"),
            None => ", ECE n/a (scores are not softmax)".into(),
        }
    );
    let w = s.confusion.labels.iter().map(String::len).max().unwrap_or(5).max(12);
    let _ = writeln!(o, "  {:<w$} precision  recall (95% CI)          f1  support", "class");
    for c in &s.per_class {
        let _ = writeln!(
            o,
            "  {:<w$} {:>9.4}  {:.4} ({:.3}-{:.3}) {:>8.4} {:>8}",
            c.label, c.precision, c.recall, c.recall_interval[0], c.recall_interval[1], c.f1, c.support
        );
    }
    for (name, v) in [("macro avg", s.macro_avg), ("weighted avg", s.weighted_avg)] {
        let _ = writeln!(o, "  {name:<w$} {:>9.4}  {:.4}{:>24.4} {:>8}", v.precision, v.recall, v.f1, s.frames);
    }
    let _ = writeln!(o, "  confusion (rows true, columns predicted):");
    let cw = s.confusion.labels.iter().map(String::len).max().unwrap_or(4).max(4);
    let _ = write!(o, "  {:<w$}", "");
    for l in &s.confusion.labels {
        let _ = write!(o, " {l:>cw$}");
    }
    let _ = writeln!(o);
    for (l, row) in s.confusion.labels.iter().zip(&s.confusion.matrix) {
        let _ = write!(o, "  {l:<w$}");
        for v in row {
            let _ = write!(o, " {v:>cw$}");
        }
        let _ = writeln!(o);
    }
}

/// The trade-off rows the text and the page show (hundredths of min_score).
pub(crate) const SHOWN_THRESHOLDS: [usize; 7] = [50, 60, 70, 80, 90, 95, 99];

fn trade_off(o: &mut String, s: &Summary) {
    let _ = writeln!(o, "  threshold trade-off (top score below min_score goes to review):");
    for t in SHOWN_THRESHOLDS {
        let p = &s.thresholds[t];
        let _ = writeln!(
            o,
            "    min_score {:.2}: review {:>6}, residual error {:>6} ({} frames kept)",
            p.min_score,
            pct(p.review),
            pct(p.residual_error),
            p.kept
        );
    }
}

fn verdict_lines(o: &mut String, v: &crate::evaluate::verdicts::VerdictFigures) {
    let share = |p: &crate::evaluate::stats::Proportion| {
        format!("{} of {} ({}, 95% CI {}-{})", p.k, p.n, pct(p.rate), pct(p.low), pct(p.high))
    };
    let at = v
        .min_score
        .map_or_else(|| "min_score not set: nothing goes to review".to_owned(), |m| format!("at min_score {m:.4}"));
    let _ = writeln!(o, "  line verdicts ({at}):");
    let _ = writeln!(o, "    escapes (defective parts let pass):  {}", share(&v.escapes));
    let _ = writeln!(o, "    overkill (good parts stopped):       {}", share(&v.overkill));
    let _ = writeln!(o, "    held for review:                     {}", share(&v.review));
    let _ = writeln!(o, "    verdict trade-off (escape rate, overkill rate, review rate):");
    for t in SHOWN_THRESHOLDS {
        let p = &v.thresholds[t];
        let _ = writeln!(
            o,
            "      min_score {:.2}: escapes {:>6}, overkill {:>6}, review {:>6}",
            p.min_score,
            pct(p.escape_rate),
            pct(p.overkill_rate),
            pct(p.review_rate)
        );
    }
}

/// The baseline file's format version (`--baseline-out`); see docs/evaluate.md.
pub const BASELINE_VERSION: u32 = 1;

/// What live frames will be compared with: the model, the share of each predicted label and
/// the histogram of top scores on the evaluation set.
#[derive(Debug, Clone, Serialize)]
pub struct Baseline {
    /// Always "lineside-baseline".
    pub format: &'static str,
    /// [`BASELINE_VERSION`] (`version` is the model's).
    pub format_version: u32,
    /// The model it describes.
    #[serde(flatten)]
    pub id: ModelId,
    /// The set it was measured on.
    pub set: String,
    /// Frames it was measured on.
    pub frames: u64,
    /// Labels, labels-file order.
    pub labels: Vec<String>,
    /// Share of frames predicted as each label (same order).
    pub label_shares: Vec<f64>,
    /// Top-score histogram: 20 equal bins of [0, 1], right-closed, 0 in the first.
    pub top_score_edges: Vec<f64>,
    /// Frames in each bin.
    pub top_score_counts: Vec<u64>,
}

impl Baseline {
    /// The baseline of `doc`.
    pub fn of(doc: &Document) -> Baseline {
        let labels = doc.summary.confusion.labels.clone();
        let n = doc.predictions.len().max(1) as f64;
        let label_shares =
            labels.iter().map(|l| doc.predictions.iter().filter(|p| &p.label == l).count() as f64 / n).collect();
        let mut counts = vec![0u64; 20];
        for p in &doc.predictions {
            counts[super::stats::right_closed_bin(f64::from(p.score).clamp(0.0, 1.0), 20)] += 1;
        }
        Baseline {
            format: "lineside-baseline",
            format_version: BASELINE_VERSION,
            id: doc.id.clone(),
            set: doc.set.clone(),
            frames: doc.summary.frames,
            labels,
            label_shares,
            top_score_edges: (0..=20).map(|i| f64::from(i) / 20.0).collect(),
            top_score_counts: counts,
        }
    }
}

/// Write `value` as pretty JSON to `path`.
///
/// # Errors
/// The file cannot be written.
pub fn write_json(path: &Path, value: &impl Serialize) -> anyhow::Result<()> {
    let text = serde_json::to_string_pretty(value).context("internal: the report does not serialise")?;
    std::fs::write(path, text + "\n").with_context(|| format!("cannot write {}", path.display()))
}

/// Copy every wrong frame to `out/<true>/<predicted>/`, its name the set-relative path with
/// the path separators turned into `__` (so frames of sub-folders cannot collide); labels and
/// names are made safe as single path components, and a name already taken gets `-2`, `-3`,
/// ... before its extension. Returns how many were copied.
///
/// # Errors
/// A folder cannot be created or a frame copied.
pub fn copy_misclassified(root: &Path, preds: &[Prediction], out: &Path) -> anyhow::Result<usize> {
    let base = super::dataset::base_of(root);
    let mut n = 0;
    for p in preds.iter().filter(|p| !p.right()) {
        let dir = out.join(component(&p.truth)).join(component(&p.label));
        std::fs::create_dir_all(&dir).with_context(|| format!("cannot create {}", dir.display()))?;
        let from = base.join(&p.file);
        let name = component(&p.file.replace(['/', '\\'], "__"));
        let mut to = dir.join(&name);
        let (stem, ext) = name.rsplit_once('.').map_or((name.as_str(), ""), |(s, e)| (s, e));
        for k in 2.. {
            if !to.exists() {
                break;
            }
            to = dir.join(if ext.is_empty() { format!("{stem}-{k}") } else { format!("{stem}-{k}.{ext}") });
        }
        std::fs::copy(&from, &to).with_context(|| format!("cannot copy {} to {}", from.display(), to.display()))?;
        n += 1;
    }
    Ok(n)
}

/// `s` as one safe path component: separators and characters outside letters, digits and
/// `-_.+=,@` replaced by `_`, and never `.` or `..`.
fn component(s: &str) -> String {
    let c: String = s.chars().map(|c| if c.is_alphanumeric() || "-_.+=,@".contains(c) { c } else { '_' }).collect();
    match c.as_str() {
        "" | "." | ".." => format!("_{c}"),
        _ => c,
    }
}

#[cfg(test)]
mod tests {
    use super::component;

    #[test]
    fn names_stay_one_component() {
        assert_eq!(component("good"), "good");
        assert_eq!(component("n/a"), "n_a");
        assert_eq!(component(".."), "_..");
        assert_eq!(component("..__..__x.png"), "..__..__x.png");
        assert_eq!(component("a\\b c.png"), "a_b_c.png");
    }
}
