//! Validation: the raw TOML types checked, one key at a time, into the stages' settings. Every
//! message names the key, the value found and what is expected.

use std::path::Path;
use std::time::Duration;

use super::raw::{RawBatching, RawConfig, RawLanes, RawModel, RawPreprocess, RawRetain, RawServer, RawStack};
use super::{Config, ModelConfig, Overrides, ServerConfig, defaults};
use crate::access::AccessConfig;
use crate::access::tls::TlsFiles;
use crate::batch::{BatchingConfig, Lanes};
use crate::decision::{DecisionConfig, Verdict};
use crate::model::{Library, StackMode};
use crate::preprocess::{Channels, PreprocessConfig, ResizeMode, Roi, short_side_below_crop};
use crate::retain::RetainConfig;
use crate::selftest::SelftestConfig;
use crate::source::Source;
use std::net::SocketAddr;

/// The whole file, with the command line's overrides.
pub(super) fn config(
    raw: RawConfig,
    origin: &str,
    resolve: &dyn Fn(&Path) -> Source,
    overrides: &Overrides,
) -> Result<Config, String> {
    let server = server(raw.server, resolve, overrides)?;
    if raw.models.is_empty() {
        return Err("no [[models]] table: add at least one model (see config/lineside.toml)".into());
    }
    let configured = raw.onnxruntime.and_then(|o| o.library).map(|p| match resolve(&p) {
        Source::File(resolved) => resolved,
        _ => p,
    });
    let onnxruntime_library =
        configured.map(|path| Library { path, from: "[onnxruntime] library" }).or_else(|| overrides.env_library());
    let mut models: Vec<ModelConfig> = Vec::new();
    for (i, m) in raw.models.into_iter().enumerate() {
        let ctx = format!("[[models]] #{} ({:?})", i + 1, m.name);
        if models.iter().any(|o| o.name == m.name) {
            return Err(format!("{ctx}: the name {:?} is used twice", m.name));
        }
        let m = model(m, &ctx, resolve, overrides, &onnxruntime_library)?;
        let dir = m.retain.as_ref().map(|r| &r.dir);
        if let Some(other) = models.iter().find(|o| dir.is_some() && o.retain.as_ref().map(|r| &r.dir) == dir) {
            return Err(format!(
                "{ctx}: retain.dir is also model {:?}'s: give each model a folder of its own (eviction and export \
                 work per folder)",
                other.name
            ));
        }
        models.push(m);
    }
    Ok(Config { origin: origin.to_string(), path: None, server, models })
}

