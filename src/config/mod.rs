//! Configuration: built-in defaults, then the TOML file, then command-line flags, validated
//! once into the types the rest of lineside uses.
//!
//! [`raw`] mirrors the TOML file (every key optional where a default exists, unknown keys
//! refused with their line). [`Config::from_toml`] resolves paths against the config file's
//! folder and [`validate`] checks every value, so that no module past this one sees TOML, clap
//! or an unchecked number. The built-in washer default ([`builtin`]) is the repository's own
//! `config/lineside.toml`, compiled in, with its model files embedded in the binary.
//!
//! The settings of each stage are that stage's own types (`preprocess::PreprocessConfig`,
//! `batch::BatchingConfig`, `model::Spec`, ...): this module imports them and builds them;
//! no stage imports this module.

mod builtin;
pub mod defaults;
pub mod env;
mod raw;
#[cfg(test)]
mod tests;
mod validate;

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::time::Duration;

pub use crate::access::AccessConfig;
pub use crate::batch::{BatchingConfig, Lanes};
pub use crate::decision::DecisionConfig;
pub use crate::model::{EngineKind, Layout, Library, ScoresMode, Spec, StackMode};
pub use crate::preprocess::{Channels, Filter, Orientation, PreprocessConfig, ResizeMode, Roi};
pub use crate::retain::RetainConfig;
pub use crate::selftest::SelftestConfig;
pub use crate::source::Source;

/// Where a config value came from, for error messages.
pub const BUILTIN_NAME: &str = "<built-in washer config>";

/// A validated configuration.
#[derive(Debug, Clone)]
pub struct Config {
    /// Where the config was read from (a path, or [`BUILTIN_NAME`]).
    pub origin: String,
    /// The file it was read from (`None`: the built-in config); reloads read it again.
    pub path: Option<PathBuf>,
    /// Server-wide settings.
    pub server: ServerConfig,
    /// The models to serve, in config order; names are unique.
    pub models: Vec<ModelConfig>,
}

/// Server-wide settings (`[server]`).
#[derive(Debug, Clone)]
pub struct ServerConfig {
    /// Address to listen on.
    pub listen: SocketAddr,
    /// Largest request body accepted, in bytes; larger gets 413 `too_large`.
    pub body_limit_bytes: usize,
    /// Largest decoded image accepted, in pixels (width x height), checked from the header.
    pub max_pixels: u64,
    /// Most memory one frame's decode may take, estimated from its header.
    pub max_decode_bytes: u64,
    /// Most parts in one multipart request (also at most the model's backlog).
    pub max_parts: usize,
    /// Largest part of a multipart request; a larger part gets its own 413 `too_large`.
    pub max_part_bytes: usize,
    /// Threads that decode and preprocess images (a bounded pool beside the lanes).
    pub decode_threads: usize,
    /// Images waiting for a decode thread before new ones get 503 `overloaded`.
    pub decode_backlog: usize,
    /// Frames of at most this many pixels (from their header) are decoded and preprocessed
    /// on the HTTP thread that received them instead of the decode pool; 0: never.
    pub decode_inline_pixels: u64,
    /// Threads of the async runtime that runs HTTP (and the inline decodes).
    pub http_threads: usize,
    /// Longest a client may take to send its request headers.
    pub header_timeout: Duration,
    /// Longest shutdown waits for requests in flight.
    pub drain: Duration,
    /// Longest a classify request may take from arrival to answer (a request header
    /// `X-Deadline-Ms` may shorten it); past it the answer is 504 `deadline`.
    pub deadline: Duration,
    /// Longest a client may take to send its request body.
    pub body_timeout: Duration,
    /// A lane busy with one pass for longer than this makes `/healthz` fail.
    pub stall: Duration,
    /// `/readyz` turns 503 when a model's backlog holds this share of its size or more.
    pub ready_backlog: f64,
    /// Connections open at once; one more is answered 503 and closed.
    pub max_connections: usize,
    /// Largest request line and headers together; larger gets 431.
    pub max_header_bytes: usize,
    /// Tokens, page sessions and TLS (docs/security.md).
    pub access: AccessConfig,
}

impl ServerConfig {
    /// The limits every frame's decode runs under.
    pub fn decode_limits(&self) -> crate::preprocess::DecodeLimits {
        crate::preprocess::DecodeLimits { max_pixels: self.max_pixels, max_decode_bytes: self.max_decode_bytes }
    }
}

