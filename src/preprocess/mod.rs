//! Preprocessing: the pure path from request bytes to the model's input tensor.
//!
//! decode ([`decode`], EXIF orientation, limits from the header) -> region of interest ->
//! channel conversion ([`normalize::luma`] for gray models) -> resize ([`resize`]: stretch,
//! centre crop or letterbox, with Pillow's filters and arithmetic) -> normalise into the
//! model's layout ([`normalize::to_tensor`]). Each step is a pure function of its inputs and
//! the model's config, so each is unit-tested; the [`Pipeline`] only strings them together
//! and times them. `serve`, the self-test and `lineside preprocess` all call
//! [`Pipeline::run`]. It runs on the bounded decode pool ([`pool::CpuPool`]), never on the
//! async executor's threads.

pub mod decode;
pub mod normalize;
pub mod npy;
pub mod pool;
pub mod resize;
pub mod settings;

pub use settings::{Channels, Filter, Orientation, PreprocessConfig, ResizeMode, Roi, short_side_below_crop};

use std::time::{Duration, Instant};

use crate::model::{Contract, InputType, Layout, Tensor};
use decode::FrameLimits;
use resize::{Plane, Window};

/// A decoded frame: 8-bit levels, or 16-bit samples as unrounded float levels (v / 257).
#[derive(Debug, Clone, PartialEq)]
pub enum Frame {
    /// 8-bit samples.
    U8(Plane<u8>),
    /// Float levels on the 8-bit scale (from 16-bit samples).
    F32(Plane<f32>),
}

impl Frame {
    /// Width and height.
    pub fn size(&self) -> (u32, u32) {
        match self {
            Frame::U8(p) => (p.width, p.height),
            Frame::F32(p) => (p.width, p.height),
        }
    }

    /// The frame as 8-bit gray or RGB (float levels rounded), for previews.
    pub fn to_dynamic(&self) -> Option<image::DynamicImage> {
        let (w, h) = self.size();
        let (channels, data) = match self {
            Frame::U8(p) => (p.channels, p.data.clone()),
            Frame::F32(p) => (p.channels, p.data.iter().map(|v| v.round().clamp(0.0, 255.0) as u8).collect()),
        };
        match channels {
            1 => image::GrayImage::from_raw(w, h, data).map(image::DynamicImage::ImageLuma8),
            _ => image::RgbImage::from_raw(w, h, data).map(image::DynamicImage::ImageRgb8),
        }
    }
}

/// Why an image could not become a tensor.
#[derive(Debug, thiserror::Error)]
pub enum PreprocessError {
    /// The body was empty.
    #[error("the request body is empty; send the image file as the body")]
    Empty,
    /// Not an image, or a truncated or corrupt one.
    #[error("cannot decode the image: {0}")]
    BadImage(String),
    /// A recognised format this build cannot decode.
    #[error("unsupported image format: {0}")]
    Unsupported(String),
    /// More pixels than `[server] max_pixels`.
    #[error("image is {width}x{height} = {} pixels, more than server.max_pixels = {max_pixels}", u64::from(*width) * u64::from(*height))]
    TooLarge {
        /// Width from the header.
        width: u32,
        /// Height from the header.
        height: u32,
        /// The configured limit.
        max_pixels: u64,
    },
    /// The decoder's own limit tripped (the header claims more than it may allocate).
    #[error("image exceeds the decoder's limits (server.max_pixels = {max_pixels}): {detail}")]
    TooLargeUnknown {
        /// The configured limit.
        max_pixels: u64,
        /// The decoder's message.
        detail: String,
    },
    /// A side shorter than `[models.preprocess] min_side`.
    #[error("image is {width}x{height}; its shorter side is below preprocess.min_side = {min_side} pixels")]
    TooSmall {
        /// Width from the header.
        width: u32,
        /// Height from the header.
        height: u32,
        /// The configured limit.
        min_side: u32,
    },
    /// Decoding would take more memory than `[server] max_decode_bytes` (from the header).
    #[error(
        "decoding this {width}x{height} {format:?} frame takes up to {} MiB of memory, more than \
         server.max_decode_bytes = {max} ({} MiB); send 8-bit baseline JPEG or PNG, smaller frames, \
         or raise the limit",
        decode_bytes.div_ceil(1 << 20), max / (1 << 20)
    )]
    TooCostly {
        /// Width from the header.
        width: u32,
        /// Height from the header.
        height: u32,
        /// The sniffed format.
        format: image::ImageFormat,
        /// The estimate.
        decode_bytes: u64,
        /// The configured limit.
        max: u64,
    },
    /// The configured region of interest does not fit inside the frame.
    #[error(
        "preprocess.roi = [{}, {}, {}, {}] reaches to ({}, {}), outside the {width}x{height} frame \
         (sizes after EXIF orientation); send frames of the size the ROI was drawn on",
        roi.x, roi.y, roi.w, roi.h, u64::from(roi.x) + u64::from(roi.w), u64::from(roi.y) + u64::from(roi.h)
    )]
    RoiOutside {
        /// The configured region.
        roi: Roi,
        /// Frame width.
        width: u32,
        /// Frame height.
        height: u32,
    },
    /// A bug: buffers did not match their sizes.
    #[error("internal preprocessing error: {0}")]
    Internal(String),
}

