//! What `evaluate` reports, computed from the scored frames: accuracy and its interval,
//! balanced and top-k accuracy, per-class figures, the confusion matrix, calibration, the
//! threshold trade-off, and a candidate's comparison. Pure functions of the predictions; the
//! definitions follow scikit-learn's metrics of the same names (checked against it in
//! tests/it/evaluate.rs).

use serde::Serialize;

use super::stats::{self, Bin, Proportion};

/// One scored frame.
#[derive(Debug, Clone, Serialize)]
pub struct Prediction {
    /// The frame, relative to the set.
    pub file: String,
    /// Its true label.
    pub truth: String,
    /// The top label.
    pub label: String,
    /// The top score.
    pub score: f32,
    /// Every label's score, in labels-file order (what `POST /classify?top=all` answers).
    pub scores: Vec<f32>,
    #[serde(skip)]
    pub(crate) truth_index: usize,
    #[serde(skip)]
    pub(crate) label_index: usize,
}

impl Prediction {
    /// A frame's prediction from its scores (the top label is the highest score; the first
    /// such label on a tie, as the server's answer orders them).
    pub fn new(file: String, truth_index: usize, scores: Vec<f32>, labels: &[String]) -> Prediction {
        let label_index = top_order(&scores)[0];
        Prediction {
            file,
            truth: labels[truth_index].clone(),
            label: labels[label_index].clone(),
            score: scores[label_index],
            scores,
            truth_index,
            label_index,
        }
    }

    /// Whether the top label is the true one.
    pub fn right(&self) -> bool {
        self.truth_index == self.label_index
    }
}

/// Label indices by score, highest first, ties in label order.
pub fn top_order(scores: &[f32]) -> Vec<usize> {
    let mut order: Vec<usize> = (0..scores.len()).collect();
    order.sort_by(|&a, &b| scores[b].total_cmp(&scores[a]).then(a.cmp(&b)));
    order
}

/// One class's figures.
#[derive(Debug, Clone, Serialize)]
pub struct ClassFigures {
    /// The label.
    pub label: String,
    /// Right among the frames predicted as it (0 when none were).
    pub precision: f64,
    /// Right among its frames (0 when it has none).
    pub recall: f64,
    /// 95% Clopper–Pearson interval of the recall.
    pub recall_interval: [f64; 2],
    /// Harmonic mean of precision and recall (0 when both are 0).
    pub f1: f64,
    /// Its frames in the set.
    pub support: u64,
}

/// Precision, recall and F1 averaged over classes.
#[derive(Debug, Clone, Copy, Serialize)]
pub struct Averages {
    /// Precision.
    pub precision: f64,
    /// Recall.
    pub recall: f64,
    /// F1.
    pub f1: f64,
}

/// The confusion matrix: `matrix[true][predicted]`, labels-file order.
#[derive(Debug, Clone, Serialize)]
pub struct Confusion {
    /// Row and column labels.
    pub labels: Vec<String>,
    /// Counts.
    pub matrix: Vec<Vec<u64>>,
}

/// One point of the threshold trade-off.
#[derive(Debug, Clone, Copy, Serialize)]
pub struct ThresholdPoint {
    /// The threshold on the top score.
    pub min_score: f64,
    /// Share of frames below it (sent to a person).
    pub review: f64,
    /// Error rate among the frames at or above it (0 when none are).
    pub residual_error: f64,
    /// Frames at or above it.
    pub kept: u64,
}

/// What `--target-error` concluded.
#[derive(Debug, Clone, Serialize)]
pub struct Suggestion {
    /// The residual error asked for.
    pub target_error: f64,
    /// The lowest threshold whose residual error's 95% upper bound is within the target
    /// (None when no threshold supports it).
    pub min_score: Option<f64>,
    /// Share of frames it sends to review.
    pub review: Option<f64>,
    /// Residual error at it and its 95% Clopper–Pearson interval.
    pub residual_error: Option<Proportion>,
    /// Frames that must be kept, with no error among them, for the bound to reach the target.
    pub frames_needed: u64,
    /// The conclusion in words.
    pub statement: String,
}

