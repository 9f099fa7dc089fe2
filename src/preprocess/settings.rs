//! The preprocessing settings (`[models.preprocess]` once validated): how a frame becomes the
//! model's input. The config validates the keys into these types; the pipeline reads them.

use serde::{Deserialize, Serialize};

use crate::model::{Contract, Expect, Layout, ScoresMode};

/// How to resize a frame to the model's input size.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize)]
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
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Orientation {
    /// Rotate/flip the frame as its EXIF tag says (what a photo viewer shows).
    Exif,
    /// Use the pixels as stored.
    Ignore,
}

/// A region of interest in source pixels (after orientation).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
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
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize)]
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
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize)]
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

/// Validated `[models.preprocess]`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
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

/// The error for a `short_side` smaller than the square crop it must contain.
pub fn short_side_below_crop(short_side: u32, crop: u32) -> String {
    format!(
        "preprocess.short_side = {short_side} is below the crop size {crop}: the centre crop must fit inside the \
         resized frame; set short_side >= {crop} (e.g. 256 for a 224 crop) or remove it (the crop size)"
    )
}

impl PreprocessConfig {
    /// Check these settings against the model they feed: a centre crop needs a square input
    /// that fits inside the resized frame.
    ///
    /// # Errors
    /// What does not fit, naming the key and both values.
    pub fn fit(&self, contract: &Contract) -> Result<(), String> {
        let (width, height) = (contract.width, contract.height);
        if self.resize == ResizeMode::Crop && height != width {
            return Err(format!(
                "input {width}x{height} (width x height) is not square, and preprocess.resize = \"crop\" \
                 (resize the short side, then crop the centre square) needs a square input; \
                 use resize = \"stretch\" or \"letterbox\""
            ));
        }
        if let Some(s) = self.short_side.filter(|&s| s < width) {
            return Err(short_side_below_crop(s, width));
        }
        Ok(())
    }

    /// What these settings ask of the model's input (with the config's `scores`).
    pub fn expect(&self, scores: ScoresMode) -> Expect {
        Expect {
            layout: self.layout,
            channels: self.channels_given.then(|| self.channels.count()),
            width: self.width,
            height: self.height,
            scores,
        }
    }

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
