//! Configuration: built-in defaults, then the TOML file, then command-line flags, validated
//! once into the types the rest of lineside uses.
//!
//! `RawConfig` mirrors the TOML file (every key optional where a default exists, unknown keys
//! refused with their line). [`Config::from_toml`] resolves paths against the config file's
//! folder and checks every value, so that no module past this one sees TOML, clap or an
//! unchecked number. The built-in washer default is the repository's own
//! `config/lineside.toml`, compiled in, with its model files embedded in the binary.

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::time::Duration;

use serde::Deserialize;

use crate::model::EngineKind;

/// The documented example config, which is also the built-in default.
const BUILTIN_TOML: &str = include_str!("../config/lineside.toml");

/// Files the built-in config refers to, embedded so that `lineside serve` works anywhere.
/// Keys are the paths exactly as `config/lineside.toml` writes them.
const EMBEDDED: &[(&str, &[u8])] = &[
    ("../models/washers/classifier.onnx", include_bytes!("../models/washers/classifier.onnx")),
    ("../models/washers/classes.txt", include_bytes!("../models/washers/classes.txt")),
];

/// Folders the built-in config refers to (the self-test samples), embedded file by file.
const EMBEDDED_DIRS: &[(&str, &[(&str, &[u8])])] = &[("../models/washers/samples", WASHER_SAMPLES)];

macro_rules! washer_samples {
    ($($f:literal),* $(,)?) => { &[$(($f, include_bytes!(concat!("../models/washers/samples/", $f)))),*] };
}
const WASHER_SAMPLES: &[(&str, &[u8])] = washer_samples!(
    "expected.json",
    "good-01.png",
    "good-02.png",
    "good-03.png",
    "cracked-01.png",
    "cracked-02.png",
    "cracked-03.png",
    "burr-01.png",
    "burr-02.png",
    "burr-03.png",
    "no_hole-01.png",
    "no_hole-02.png",
    "no_hole-03.png",
    "empty-01.png",
    "empty-02.png",
    "empty-03.png",
);

/// Where a config value came from, for error messages.
pub const BUILTIN_NAME: &str = "<built-in washer config>";

/// A validated configuration.
#[derive(Debug, Clone)]
pub struct Config {
    /// Where the config was read from (a path, or [`BUILTIN_NAME`]).
    pub origin: String,
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
}

/// A file the config names, on disk or embedded in the binary.
#[derive(Debug, Clone)]
pub enum Source {
    /// A file on disk (already resolved against the config's folder).
    File(PathBuf),
    /// A file compiled into the binary (the built-in demo).
    Embedded {
        /// The path as the built-in config writes it.
        name: &'static str,
        /// The file's bytes.
        bytes: &'static [u8],
    },
    /// A folder compiled into the binary, file by file (the built-in demo's samples).
    EmbeddedDir {
        /// The path as the built-in config writes it.
        name: &'static str,
        /// File names and bytes.
        files: &'static [(&'static str, &'static [u8])],
    },
}

impl Source {
    /// Read the whole file.
    ///
    /// # Errors
    /// The I/O error, with the path.
    pub fn read(&self) -> anyhow::Result<Vec<u8>> {
        use anyhow::Context as _;
        match self {
            Source::File(p) => std::fs::read(p).with_context(|| format!("cannot read {}", p.display())),
            Source::Embedded { bytes, .. } => Ok(bytes.to_vec()),
            Source::EmbeddedDir { name, .. } => anyhow::bail!("{name} is a folder, not a file"),
        }
    }

    /// Read every file of a folder source, sorted by name (sub-folders are skipped).
    ///
    /// # Errors
    /// An unreadable folder or file, with its path.
    pub fn read_dir(&self) -> anyhow::Result<Vec<(String, Vec<u8>)>> {
        use anyhow::Context as _;
        let mut out = match self {
            Source::File(dir) => {
                let mut out = Vec::new();
                for entry in std::fs::read_dir(dir).with_context(|| format!("cannot read folder {}", dir.display()))? {
                    let path = entry.with_context(|| format!("cannot read folder {}", dir.display()))?.path();
                    if path.is_file() {
                        let bytes = std::fs::read(&path).with_context(|| format!("cannot read {}", path.display()))?;
                        out.push((path.file_name().unwrap_or_default().to_string_lossy().into_owned(), bytes));
                    }
                }
                out
            }
            Source::EmbeddedDir { files, .. } => files.iter().map(|(n, b)| (n.to_string(), b.to_vec())).collect(),
            Source::Embedded { name, .. } => anyhow::bail!("{name} is a file, not a folder"),
        };
        out.sort_by(|a, b| a.0.cmp(&b.0));
        Ok(out)
    }

    /// A name for messages.
    pub fn display(&self) -> String {
        match self {
            Source::File(p) => p.display().to_string(),
            Source::Embedded { name, .. } | Source::EmbeddedDir { name, .. } => format!("{name} (embedded)"),
        }
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
    /// The onnxruntime shared library (`[onnxruntime] library`); `None`: the environment
    /// variable `ORT_DYLIB_PATH`, else the system's `libonnxruntime.so`.
    pub onnxruntime_library: Option<PathBuf>,
}

/// How a model's outputs become scores (`[[models]] scores`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum ScoresMode {
    /// Use the outputs as they are when the graph ends in Softmax or Sigmoid, else softmax them.
    Auto,
    /// Apply softmax.
    Softmax,
    /// Apply the sigmoid to each output.
    Sigmoid,
    /// Use the outputs as they are.
    None,
}

/// Validated `[models.selftest]`.
#[derive(Debug, Clone)]
pub struct SelftestConfig {
    /// The folder of images with their `expected.json`.
    pub samples: Source,
    /// Largest allowed difference of an expected score.
    pub tolerance: f32,
}

