//! Decisions: what the line acts on. A model's label becomes a verdict through the model's
//! `[models.decision]` table (every label in exactly one of `accept`, `reject`, `no_part`),
//! and a frame whose top score is below `min_score` is held for a person (`review`) whatever
//! its label.
//!
//! lineside assists inspection: a verdict is advice to the line's controller, which keeps
//! the plant's safety systems and its own rule for parts lineside did not answer in time.

use serde::{Deserialize, Serialize};

/// What the line does with a part.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Verdict {
    /// Let it pass.
    Accept,
    /// Push it off the line.
    Reject,
    /// Hold it for a person: the model was not sure.
    Review,
    /// Nothing to inspect in the frame.
    NoPart,
}

impl Verdict {
    /// Every verdict, in the order documents list them.
    pub const ALL: [Verdict; 4] = [Verdict::Accept, Verdict::Reject, Verdict::Review, Verdict::NoPart];

    /// As JSON, metric labels and config lists spell it.
    pub fn as_str(self) -> &'static str {
        match self {
            Verdict::Accept => "accept",
            Verdict::Reject => "reject",
            Verdict::Review => "review",
            Verdict::NoPart => "no_part",
        }
    }

    /// From its name.
    pub fn parse(text: &str) -> Option<Verdict> {
        Verdict::ALL.into_iter().find(|v| v.as_str() == text)
    }
}

/// `[models.decision]` as written: label names per list.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct DecisionConfig {
    /// Labels whose parts pass.
    pub accept: Vec<String>,
    /// Labels whose parts are pushed off.
    pub reject: Vec<String>,
    /// Labels that mean no part is in the frame.
    pub no_part: Vec<String>,
}

impl DecisionConfig {
    /// The lists with their verdicts.
    fn lists(&self) -> [(Verdict, &Vec<String>); 3] {
        [(Verdict::Accept, &self.accept), (Verdict::Reject, &self.reject), (Verdict::NoPart, &self.no_part)]
    }

    /// Check the lists by themselves (before the labels are known): no label twice.
    ///
    /// # Errors
    /// The doubled label and the lists it is in.
    pub fn check_lists(&self) -> Result<(), String> {
        let mut seen: Vec<(&str, Verdict)> = Vec::new();
        for (verdict, list) in self.lists() {
            for label in list {
                if let Some((_, first)) = seen.iter().find(|(l, _)| *l == label) {
                    return Err(format!(
                        "decision: label {label:?} is in both `{}` and `{}`; a label takes exactly one verdict",
                        first.as_str(),
                        verdict.as_str()
                    ));
                }
                seen.push((label, verdict));
            }
        }
        Ok(())
    }
}

/// The verdict of each label, in the model's label order.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct DecisionTable {
    by_label: Vec<Verdict>,
}

impl DecisionTable {
    /// The table for a model with `labels`.
    ///
    /// # Errors
    /// A label in no list or in two, or a listed name that is not one of the labels (each
    /// message names it and lists the labels).
    pub fn new(config: &DecisionConfig, labels: &[String]) -> Result<DecisionTable, String> {
        config.check_lists()?;
        for (verdict, list) in config.lists() {
            if let Some(unknown) = list.iter().find(|l| !labels.contains(l)) {
                return Err(format!(
                    "decision.{} names {unknown:?}, which is not one of the model's labels {labels:?}",
                    verdict.as_str()
                ));
            }
        }
        let by_label = labels
            .iter()
            .map(|label| {
                config.lists().into_iter().find(|(_, list)| list.contains(label)).map(|(v, _)| v).ok_or_else(|| {
                    format!(
                        "decision: label {label:?} is in none of accept, reject, no_part; every label needs exactly \
                         one verdict (labels: {labels:?})"
                    )
                })
            })
            .collect::<Result<_, _>>()?;
        Ok(DecisionTable { by_label })
    }

    /// The verdict for top-1 label `index` with top score `score`: `review` below `min_score`.
    pub fn verdict(&self, index: usize, score: f32, min_score: Option<f32>) -> Verdict {
        // Below min_score, or not a number: not `confident`, so held for a person.
        if min_score.is_some_and(|min| score.partial_cmp(&min).is_none_or(std::cmp::Ordering::is_lt)) {
            return Verdict::Review;
        }
        self.by_label.get(index).copied().unwrap_or(Verdict::Review)
    }

    /// The verdict a label takes when the model is sure.
    pub fn of_label(&self, index: usize) -> Option<Verdict> {
        self.by_label.get(index).copied()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn labels() -> Vec<String> {
        ["burr", "cracked", "empty", "good", "no_hole"].map(String::from).to_vec()
    }

    fn washers() -> DecisionConfig {
        DecisionConfig {
            accept: vec!["good".into()],
            reject: vec!["cracked".into(), "burr".into(), "no_hole".into()],
            no_part: vec!["empty".into()],
        }
    }

    #[test]
    fn every_label_takes_its_list_and_low_scores_go_to_review() {
        let t = DecisionTable::new(&washers(), &labels()).unwrap();
        let expected = [Verdict::Reject, Verdict::Reject, Verdict::NoPart, Verdict::Accept, Verdict::Reject];
        for (i, v) in expected.into_iter().enumerate() {
            assert_eq!(t.verdict(i, 0.99, Some(0.9)), v);
            assert_eq!(t.verdict(i, 0.9, Some(0.9)), v, "at min_score exactly: as the `confident` flag");
            assert_eq!(t.verdict(i, 0.89, Some(0.9)), Verdict::Review, "below min_score, whatever the label");
            assert_eq!(t.verdict(i, 0.01, None), v, "no min_score: never review");
        }
        assert_eq!(t.verdict(0, f32::NAN, Some(0.5)), Verdict::Review);
    }

    #[test]
    fn missing_doubled_and_unknown_labels_are_named() {
        let mut c = washers();
        c.reject.retain(|l| l != "no_hole");
        let e = DecisionTable::new(&c, &labels()).unwrap_err();
        assert!(e.contains("\"no_hole\"") && e.contains("none of"), "{e}");
        let mut c = washers();
        c.accept.push("burr".into());
        let e = c.check_lists().unwrap_err();
        assert!(e.contains("\"burr\"") && e.contains("`accept`") && e.contains("`reject`"), "{e}");
        let mut c = washers();
        c.no_part.push("scratched".into());
        let e = DecisionTable::new(&c, &labels()).unwrap_err();
        assert!(e.contains("\"scratched\"") && e.contains("decision.no_part"), "{e}");
    }

    #[test]
    fn names_round_trip() {
        for v in Verdict::ALL {
            assert_eq!(Verdict::parse(v.as_str()), Some(v));
            assert_eq!(serde_json::to_value(v).unwrap(), v.as_str());
        }
        assert_eq!(Verdict::parse("pass"), None);
    }
}
