//! `GET /models` and `GET /models/{model}`: each served model's contract, as an operator or
//! a client library needs it: input shape, layout and type, preprocessing, labels, batching,
//! engine, version, load time and self-test result.
//!
//! The answer is one typed [`ModelInfo`], which `lineside bench` reads back from a server
//! with the same type.

use axum::Json;
use axum::extract::{Path, State};
use serde::{Deserialize, Serialize};

use crate::decision::Verdict;

use super::error::{ApiError, ErrorKind};
use super::state::{AppState, ServedModel, find};
use crate::model::{InputType, Layout, ScoreTransform, Stacking};
use crate::preprocess::PreprocessConfig;
use crate::selftest::Outcome;

/// One served model, as `/models/{model}` answers.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelInfo {
    /// The name in URLs.
    pub name: String,
    /// First 12 hex digits of the ONNX file's SHA-256.
    pub version: String,
    /// `tract` or `onnxruntime`.
    pub engine: String,
    /// Whether passes run as one stacked tensor.
    pub stacked_passes: bool,
    /// How that was decided.
    pub stacking: Stacking,
    /// The ONNX file.
    pub file: String,
    /// Time to load, check, plan and warm, in ms.
    pub load_ms: f64,
    /// The image input.
    pub input: InputInfo,
    /// The scores output.
    pub output: OutputInfo,
    /// Class names, in output order.
    pub labels: Vec<String>,
    /// `min_score`, if set.
    pub min_score: Option<f32>,
    /// The preprocessing in force (resolved against the model).
    pub preprocess: PreprocessConfig,
    /// Batching, with the lanes running.
    pub batching: BatchingInfo,
    /// The self-test's result at load.
    pub selftest: Option<Outcome>,
    /// Each label's verdict (`[models.decision]`), when configured.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub decision: Option<std::collections::BTreeMap<String, Verdict>>,
    /// Which frames are kept, where (`[models.retain]`), when configured.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub retain: Option<RetainInfo>,
    /// The last reload: when, outcome, reason, the version serving, who asked.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub last_reload: Option<serde_json::Value>,
}

/// `[models.retain]` as served.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RetainInfo {
    /// The folder.
    pub dir: String,
    /// Verdicts kept.
    pub verdicts: Vec<Verdict>,
    /// Labels kept whatever the verdict.
    pub labels: Vec<String>,
    /// Share of other frames kept.
    pub sample_other: f64,
    /// Most frames kept.
    pub max_frames: usize,
    /// Most bytes kept.
    pub max_bytes: u64,
}

/// The image input of [`ModelInfo`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct InputInfo {
    /// Input name in the graph.
    pub name: String,
    /// Shape as the model declares it (symbols by name).
    pub shape: Vec<String>,
    /// The shape one image is served at.
    pub served_shape: [usize; 4],
    /// NCHW or NHWC.
    pub layout: Layout,
    /// Element type.
    #[serde(rename = "type")]
    pub input_type: InputType,
    /// Channels (1 or 3).
    pub channels: usize,
    /// Width served.
    pub width: u32,
    /// Height served.
    pub height: u32,
}

/// The scores output of [`ModelInfo`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct OutputInfo {
    /// Output name in the graph.
    pub name: String,
    /// Shape as the model declares it.
    pub shape: Vec<String>,
    /// How outputs become scores.
    pub scores: ScoreTransform,
}

/// The batching of [`ModelInfo`].
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct BatchingInfo {
    /// Most requests one pass takes.
    pub batch_cap: usize,
    /// Gathering window, in microseconds.
    pub gather_us: u64,
    /// Requests waiting before 503 `overloaded`.
    pub backlog: usize,
    /// Lanes running (after `lanes = "auto"` is resolved).
    pub lanes: usize,
    /// Threads per lane.
    pub lane_threads: usize,
}