/// How to resize a frame to the model's input size.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum ResizeMode {
    /// To width x height, ignoring aspect.
    Stretch,
    /// Short side to `short_side` (default: the crop size W), then the centre W x W (square
    /// inputs).
    Crop,
    /// Scale to fit inside width x height keeping aspect, centred on a `pad_value` canvas.
    Letterbox,
}

/// Whether the EXIF orientation tag is applied (`[models.preprocess] orientation`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Orientation {
    /// Rotate/flip the frame as its EXIF tag says (what a photo viewer shows).
    Exif,
    /// Use the pixels as stored.
    Ignore,
}

/// A region of interest in source pixels (after orientation).
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
pub struct Roi {
    /// Left edge.
    pub x: u32,
    /// Top edge.
    pub y: u32,
    /// Width (at least 1).
    pub w: u32,
    /// Height (at least 1).
    pub h: u32,
}

/// Resampling filter, with Pillow's (antialiased) semantics.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Filter {
    /// Nearest neighbour.
    Nearest,
    /// Triangle filter, widened when downscaling.
    Bilinear,
    /// Cubic (a = -0.5), widened when downscaling.
    Bicubic,
    /// Lanczos, 3 lobes.
    Lanczos,
    /// Box filter (Pillow's BOX): the area average.
    Area,
}

/// Channel order of the model's input.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Channels {
    /// Red, green, blue.
    Rgb,
    /// Blue, green, red (models trained on OpenCV-loaded frames).
    Bgr,
    /// One luma channel (ITU-R BT.601 weights).
    Gray,
}

impl Channels {
    /// Number of channels in the tensor.
    pub fn count(self) -> usize {
        match self {
            Channels::Rgb | Channels::Bgr => 3,
            Channels::Gray => 1,
        }
    }
}

/// Memory layout of the input tensor.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Layout {
    /// Batch, channels, height, width.
    Nchw,
    /// Batch, height, width, channels.
    Nhwc,
}

impl std::fmt::Display for Layout {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            Layout::Nchw => "nchw",
            Layout::Nhwc => "nhwc",
        })
    }
}

/// Validated `[models.preprocess]`.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct PreprocessConfig {
    /// Model input width in pixels (`None`: taken from the model, which must fix it).
    pub width: Option<u32>,
    /// Model input height in pixels (`None`: taken from the model, which must fix it).
    pub height: Option<u32>,
    /// Resize mode.
    pub resize: ResizeMode,
    /// For `resize = "crop"`: the short side in pixels the frame is resized to before the
    /// centre crop (`None`: the crop size, so the crop takes the whole short side).
    pub short_side: Option<u32>,
    /// For `resize = "letterbox"`: the level (0..255) of the padding, in every channel.
    pub pad_value: u8,
    /// Resampling filter.
    pub filter: Filter,
    /// Channel order. When the config has no `channels` key and nothing else fixes the count
    /// (`channels_given` false), this is a placeholder that the model's input replaces at load:
    /// one channel is gray, three are RGB ([`PreprocessConfig::follow_model`]).
    pub channels: Channels,
    /// Whether the config fixed the channels (`channels`, or `mean`/`std`/`normalize` that
    /// imply a count).
    #[serde(skip)]
    pub channels_given: bool,
    /// Whether EXIF orientation is applied.
    pub orientation: Orientation,
    /// Crop this region (source pixels, after orientation) before anything else.
    pub roi: Option<Roi>,
    /// Frames with a side shorter than this are refused (422 `too_small`).
    pub min_side: u32,
    /// Layout, when the config states one (otherwise detected from the model).
    pub layout: Option<Layout>,
    /// x = (pixel / divisor - mean\[c\]) / std\[c\].
    pub divisor: f32,
    /// Per-channel mean, in the model's channel order.
    pub mean: Vec<f32>,
    /// Per-channel standard deviation, in the model's channel order.
    pub std: Vec<f32>,
}

/// How many inference lanes a model gets.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Lanes {
    /// One lane per available core (see `batch` for the rule).
    Auto,
    /// Exactly this many.
    Fixed(usize),
}

/// Validated `[models.batching]`.
#[derive(Debug, Clone, PartialEq)]
pub struct BatchingConfig {
    /// Most requests one inference pass takes.
    pub batch_cap: usize,
    /// Longest the first request of a pass may wait for company (engines that stack only).
    pub gather: Duration,
    /// Requests waiting per model before new ones get 503 `overloaded`.
    pub backlog: usize,
    /// Parallel inference lanes.
    pub lanes: Lanes,
    /// Threads inside one lane's inference.
    pub lane_threads: usize,
    /// Whether passes are stacked into one tensor (`stack`).
    pub stack: StackMode,
}

/// `[models.batching] stack`: whether a formed pass runs as one stacked tensor.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum StackMode {
    /// Decided at load: never on an engine or model that cannot stack, else by calibration.
    Auto,
    /// Always stack (`stack = true`); refused where the engine or model cannot.
    Always,
    /// Never stack (`stack = false`).
    Never,
}

