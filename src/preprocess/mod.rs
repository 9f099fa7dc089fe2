//! Preprocessing: the pure path from request bytes to the model's input tensor.
//!
//! decode ([`decode`]) -> channel conversion ([`normalize::luma`] for gray) -> resize
//! ([`resize`]) -> normalise into the model's layout ([`normalize::to_tensor`]). Every step
//! is a pure function of its inputs and the model's config, so each is unit-tested; the
//! [`Pipeline`] only strings them together and times them. It runs on the bounded decode
//! pool ([`pool::CpuPool`]), never on the async executor's threads.

pub mod decode;
pub mod normalize;
pub mod pool;
pub mod resize;

use std::time::{Duration, Instant};

use image::RgbImage;

use crate::config::{Channels, Layout, PreprocessConfig};
use crate::model::{Contract, InputType};

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
    /// A bug: buffers did not match their sizes.
    #[error("internal preprocessing error: {0}")]
    Internal(String),
}

/// One image, ready for the engine.
#[derive(Debug)]
pub struct Prepared {
    /// The input tensor for one image, in the model's layout.
    pub tensor: Vec<f32>,
    /// Width and height of the decoded frame (after orientation).
    pub source_size: (u32, u32),
    /// Time spent decoding.
    pub decode: Duration,
    /// Time spent converting, resizing and normalising.
    pub preprocess: Duration,
}

/// A model's preprocessing, fixed at load from its config and contract.
#[derive(Debug, Clone)]
pub struct Pipeline {
    cfg: PreprocessConfig,
    width: u32,
    height: u32,
    layout: Layout,
    max_pixels: u64,
}

impl Pipeline {
    /// A pipeline for a model with this config, at the size and in the layout its contract
    /// says. A uint8 model takes raw pixels: the normalisation keys do not apply to it.
    pub fn new(mut cfg: PreprocessConfig, contract: &Contract, max_pixels: u64) -> Pipeline {
        if contract.input_type == InputType::Uint8 {
            let n = cfg.channels.count();
            (cfg.divisor, cfg.mean, cfg.std) = (1.0, vec![0.0; n], vec![1.0; n]);
        }
        Pipeline { cfg, width: contract.width, height: contract.height, layout: contract.layout, max_pixels }
    }

    /// Decode and preprocess one request body.
    ///
    /// # Errors
    /// See [`PreprocessError`].
    pub fn run(&self, bytes: &[u8]) -> Result<Prepared, PreprocessError> {
        let t0 = Instant::now();
        let img = decode::decode(bytes, self.max_pixels)?;
        let t1 = Instant::now();
        let tensor = self.tensor(&img)?;
        Ok(Prepared { tensor, source_size: img.dimensions(), decode: t1 - t0, preprocess: t1.elapsed() })
    }

    /// Preprocess an already decoded RGB frame.
    ///
    /// # Errors
    /// Only internal errors (buffer size mismatches).
    pub fn tensor(&self, img: &RgbImage) -> Result<Vec<f32>, PreprocessError> {
        let c = &self.cfg;
        let (w, h) = img.dimensions();
        let gray;
        let src: &[u8] = if c.channels == Channels::Gray {
            gray = normalize::luma(img.as_raw());
            &gray
        } else {
            img.as_raw()
        };
        let n = c.channels.count();
        let small = resize::resize(src, w, h, n, self.width, self.height, c.filter)?;
        Ok(normalize::to_tensor(&small, self.width, self.height, c.channels, self.layout, c.divisor, &c.mean, &c.std))
    }
}
