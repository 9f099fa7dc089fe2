//! Image bytes through the whole preprocessing, as `serve` runs it: sniff, header and
//! limits (`probe`), decode (EXIF orientation), ROI, channels, resize, normalise, under a
//! random but valid configuration (the checks `config::validate` makes: sizes, a square
//! crop, one mean and std per channel, std > 0).
//!
//! Property: no panic; an accepted frame gives exactly the tensor the model takes (H x W x C
//! values, finite). `max_pixels` is small (1 MP) so that no legal input can need more memory
//! than libFuzzer's limit.
#![no_main]

use arbitrary::{Result, Unstructured};
use libfuzzer_sys::fuzz_target;
use lineside_fuzz::model::{BatchAxis, Contract, InputType, Layout, ScoreTransform, Tensor};
use lineside_fuzz::preprocess::{
    Channels, DecodeLimits, Filter, Orientation, Pipeline, PreprocessConfig, ResizeMode, Roi,
};

const MAX_PIXELS: u64 = 1 << 20;
/// A decode memory limit a 1 MP frame can pass or break (16-bit RGBA at 1 MP needs 28 MiB).
const MAX_DECODE_BYTES: u64 = 8 << 20;

fn setup(u: &mut Unstructured<'_>) -> Result<(PreprocessConfig, Contract)> {
    let resize = *u.choose(&[ResizeMode::Stretch, ResizeMode::Crop, ResizeMode::Letterbox])?;
    let width = u.int_in_range(1..=40)?;
    let height = if resize == ResizeMode::Crop { width } else { u.int_in_range(1..=40)? };
    let short_side =
        if resize == ResizeMode::Crop && u.arbitrary()? { Some(u.int_in_range(width..=width + 64)?) } else { None };
    let channels = *u.choose(&[Channels::Rgb, Channels::Bgr, Channels::Gray])?;
    let n = channels.count();
    let layout = *u.choose(&[Layout::Nchw, Layout::Nhwc])?;
    let input_type = *u.choose(&[InputType::Float32, InputType::Uint8])?;
    let mut mean = Vec::with_capacity(n);
    let mut std = Vec::with_capacity(n);
    for _ in 0..n {
        mean.push(f32::from(u.int_in_range(0u8..=255)?) / 255.0);
        std.push(f32::from(u.int_in_range(1u8..=255)?) / 255.0);
    }
    let roi = if u.arbitrary()? {
        Some(Roi { x: u.int_in_range(0..=64)?, y: u.int_in_range(0..=64)?, w: u.int_in_range(1..=64)?, h: u.int_in_range(1..=64)? })
    } else {
        None
    };
    let cfg = PreprocessConfig {
        width: Some(width),
        height: Some(height),
        resize,
        short_side,
        pad_value: u.arbitrary()?,
        filter: *u.choose(&[Filter::Nearest, Filter::Bilinear, Filter::Bicubic, Filter::Lanczos, Filter::Area])?,
        channels,
        channels_given: true,
        orientation: *u.choose(&[Orientation::Exif, Orientation::Ignore])?,
        roi,
        min_side: u.int_in_range(0..=8)?,
        layout: Some(layout),
        divisor: *u.choose(&[1.0, 255.0])?,
        mean,
        std,
    };
    let contract = Contract {
        input_name: "image".into(),
        input_shape: Vec::new(),
        layout,
        channels: n,
        height,
        width,
        input_type,
        batch: BatchAxis::Fixed(1),
        output_name: "scores".into(),
        output_shape: Vec::new(),
        classes: 2,
        scores: ScoreTransform::Softmax,
        ends_in: None,
    };
    Ok((cfg, contract))
}

fuzz_target!(|data: &[u8]| {
    // The settings from the first bytes, the frame from the rest (a seed file is a valid
    // image after a 32-byte settings prefix).
    let (head, image) = data.split_at(data.len().min(32));
    let Ok((cfg, contract)) = setup(&mut Unstructured::new(head)) else { return };
    let want = contract.width as usize * contract.height as usize * contract.channels;
    let Ok(pipeline) = Pipeline::new(cfg, &contract, DecodeLimits { max_pixels: MAX_PIXELS, max_decode_bytes: MAX_DECODE_BYTES }) else { return };
    if let Ok(p) = pipeline.run(image) {
        assert_eq!(p.tensor.len(), want, "tensor size");
        if let Tensor::F32(v) = &p.tensor {
            assert!(v.iter().all(|x| x.is_finite()), "non-finite value in the tensor");
        }
        let (w, h) = p.source_size;
        assert!(u64::from(w) * u64::from(h) <= MAX_PIXELS, "a frame above max_pixels was decoded");
    }
});
