//! The self-test: a model's sample images run through the full serving path at load, and
//! compared with what `expected.json` says they should give.
//!
//! `expected.json` maps each file name to `{"label": ..., "scores": [...]}` (`scores`
//! optional, in label order). A different top-1, or a score off by more than the tolerance,
//! is a failure: `check` exits 1 and `serve` keeps `/readyz` at 503 with the reason, so that a
//! model whose preprocessing or weights changed under it never takes traffic silently.

use std::collections::BTreeMap;

use anyhow::Context as _;
use serde::{Deserialize, Serialize};

use crate::model::{Model, Runner, top_k};
use crate::preprocess::Pipeline;
use crate::source::Source;

/// Validated `[models.selftest]`.
#[derive(Debug, Clone)]
pub struct SelftestConfig {
    /// The folder of images with their `expected.json`.
    pub samples: Source,
    /// Largest allowed difference of an expected score.
    pub tolerance: f32,
}

/// One sample's expectation.
#[derive(Debug, Clone, Deserialize, Serialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Expected {
    /// Expected top-1 label.
    pub label: String,
    /// Expected probabilities, in label order.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub scores: Option<Vec<f32>>,
}

/// What the self-test found.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct Outcome {
    /// Samples checked.
    pub samples: usize,
    /// One line per mismatch.
    pub failures: Vec<String>,
}

impl Outcome {
    /// Whether every sample matched.
    pub fn passed(&self) -> bool {
        self.failures.is_empty()
    }
}

/// The samples of a self-test folder: images by name and the expectations.
pub struct Samples {
    images: Vec<(String, Vec<u8>)>,
    expected: BTreeMap<String, Expected>,
    origin: String,
}

impl Samples {
    /// Read the folder and its `expected.json`.
    ///
    /// # Errors
    /// An unreadable folder, a missing or malformed `expected.json`, or a listed file that is absent.
    pub fn read(cfg: &SelftestConfig) -> anyhow::Result<Samples> {
        let origin = cfg.samples.display();
        let mut files = cfg.samples.read_dir()?;
        let pos = files.iter().position(|(n, _)| n == "expected.json").with_context(|| {
            format!("{origin}: no expected.json (write one with `lineside check --write-expected`)")
        })?;
        let (_, json) = files.remove(pos);
        let expected: BTreeMap<String, Expected> = serde_json::from_slice(&json)
            .with_context(|| format!("{origin}/expected.json: not a map of file name to {{\"label\", \"scores\"?}}"))?;
        for name in expected.keys() {
            if !files.iter().any(|(n, _)| n == name) {
                anyhow::bail!("{origin}/expected.json lists {name:?}, which is not in the folder");
            }
        }
        let images = files.into_iter().filter(|(n, _)| expected.contains_key(n)).collect();
        Ok(Samples { images, expected, origin })
    }

    /// Image files of a folder, by extension (for `--write-expected`; other files, such as a
    /// README beside the samples, are left alone).
    ///
    /// # Errors
    /// An unreadable folder.
    pub fn images_only(cfg: &SelftestConfig) -> anyhow::Result<Vec<(String, Vec<u8>)>> {
        Ok(cfg.samples.read_dir()?.into_iter().filter(|(n, _)| is_image_name(n)).collect())
    }
}

/// Whether a file name has an image extension lineside decodes (case-insensitive).
pub fn is_image_name(name: &str) -> bool {
    const IMAGE_EXTENSIONS: &[&str] = &["png", "jpg", "jpeg", "bmp", "tif", "tiff", "webp"];
    name.rsplit_once('.').is_some_and(|(_, ext)| IMAGE_EXTENSIONS.contains(&ext.to_ascii_lowercase().as_str()))
}

/// Classify one sample through the serving path: decode, preprocess, engine.
fn classify(runner: &mut Runner, pipeline: &Pipeline, bytes: &[u8]) -> anyhow::Result<Vec<f32>> {
    let prepared = pipeline.run(bytes)?;
    Ok(runner.run(&prepared.tensor)?)
}

/// Run the self-test.
pub fn run(model: &Model, pipeline: &Pipeline, samples: &Samples, tolerance: f32) -> Outcome {
    let mut runner = match model.runner() {
        Ok(r) => r,
        Err(e) => return Outcome { samples: samples.images.len(), failures: vec![format!("engine: {e}")] },
    };
    let mut failures = Vec::new();
    for (name, bytes) in &samples.images {
        let want = &samples.expected[name];
        let scores = match classify(&mut runner, pipeline, bytes) {
            Ok(s) => s,
            Err(e) => {
                failures.push(format!("{}/{name}: {e:#}", samples.origin));
                continue;
            }
        };
        let best = top_k(&scores, 1)[0];
        let got = &model.labels[best];
        if got != &want.label {
            failures.push(format!(
                "{}/{name}: expected {:?}, got {got:?} (score {:.4})",
                samples.origin, want.label, scores[best]
            ));
        }
        if let Some(ws) = &want.scores {
            if ws.len() != scores.len() {
                failures.push(format!(
                    "{name}: expected.json has {} scores, the model gives {}",
                    ws.len(),
                    scores.len()
                ));
            } else if let Some((i, (w, g))) =
                ws.iter().zip(&scores).enumerate().find(|(_, (w, g))| (*w - *g).abs() > tolerance)
            {
                failures.push(format!(
                    "{}/{name}: score of {:?} is {g:.6}, expected {w:.6} (tolerance {tolerance:e})",
                    samples.origin, model.labels[i]
                ));
            }
        }
    }
    Outcome { samples: samples.images.len(), failures }
}

/// The `expected.json` the current model gives for these images (top-1 and scores).
///
/// # Errors
/// A sample that does not decode.
pub fn expectations(
    model: &Model,
    pipeline: &Pipeline,
    images: &[(String, Vec<u8>)],
) -> anyhow::Result<BTreeMap<String, Expected>> {
    let mut runner = model.runner()?;
    let mut out = BTreeMap::new();
    for (name, bytes) in images {
        let scores = classify(&mut runner, pipeline, bytes).with_context(|| name.clone())?;
        let best = top_k(&scores, 1)[0];
        out.insert(name.clone(), Expected { label: model.labels[best].clone(), scores: Some(scores) });
    }
    Ok(out)
}