impl PreprocessError {
    /// The error's kind as the HTTP API names it (`bad_image`, `unsupported_format`,
    /// `too_large`, `too_small`, `roi_outside`, `internal`).
    pub fn kind(&self) -> &'static str {
        match self {
            PreprocessError::Empty | PreprocessError::BadImage(_) => "bad_image",
            PreprocessError::Unsupported(_) => "unsupported_format",
            PreprocessError::TooLarge { .. }
            | PreprocessError::TooLargeUnknown { .. }
            | PreprocessError::TooCostly { .. } => "too_large",
            PreprocessError::TooSmall { .. } => "too_small",
            PreprocessError::RoiOutside { .. } => "roi_outside",
            PreprocessError::Internal(_) => "internal",
        }
    }
}

/// One image, ready for the engine.
#[derive(Debug)]
pub struct Prepared {
    /// The input tensor for one image, in the model's layout and element type.
    pub tensor: Tensor,
    /// Width and height of the decoded frame (after orientation).
    pub source_size: (u32, u32),
    /// Time spent decoding.
    pub decode: Duration,
    /// Time spent cropping, converting, resizing and normalising.
    pub preprocess: Duration,
    /// The resized image before normalisation (only when asked for, as a preview).
    pub canvas: Option<Frame>,
}

/// Where the resized frame lands on the model's input: resize the whole frame to
/// `full_w x full_h`, keep `window` of it, and place that at (`left`, `top`) of the input
/// (non-zero only for letterbox, which pads the rest).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Geometry {
    /// Width the whole frame is resized to.
    pub full_w: u32,
    /// Height the whole frame is resized to.
    pub full_h: u32,
    /// The part of the resized frame kept.
    pub window: Window,
    /// Column of the input where the window's left edge goes.
    pub left: u32,
    /// Row of the input where the window's top edge goes.
    pub top: u32,
}

/// Python's `round()` for halves: to the even neighbour (what torchvision's centre-crop
/// offsets use). `x` is a non-negative multiple of 0.5 here.
fn round_half_even(x: f64) -> u32 {
    let r = x.round(); // halves away from zero
    let r = if (x - x.trunc()) == 0.5 && r % 2.0 != 0.0 { r - 1.0 } else { r };
    r as u32
}