/// Everything `evaluate` reports about one model on one set.
#[derive(Debug, Clone, Serialize)]
pub struct Summary {
    /// Frames scored.
    pub frames: u64,
    /// Top-1 accuracy with its 95% Clopper–Pearson interval.
    pub accuracy: f64,
    /// The same as a proportion.
    pub accuracy_interval: Proportion,
    /// Mean recall over the classes present in the set.
    pub balanced_accuracy: f64,
    /// `top_2`, `top_3` accuracy (only where there are more classes than k).
    pub top_k: std::collections::BTreeMap<String, f64>,
    /// Per class, labels-file order.
    pub per_class: Vec<ClassFigures>,
    /// Unweighted mean over all labels.
    pub macro_avg: Averages,
    /// Mean weighted by support.
    pub weighted_avg: Averages,
    /// The confusion matrix.
    pub confusion: Confusion,
    /// Expected calibration error (15 bins), for softmax scores only.
    pub ece: Option<f64>,
    /// The reliability diagram's bins (empty when `ece` is None).
    pub reliability: Vec<Bin>,
    /// The threshold trade-off, 0.00 to 1.00 in steps of 0.01.
    pub thresholds: Vec<ThresholdPoint>,
    /// Escapes, overkill and review in the line's terms (models with a decision table).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub verdicts: Option<super::verdicts::VerdictFigures>,
}

/// Summarise `preds` for `labels`. `calibrated`: the scores are softmax probabilities (ECE is
/// only meaningful then).
pub fn summarise(preds: &[Prediction], labels: &[String], calibrated: bool) -> Summary {
    let n = labels.len();
    let mut matrix = vec![vec![0u64; n]; n];
    for p in preds {
        matrix[p.truth_index][p.label_index] += 1;
    }
    let frames = preds.len() as u64;
    let right: u64 = (0..n).map(|i| matrix[i][i]).sum();
    let per_class: Vec<ClassFigures> = (0..n)
        .map(|i| {
            let support: u64 = matrix[i].iter().sum();
            let predicted: u64 = matrix.iter().map(|r| r[i]).sum();
            let tp = matrix[i][i];
            let precision = ratio(tp, predicted);
            let recall = ratio(tp, support);
            let f1 = if precision + recall > 0.0 { 2.0 * precision * recall / (precision + recall) } else { 0.0 };
            let (lo, hi) = stats::clopper_pearson(tp, support, 0.05);
            ClassFigures { label: labels[i].clone(), precision, recall, recall_interval: [lo, hi], f1, support }
        })
        .collect();
    let present: Vec<&ClassFigures> = per_class.iter().filter(|c| c.support > 0).collect();
    let balanced_accuracy =
        if present.is_empty() { 0.0 } else { present.iter().map(|c| c.recall).sum::<f64>() / present.len() as f64 };
    let avg = |w: &dyn Fn(&ClassFigures) -> f64| {
        let total: f64 = per_class.iter().map(w).sum();
        let mean = |f: &dyn Fn(&ClassFigures) -> f64| {
            if total == 0.0 { 0.0 } else { per_class.iter().map(|c| w(c) * f(c)).sum::<f64>() / total }
        };
        Averages { precision: mean(&|c| c.precision), recall: mean(&|c| c.recall), f1: mean(&|c| c.f1) }
    };
    let top_k = (2..=3)
        .filter(|&k| k < n)
        .map(|k| {
            let hits = preds.iter().filter(|p| top_order(&p.scores)[..k].contains(&p.truth_index)).count();
            (format!("top_{k}"), ratio(hits as u64, frames))
        })
        .collect();
    let tops: Vec<(f32, bool)> = preds.iter().map(|p| (p.score, p.right())).collect();
    let (ece, reliability) = if calibrated {
        let (e, bins) = stats::calibration(&tops, 15);
        (Some(e), bins)
    } else {
        (None, Vec::new())
    };
    Summary {
        frames,
        accuracy: ratio(right, frames),
        accuracy_interval: Proportion::of(right, frames),
        balanced_accuracy,
        top_k,
        macro_avg: avg(&|_| 1.0),
        weighted_avg: avg(&|c| c.support as f64),
        per_class,
        confusion: Confusion { labels: labels.to_vec(), matrix },
        ece,
        reliability,
        thresholds: (0..=100).map(|i| threshold_point(&tops, f64::from(i) / 100.0)).collect(),
        verdicts: None,
    }
}

fn ratio(k: u64, n: u64) -> f64 {
    if n == 0 { 0.0 } else { k as f64 / n as f64 }
}

