//! Normalisation: resized pixels into the model's float tensor,
//! x = (pixel / divisor - mean\[c\]) / std\[c\], in the model's channel order and layout;
//! and the channel conversions that come before resizing (luma for gray models).

use super::Channels;
use crate::model::Layout;

/// BT.601 luma with Pillow's integer rounding: L = (R*19595 + G*38470 + B*7471 + 0x8000) >> 16
/// (weights 0.299, 0.587, 0.114 in 16-bit fixed point; the formula is recalled from Pillow's
/// source, and the unit test checks it against values Pillow printed).
pub fn luma(rgb: &[u8]) -> Vec<u8> {
    rgb.chunks_exact(3)
        .map(|p| ((u32::from(p[0]) * 19595 + u32::from(p[1]) * 38470 + u32::from(p[2]) * 7471 + 0x8000) >> 16) as u8)
        .collect()
}

/// BT.601 luma of float levels (16-bit frames), unrounded: 0.299 R + 0.587 G + 0.114 B.
pub fn luma_f32(rgb: &[f32]) -> Vec<f32> {
    rgb.chunks_exact(3).map(|p| 0.299 * p[0] + 0.587 * p[1] + 0.114 * p[2]).collect()
}

/// A sample that can be normalised: its level on the 0..255 scale.
pub trait Level: Copy {
    /// The level as a float.
    fn level(self) -> f32;
    /// The level as a byte (a uint8 model's input): 8-bit samples as they are, float levels
    /// (16-bit frames) rounded and clamped.
    fn byte(self) -> u8;
}
impl Level for u8 {
    fn level(self) -> f32 {
        f32::from(self)
    }
    fn byte(self) -> u8 {
        self
    }
}
impl Level for f32 {
    fn level(self) -> f32 {
        self
    }
    fn byte(self) -> u8 {
        self.round().clamp(0.0, 255.0) as u8
    }
}

/// Source sample for each model channel: a gray source feeds every channel, BGR swaps.
fn channel_order(channels: Channels, src_channels: usize) -> [usize; 3] {
    match (channels, src_channels) {
        (_, 1) => [0, 0, 0],
        (Channels::Bgr, _) => [2, 1, 0],
        _ => [0, 1, 2],
    }
}

/// A uint8 model's tensor for one image: the pixels as bytes, only reordered into the
/// model's channel order and layout (no normalisation: the model does its own).
pub fn to_bytes<T: Level>(
    pixels: &[T],
    src_channels: usize,
    width: u32,
    height: u32,
    channels: Channels,
    layout: Layout,
) -> Vec<u8> {
    arrange(pixels, src_channels, width, height, channels, layout, |_, px| px.byte())
}

/// Build the tensor for one image from interleaved pixels with `src_channels` samples each
/// (1 = gray, 3 = RGB). A gray source feeding an RGB/BGR model is replicated (Pillow's
/// `convert("RGB")` of an "L" image); an RGB source for a gray model must be converted with
/// [`luma`] before resizing, as Pillow does. `mean` and `std` are in the model's channel order
/// (after a BGR swap).
#[allow(clippy::too_many_arguments)]
pub fn to_tensor<T: Level>(
    pixels: &[T],
    src_channels: usize,
    width: u32,
    height: u32,
    channels: Channels,
    layout: Layout,
    divisor: f32,
    mean: &[f32],
    std: &[f32],
) -> Vec<f32> {
    // (p / divisor - mean) / std == p * scale + offset, computed once per channel.
    let scale: Vec<f32> = std.iter().map(|s| 1.0 / (divisor * s)).collect();
    let offset: Vec<f32> = mean.iter().zip(std).map(|(m, s)| -m / s).collect();
    arrange(pixels, src_channels, width, height, channels, layout, |c, px| px.level() * scale[c] + offset[c])
}

