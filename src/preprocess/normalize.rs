//! Normalisation: resized 8-bit pixels into the model's float tensor,
//! x = (pixel / divisor - mean\[c\]) / std\[c\], in the model's channel order and layout.

use crate::config::{Channels, Layout};

/// BT.601 luma with Pillow's integer rounding: L = (R*19595 + G*38470 + B*7471 + 0x8000) >> 16
/// (weights 0.299, 0.587, 0.114 in 16-bit fixed point; the formula is recalled from Pillow's
/// source, and the unit test checks it against values Pillow printed).
pub fn luma(rgb: &[u8]) -> Vec<u8> {
    rgb.chunks_exact(3)
        .map(|p| ((u32::from(p[0]) * 19595 + u32::from(p[1]) * 38470 + u32::from(p[2]) * 7471 + 0x8000) >> 16) as u8)
        .collect()
}

/// Build the tensor for one image from interleaved pixels (`channels.count()` per pixel, RGB
/// order for colour). `mean` and `std` are in the model's channel order (after a BGR swap).
pub fn to_tensor(
    pixels: &[u8],
    width: u32,
    height: u32,
    channels: Channels,
    layout: Layout,
    divisor: f32,
    mean: &[f32],
    std: &[f32],
) -> Vec<f32> {
    let n = channels.count();
    let plane = width as usize * height as usize;
    // Source channel for each model channel.
    let order: &[usize] = match channels {
        Channels::Rgb => &[0, 1, 2],
        Channels::Bgr => &[2, 1, 0],
        Channels::Gray => &[0],
    };
    // (p / divisor - mean) / std == p * scale + offset, computed once per channel.
    let scale: Vec<f32> = std.iter().map(|s| 1.0 / (divisor * s)).collect();
    let offset: Vec<f32> = mean.iter().zip(std).map(|(m, s)| -m / s).collect();
    let mut out = vec![0.0f32; plane * n];
    match layout {
        Layout::Nchw => {
            for (c, &src_c) in order.iter().enumerate() {
                let dst = &mut out[c * plane..(c + 1) * plane];
                for (i, v) in dst.iter_mut().enumerate() {
                    *v = f32::from(pixels[i * n + src_c]) * scale[c] + offset[c];
                }
            }
        }
        Layout::Nhwc => {
            for i in 0..plane {
                for (c, &src_c) in order.iter().enumerate() {
                    out[i * n + c] = f32::from(pixels[i * n + src_c]) * scale[c] + offset[c];
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
        let t = to_tensor(&[255, 128, 0], 1, 1, Channels::Rgb, Layout::Nchw, 255.0, &mean, &std);
        for (a, b) in t.iter().zip([2.248_908, 0.205_182, -1.804_444]) {
            assert!((a - b).abs() < 1e-5, "{t:?}");
        }
    }

    #[test]
    fn layouts_and_bgr_order() {
        // 2x1 image: pixels (1,2,3) and (4,5,6); divisor 1, no mean/std.
        let px = [1, 2, 3, 4, 5, 6];
        let id = [0.0; 3];
        let one = [1.0; 3];
        assert_eq!(to_tensor(&px, 2, 1, Channels::Rgb, Layout::Nchw, 1.0, &id, &one), [1., 4., 2., 5., 3., 6.]);
        assert_eq!(to_tensor(&px, 2, 1, Channels::Rgb, Layout::Nhwc, 1.0, &id, &one), [1., 2., 3., 4., 5., 6.]);
        assert_eq!(to_tensor(&px, 2, 1, Channels::Bgr, Layout::Nchw, 1.0, &id, &one), [3., 6., 2., 5., 1., 4.]);
        assert_eq!(to_tensor(&px, 2, 1, Channels::Bgr, Layout::Nhwc, 1.0, &id, &one), [3., 2., 1., 6., 5., 4.]);
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
}