fn threshold_point(tops: &[(f32, bool)], t: f64) -> ThresholdPoint {
    // Compared in f32, as the server compares a score with `min_score`.
    let kept: Vec<bool> = tops.iter().filter(|(s, _)| *s >= t as f32).map(|&(_, r)| r).collect();
    let wrong = kept.iter().filter(|r| !**r).count() as u64;
    ThresholdPoint {
        min_score: t,
        review: ratio((tops.len() - kept.len()) as u64, tops.len() as u64),
        residual_error: ratio(wrong, kept.len() as u64),
        kept: kept.len() as u64,
    }
}

/// The lowest threshold (among the frames' own top scores) at which the residual error's 95%
/// Clopper–Pearson upper bound is within `target`: the least review that the evidence
/// supports. When none does, how many error-free kept frames the target would need: the
/// smallest m with 1 − 0.025^(1/m) ≤ target (the bound at zero errors).
pub fn suggest(preds: &[Prediction], target: f64) -> Suggestion {
    let mut tops: Vec<(f32, bool)> = preds.iter().map(|p| (p.score, p.right())).collect();
    tops.sort_by(|a, b| a.0.total_cmp(&b.0));
    let frames_needed =
        if target <= 0.0 || target >= 1.0 { u64::MAX } else { (0.025f64.ln() / (1.0 - target).ln()).ceil() as u64 };
    // Thresholds from low to high: the first that supports the target reviews the least.
    let mut wrong_from: Vec<u64> = vec![0; tops.len() + 1];
    for i in (0..tops.len()).rev() {
        wrong_from[i] = wrong_from[i + 1] + u64::from(!tops[i].1);
    }
    for i in 0..tops.len() {
        if i > 0 && tops[i].0 == tops[i - 1].0 {
            continue; // the same threshold as the frame before
        }
        let kept = (tops.len() - i) as u64;
        if wrong_from[i] as f64 > target * kept as f64 {
            continue; // the observed error alone is above the target: its bound is too
        }
        let err = Proportion::of(wrong_from[i], kept);
        if err.high <= target {
            let t = f64::from(tops[i].0);
            let review = i as f64 / tops.len() as f64;
            return Suggestion {
                target_error: target,
                min_score: Some(t),
                review: Some(review),
                residual_error: Some(err),
                frames_needed,
                statement: format!(
                    "min_score = {} keeps the residual error at {:.2}% (95% upper bound {:.2}%, within the target {:.2}%) \
                     and sends {:.1}% of frames to review",
                    tops[i].0,
                    err.rate * 100.0,
                    err.high * 100.0,
                    target * 100.0,
                    review * 100.0
                ),
            };
        }
    }
    let statement = if (tops.len() as u64) < frames_needed {
        format!(
            "the frames are too few to support a residual error of {:.2}%: even with no error among them, \
             at least {frames_needed} kept frames are needed for the 95% upper bound to reach it (the set has {})",
            target * 100.0,
            tops.len()
        )
    } else {
        // Enough frames, but errors remain among the confident ones: say where the bound is lowest.
        let best = (0..tops.len())
            .map(|i| (i, Proportion::of(wrong_from[i], (tops.len() - i) as u64)))
            .min_by(|a, b| a.1.high.total_cmp(&b.1.high));
        match best {
            Some((i, e)) => format!(
                "no min_score reaches a residual error of {:.2}% with 95% confidence on this set: the lowest upper bound is \
                 {:.2}% ({} errors among {} frames kept at min_score {:.4}); the target needs at least {frames_needed} \
                 kept frames with no error among them: a better model, or more frames",
                target * 100.0,
                e.high * 100.0,
                e.k,
                e.n,
                tops[i].0
            ),
            None => "no frames were scored".to_string(),
        }
    };
    Suggestion { target_error: target, min_score: None, review: None, residual_error: None, frames_needed, statement }
}

/// A candidate compared with the model on the same frames.
#[derive(Debug, Clone, Serialize)]
pub struct Comparison {
    /// Frames both scored.
    pub compared: u64,
    /// Share of frames where both gave the same top label.
    pub agreement: f64,
    /// Frames only the model got right.
    pub only_model_right: u64,
    /// Frames only the candidate got right.
    pub only_candidate_right: u64,
    /// McNemar's exact two-sided p-value on those two counts.
    pub mcnemar_p: f64,
    /// The frames where the two top labels differ.
    pub disagreements: Vec<Disagreement>,
}

