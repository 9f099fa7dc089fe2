//! The TOML file as written: every key optional where a default exists, unknown keys refused
//! with their line. Only `validate` reads these types.

use std::path::PathBuf;

use serde::Deserialize;

use super::BatchingOverrides;
use crate::model::{EngineKind, Layout, ScoresMode};
use crate::preprocess::{Channels, Filter, Orientation, ResizeMode};

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawConfig {
    #[serde(default)]
    pub(super) server: RawServer,
    #[serde(default)]
    pub(super) models: Vec<RawModel>,
    pub(super) onnxruntime: Option<RawOnnxruntime>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawOnnxruntime {
    pub(super) library: Option<PathBuf>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawServer {
    pub(super) listen: Option<String>,
    pub(super) body_limit_bytes: Option<u64>,
    pub(super) max_pixels: Option<u64>,
    pub(super) max_decode_bytes: Option<u64>,
    pub(super) max_parts: Option<usize>,
    pub(super) max_part_bytes: Option<u64>,
    pub(super) decode_threads: Option<usize>,
    pub(super) decode_backlog: Option<usize>,
    pub(super) decode_inline_pixels: Option<u64>,
    pub(super) http_threads: Option<usize>,
    pub(super) header_timeout_ms: Option<u64>,
    pub(super) drain_ms: Option<u64>,
    pub(super) deadline_ms: Option<u64>,
    pub(super) body_timeout_ms: Option<u64>,
    pub(super) stall_ms: Option<u64>,
    pub(super) ready_backlog: Option<f64>,
    pub(super) max_connections: Option<usize>,
    pub(super) max_header_bytes: Option<usize>,
    pub(super) admin_token_file: Option<PathBuf>,
    pub(super) client_token_file: Option<PathBuf>,
    pub(super) session_minutes: Option<u64>,
    pub(super) tls_cert: Option<PathBuf>,
    pub(super) tls_key: Option<PathBuf>,
    pub(super) tls_client_ca: Option<PathBuf>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawModel {
    pub(super) name: String,
    pub(super) onnx: PathBuf,
    pub(super) labels: PathBuf,
    pub(super) preprocess: RawPreprocess,
    #[serde(default)]
    pub(super) batching: RawBatching,
    pub(super) selftest: Option<RawSelftest>,
    #[serde(default = "default_scores")]
    pub(super) scores: ScoresMode,
    pub(super) min_score: Option<f32>,
    pub(super) engine: Option<EngineKind>,
    pub(super) decision: Option<RawDecision>,
    pub(super) sha256: Option<String>,
    pub(super) retain: Option<RawRetain>,
    #[serde(default)]
    pub(super) watch: bool,
}

/// The per-model keys the environment may set (`config::env`), each optional: only to check
/// that a variable's value is one the key takes. The nested ones by their last name.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)] // read by serde only
pub(super) struct RawModelKeys {
    onnx: Option<PathBuf>,
    labels: Option<PathBuf>,
    sha256: Option<String>,
    min_score: Option<f32>,
    engine: Option<EngineKind>,
    scores: Option<ScoresMode>,
    watch: Option<bool>,
    lanes: Option<RawLanes>,
    samples: Option<PathBuf>,
    dir: Option<PathBuf>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawDecision {
    #[serde(default)]
    pub(super) accept: Vec<String>,
    #[serde(default)]
    pub(super) reject: Vec<String>,
    #[serde(default)]
    pub(super) no_part: Vec<String>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawRetain {
    pub(super) dir: PathBuf,
    pub(super) verdicts: Option<Vec<String>>,
    #[serde(default)]
    pub(super) labels: Vec<String>,
    pub(super) sample_other: Option<f64>,
    pub(super) max_frames: Option<u64>,
    pub(super) max_bytes: Option<u64>,
    pub(super) queue: Option<u64>,
}

pub(super) fn default_scores() -> ScoresMode {
    ScoresMode::Auto
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawSelftest {
    pub(super) samples: PathBuf,
    pub(super) tolerance: Option<f32>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawPreprocess {
    pub(super) width: Option<u32>,
    pub(super) height: Option<u32>,
    #[serde(default = "default_resize")]
    pub(super) resize: ResizeMode,
    pub(super) short_side: Option<i64>,
    pub(super) pad_value: Option<i64>,
    #[serde(default = "default_filter")]
    pub(super) filter: Filter,
    pub(super) channels: Option<Channels>,
    #[serde(default = "default_orientation")]
    pub(super) orientation: Orientation,
    pub(super) roi: Option<Vec<i64>>,
    pub(super) min_side: Option<i64>,
    pub(super) layout: Option<Layout>,
    #[serde(default = "default_divisor")]
    pub(super) divisor: f32,
    pub(super) normalize: Option<String>,
    pub(super) mean: Option<Vec<f32>>,
    pub(super) std: Option<Vec<f32>>,
}

pub(super) fn default_orientation() -> Orientation {
    Orientation::Exif
}

pub(super) fn default_resize() -> ResizeMode {
    ResizeMode::Stretch
}
pub(super) fn default_filter() -> Filter {
    Filter::Bilinear
}
pub(super) fn default_divisor() -> f32 {
    255.0
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawBatching {
    pub(super) batch_cap: Option<usize>,
    pub(super) gather_us: Option<u64>,
    pub(super) backlog: Option<usize>,
    pub(super) lanes: Option<RawLanes>,
    pub(super) lane_threads: Option<usize>,
    pub(super) stack: Option<RawStack>,
}

#[derive(Debug, Deserialize)]
#[serde(untagged)]
pub(super) enum RawStack {
    Flag(bool),
    Word(String),
}

#[derive(Debug, Deserialize)]
#[serde(untagged)]
pub(super) enum RawLanes {
    Count(i64),
    Word(String),
}

impl BatchingOverrides {
    pub(super) fn apply(&self, raw: &mut RawBatching) {
        raw.batch_cap = self.batch_cap.or(raw.batch_cap);
        raw.gather_us = self.gather_us.or(raw.gather_us);
        raw.lane_threads = self.lane_threads.or(raw.lane_threads);
        if let Some(l) = &self.lanes {
            raw.lanes = Some(l.parse::<i64>().map_or_else(|_| RawLanes::Word(l.clone()), RawLanes::Count));
        }
    }
}