/// `[server]`, with the command line's overrides.
fn server(s: RawServer, resolve: &dyn Fn(&Path) -> Source, overrides: &Overrides) -> Result<ServerConfig, String> {
    let access = access(&s, resolve)?;
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
    let max_decode_bytes = s.max_decode_bytes.unwrap_or(defaults::MAX_DECODE_BYTES);
    if !(1 << 20..=1 << 40).contains(&max_decode_bytes) {
        return Err(format!(
            "server.max_decode_bytes = {max_decode_bytes}: expected 1048576 ..= 1099511627776 (1 MiB to 1 TiB)"
        ));
    }
    let max_parts = s.max_parts.unwrap_or(defaults::MAX_PARTS);
    if !(1..=4096).contains(&max_parts) {
        return Err(format!("server.max_parts = {max_parts}: expected 1 ..= 4096"));
    }
    let max_part_bytes = s.max_part_bytes.unwrap_or(defaults::MAX_PART_BYTES);
    if max_part_bytes == 0 || max_part_bytes > 1 << 30 {
        return Err(format!("server.max_part_bytes = {max_part_bytes}: expected 1 ..= 1073741824"));
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
    let max_connections = s.max_connections.unwrap_or(defaults::MAX_CONNECTIONS);
    if !(1..=1 << 20).contains(&max_connections) {
        return Err(format!("server.max_connections = {max_connections}: expected 1 ..= 1048576"));
    }
    let max_header_bytes = s.max_header_bytes.unwrap_or(defaults::MAX_HEADER_BYTES);
    if !(1024..=1 << 20).contains(&max_header_bytes) {
        return Err(format!(
            "server.max_header_bytes = {max_header_bytes}: expected 1024 ..= 1048576 (a request line and its headers)"
        ));
    }
    Ok(ServerConfig {
        max_connections,
        max_header_bytes,
        listen,
        body_limit_bytes: body_limit as usize,
        max_pixels,
        max_decode_bytes,
        max_parts,
        max_part_bytes: max_part_bytes as usize,
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
        access,
    })
}

/// The access keys of `[server]`: token files and TLS files, relative to the config's folder.
fn access(s: &RawServer, resolve: &dyn Fn(&Path) -> Source) -> Result<AccessConfig, String> {
    let path = |p: &Option<std::path::PathBuf>| {
        p.as_ref().map(|p| match resolve(p) {
            Source::File(resolved) => resolved,
            _ => p.clone(),
        })
    };
    let minutes = s.session_minutes.unwrap_or(defaults::SESSION_MINUTES);
    if minutes == 0 || minutes > 24 * 60 {
        return Err(format!(
            "server.session_minutes = {minutes}: expected 1 ..= 1440 (a page session lasts at most a day)"
        ));
    }
    let tls = match (path(&s.tls_cert), path(&s.tls_key)) {
        (Some(cert), Some(key)) => Some(TlsFiles { cert, key, client_ca: path(&s.tls_client_ca) }),
        (None, None) if s.tls_client_ca.is_some() => {
            return Err("server.tls_client_ca is set without tls_cert and tls_key: mutual TLS needs HTTPS; set \
                        both, or remove tls_client_ca"
                .into());
        }
        (None, None) => None,
        (Some(_), None) => {
            return Err("server.tls_cert is set without server.tls_key: set both (PEM files), or neither".into());
        }
        (None, Some(_)) => {
            return Err("server.tls_key is set without server.tls_cert: set both (PEM files), or neither".into());
        }
    };
    Ok(AccessConfig {
        admin_token_file: path(&s.admin_token_file),
        client_token_file: path(&s.client_token_file),
        session: Duration::from_secs(minutes * 60),
        tls,
    })
}

/// One `[[models]]` table, `ctx` naming it in messages.
fn model(
    m: RawModel,
    ctx: &str,
    resolve: &dyn Fn(&Path) -> Source,
    overrides: &Overrides,
    onnxruntime_library: &Option<Library>,
) -> Result<ModelConfig, String> {
    if m.name.is_empty() || !m.name.chars().all(|c| c.is_ascii_alphanumeric() || c == '_' || c == '-' || c == '.') {
        return Err(format!("{ctx}: name must be non-empty and use only letters, digits, '_', '-', '.'"));
    }
    let preprocess = preprocess(m.preprocess).map_err(|e| format!("{ctx}: {e}"))?;
    if let Some(v) = m.min_score.filter(|v| !(v.is_finite() && (0.0..=1.0).contains(v))) {
        return Err(format!("{ctx}: min_score = {v}: expected a score 0 ..= 1"));
    }
    let min_score = m.min_score;
    let engine = match (overrides.engine, m.engine) {
        (Some(e), _) | (None, Some(e)) => e,
        (None, None) => overrides.default_engine,
    };
    let engine = engine.require_built().map_err(|e| format!("{ctx}: {e}"))?;
    let mut raw_batching = m.batching;
    overrides.batching.apply(&mut raw_batching);
    let batching = batching(raw_batching).map_err(|e| format!("{ctx}: {e}"))?;
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
    let decision = m.decision.map(|d| DecisionConfig { accept: d.accept, reject: d.reject, no_part: d.no_part });
    if let Some(d) = &decision {
        d.check_lists().map_err(|e| format!("{ctx}: {e}"))?;
    }
    let retain =
        m.retain.map(|r| retain(r, decision.is_some(), resolve)).transpose().map_err(|e| format!("{ctx}: {e}"))?;
    let sha256 = match m.sha256 {
        Some(h) if h.len() == 64 && h.bytes().all(|b| b.is_ascii_hexdigit()) => Some(h.to_ascii_lowercase()),
        Some(h) => {
            return Err(format!(
                "{ctx}: sha256 = {h:?}: expected the 64 hex digits of the ONNX file's SHA-256 (`sha256sum model.onnx`)"
            ));
        }
        None => None,
    };
    Ok(ModelConfig {
        sha256,
        watch: m.watch,
        decision,
        retain,
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
    })
}

/// `[models.retain]`: verdict names known (and a decision table to give them), a share, bounds.
fn retain(r: RawRetain, has_decision: bool, resolve: &dyn Fn(&Path) -> Source) -> Result<RetainConfig, String> {
    let names =
        r.verdicts.unwrap_or_else(|| if has_decision { vec!["review".into(), "reject".into()] } else { Vec::new() });
    let verdicts = names
        .iter()
        .map(|n| {
            Verdict::parse(n).ok_or_else(|| {
                format!("retain.verdicts: {n:?} is not a verdict; expected some of \"accept\", \"reject\", \"review\", \"no_part\"")
            })
        })
        .collect::<Result<Vec<_>, _>>()?;
    if !verdicts.is_empty() && !has_decision {
        return Err("retain.verdicts needs a [models.decision] table (verdicts come from it); without one, keep \
                    frames by `labels` and `sample_other`"
            .into());
    }
    let sample_other = r.sample_other.unwrap_or(0.0);
    if !(0.0..=1.0).contains(&sample_other) {
        return Err(format!(
            "retain.sample_other = {sample_other}: expected a share 0 ..= 1 (0.01 = one frame in 100)"
        ));
    }
    let max_frames = r.max_frames.unwrap_or(defaults::RETAIN_MAX_FRAMES);
    let max_bytes = r.max_bytes.unwrap_or(defaults::RETAIN_MAX_BYTES);
    let queue = r.queue.unwrap_or(defaults::RETAIN_QUEUE);
    for (key, v) in [("max_frames", max_frames), ("max_bytes", max_bytes), ("queue", queue)] {
        if v == 0 {
            return Err(format!("retain.{key} = 0: expected at least 1"));
        }
    }
    let dir = match resolve(&r.dir) {
        Source::File(p) => p,
        _ => r.dir,
    };
    Ok(RetainConfig {
        dir,
        verdicts,
        labels: r.labels,
        sample_other,
        max_frames: usize::try_from(max_frames).unwrap_or(usize::MAX),
        max_bytes,
        queue: usize::try_from(queue.min(1 << 20)).unwrap_or(1 << 20),
    })
}

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

fn positive(key: &str, v: Option<u64>, default: u64) -> Result<u64, String> {
    match v.unwrap_or(default) {
        0 => Err(format!("{key} = 0: expected at least 1")),
        n => Ok(n),
    }
}

pub(super) fn preprocess(p: RawPreprocess) -> Result<PreprocessConfig, String> {
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
    let (mean, std) = stats(&p, channels)?;
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
    let (roi, min_side) = (roi(p.roi)?, min_side(p.min_side)?);
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

/// `mean` and `std` (or `normalize`), one value per channel of `channels`.
fn stats(p: &RawPreprocess, channels: Channels) -> Result<(Vec<f32>, Vec<f32>), String> {
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
        None => (per_channel("mean", p.mean.clone(), 0.0)?, per_channel("std", p.std.clone(), 1.0)?),
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
    Ok((mean, std))
}

/// `roi = [x, y, w, h]`.
fn roi(v: Option<Vec<i64>>) -> Result<Option<Roi>, String> {
    let Some(v) = v else { return Ok(None) };
    let ok = v.len() == 4 && v.iter().all(|x| (0..=i64::from(u32::MAX)).contains(x)) && v[2] > 0 && v[3] > 0;
    if !ok {
        return Err(format!(
            "preprocess.roi = {v:?}: expected [x, y, w, h] in source pixels, x and y >= 0, w and h >= 1"
        ));
    }
    Ok(Some(Roi { x: v[0] as u32, y: v[1] as u32, w: v[2] as u32, h: v[3] as u32 }))
}

/// `min_side`.
fn min_side(v: Option<i64>) -> Result<u32, String> {
    match v {
        None => Ok(defaults::MIN_SIDE),
        Some(v) if (1..=65535).contains(&v) => Ok(v as u32),
        Some(v) => Err(format!("preprocess.min_side = {v}: expected 1 ..= 65535")),
    }
}

pub(super) fn batching(b: RawBatching) -> Result<BatchingConfig, String> {
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