impl ModelInfo {
    /// Describe a served model.
    pub fn of(m: &ServedModel) -> ModelInfo {
        let c = &m.model.contract;
        let b = &m.batching;
        ModelInfo {
            name: m.model.name.clone(),
            version: m.model.version.clone(),
            engine: m.model.engine().name().into(),
            stacked_passes: m.model.stacks(),
            stacking: m.model.stacking.clone(),
            file: m.model.file.clone(),
            load_ms: crate::millis(m.model.load_time),
            input: InputInfo {
                name: c.input_name.clone(),
                shape: c.input_shape.clone(),
                served_shape: c.input_shape(1),
                layout: c.layout,
                input_type: c.input_type,
                channels: c.channels,
                width: c.width,
                height: c.height,
            },
            output: OutputInfo { name: c.output_name.clone(), shape: c.output_shape.clone(), scores: c.scores },
            labels: m.model.labels.clone(),
            min_score: m.min_score,
            preprocess: m.pipeline.config().clone(),
            batching: BatchingInfo {
                batch_cap: b.batch_cap,
                gather_us: b.gather.as_micros() as u64,
                backlog: b.backlog,
                lanes: m.lanes,
                lane_threads: b.lane_threads,
            },
            selftest: m.selftest.clone(),
            decision: m.decision.as_ref().map(|d| {
                m.model.labels.iter().enumerate().filter_map(|(i, l)| Some((l.clone(), d.of_label(i)?))).collect()
            }),
            last_reload: None,
            retain: m.retain.as_ref().map(|r| {
                let c = r.config();
                RetainInfo {
                    dir: c.dir.display().to_string(),
                    verdicts: c.verdicts.clone(),
                    labels: c.labels.clone(),
                    sample_other: c.sample_other,
                    max_frames: c.max_frames,
                    max_bytes: c.max_bytes,
                }
            }),
        }
    }
}

/// The answer of `GET /models`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelList {
    /// Every served model, by name.
    pub models: Vec<ModelInfo>,
}

/// Every served model.
pub async fn list(State(state): State<AppState>) -> Result<Json<ModelList>, ApiError> {
    let s = state.readiness.borrow().served(true)?;
    Ok(Json(ModelList { models: s.values().map(|m| ModelInfo::of(m)).collect() }))
}

/// One model, with its last reload.
pub async fn one(State(state): State<AppState>, Path(name): Path<String>) -> Result<Json<ModelInfo>, ApiError> {
    let s = state.readiness.borrow().served(true)?;
    let mut info = ModelInfo::of(find(&s, &name)?);
    info.last_reload =
        state.reloader.as_ref().and_then(|r| r.status(&name)).and_then(|st| serde_json::to_value(st).ok());
    Ok(Json(info))
}

/// `POST /models/{model}/reload` (admin): load the model's files and config entry as they are
/// now beside the serving version, and swap it in when it checks and self-tests; 200 with the
/// outcome, or the error (the old version serves on).
pub async fn reload(
    State(state): State<AppState>,
    Path(name): Path<String>,
    peer: Option<axum::Extension<crate::access::Peer>>,
) -> Result<Json<crate::reload::ReloadStatus>, ApiError> {
    let reloader =
        state.reloader.clone().ok_or_else(|| ApiError::new(ErrorKind::NotFound, "this server cannot reload models"))?;
    // The model must be served now: a reload does not add models.
    let served = state.readiness.borrow().served(false)?;
    find(&served, &name)?;
    drop(served);
    let peer = peer.map_or_else(|| "unknown".to_owned(), |axum::Extension(p)| p.0.to_string());
    // On its own task: a client that leaves (or times out) does not cut the reload short.
    let trigger = crate::reload::Trigger::Route { peer };
    let done = tokio::spawn(async move { reloader.reload(&name, trigger).await });
    let status = done
        .await
        .map_err(|e| ApiError::new(ErrorKind::Internal, format!("the reload task ended without an answer: {e}")))??;
    Ok(Json(status))
}