/// The geometry of a resize mode for a `src_w x src_h` frame and a `dst_w x dst_h` input.
///
/// - stretch: the whole frame to the input size.
/// - crop: resize so the short side becomes S = `short_side` (default: `dst_w`), the long
///   side int(S * long / short), then the centre `dst_w x dst_h`, at offsets
///   round((new - dst) / 2) with halves to even (a common training library's arithmetic for
///   a short-side resize followed by a centre crop on a PIL image).
/// - letterbox: s = min(dst_w / src_w, dst_h / src_h); the frame becomes
///   floor(src * s + 0.5) (round half up) and is centred at floor((dst - new) / 2).
pub fn geometry(mode: ResizeMode, short_side: Option<u32>, src: (u32, u32), dst: (u32, u32)) -> Geometry {
    let (sw, sh) = src;
    let (dw, dh) = dst;
    let whole = |w, h| Window { x: 0, y: 0, w, h };
    match mode {
        ResizeMode::Stretch => Geometry { full_w: dw, full_h: dh, window: whole(dw, dh), left: 0, top: 0 },
        ResizeMode::Crop => {
            let s = u64::from(short_side.unwrap_or(dw));
            let (short, long) = (u64::from(sw.min(sh)), u64::from(sw.max(sh)));
            let new_long = ((s * long) as f64 / short as f64) as u64;
            let (nw, nh) = if sw <= sh { (s, new_long) } else { (new_long, s) };
            let (nw, nh) = (u32::try_from(nw).unwrap_or(u32::MAX), u32::try_from(nh).unwrap_or(u32::MAX));
            // nw, nh >= S >= dw for a square input (the model check refuses other crops).
            let x = round_half_even(f64::from(nw.saturating_sub(dw)) / 2.0);
            let y = round_half_even(f64::from(nh.saturating_sub(dh)) / 2.0);
            Geometry { full_w: nw, full_h: nh, window: Window { x, y, w: dw, h: dh }, left: 0, top: 0 }
        }
        ResizeMode::Letterbox => {
            let s = (f64::from(dw) / f64::from(sw)).min(f64::from(dh) / f64::from(sh));
            let nw = ((f64::from(sw) * s + 0.5).floor() as u32).clamp(1, dw);
            let nh = ((f64::from(sh) * s + 0.5).floor() as u32).clamp(1, dh);
            Geometry { full_w: nw, full_h: nh, window: whole(nw, nh), left: (dw - nw) / 2, top: (dh - nh) / 2 }
        }
    }
}

/// The server's limits on one frame (`[server] max_pixels`, `max_decode_bytes`).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct DecodeLimits {
    /// Most pixels.
    pub max_pixels: u64,
    /// Most memory one decode may take, estimated from the header.
    pub max_decode_bytes: u64,
}

impl DecodeLimits {
    /// No limit (tools that read the user's own files).
    pub const NONE: DecodeLimits = DecodeLimits { max_pixels: u64::MAX, max_decode_bytes: u64::MAX };
}

/// A model's preprocessing, fixed at load from its config and contract.
#[derive(Debug, Clone)]
pub struct Pipeline {
    cfg: PreprocessConfig,
    width: u32,
    height: u32,
    layout: Layout,
    input_type: InputType,
    limits: FrameLimits,
}

impl Pipeline {
    /// A pipeline for a model with this config, at the size and in the layout its contract
    /// says. A uint8 model takes raw pixels: the normalisation keys do not apply to it.
    ///
    /// # Errors
    /// Settings that do not fit the model ([`PreprocessConfig::fit`]).
    pub fn new(cfg: PreprocessConfig, contract: &Contract, limits: DecodeLimits) -> Result<Pipeline, String> {
        cfg.fit(contract)?;
        let mut cfg = cfg.follow_model(contract.channels);
        if contract.input_type == InputType::Uint8 {
            let n = cfg.channels.count();
            (cfg.divisor, cfg.mean, cfg.std) = (1.0, vec![0.0; n], vec![1.0; n]);
        }
        let limits = FrameLimits {
            max_pixels: limits.max_pixels,
            min_side: cfg.min_side,
            max_decode_bytes: limits.max_decode_bytes,
        };
        let (width, height, layout, input_type) =
            (contract.width, contract.height, contract.layout, contract.input_type);
        Ok(Pipeline { cfg, width, height, layout, input_type, limits })
    }

    /// The preprocessing settings in force (after a uint8 model's override).
    pub fn config(&self) -> &PreprocessConfig {
        &self.cfg
    }

    /// Decode and preprocess one request body.
    ///
    /// # Errors
    /// See [`PreprocessError`].
    pub fn run(&self, bytes: &[u8]) -> Result<Prepared, PreprocessError> {
        self.run_inner(bytes, false)
    }