// ----------------------------------------------------------------------------- raw TOML

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawConfig {
    #[serde(default)]
    server: RawServer,
    #[serde(default)]
    models: Vec<RawModel>,
    onnxruntime: Option<RawOnnxruntime>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawOnnxruntime {
    library: Option<PathBuf>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawServer {
    listen: Option<String>,
    body_limit_bytes: Option<u64>,
    max_pixels: Option<u64>,
    decode_threads: Option<usize>,
    decode_backlog: Option<usize>,
    decode_inline_pixels: Option<u64>,
    http_threads: Option<usize>,
    header_timeout_ms: Option<u64>,
    drain_ms: Option<u64>,
    deadline_ms: Option<u64>,
    body_timeout_ms: Option<u64>,
    stall_ms: Option<u64>,
    ready_backlog: Option<f64>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawModel {
    name: String,
    onnx: PathBuf,
    labels: PathBuf,
    preprocess: RawPreprocess,
    #[serde(default)]
    batching: RawBatching,
    selftest: Option<RawSelftest>,
    #[serde(default = "default_scores")]
    scores: ScoresMode,
    min_score: Option<f32>,
    engine: Option<EngineKind>,
}

fn default_scores() -> ScoresMode {
    ScoresMode::Auto
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawSelftest {
    samples: PathBuf,
    tolerance: Option<f32>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawPreprocess {
    width: Option<u32>,
    height: Option<u32>,
    #[serde(default = "default_resize")]
    resize: ResizeMode,
    short_side: Option<i64>,
    pad_value: Option<i64>,
    #[serde(default = "default_filter")]
    filter: Filter,
    channels: Option<Channels>,
    #[serde(default = "default_orientation")]
    orientation: Orientation,
    roi: Option<Vec<i64>>,
    min_side: Option<i64>,
    layout: Option<Layout>,
    #[serde(default = "default_divisor")]
    divisor: f32,
    normalize: Option<String>,
    mean: Option<Vec<f32>>,
    std: Option<Vec<f32>>,
}

fn default_orientation() -> Orientation {
    Orientation::Exif
}

fn default_resize() -> ResizeMode {
    ResizeMode::Stretch
}
fn default_filter() -> Filter {
    Filter::Bilinear
}
fn default_divisor() -> f32 {
    255.0
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawBatching {
    batch_cap: Option<usize>,
    gather_us: Option<u64>,
    backlog: Option<usize>,
    lanes: Option<RawLanes>,
    lane_threads: Option<usize>,
    stack: Option<RawStack>,
}

#[derive(Debug, Deserialize)]
#[serde(untagged)]
enum RawStack {
    Flag(bool),
    Word(String),
}

#[derive(Debug, Deserialize)]
#[serde(untagged)]
enum RawLanes {
    Count(i64),
    Word(String),
}

/// Defaults, in one place (docs/configuration.md lists the same).
pub mod defaults {
    /// `[server] listen`.
    pub const LISTEN: &str = "127.0.0.1:8080";
    /// `[server] body_limit_bytes`: 16 MiB.
    pub const BODY_LIMIT_BYTES: u64 = 16 * 1024 * 1024;
    /// `[server] max_pixels`: 40 megapixels.
    pub const MAX_PIXELS: u64 = 40_000_000;
    /// `[server] header_timeout_ms`.
    pub const HEADER_TIMEOUT_MS: u64 = 5_000;
    /// `[server] deadline_ms`.
    pub const DEADLINE_MS: u64 = 2_000;
    /// `[server] body_timeout_ms`.
    pub const BODY_TIMEOUT_MS: u64 = 10_000;
    /// `[server] stall_ms`.
    pub const STALL_MS: u64 = 30_000;
    /// `[server] ready_backlog`.
    pub const READY_BACKLOG: f64 = 0.9;
    /// `[server] drain_ms`.
    pub const DRAIN_MS: u64 = 10_000;
    /// `[server] decode_backlog`.
    pub const DECODE_BACKLOG: usize = 256;
    /// `[server] decode_inline_pixels`: 128 x 128. A 96x96 PNG decodes and preprocesses in
    /// about 0.08 ms here (a 128x128 one about twice that), less than the CPU that handing
    /// it to a pool thread and back cost per request in the serving bench; larger frames go
    /// to the pool, so that a slow decode never holds the HTTP thread.
    pub const DECODE_INLINE_PIXELS: u64 = 128 * 128;
    /// `[server] http_threads`.
    pub const HTTP_THREADS: usize = 1;
    /// `[models.batching] batch_cap`.
    pub const BATCH_CAP: usize = 8;
    /// `[models.batching] gather_us`.
    pub const GATHER_US: u64 = 2_000;
    /// `[models.batching] backlog`.
    pub const BACKLOG: usize = 64;
    /// `[models.batching] lane_threads`.
    pub const LANE_THREADS: usize = 1;
    /// `[models.selftest] tolerance`.
    pub const SELFTEST_TOLERANCE: f32 = 1e-4;
    /// `[models.preprocess] min_side`.
    pub const MIN_SIDE: u32 = 8;
    /// ImageNet channel means in RGB order (common practice; `normalize = "imagenet"`).
    pub const IMAGENET_MEAN: [f32; 3] = [0.485, 0.456, 0.406];
    /// ImageNet channel standard deviations in RGB order (common practice).
    pub const IMAGENET_STD: [f32; 3] = [0.229, 0.224, 0.225];
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

impl BatchingOverrides {
    fn apply(&self, raw: &mut RawBatching) {
        raw.batch_cap = self.batch_cap.or(raw.batch_cap);
        raw.gather_us = self.gather_us.or(raw.gather_us);
        raw.lane_threads = self.lane_threads.or(raw.lane_threads);
        if let Some(l) = &self.lanes {
            raw.lanes = Some(l.parse::<i64>().map_or_else(|_| RawLanes::Word(l.clone()), RawLanes::Count));
        }
    }
}

impl Config {
    /// Load the config the CLI asks for: `path`, else `./config/lineside.toml` if present,
    /// else the built-in washer default.
    ///
    /// # Errors
    /// An unreadable file, a TOML syntax error or unknown key (with its line), or a value
    /// that fails validation (naming the key).
    pub fn load(path: Option<&Path>, overrides: &Overrides) -> anyhow::Result<Config> {
        let local = Path::new("config/lineside.toml");
        match path {
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
        Self::from_toml(&text, &origin, &|p| Source::File(base.join(p)), overrides)
    }

    /// The built-in washer config, with its files embedded.
    ///
    /// # Errors
    /// Only if the listen override is not an address.
    pub fn builtin(overrides: &Overrides) -> anyhow::Result<Config> {
        let embedded = |p: &Path| {
            let key = p.to_string_lossy();
            if let Some((name, bytes)) = EMBEDDED.iter().find(|(name, _)| *name == key) {
                return Source::Embedded { name, bytes };
            }
            match EMBEDDED_DIRS.iter().find(|(name, _)| *name == key) {
                Some((name, files)) => Source::EmbeddedDir { name, files },
                // Unreachable for the shipped config (a unit test checks every path).
                None => Source::File(p.to_path_buf()),
            }
        };
        Self::from_toml(BUILTIN_TOML, BUILTIN_NAME, &embedded, overrides)
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
        let raw: RawConfig = toml::from_str(text).map_err(|e| anyhow::anyhow!("{origin}: {e}"))?;
        validate(raw, origin, resolve, overrides).map_err(|e| anyhow::anyhow!("{origin}: {e}"))
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

fn validate(
    raw: RawConfig,
    origin: &str,
    resolve: &dyn Fn(&Path) -> Source,
    overrides: &Overrides,
) -> Result<Config, String> {
    let s = raw.server;
    let listen_text = overrides.listen.clone().or(s.listen).unwrap_or_else(|| defaults::LISTEN.into());
    let listen: SocketAddr = listen_text
        .parse()
        .map_err(|_| format!("server.listen = {listen_text:?} is not an address like \"127.0.0.1:8080\""))?;
    let body_limit = s.body_limit_bytes.unwrap_or(defaults::BODY_LIMIT_BYTES);
    if body_limit == 0 || body_limit > 1 << 30 {
        return Err(format!("server.body_limit_bytes = {body_limit}: expected 1 ..= 1073741824"));
    }
    let max_pixels = s.max_pixels.unwrap_or(defaults::MAX_PIXELS);
    if max_pixels == 0 {
        return Err("server.max_pixels = 0: expected at least 1".into());
    }
    let cores = std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1);
    let decode_threads = s.decode_threads.unwrap_or(cores);
    if decode_threads == 0 || decode_threads > 256 {
        return Err(format!("server.decode_threads = {decode_threads}: expected 1 ..= 256"));
    }
    let decode_backlog = s.decode_backlog.unwrap_or(defaults::DECODE_BACKLOG);
    if decode_backlog == 0 {
        return Err("server.decode_backlog = 0: expected at least 1".into());
    }
    let http_threads = overrides.http_threads.or(s.http_threads).unwrap_or(defaults::HTTP_THREADS);
    if http_threads == 0 || http_threads > 256 {
        return Err(format!("server.http_threads = {http_threads}: expected 1 ..= 256"));
    }
    let decode_inline_pixels = s.decode_inline_pixels.unwrap_or(defaults::DECODE_INLINE_PIXELS);
    if decode_inline_pixels > 1 << 20 {
        return Err(format!(
            "server.decode_inline_pixels = {decode_inline_pixels}: expected 0 ..= 1048576 (frames decoded on an HTTP \
             thread hold it for the whole decode; 0 sends every frame to the decode pool)"
        ));
    }
    let server = ServerConfig {
        listen,
        body_limit_bytes: body_limit as usize,
        max_pixels,
        decode_threads,
        decode_backlog,
        decode_inline_pixels,
        http_threads,
        header_timeout: Duration::from_millis(positive(
            "server.header_timeout_ms",
            s.header_timeout_ms,
            defaults::HEADER_TIMEOUT_MS,
        )?),
        drain: Duration::from_millis(s.drain_ms.unwrap_or(defaults::DRAIN_MS)),
        deadline: Duration::from_millis(positive("server.deadline_ms", s.deadline_ms, defaults::DEADLINE_MS)?),
        body_timeout: Duration::from_millis(positive(
            "server.body_timeout_ms",
            s.body_timeout_ms,
            defaults::BODY_TIMEOUT_MS,
        )?),
        stall: Duration::from_millis(positive("server.stall_ms", s.stall_ms, defaults::STALL_MS)?),
        ready_backlog: match s.ready_backlog.unwrap_or(defaults::READY_BACKLOG) {
            f if f > 0.0 && f <= 1.0 => f,
            f => return Err(format!("server.ready_backlog = {f}: expected a share 0 < f <= 1 (0.9 = 90% full)")),
        },
    };

    if raw.models.is_empty() {
        return Err("no [[models]] table: add at least one model (see config/lineside.toml)".into());
    }
    let onnxruntime_library = raw.onnxruntime.and_then(|o| o.library).map(|p| match resolve(&p) {
        Source::File(resolved) => resolved,
        _ => p,
    });
    let mut models: Vec<ModelConfig> = Vec::new();
    for (i, m) in raw.models.into_iter().enumerate() {
        let ctx = format!("[[models]] #{} ({:?})", i + 1, m.name);
        if m.name.is_empty() || !m.name.chars().all(|c| c.is_ascii_alphanumeric() || c == '_' || c == '-' || c == '.') {
            return Err(format!("{ctx}: name must be non-empty and use only letters, digits, '_', '-', '.'"));
        }
        if models.iter().any(|o| o.name == m.name) {
            return Err(format!("{ctx}: the name {:?} is used twice", m.name));
        }
        let preprocess = validate_preprocess(m.preprocess).map_err(|e| format!("{ctx}: {e}"))?;
        if let Some(v) = m.min_score.filter(|v| !(v.is_finite() && (0.0..=1.0).contains(v))) {
            return Err(format!("{ctx}: min_score = {v}: expected a score 0 ..= 1"));
        }
        let min_score = m.min_score;
        let engine = match (overrides.engine, m.engine) {
            (Some(e), _) | (None, Some(e)) => e,
            (None, None) => default_engine()?,
        };
        let engine = engine.require_built().map_err(|e| format!("{ctx}: {e}"))?;
        let mut raw_batching = m.batching;
        overrides.batching.apply(&mut raw_batching);
        let batching = validate_batching(raw_batching).map_err(|e| format!("{ctx}: {e}"))?;
        let selftest = match m.selftest {
            None => None,
            Some(t) => {
                let tolerance = t.tolerance.unwrap_or(defaults::SELFTEST_TOLERANCE);
                if !(tolerance.is_finite() && tolerance >= 0.0) {
                    return Err(format!("{ctx}: selftest.tolerance = {tolerance}: expected a number >= 0"));
                }
                Some(SelftestConfig { samples: resolve(&t.samples), tolerance })
            }
        };
        models.push(ModelConfig {
            name: m.name,
            onnx: resolve(&m.onnx),
            labels: Some(resolve(&m.labels)),
            preprocess,
            batching,
            selftest,
            scores: m.scores,
            min_score,
            engine,
            onnxruntime_library: onnxruntime_library.clone(),
        });
    }
    Ok(Config { origin: origin.to_string(), server, models })
}

impl ModelConfig {
    /// A model config for a bare ONNX file (`lineside check model.onnx`): default
    /// preprocessing at `width` x `height` (or the model's own size) with `channels` (`None`:
    /// as the model's input has them), classes named by index.
    pub fn bare(onnx: PathBuf, width: Option<u32>, height: Option<u32>, channels: Option<Channels>) -> ModelConfig {
        let given = channels.unwrap_or(Channels::Rgb);
        let name = onnx.file_stem().map_or_else(|| "model".into(), |s| s.to_string_lossy().into_owned());
        ModelConfig {
            name,
            onnx: Source::File(onnx),
            labels: None,
            preprocess: PreprocessConfig {
                width,
                height,
                resize: default_resize(),
                short_side: None,
                pad_value: 0,
                filter: default_filter(),
                channels: given,
                channels_given: channels.is_some(),
                orientation: default_orientation(),
                roi: None,
                min_side: defaults::MIN_SIDE,
                layout: None,
                divisor: default_divisor(),
                mean: vec![0.0; given.count()],
                std: vec![1.0; given.count()],
            },
            batching: validate_batching(RawBatching::default())
                .unwrap_or_else(|e| unreachable!("defaults are valid: {e}")),
            selftest: None,
            scores: ScoresMode::Auto,
            min_score: None,
            engine: default_engine().unwrap_or_default(),
            onnxruntime_library: None,
        }
    }
}

/// The engine for models without an `engine` key: `LINESIDE_ENGINE` if set, else tract.
///
/// # Errors
/// `LINESIDE_ENGINE` names no engine.
pub fn default_engine() -> Result<EngineKind, String> {
    match std::env::var(ENGINE_ENV) {
        Ok(v) if !v.is_empty() => v.parse().map_err(|e| format!("{ENGINE_ENV}={v}: {e}")),
        _ => Ok(EngineKind::Tract),
    }
}

/// Environment variable naming the engine for models without an `engine` key.
pub const ENGINE_ENV: &str = "LINESIDE_ENGINE";

/// The channels a `[models.preprocess]` table fixes, and whether it fixes them: the
/// `channels` key; else a `mean`/`std` of one value (gray) or three (RGB), or `normalize`
/// (three); else none (RGB as a placeholder until the model's input decides).
fn implied_channels(p: &RawPreprocess) -> Result<(Channels, bool), String> {
    if let Some(c) = p.channels {
        return Ok((c, true));
    }
    if p.normalize.is_some() {
        return Ok((Channels::Rgb, true));
    }
    let given = [("mean", &p.mean), ("std", &p.std)].into_iter().find_map(|(k, v)| Some((k, v.as_ref()?.len())));
    match given {
        None => Ok((Channels::Rgb, false)),
        Some((_, 1)) => Ok((Channels::Gray, true)),
        Some((_, 3)) => Ok((Channels::Rgb, true)),
        Some((key, n)) => {
            Err(format!("preprocess.{key} has {n} values, expected 3 (rgb, bgr) or 1 (gray): one per model channel"))
        }
    }
}

/// The error for a `short_side` smaller than the square crop it must contain.
pub fn short_side_below_crop(short_side: u32, crop: u32) -> String {
    format!(
        "preprocess.short_side = {short_side} is below the crop size {crop}: the centre crop must fit inside the \
         resized frame; set short_side >= {crop} (e.g. 256 for a 224 crop) or remove it (the crop size)"
    )
}

impl PreprocessConfig {
    /// These settings for a model whose input has `model_channels` channels: where the config
    /// left the channels open, 1 is gray and 3 is RGB, with the default mean and std.
    pub fn follow_model(mut self, model_channels: usize) -> PreprocessConfig {
        if !self.channels_given {
            self.channels = if model_channels == 1 { Channels::Gray } else { Channels::Rgb };
            let n = self.channels.count();
            (self.mean, self.std) = (vec![0.0; n], vec![1.0; n]);
            self.channels_given = true;
        }
        self
    }
}

fn positive(key: &str, v: Option<u64>, default: u64) -> Result<u64, String> {
    match v.unwrap_or(default) {
        0 => Err(format!("{key} = 0: expected at least 1")),
        n => Ok(n),
    }
}

fn validate_preprocess(p: RawPreprocess) -> Result<PreprocessConfig, String> {
    for (key, v) in [("width", p.width), ("height", p.height)] {
        let Some(v) = v else { continue };
        if !(1..=8192).contains(&v) {
            return Err(format!("preprocess.{key} = {v}: expected 1 ..= 8192"));
        }
    }
    if !(p.divisor.is_finite() && p.divisor > 0.0) {
        return Err(format!(
            "preprocess.divisor = {}: expected a positive number (255.0 for [0, 1] inputs)",
            p.divisor
        ));
    }
    let (channels, channels_given) = implied_channels(&p)?;
    let n = channels.count();
    let name = format!("{channels:?}").to_lowercase();
    let per_channel = |key: &str, v: Option<Vec<f32>>, default: f32| -> Result<Vec<f32>, String> {
        let v = v.unwrap_or_else(|| vec![default; n]);
        if v.len() != n {
            return Err(format!(
                "preprocess.{key} has {} values, expected {n} for channels = {name:?} (in the model's channel order)",
                v.len()
            ));
        }
        if let Some(bad) = v.iter().find(|x| !x.is_finite()) {
            return Err(format!("preprocess.{key} contains {bad}: expected finite numbers"));
        }
        Ok(v)
    };
    let (mean, std) = match p.normalize.as_deref() {
        None => (per_channel("mean", p.mean, 0.0)?, per_channel("std", p.std, 1.0)?),
        Some(_) if p.mean.is_some() || p.std.is_some() => {
            return Err("preprocess.normalize and preprocess.mean/std are both given: keep one \
                 (normalize = \"imagenet\" stands for the ImageNet mean and std)"
                .into());
        }
        Some("imagenet") => {
            let (m, s) = (defaults::IMAGENET_MEAN, defaults::IMAGENET_STD);
            match channels {
                Channels::Rgb => (m.to_vec(), s.to_vec()),
                // Listed in the model's channel order, after the swap.
                Channels::Bgr => (vec![m[2], m[1], m[0]], vec![s[2], s[1], s[0]]),
                Channels::Gray => {
                    return Err("preprocess.normalize = \"imagenet\" needs 3 channels (channels = \"gray\"): \
                         give mean = [..] and std = [..] with one value instead"
                        .into());
                }
            }
        }
        Some(other) => return Err(format!("preprocess.normalize = {other:?}: expected \"imagenet\"")),
    };
    if let Some(bad) = std.iter().find(|x| **x <= 0.0) {
        return Err(format!("preprocess.std contains {bad}: every std must be > 0"));
    }
    let short_side = match (p.short_side, p.resize) {
        (None, _) => None,
        (Some(v), ResizeMode::Crop) => {
            let v = u32::try_from(v).ok().filter(|v| (1..=65535).contains(v)).ok_or_else(|| {
                format!("preprocess.short_side = {v}: expected 1 ..= 65535 pixels (256 for the usual 256 -> 224)")
            })?;
            // The crop is square; its size is the model's when the config leaves it out
            // (checked again at load, against the model's size).
            if let Some(crop) = p.width.max(p.height).filter(|&c| v < c) {
                return Err(short_side_below_crop(v, crop));
            }
            Some(v)
        }
        (Some(_), mode) => {
            let mode = format!("{mode:?}").to_lowercase();
            return Err(format!("preprocess.short_side applies only to resize = \"crop\" (resize is {mode:?})"));
        }
    };
    let pad_value = match (p.pad_value, p.resize) {
        (None, _) => 0,
        (Some(v), ResizeMode::Letterbox) => {
            u8::try_from(v).map_err(|_| format!("preprocess.pad_value = {v}: expected a level 0 ..= 255"))?
        }
        (Some(_), mode) => {
            let mode = format!("{mode:?}").to_lowercase();
            return Err(format!("preprocess.pad_value applies only to resize = \"letterbox\" (resize is {mode:?})"));
        }
    };
    let roi = match p.roi {
        None => None,
        Some(v) => {
            let ok = v.len() == 4 && v.iter().all(|x| (0..=i64::from(u32::MAX)).contains(x)) && v[2] > 0 && v[3] > 0;
            if !ok {
                return Err(format!(
                    "preprocess.roi = {v:?}: expected [x, y, w, h] in source pixels, x and y >= 0, w and h >= 1"
                ));
            }
            Some(Roi { x: v[0] as u32, y: v[1] as u32, w: v[2] as u32, h: v[3] as u32 })
        }
    };
    let min_side = match p.min_side {
        None => defaults::MIN_SIDE,
        Some(v) if (1..=65535).contains(&v) => v as u32,
        Some(v) => return Err(format!("preprocess.min_side = {v}: expected 1 ..= 65535")),
    };
    Ok(PreprocessConfig {
        width: p.width,
        height: p.height,
        resize: p.resize,
        short_side,
        pad_value,
        filter: p.filter,
        channels,
        channels_given,
        orientation: p.orientation,
        roi,
        min_side,
        layout: p.layout,
        divisor: p.divisor,
        mean,
        std,
    })
}

fn validate_batching(b: RawBatching) -> Result<BatchingConfig, String> {
    let batch_cap = b.batch_cap.unwrap_or(defaults::BATCH_CAP);
    if !(1..=256).contains(&batch_cap) {
        return Err(format!("batching.batch_cap = {batch_cap}: expected 1 ..= 256"));
    }
    let gather_us = b.gather_us.unwrap_or(defaults::GATHER_US);
    if gather_us > 1_000_000 {
        return Err(format!("batching.gather_us = {gather_us}: expected at most 1000000 (one second)"));
    }
    let backlog = b.backlog.unwrap_or(defaults::BACKLOG);
    if backlog == 0 {
        return Err("batching.backlog = 0: expected at least 1".into());
    }
    let lanes = match b.lanes {
        None => Lanes::Auto,
        Some(RawLanes::Word(w)) if w == "auto" => Lanes::Auto,
        Some(RawLanes::Count(n)) if (1..=64).contains(&n) => Lanes::Fixed(n as usize),
        Some(RawLanes::Word(w)) => {
            return Err(format!("batching.lanes = {w:?}: expected \"auto\" or a number 1 ..= 64"));
        }
        Some(RawLanes::Count(n)) => {
            return Err(format!("batching.lanes = {n}: expected \"auto\" or a number 1 ..= 64"));
        }
    };
    let lane_threads = b.lane_threads.unwrap_or(defaults::LANE_THREADS);
    if !(1..=64).contains(&lane_threads) {
        return Err(format!("batching.lane_threads = {lane_threads}: expected 1 ..= 64"));
    }
    let stack = match b.stack {
        None => StackMode::Auto,
        Some(RawStack::Word(w)) if w == "auto" => StackMode::Auto,
        Some(RawStack::Flag(true)) => StackMode::Always,
        Some(RawStack::Flag(false)) => StackMode::Never,
        Some(RawStack::Word(w)) => return Err(format!("batching.stack = {w:?}: expected \"auto\", true or false")),
    };
    Ok(BatchingConfig { batch_cap, gather: Duration::from_micros(gather_us), backlog, lanes, lane_threads, stack })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse(text: &str) -> Result<Config, String> {
        Config::from_toml(text, "test.toml", &|p| Source::File(PathBuf::from("/base").join(p)), &Overrides::default())
            .map_err(|e| format!("{e:#}"))
    }

    const MINIMAL: &str = r#"
[[models]]
name = "m"
onnx = "m.onnx"
labels = "m.txt"
[models.preprocess]
width = 32
height = 32
"#;

    #[test]
    fn builtin_config_embeds_every_file_it_names() {
        let cfg = Config::builtin(&Overrides::default()).expect("built-in config is valid");
        assert_eq!(cfg.models.len(), 1);
        let m = &cfg.models[0];
        assert_eq!(m.name, "washers");
        for src in [&m.onnx, m.labels.as_ref().unwrap()] {
            assert!(matches!(src, Source::Embedded { .. }), "not embedded: {src:?}");
        }
        let selftest = m.selftest.as_ref().expect("the washer bundle has a self-test");
        assert!(matches!(selftest.samples, Source::EmbeddedDir { .. }), "not embedded: {:?}", selftest.samples);
        // every sample expected.json lists is embedded
        let files = selftest.samples.read_dir().unwrap();
        let expected: serde_json::Value =
            serde_json::from_slice(&files.iter().find(|(n, _)| n == "expected.json").unwrap().1).unwrap();
        for name in expected.as_object().unwrap().keys() {
            assert!(files.iter().any(|(n, _)| n == name), "{name} is not embedded");
        }
        assert_eq!(cfg.server.listen.to_string(), "127.0.0.1:8080");
    }

    #[test]
    fn defaults_fill_missing_keys() {
        let cfg = parse(MINIMAL).unwrap();
        let m = &cfg.models[0];
        assert_eq!(m.batching.batch_cap, 8);
        assert_eq!(m.batching.gather, Duration::from_micros(2000));
        assert_eq!(m.batching.backlog, 64);
        assert_eq!(m.batching.lanes, Lanes::Auto);
        assert_eq!(m.preprocess.mean, vec![0.0; 3]);
        assert_eq!(m.preprocess.std, vec![1.0; 3]);
        assert_eq!(cfg.server.body_limit_bytes, 16 * 1024 * 1024);
        assert_eq!(cfg.server.http_threads, 1);
        assert_eq!(cfg.server.decode_inline_pixels, 16384);
        assert!(matches!(&m.onnx, Source::File(p) if p == Path::new("/base/m.onnx")));
    }

    #[test]
    fn unknown_key_is_named_with_its_line() {
        let text = format!("{MINIMAL}colour = \"red\"\n");
        let err = parse(&text).unwrap_err();
        assert!(err.contains("colour"), "{err}");
        assert!(err.contains("line 9"), "{err}");
        assert!(err.starts_with("test.toml"), "{err}");
    }

    #[test]
    fn unknown_key_in_server_is_refused() {
        let err = parse(&format!("[server]\nlisten_port = 1\n{MINIMAL}")).unwrap_err();
        assert!(err.contains("listen_port") && err.contains("line 2"), "{err}");
    }

    #[test]
    fn mean_length_must_match_channels() {
        let text = MINIMAL.replace("height = 32", "height = 32\nmean = [0.5, 0.5]");
        let err = parse(&text).unwrap_err();
        assert!(err.contains("preprocess.mean has 2 values, expected 3"), "{err}");
        let gray = MINIMAL.replace("height = 32", "height = 32\nchannels = \"gray\"\nmean = [0.5]\nstd = [0.25]");
        assert_eq!(parse(&gray).unwrap().models[0].preprocess.std, vec![0.25]);
    }

    #[test]
    fn channels_left_open_follow_the_model_and_mean_std_imply_them() {
        let open = parse(MINIMAL).unwrap().models[0].preprocess.clone();
        assert!(!open.channels_given);
        let gray = open.clone().follow_model(1);
        assert_eq!((gray.channels, gray.mean, gray.std), (Channels::Gray, vec![0.0], vec![1.0]));
        assert_eq!(open.follow_model(3).channels, Channels::Rgb);
        let one = parse(&MINIMAL.replace("height = 32", "height = 32\nmean = [0.5]\nstd = [0.25]")).unwrap();
        let p = one.models[0].preprocess.clone();
        assert_eq!((p.channels, p.channels_given), (Channels::Gray, true));
        // A stated channel order is never replaced by the model's.
        let bgr = parse(&MINIMAL.replace("height = 32", "height = 32\nchannels = \"bgr\"")).unwrap();
        assert_eq!(bgr.models[0].preprocess.clone().follow_model(1).channels, Channels::Bgr);
    }

    #[test]
    fn bad_values_are_refused_with_the_key() {
        for (edit, needle) in [
            ("height = 32\nstd = [1.0, 0.0, 1.0]", "every std must be > 0"),
            ("height = 32\ndivisor = 0.0", "preprocess.divisor"),
            ("height = 32\nresize = \"squash\"", "squash"),
            ("height = 0", "preprocess.height = 0"),
        ] {
            let err = parse(&MINIMAL.replace("height = 32", edit)).unwrap_err();
            assert!(err.contains(needle), "{edit}: {err}");
        }
        for (batching, needle) in [
            ("batch_cap = 0", "batching.batch_cap = 0"),
            ("lanes = \"many\"", "batching.lanes"),
            ("lanes = 0", "batching.lanes = 0"),
            ("backlog = 0", "batching.backlog = 0"),
            ("lane_threads = 0", "lane_threads = 0"),
        ] {
            let err = parse(&format!("{MINIMAL}[models.batching]\n{batching}\n")).unwrap_err();
            assert!(err.contains(needle), "{batching}: {err}");
        }
        for (server, needle) in [
            ("listen = \"localhost\"", "server.listen"),
            ("http_threads = 0", "server.http_threads = 0"),
            ("decode_inline_pixels = 5000000", "server.decode_inline_pixels = 5000000"),
            ("decode_threads = 0", "server.decode_threads = 0"),
        ] {
            let err = parse(&format!("[server]\n{server}\n{MINIMAL}")).unwrap_err();
            assert!(err.contains(needle), "{server}: {err}");
        }
        let zero = parse(&format!("[server]\ndecode_inline_pixels = 0\nhttp_threads = 2\n{MINIMAL}")).unwrap();
        assert_eq!((zero.server.decode_inline_pixels, zero.server.http_threads), (0, 2));
        // `--http-threads` wins over the file, and is checked like the key.
        let flag = |n| Overrides { http_threads: Some(n), ..Overrides::default() };
        let text = format!("[server]\nhttp_threads = 2\n{MINIMAL}");
        let over = Config::from_toml(&text, "test.toml", &|p| Source::File(p.to_path_buf()), &flag(3)).unwrap();
        assert_eq!(over.server.http_threads, 3);
        let err = Config::from_toml(&text, "test.toml", &|p| Source::File(p.to_path_buf()), &flag(0)).unwrap_err();
        assert!(format!("{err:#}").contains("server.http_threads = 0"), "{err:#}");
    }

    #[test]
    fn duplicate_model_names_and_no_models_are_refused() {
        let twice = format!("{MINIMAL}{MINIMAL}");
        assert!(parse(&twice).unwrap_err().contains("used twice"));
        assert!(parse("[server]\n").unwrap_err().contains("no [[models]]"));
    }

    #[test]
    fn listen_flag_overrides_file() {
        let o = Overrides { listen: Some("0.0.0.0:9000".into()), ..Default::default() };
        let cfg = Config::builtin(&o).unwrap();
        assert_eq!(cfg.server.listen.to_string(), "0.0.0.0:9000");
    }

    #[test]
    fn lanes_accepts_number_or_auto() {
        let cfg = parse(&format!("{MINIMAL}[models.batching]\nlanes = 3\n")).unwrap();
        assert_eq!(cfg.models[0].batching.lanes, Lanes::Fixed(3));
        let cfg = parse(&format!("{MINIMAL}[models.batching]\nlanes = \"auto\"\n")).unwrap();
        assert_eq!(cfg.models[0].batching.lanes, Lanes::Auto);
    }

    #[test]
    fn preprocess_keys_are_checked_with_their_names() {
        for (edit, needle) in [
            ("height = 32\nnormalize = \"imagenet\"\nmean = [0.5, 0.5, 0.5]", "both given"),
            ("height = 32\nnormalize = \"coco\"", "normalize = \"coco\""),
            ("height = 32\nchannels = \"gray\"\nnormalize = \"imagenet\"", "needs 3 channels"),
            ("height = 32\nresize = \"crop\"\nshort_side = 0", "short_side = 0"),
            ("height = 32\nresize = \"crop\"\nshort_side = 31", "short_side = 31 is below the crop size 32"),
            ("height = 32\nshort_side = 36", "applies only to resize = \"crop\""),
            ("height = 32\nresize = \"letterbox\"\npad_value = 300", "pad_value = 300"),
            ("height = 32\npad_value = 40", "applies only to resize = \"letterbox\""),
            ("height = 32\nroi = [0, 0, 10]", "preprocess.roi = [0, 0, 10]"),
            ("height = 32\nroi = [0, 0, 0, 10]", "w and h >= 1"),
            ("height = 32\nmin_side = 0", "min_side = 0"),
            ("height = 32\norientation = \"auto\"", "auto"),
        ] {
            let err = parse(&MINIMAL.replace("height = 32", edit)).unwrap_err();
            assert!(err.contains(needle), "{edit}: {err}");
        }
    }

    #[test]
    fn imagenet_statistics_follow_the_channel_order() {
        let bgr = MINIMAL.replace("height = 32", "height = 32\nchannels = \"bgr\"\nnormalize = \"imagenet\"");
        let p = parse(&bgr).unwrap().models[0].preprocess.clone();
        // ImageNet statistics in RGB order (common practice), listed here in BGR order.
        assert_eq!(p.mean, vec![0.406, 0.456, 0.485]);
        assert_eq!(p.std, vec![0.225, 0.224, 0.229]);
        let crop =
            MINIMAL.replace("height = 32", "height = 32\nresize = \"crop\"\nshort_side = 36\nroi = [1, 2, 3, 4]");
        let p = parse(&crop).unwrap().models[0].preprocess.clone();
        assert_eq!((p.short_side, p.roi), (Some(36), Some(Roi { x: 1, y: 2, w: 3, h: 4 })));
        assert_eq!((p.min_side, p.orientation, p.pad_value), (8, Orientation::Exif, 0));
    }
}