/// A frame the two models label differently.
#[derive(Debug, Clone, Serialize)]
pub struct Disagreement {
    /// The frame.
    pub file: String,
    /// Its true label.
    pub truth: String,
    /// The model's top label and score.
    pub label: String,
    /// Its score.
    pub score: f32,
    /// The candidate's top label.
    pub against_label: String,
    /// Its score.
    pub against_score: f32,
}

/// Compare two models' predictions on the same frames (`a[i]` and `b[i]` the same frame).
pub fn compare(a: &[Prediction], b: &[Prediction]) -> Comparison {
    let frames = a.len().min(b.len()) as u64;
    let pairs = || a.iter().zip(b);
    let agree = pairs().filter(|(x, y)| x.label == y.label).count() as u64;
    let only_a = pairs().filter(|(x, y)| x.right() && !y.right()).count() as u64;
    let only_b = pairs().filter(|(x, y)| !x.right() && y.right()).count() as u64;
    Comparison {
        compared: frames,
        agreement: ratio(agree, frames),
        only_model_right: only_a,
        only_candidate_right: only_b,
        mcnemar_p: stats::mcnemar_exact(only_a, only_b),
        disagreements: pairs()
            .filter(|(x, y)| x.label != y.label)
            .map(|(x, y)| Disagreement {
                file: x.file.clone(),
                truth: x.truth.clone(),
                label: x.label.clone(),
                score: x.score,
                against_label: y.label.clone(),
                against_score: y.score,
            })
            .collect(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn labels() -> Vec<String> {
        ["a", "b", "c"].map(String::from).to_vec()
    }

    fn pred(truth: usize, scores: [f32; 3]) -> Prediction {
        Prediction::new(format!("f{truth}"), truth, scores.to_vec(), &labels())
    }

    #[test]
    fn hand_counted_figures() {
        // Truth a a b c; predicted a b b b.
        let p =
            [pred(0, [0.8, 0.1, 0.1]), pred(0, [0.3, 0.6, 0.1]), pred(1, [0.1, 0.7, 0.2]), pred(2, [0.1, 0.5, 0.4])];
        let s = summarise(&p, &labels(), true);
        assert_eq!(s.confusion.matrix, [[1, 1, 0], [0, 1, 0], [0, 1, 0]]);
        assert_eq!(s.accuracy, 0.5);
        // recalls 1/2, 1, 0 -> balanced 0.5; precision of b = 1/3.
        assert!((s.balanced_accuracy - 0.5).abs() < 1e-12);
        assert!((s.per_class[1].precision - 1.0 / 3.0).abs() < 1e-12);
        assert_eq!(s.per_class[2].f1, 0.0);
        // top-2: frame 2 (truth a, a second) and frame 4 (truth c, c second) become hits.
        assert_eq!(s.top_k.get("top_2"), Some(&1.0));
        assert_eq!(s.top_k.len(), 1, "top-3 needs more than 3 classes");
        assert_eq!(s.thresholds[0].review, 0.0);
        assert_eq!(s.thresholds[100].kept, 0);
    }

    #[test]
    fn suggestion_needs_enough_frames() {
        // 10 right at 0.9: the 95% upper bound with 0 errors in 10 is 30.8%.
        let p: Vec<Prediction> = (0..10).map(|_| pred(0, [0.9, 0.05, 0.05])).collect();
        let s = suggest(&p, 0.01);
        assert!(s.min_score.is_none());
        // 1 − 0.025^(1/m) <= 0.01  <=>  m >= ln 0.025 / ln 0.99 = 367.04.
        assert_eq!(s.frames_needed, 368);
        assert!(s.statement.contains("368"), "{}", s.statement);
        let s = suggest(&p, 0.35);
        assert_eq!(s.min_score, Some(0.9f32 as f64));
        assert_eq!(s.review, Some(0.0));
    }

    #[test]
    fn comparison_counts_discordant_pairs() {
        let a = [pred(0, [0.9, 0.1, 0.0]), pred(1, [0.9, 0.1, 0.0]), pred(2, [0.0, 0.1, 0.9])];
        let b = [pred(0, [0.1, 0.9, 0.0]), pred(1, [0.1, 0.9, 0.0]), pred(2, [0.0, 0.1, 0.9])];
        let c = compare(&a, &b);
        assert_eq!((c.only_model_right, c.only_candidate_right, c.disagreements.len()), (1, 1, 2));
        assert!((c.agreement - 1.0 / 3.0).abs() < 1e-12);
        assert_eq!(c.mcnemar_p, 1.0);
    }
}
