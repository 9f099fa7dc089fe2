//! evaluate's figures in the line's terms, for a model with a `[models.decision]` table:
//! escapes (defective parts let pass) and overkill (good parts pushed off or held), as counts
//! and rates with 95% Clopper–Pearson intervals, and the threshold trade-off in those terms.
//!
//! Definitions: a frame's *intended* verdict is its true label's verdict; its *answered*
//! verdict is what the server would answer at `min_score`. An escape is a frame whose true
//! label is a `reject` one answered `accept` or `no_part` (the part is not pushed off and no
//! person sees it); overkill is a frame whose true label is an `accept` one answered `reject`
//! or `review` (a good part stopped).

use std::collections::BTreeMap;

use serde::Serialize;

use super::stats::Proportion;
use super::summary::Prediction;
use crate::decision::{DecisionTable, Verdict};

/// Escapes, overkill and review at one threshold.
#[derive(Debug, Clone, Copy, Serialize)]
pub struct VerdictPoint {
    /// The threshold on the top score (`min_score`).
    pub min_score: f64,
    /// Defective frames let pass, among the defective.
    pub escape_rate: f64,
    /// Good frames stopped (rejected or held), among the good.
    pub overkill_rate: f64,
    /// Frames held for a person, among all.
    pub review_rate: f64,
}

/// The verdict figures of one model on one set.
#[derive(Debug, Clone, Serialize)]
pub struct VerdictFigures {
    /// The `min_score` the figures use (the model's; none: nothing goes to review).
    pub min_score: Option<f64>,
    /// Frames by intended verdict (rows: accept, reject, no_part) and answered verdict.
    pub matrix: BTreeMap<String, BTreeMap<String, u64>>,
    /// Defective frames (true label in `reject`) answered accept or no_part, of all defective.
    pub escapes: Proportion,
    /// Good frames (true label in `accept`) answered reject or review, of all good.
    pub overkill: Proportion,
    /// Frames answered review, of all.
    pub review: Proportion,
    /// The trade-off, `min_score` 0.00 to 1.00 in steps of 0.01.
    pub thresholds: Vec<VerdictPoint>,
}

struct Tally {
    escapes: u64,
    defective: u64,
    overkill: u64,
    good: u64,
    review: u64,
    frames: u64,
    matrix: BTreeMap<String, BTreeMap<String, u64>>,
}

fn tally(preds: &[Prediction], table: &DecisionTable, min_score: Option<f32>) -> Tally {
    let mut t = Tally { escapes: 0, defective: 0, overkill: 0, good: 0, review: 0, frames: 0, matrix: BTreeMap::new() };
    for p in preds {
        let Some(intended) = table.of_label(p.truth_index) else { continue };
        let answered = table.verdict(p.label_index, p.score, min_score);
        t.frames += 1;
        *t.matrix.entry(intended.as_str().into()).or_default().entry(answered.as_str().into()).or_default() += 1;
        t.review += u64::from(answered == Verdict::Review);
        match intended {
            Verdict::Reject => {
                t.defective += 1;
                t.escapes += u64::from(matches!(answered, Verdict::Accept | Verdict::NoPart));
            }
            Verdict::Accept => {
                t.good += 1;
                t.overkill += u64::from(matches!(answered, Verdict::Reject | Verdict::Review));
            }
            _ => {}
        }
    }
    t
}

fn rate(k: u64, n: u64) -> f64 {
    if n == 0 { 0.0 } else { k as f64 / n as f64 }
}

/// The figures for `preds` under `table` at `min_score`.
pub fn figures(preds: &[Prediction], table: &DecisionTable, min_score: Option<f32>) -> VerdictFigures {
    let t = tally(preds, table, min_score);
    let thresholds = (0..=100)
        .map(|i| {
            let m = f64::from(i) / 100.0;
            let at = tally(preds, table, Some(m as f32));
            VerdictPoint {
                min_score: m,
                escape_rate: rate(at.escapes, at.defective),
                overkill_rate: rate(at.overkill, at.good),
                review_rate: rate(at.review, at.frames),
            }
        })
        .collect();
    VerdictFigures {
        min_score: min_score.map(f64::from),
        escapes: Proportion::of(t.escapes, t.defective),
        overkill: Proportion::of(t.overkill, t.good),
        review: Proportion::of(t.review, t.frames),
        matrix: t.matrix,
        thresholds,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::decision::DecisionConfig;

    fn labels() -> Vec<String> {
        ["burr", "empty", "good"].map(String::from).to_vec()
    }

    fn pred(truth: usize, scores: [f32; 3]) -> Prediction {
        Prediction::new(String::new(), truth, scores.to_vec(), &labels())
    }

    #[test]
    fn escapes_and_overkill_are_counted_as_defined() {
        let table = DecisionTable::new(
            &DecisionConfig { accept: vec!["good".into()], reject: vec!["burr".into()], no_part: vec!["empty".into()] },
            &labels(),
        )
        .unwrap();
        let preds = [
            pred(0, [0.9, 0.05, 0.05]), // burr, rejected: right
            pred(0, [0.1, 0.1, 0.8]),   // burr answered good: an escape
            pred(0, [0.2, 0.7, 0.1]),   // burr answered empty: an escape too
            pred(0, [0.1, 0.3, 0.6]),   // burr answered good but unsure at 0.7: review, not an escape
            pred(2, [0.05, 0.05, 0.9]), // good, accepted
            pred(2, [0.8, 0.1, 0.1]),   // good answered burr: overkill
            pred(2, [0.3, 0.1, 0.6]),   // good, unsure: review, overkill
            pred(1, [0.0, 1.0, 0.0]),   // empty
        ];
        let f = figures(&preds, &table, Some(0.7));
        assert_eq!((f.escapes.k, f.escapes.n), (2, 4));
        assert_eq!((f.overkill.k, f.overkill.n), (2, 3));
        assert_eq!((f.review.k, f.review.n), (2, 8));
        assert_eq!(f.matrix["reject"]["accept"], 1);
        assert_eq!(f.matrix["reject"]["no_part"], 1);
        assert_eq!(f.matrix["accept"]["review"], 1);
        // At threshold 0 nothing is reviewed; at 1.0 everything below a perfect score is.
        let at0 = f.thresholds[0];
        assert_eq!((at0.review_rate, at0.escape_rate), (0.0, 3.0 / 4.0));
        let at100 = f.thresholds[100];
        assert_eq!((at100.escape_rate, at100.review_rate), (0.0, 7.0 / 8.0));
    }
}