/// Lay interleaved pixels out in the model's channel order and layout, each sample mapped by
/// `value(model channel, source sample)`.
fn arrange<T: Level, O: Copy + Default>(
    pixels: &[T],
    src_channels: usize,
    width: u32,
    height: u32,
    channels: Channels,
    layout: Layout,
    value: impl Fn(usize, T) -> O,
) -> Vec<O> {
    let n = channels.count();
    let plane = width as usize * height as usize;
    let order = channel_order(channels, src_channels);
    let mut out = vec![O::default(); plane * n];
    match layout {
        Layout::Nchw => {
            for c in 0..n {
                let dst = &mut out[c * plane..(c + 1) * plane];
                for (v, px) in dst.iter_mut().zip(pixels.chunks_exact(src_channels)) {
                    *v = value(c, px[order[c]]);
                }
            }
        }
        Layout::Nhwc => {
            for (dst, px) in out.chunks_exact_mut(n).zip(pixels.chunks_exact(src_channels)) {
                for c in 0..n {
                    dst[c] = value(c, px[order[c]]);
                }
            }
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn imagenet_normalisation_by_hand() {
        // One pixel (R, G, B) = (255, 128, 0) with ImageNet statistics (common practice):
        // R: (1.0 - 0.485) / 0.229 = 2.248908; G: (128/255 - 0.456) / 0.224 = 0.205182;
        // B: (0.0 - 0.406) / 0.225 = -1.804444
        let mean = [0.485, 0.456, 0.406];
        let std = [0.229, 0.224, 0.225];
        let t = to_tensor(&[255u8, 128, 0], 3, 1, 1, Channels::Rgb, Layout::Nchw, 255.0, &mean, &std);
        for (a, b) in t.iter().zip([2.248_908, 0.205_182, -1.804_444]) {
            assert!((a - b).abs() < 1e-5, "{t:?}");
        }
    }

    #[test]
    fn layouts_and_bgr_order() {
        // 2x1 image: pixels (1,2,3) and (4,5,6); divisor 1, no mean/std.
        let px = [1u8, 2, 3, 4, 5, 6];
        let id = [0.0; 3];
        let one = [1.0; 3];
        assert_eq!(to_tensor(&px, 3, 2, 1, Channels::Rgb, Layout::Nchw, 1.0, &id, &one), [1., 4., 2., 5., 3., 6.]);
        assert_eq!(to_tensor(&px, 3, 2, 1, Channels::Rgb, Layout::Nhwc, 1.0, &id, &one), [1., 2., 3., 4., 5., 6.]);
        assert_eq!(to_tensor(&px, 3, 2, 1, Channels::Bgr, Layout::Nchw, 1.0, &id, &one), [3., 6., 2., 5., 1., 4.]);
        assert_eq!(to_tensor(&px, 3, 2, 1, Channels::Bgr, Layout::Nhwc, 1.0, &id, &one), [3., 2., 1., 6., 5., 4.]);
    }

    #[test]
    fn a_uint8_models_bytes_are_only_reordered() {
        let px = [1u8, 2, 3, 4, 5, 6];
        assert_eq!(to_bytes(&px, 3, 2, 1, Channels::Rgb, Layout::Nchw), [1, 4, 2, 5, 3, 6]);
        assert_eq!(to_bytes(&px, 3, 2, 1, Channels::Bgr, Layout::Nhwc), [3, 2, 1, 6, 5, 4]);
        assert_eq!(to_bytes(&[9u8, 8], 1, 2, 1, Channels::Rgb, Layout::Nhwc), [9, 9, 9, 8, 8, 8]);
        // Float levels (16-bit frames) are rounded and clamped once.
        assert_eq!(to_bytes(&[254.6f32, -3.0, 300.0], 1, 3, 1, Channels::Gray, Layout::Nchw), [255, 0, 255]);
    }

    #[test]
    fn luma_matches_pillow() {
        // 0.299*200 + 0.587*100 + 0.114*50 = 124.2 -> 124. Expected values printed by
        // Pillow 13.0.0, Image.convert("L"), for these exact pixels.
        let px = [
            200, 100, 50, 255, 255, 255, 0, 0, 0, 68, 32, 130, 60, 253, 230, 241, 194, 107, 48, 249, 14, 199, 221, 1,
            228, 136, 117, 52, 162, 15, 11, 13, 4,
        ];
        assert_eq!(luma(&px), [124, 255, 0, 54, 193, 198, 162, 189, 161, 112, 11]);
    }

    #[test]
    fn gray_source_is_replicated_for_colour_models() {
        let t = to_tensor(&[10u8, 20], 1, 2, 1, Channels::Bgr, Layout::Nchw, 1.0, &[0.0; 3], &[1.0; 3]);
        assert_eq!(t, [10., 20., 10., 20., 10., 20.]);
        let t = to_tensor(&[7.5f32], 1, 1, 1, Channels::Gray, Layout::Nhwc, 255.0, &[0.0], &[1.0]);
        // p * (1 / (divisor * std)) + offset: within an ulp or two of (p / divisor - mean) / std.
        assert!((t[0] - 7.5 / 255.0).abs() < 1e-7, "{t:?}");
    }
}
