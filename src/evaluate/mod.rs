//! `lineside evaluate`: a model qualified on labelled line frames through the exact serving
//! path. Each frame is read, decoded and preprocessed by the model's serving [`Pipeline`] and
//! scored by its lanes as background work ([`Batcher::infer_background`]: the same engine,
//! passes and score transform as `POST /classify`, yielding to live requests when it runs
//! beside serving). Frames stream: at most a bounded number are read, decoded or waiting at
//! once, whatever the size of the set.
//!
//! [`dataset`] reads the set, [`summary`] computes the figures, [`stats`] holds the
//! statistics, [`report`] writes the terminal text, JSON, HTML and baseline.
//!
//! [`Pipeline`]: crate::preprocess::Pipeline
//! [`Batcher::infer_background`]: crate::batch::Batcher::infer_background

pub mod dataset;
pub mod html;
pub mod report;
pub mod stats;
pub mod summary;
pub mod verdicts;

use std::sync::Arc;

use futures_util::StreamExt as _;
use serde::Serialize;

use crate::model::ScoreTransform;
use crate::served::ServedModel;
use dataset::Item;
use summary::Prediction;

/// A frame that could not be scored, and why. With a candidate, a frame that fails for either
/// model is left out of both sets of figures (they are compared on the same frames).
#[derive(Debug, Clone, Serialize)]
pub struct Failure {
    /// The frame, relative to the set.
    pub file: String,
    /// The model it failed for (its configured name).
    pub model: String,
    /// What went wrong, as the HTTP API names it (`bad_image`, `too_small`, `unreadable`, ...).
    pub kind: String,
    /// The message a request for it would get.
    pub message: String,
}

/// The outcome of scoring one frame with each model.
pub type Scored = Result<Vec<Vec<f32>>, Failure>;

/// Whether a model's scores are softmax probabilities (calibration means something then).
pub fn calibrated(m: &ServedModel) -> bool {
    let c = &m.model.contract;
    c.scores == ScoreTransform::Softmax || (c.scores == ScoreTransform::AsIs && c.ends_in.as_deref() == Some("Softmax"))
}

/// Score every frame with every model in `models` (each through its own pipeline and lanes),
/// in the set's order; `progress` is called once a frame. At most `in_flight` frames are
/// being read, decoded or scored at once, and at most one decode per core runs at a time (a
/// decoded frame is the large buffer: 12 MP frames take 36 MB each).
pub async fn score_all(
    models: &[Arc<ServedModel>],
    items: &[Item],
    in_flight: usize,
    progress: &(dyn Fn() + Sync),
) -> Vec<Scored> {
    let cores = std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1);
    let decoders = tokio::sync::Semaphore::new(cores);
    let decoders = &decoders;
    futures_util::stream::iter(items)
        .map(|item| async move {
            let out = score_one(models, item, decoders).await;
            progress();
            out
        })
        .buffered(in_flight.max(1))
        .collect()
        .await
}

async fn score_one(models: &[Arc<ServedModel>], item: &Item, decoders: &tokio::sync::Semaphore) -> Scored {
    let first = models.first().map_or("", |m| m.model.name.as_str());
    let fail_for = |model: &str, kind: &str, message: String| Failure {
        file: item.file.clone(),
        model: model.to_string(),
        kind: kind.into(),
        message,
    };
    let fail = |kind: &str, message: String| fail_for(first, kind, message);
    let path = item.path.clone();
    let bytes = tokio::task::spawn_blocking(move || std::fs::read(path))
        .await
        .map_err(|e| fail("internal", e.to_string()))?
        .map_err(|e| fail("unreadable", format!("cannot read {}: {e}", item.path.display())))?;
    let bytes = Arc::new(bytes);
    let mut all = Vec::with_capacity(models.len());
    for m in models {
        let name = m.model.name.as_str();
        let (pipeline, frame) = (Arc::clone(&m.pipeline), Arc::clone(&bytes));
        let permit = decoders.acquire().await.map_err(|e| fail_for(name, "internal", e.to_string()))?;
        let prepared = tokio::task::spawn_blocking(move || pipeline.run(&frame[..]))
            .await
            .map_err(|e| fail_for(name, "internal", format!("preprocessing panicked: {e}")))?
            .map_err(|e| fail_for(name, e.kind(), e.to_string()))?;
        drop(permit);
        let scored = m
            .batcher
            .infer_background(prepared.tensor)
            .await
            .map_err(|e| fail_for(name, "inference_failed", e.to_string()))?;
        if let Some(bad) = scored.scores.iter().find(|s| !s.is_finite()) {
            let message = format!("the model answered a score of {bad} for this frame");
            return Err(fail_for(name, "non_finite_scores", message));
        }
        all.push(scored.scores);
    }
    Ok(all)
}

/// Split scored frames into each model's predictions and the failures.
pub fn predictions(
    items: &[Item],
    scored: Vec<Scored>,
    labels: &[Vec<String>],
) -> (Vec<Vec<Prediction>>, Vec<Failure>) {
    let mut preds: Vec<Vec<Prediction>> = labels.iter().map(|_| Vec::new()).collect();
    let mut failed = Vec::new();
    for (item, s) in items.iter().zip(scored) {
        match s {
            Ok(per_model) => {
                for ((scores, out), l) in per_model.into_iter().zip(&mut preds).zip(labels) {
                    out.push(Prediction::new(item.file.clone(), item.truth, scores, l));
                }
            }
            Err(f) => failed.push(f),
        }
    }
    (preds, failed)
}