    /// As [`Pipeline::run`], and keep the resized image before normalisation
    /// (`lineside preprocess --preview`): the same code path, not a copy of it.
    ///
    /// # Errors
    /// See [`PreprocessError`].
    pub fn run_with_canvas(&self, bytes: &[u8]) -> Result<Prepared, PreprocessError> {
        self.run_inner(bytes, true)
    }

    /// Read and check a frame's header (format, size, limits) without decoding it.
    ///
    /// # Errors
    /// See [`decode::probe`].
    pub fn probe<B: AsRef<[u8]>>(&self, bytes: B) -> Result<decode::Probe<B>, PreprocessError> {
        decode::probe(bytes, self.limits)
    }

    /// As [`Pipeline::run`], for a frame whose header `probe` already read.
    ///
    /// # Errors
    /// See [`PreprocessError`].
    pub fn run_probed<B: AsRef<[u8]>>(&self, probe: decode::Probe<B>) -> Result<Prepared, PreprocessError> {
        self.prepare(probe, false, Instant::now())
    }

    fn run_inner(&self, bytes: &[u8], keep_canvas: bool) -> Result<Prepared, PreprocessError> {
        let t0 = Instant::now();
        let probe = decode::probe(bytes, self.limits)?;
        self.prepare(probe, keep_canvas, t0)
    }

    fn prepare<B: AsRef<[u8]>>(
        &self,
        probe: decode::Probe<B>,
        keep_canvas: bool,
        t0: Instant,
    ) -> Result<Prepared, PreprocessError> {
        let frame = decode::decode(probe, self.limits.max_pixels, self.cfg.orientation)?;
        let t1 = Instant::now();
        let source_size = frame.size();
        let (tensor, canvas) = match frame {
            Frame::U8(p) => {
                let c = self.canvas(p, normalize::luma)?;
                (self.normalise(&c), keep_canvas.then_some(Frame::U8(c)))
            }
            Frame::F32(p) => {
                let c = self.canvas(p, normalize::luma_f32)?;
                (self.normalise(&c), keep_canvas.then_some(Frame::F32(c)))
            }
        };
        Ok(Prepared { tensor, source_size, decode: t1 - t0, preprocess: t1.elapsed(), canvas })
    }

    /// ROI, channel conversion and resize: the model-sized image before normalisation.
    fn canvas<T>(&self, frame: Plane<T>, luma: fn(&[T]) -> Vec<T>) -> Result<Plane<T>, PreprocessError>
    where
        T: resize::Pass + PadLevel,
    {
        let c = &self.cfg;
        let frame = match c.roi {
            None => frame,
            Some(roi) => {
                let fits = u64::from(roi.x) + u64::from(roi.w) <= u64::from(frame.width)
                    && u64::from(roi.y) + u64::from(roi.h) <= u64::from(frame.height);
                if !fits {
                    return Err(PreprocessError::RoiOutside { roi, width: frame.width, height: frame.height });
                }
                frame.crop(roi.x, roi.y, roi.w, roi.h)
            }
        };
        // Pillow converts before it resizes: a gray model's luma is taken at full size.
        let frame = if c.channels == Channels::Gray && frame.channels == 3 {
            Plane { width: frame.width, height: frame.height, channels: 1, data: luma(&frame.data) }
        } else {
            frame
        };
        let g = geometry(c.resize, c.short_side, (frame.width, frame.height), (self.width, self.height));
        // A centre crop resizes the whole frame first: a long thin frame (8 x 5 000 000 is
        // within max_pixels) would become billions of pixels. Bounded like the frame itself.
        let full = u64::from(g.full_w) * u64::from(g.full_h);
        if c.resize == ResizeMode::Crop && full > self.limits.max_pixels {
            return Err(PreprocessError::TooLargeUnknown {
                max_pixels: self.limits.max_pixels,
                detail: format!(
                    "preprocess.resize = \"crop\" scales the {}x{} frame to {}x{} = {full} pixels before its centre crop",
                    frame.width, frame.height, g.full_w, g.full_h
                ),
            });
        }
        let resized = resize::resize(&frame, g.full_w, g.full_h, g.window, c.filter)?;
        if (g.window.w, g.window.h) == (self.width, self.height) {
            return Ok(resized);
        }
        // Letterbox: paste centred on a canvas of pad_value.
        let ch = resized.channels;
        let mut out = Plane {
            width: self.width,
            height: self.height,
            channels: ch,
            data: vec![T::pad(c.pad_value); self.width as usize * self.height as usize * ch],
        };
        let row = resized.width as usize * ch;
        for (y, src) in resized.data.chunks_exact(row).enumerate() {
            let start = ((g.top as usize + y) * self.width as usize + g.left as usize) * ch;
            let dst = out.data.get_mut(start..start + row).ok_or_else(|| {
                PreprocessError::Internal(format!(
                    "letterbox row {y} does not fit the {}x{} canvas",
                    self.width, self.height
                ))
            })?;
            dst.copy_from_slice(src);
        }
        Ok(out)
    }