/// One model (`[[models]]`).
#[derive(Debug, Clone)]
pub struct ModelConfig {
    /// Name used in URLs (`/classify/{name}`) and metric labels.
    pub name: String,
    /// The ONNX file.
    pub onnx: Source,
    /// The labels file, one label a line, in the model's output order (`None` only for
    /// `lineside check model.onnx`, which names classes by index).
    pub labels: Option<Source>,
    /// How images become the model's input tensor.
    pub preprocess: PreprocessConfig,
    /// How requests are gathered into inference passes.
    pub batching: BatchingConfig,
    /// Samples run through the serving path at load (`[models.selftest]`).
    pub selftest: Option<SelftestConfig>,
    /// How outputs become scores.
    pub scores: ScoresMode,
    /// Answers whose top score is below this are marked `"confident": false` and counted.
    pub min_score: Option<f32>,
    /// The engine that runs the model (`engine`, default tract).
    pub engine: EngineKind,
    /// `[models.decision]`: label → verdict lists (checked against the labels at load).
    pub decision: Option<DecisionConfig>,
    /// `sha256`: the ONNX file's digest it must have (lowercase hex); another is refused.
    pub sha256: Option<String>,
    /// `watch`: reload when the model's files change (docs/reload.md).
    pub watch: bool,
    /// `[models.retain]`: which frames are kept, where, within which bounds.
    pub retain: Option<RetainConfig>,
    /// The onnxruntime shared library: `[onnxruntime] library`, else the environment
    /// variable `ORT_DYLIB_PATH` (given by the CLI); `None`: the system's `libonnxruntime.so`.
    pub onnxruntime_library: Option<Library>,
}

/// Flags from the command line that override the file.
#[derive(Debug, Default, Clone)]
pub struct Overrides {
    /// `--listen ADDR`.
    pub listen: Option<String>,
    /// `--batch-cap`, `--gather-us`, `--lanes`, `--lane-threads`: every model's
    /// `[models.batching]` key of that name (for trials and `lineside bench --try-settings`).
    pub batching: BatchingOverrides,
    /// `--engine`: every model's `engine`.
    pub engine: Option<EngineKind>,
    /// `--http-threads`: `[server] http_threads`.
    pub http_threads: Option<usize>,
    /// The engine of models without an `engine` key (the CLI reads `LINESIDE_ENGINE`).
    pub default_engine: EngineKind,
    /// The onnxruntime library when the config names none (the CLI reads `ORT_DYLIB_PATH`).
    pub onnxruntime_library: Option<PathBuf>,
    /// The config file when no `--config` is given (the CLI reads `LINESIDE_CONFIG`).
    pub config_file: Option<PathBuf>,
    /// `LINESIDE_SERVER_*` and `LINESIDE_MODEL_*` variables (name, value), applied over the
    /// file and under the flags ([`env`]).
    pub env: Vec<(String, String)>,
}

/// Batching keys set from the command line for every model; checked like the file's.
#[derive(Debug, Default, Clone, PartialEq, Eq)]
pub struct BatchingOverrides {
    /// `batch_cap`.
    pub batch_cap: Option<usize>,
    /// `gather_us`.
    pub gather_us: Option<u64>,
    /// `lanes`: a number, or "auto".
    pub lanes: Option<String>,
    /// `lane_threads`.
    pub lane_threads: Option<usize>,
}

impl Overrides {
    /// The onnxruntime library the environment names, for models whose config names none.
    pub fn env_library(&self) -> Option<Library> {
        self.onnxruntime_library.clone().map(|path| Library { path, from: "ORT_DYLIB_PATH" })
    }
}

impl Config {
    /// Load the config the CLI asks for: `path` (`--config`), else `LINESIDE_CONFIG`, else
    /// `./config/lineside.toml` if present, else the built-in washer default.
    ///
    /// # Errors
    /// An unreadable file, a TOML syntax error or unknown key (with its line), or a value
    /// that fails validation (naming the key).
    pub fn load(path: Option<&Path>, overrides: &Overrides) -> anyhow::Result<Config> {
        let local = Path::new("config/lineside.toml");
        match path.or(overrides.config_file.as_deref()) {
            Some(p) => Self::from_file(p, overrides),
            None if local.is_file() => Self::from_file(local, overrides),
            None => Self::builtin(overrides),
        }
    }

    /// Read and validate a config file; paths inside are relative to its folder.
    ///
    /// # Errors
    /// As [`Config::load`].
    pub fn from_file(path: &Path, overrides: &Overrides) -> anyhow::Result<Config> {
        use anyhow::Context as _;
        let text = std::fs::read_to_string(path).with_context(|| format!("cannot read config {}", path.display()))?;
        let base = path.parent().unwrap_or(Path::new("."));
        let origin = path.display().to_string();
        let mut config = Self::from_toml(&text, &origin, &|p| Source::File(base.join(p)), overrides)?;
        config.path = Some(path.to_path_buf());
        Ok(config)
    }

