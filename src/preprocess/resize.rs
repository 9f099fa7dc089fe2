//! Resizing with Pillow's semantics: convolution filters that widen when downscaling
//! (antialiased), via `fast_image_resize` (within one level of Pillow for bilinear, and
//! about 13x faster than the `image` crate's own resize here: FACTS.md).

use fast_image_resize::{FilterType, PixelType, ResizeAlg, ResizeOptions, Resizer, images::Image, images::ImageRef};

use super::PreprocessError;
use crate::config::Filter;

/// The resize algorithm that gives Pillow's result for `filter`.
fn algorithm(filter: Filter) -> ResizeAlg {
    match filter {
        Filter::Nearest => ResizeAlg::Nearest,
        Filter::Bilinear => ResizeAlg::Convolution(FilterType::Bilinear),
        // Pillow's BICUBIC is the a = -0.5 cubic, which is Catmull-Rom.
        Filter::Bicubic => ResizeAlg::Convolution(FilterType::CatmullRom),
        Filter::Lanczos => ResizeAlg::Convolution(FilterType::Lanczos3),
        Filter::Area => ResizeAlg::Convolution(FilterType::Box),
    }
}

/// Resize an interleaved 8-bit image of `channels` (1 or 3) to `width` x `height`.
///
/// # Errors
/// Only for buffers that do not match their stated size (a bug, reported not panicked).
pub fn resize(
    src: &[u8],
    src_w: u32,
    src_h: u32,
    channels: usize,
    width: u32,
    height: u32,
    filter: Filter,
) -> Result<Vec<u8>, PreprocessError> {
    let pixel = if channels == 1 { PixelType::U8 } else { PixelType::U8x3 };
    if (src_w, src_h) == (width, height) {
        return Ok(src.to_vec());
    }
    let internal = |e: &dyn std::fmt::Display| PreprocessError::Internal(format!("resize: {e}"));
    let src = ImageRef::new(src_w, src_h, src, pixel).map_err(|e| internal(&e))?;
    let mut dst = Image::new(width, height, pixel);
    Resizer::new()
        .resize(&src, &mut dst, &ResizeOptions::new().resize_alg(algorithm(filter)))
        .map_err(|e| internal(&e))?;
    Ok(dst.into_vec())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn flat_image_stays_flat_under_every_filter() {
        let src = vec![77u8; 40 * 30 * 3];
        for f in [Filter::Nearest, Filter::Bilinear, Filter::Bicubic, Filter::Lanczos, Filter::Area] {
            let out = resize(&src, 40, 30, 3, 7, 9, f).unwrap();
            assert_eq!(out.len(), 7 * 9 * 3);
            assert!(out.iter().all(|&v| v == 77), "{f:?}: {out:?}");
        }
    }

    #[test]
    fn box_downscale_by_two_is_the_block_mean() {
        // 4x2 gray image, halved: Pillow's BOX averages each 2x2 block.
        let src = [0u8, 100, 200, 250, 0, 100, 200, 250];
        let out = resize(&src, 4, 2, 1, 2, 1, Filter::Area).unwrap();
        assert_eq!(out, vec![50, 225]);
    }
}