    fn normalise<T: normalize::Level>(&self, canvas: &Plane<T>) -> Tensor {
        let c = &self.cfg;
        if self.input_type == InputType::Uint8 {
            let (data, channels) = (&canvas.data, canvas.channels);
            return Tensor::U8(normalize::to_bytes(
                data,
                channels,
                canvas.width,
                canvas.height,
                c.channels,
                self.layout,
            ));
        }
        Tensor::F32(normalize::to_tensor(
            &canvas.data,
            canvas.channels,
            canvas.width,
            canvas.height,
            c.channels,
            self.layout,
            c.divisor,
            &c.mean,
            &c.std,
        ))
    }
}

/// The padding level as a sample.
pub trait PadLevel {
    /// `level` (0..255) as this sample type.
    fn pad(level: u8) -> Self;
}
impl PadLevel for u8 {
    fn pad(level: u8) -> u8 {
        level
    }
}
impl PadLevel for f32 {
    fn pad(level: u8) -> f32 {
        f32::from(level)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn python_round_sends_halves_to_even() {
        // Python 3: round(0.5) == 0, round(1.5) == 2, round(2.5) == 2, round(16.0) == 16.
        assert_eq!([0.5, 1.5, 2.5, 3.5, 16.0, 7.0].map(round_half_even), [0, 2, 2, 4, 16, 7]);
    }

    #[test]
    fn crop_geometry_follows_the_short_side_resize_and_centre_crop() {
        // Resize(256) + CenterCrop(224) on a 640x480 frame: short side 480 -> 256, long side
        // int(256 * 640 / 480) = 341; left = round((341 - 224) / 2) = round(58.5) = 58 (even),
        // top = round((256 - 224) / 2) = 16. (torchvision's transforms, by their formulas.)
        let g = geometry(ResizeMode::Crop, Some(256), (640, 480), (224, 224));
        assert_eq!((g.full_w, g.full_h), (341, 256));
        assert_eq!(g.window, Window { x: 58, y: 16, w: 224, h: 224 });
        // Portrait, odd: 479x641, short side to the crop size 96: 96 x int(96 * 641 / 479) = 128;
        // top = round(32 / 2) = 16.
        let g = geometry(ResizeMode::Crop, None, (479, 641), (96, 96));
        assert_eq!((g.full_w, g.full_h, g.window.x, g.window.y), (96, 128, 0, 16));
    }

    #[test]
    fn letterbox_geometry_rounds_half_up_and_centres() {
        // 320x240 into 96x96: s = 0.3, 96 x 72, centred 12 rows down.
        let g = geometry(ResizeMode::Letterbox, None, (320, 240), (96, 96));
        assert_eq!((g.full_w, g.full_h, g.left, g.top), (96, 72, 0, 12));
        // 5x3 into 4x4: s = 0.8, 4 x floor(2.4 + 0.5) = 2, top (4 - 2) / 2 = 1.
        let g = geometry(ResizeMode::Letterbox, None, (5, 3), (4, 4));
        assert_eq!((g.full_w, g.full_h, g.left, g.top), (4, 2, 0, 1));
    }
}