    /// The built-in washer config, with its files embedded.
    ///
    /// # Errors
    /// Only if the listen override is not an address.
    pub fn builtin(overrides: &Overrides) -> anyhow::Result<Config> {
        Self::from_toml(builtin::BUILTIN_TOML, BUILTIN_NAME, &builtin::resolve, overrides)
    }

    /// Parse and validate TOML text. `resolve` turns a path written in the file into a source.
    ///
    /// # Errors
    /// As [`Config::load`].
    pub fn from_toml(
        text: &str,
        origin: &str,
        resolve: &dyn Fn(&Path) -> Source,
        overrides: &Overrides,
    ) -> anyhow::Result<Config> {
        // The file alone first: its own mistakes are named with their line.
        let raw: raw::RawConfig = toml::from_str(text).map_err(|e| anyhow::anyhow!("{origin}: {e}"))?;
        let raw = if overrides.env.is_empty() {
            raw
        } else {
            let mut table: toml::Table = toml::from_str(text).map_err(|e| anyhow::anyhow!("{origin}: {e}"))?;
            env::apply(&mut table, &overrides.env)
                .map_err(|e| anyhow::anyhow!("{origin} with the environment: {e}"))?;
            toml::Value::Table(table)
                .try_into()
                .map_err(|e| anyhow::anyhow!("{origin} with the environment's LINESIDE_ variables: {e}"))?
        };
        validate::config(raw, origin, resolve, overrides).map_err(|e| anyhow::anyhow!("{origin}: {e}"))
    }

    /// The model called `name`.
    pub fn model(&self, name: &str) -> Option<&ModelConfig> {
        self.models.iter().find(|m| m.name == name)
    }

    /// The model called `name`, or an error naming the config and the models it has.
    ///
    /// # Errors
    /// No model by that name.
    pub fn named(&self, name: &str) -> anyhow::Result<&ModelConfig> {
        self.model(name).ok_or_else(|| {
            let known: Vec<&str> = self.models.iter().map(|m| m.name.as_str()).collect();
            anyhow::anyhow!("{}: no model named {name:?}; it has {known:?}", self.origin)
        })
    }
}

impl ModelConfig {
    /// A model config for a bare ONNX file (`lineside check model.onnx`): default
    /// preprocessing at `width` x `height` (or the model's own size) with `channels` (`None`:
    /// as the model's input has them), classes named by index, on the engine `overrides` name
    /// (`--engine`, else the default) with their onnxruntime library.
    pub fn bare(
        onnx: PathBuf,
        width: Option<u32>,
        height: Option<u32>,
        channels: Option<Channels>,
        overrides: &Overrides,
    ) -> ModelConfig {
        let given = channels.unwrap_or(Channels::Rgb);
        let name = onnx.file_stem().map_or_else(|| "model".into(), |s| s.to_string_lossy().into_owned());
        ModelConfig {
            name,
            onnx: Source::File(onnx),
            labels: None,
            preprocess: PreprocessConfig {
                width,
                height,
                resize: raw::default_resize(),
                short_side: None,
                pad_value: 0,
                filter: raw::default_filter(),
                channels: given,
                channels_given: channels.is_some(),
                orientation: raw::default_orientation(),
                roi: None,
                min_side: defaults::MIN_SIDE,
                layout: None,
                divisor: raw::default_divisor(),
                mean: vec![0.0; given.count()],
                std: vec![1.0; given.count()],
            },
            batching: validate::batching(raw::RawBatching::default())
                .unwrap_or_else(|e| unreachable!("defaults are valid: {e}")),
            selftest: None,
            scores: ScoresMode::Auto,
            min_score: None,
            engine: overrides.engine.unwrap_or(overrides.default_engine),
            onnxruntime_library: overrides.env_library(),
            decision: None,
            retain: None,
            sha256: None,
            watch: false,
        }
    }

    /// What loading the model needs ([`crate::model::load`]).
    pub fn spec(&self) -> Spec {
        Spec {
            name: self.name.clone(),
            onnx: self.onnx.clone(),
            labels: self.labels.clone(),
            expect: self.preprocess.expect(self.scores),
            engine: self.engine,
            onnxruntime_library: self.onnxruntime_library.clone(),
            stack: self.batching.stack,
            batch_cap: self.batching.batch_cap,
            sha256: self.sha256.clone(),
            kept_stacking: None,
        }
    }
}
