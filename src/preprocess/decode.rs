//! Decoding: bytes from a camera into an 8-bit RGB frame, with the size checked from the
//! header before any pixel buffer is allocated.
//!
//! The format is sniffed from the bytes (the request's Content-Type is not trusted). The
//! `image` crate does not honour its allocation limit through `into_decoder` (FACTS.md: a
//! 631-byte JPEG took 12 GB), so the width/height limits are always set and the pixel count
//! is checked from `dimensions()` first.

use std::io::Cursor;

use image::{DynamicImage, ImageDecoder, ImageError, ImageFormat, ImageReader, Limits, RgbImage};

use super::PreprocessError;

/// Decode `bytes` into RGB8, applying EXIF orientation and dropping alpha.
///
/// # Errors
/// `Empty`, `BadImage` (not an image, truncated, corrupt), `Unsupported` (a recognised format
/// this build cannot decode) or `TooLarge` (more than `max_pixels` pixels).
pub fn decode(bytes: &[u8], max_pixels: u64) -> Result<RgbImage, PreprocessError> {
    if bytes.is_empty() {
        return Err(PreprocessError::Empty);
    }
    // A Cursor over memory cannot fail to read; an error here is still answered, not unwrapped.
    let mut reader = ImageReader::new(Cursor::new(bytes))
        .with_guessed_format()
        .map_err(|e| PreprocessError::BadImage(e.to_string()))?;
    match reader.format() {
        None => {
            return Err(PreprocessError::BadImage(
                "not a recognised image format (expected JPEG, PNG, BMP, TIFF or WebP)".into(),
            ));
        }
        // The JPEG decoder fills a truncated scan with grey and reports success; a cut-off
        // frame (a dropped camera connection) must not be classified as if it were whole.
        Some(ImageFormat::Jpeg) if !ends_with_eoi(bytes) => {
            return Err(PreprocessError::BadImage(
                "truncated JPEG: the data does not end with the end-of-image marker (FF D9)".into(),
            ));
        }
        Some(_) => {}
    }
    let side = u32::try_from(max_pixels).unwrap_or(u32::MAX);
    let mut limits = Limits::default();
    limits.max_image_width = Some(side);
    limits.max_image_height = Some(side);
    // 16-bit RGBA is the widest decode target: 8 bytes a pixel, plus decoder scratch.
    limits.max_alloc = Some(max_pixels.saturating_mul(8).saturating_add(64 << 20));
    reader.limits(limits);

    let mut decoder = reader.into_decoder().map_err(|e| classify(e, max_pixels))?;
    let (w, h) = decoder.dimensions();
    check_pixels(w, h, max_pixels)?;
    let orientation = decoder.orientation().map_err(|e| classify(e, max_pixels))?;
    let mut img = DynamicImage::from_decoder(decoder).map_err(|e| classify(e, max_pixels))?;
    img.apply_orientation(orientation);
    Ok(img.into_rgb8())
}

/// Whether JPEG data ends with its EOI marker (ITU-T T.81, B.2.1), ignoring zero padding that
/// some cameras append after it.
fn ends_with_eoi(bytes: &[u8]) -> bool {
    let end = bytes.iter().rposition(|&b| b != 0).map_or(0, |i| i + 1);
    bytes[..end].ends_with(&[0xff, 0xd9])
}

/// Refuse a frame larger than `max_pixels`.
fn check_pixels(w: u32, h: u32, max_pixels: u64) -> Result<(), PreprocessError> {
    if u64::from(w) * u64::from(h) > max_pixels {
        return Err(PreprocessError::TooLarge { width: w, height: h, max_pixels });
    }
    Ok(())
}

fn classify(e: ImageError, max_pixels: u64) -> PreprocessError {
    match e {
        ImageError::Limits(l) => PreprocessError::TooLargeUnknown { max_pixels, detail: l.to_string() },
        ImageError::Unsupported(u) => PreprocessError::Unsupported(u.to_string()),
        other => PreprocessError::BadImage(other.to_string()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn png(w: u32, h: u32) -> Vec<u8> {
        let img = RgbImage::from_fn(w, h, |x, y| image::Rgb([x as u8, y as u8, 7]));
        let mut out = Vec::new();
        img.write_to(&mut Cursor::new(&mut out), image::ImageFormat::Png).unwrap();
        out
    }

    #[test]
    fn decodes_png_exactly() {
        let img = decode(&png(5, 4), 1000).unwrap();
        assert_eq!(img.dimensions(), (5, 4));
        assert_eq!(img.get_pixel(3, 2).0, [3, 2, 7]);
    }

    #[test]
    fn empty_random_and_truncated_bodies_are_bad_images() {
        assert!(matches!(decode(b"", 1000), Err(PreprocessError::Empty)));
        assert!(matches!(decode(b"hello, this is text", 1000), Err(PreprocessError::BadImage(_))));
        let p = png(20, 20);
        assert!(matches!(decode(&p[..p.len() / 2], 1000), Err(PreprocessError::BadImage(_))));
    }

    #[test]
    fn truncated_jpeg_is_a_bad_image_and_padding_after_eoi_is_fine() {
        let img = RgbImage::from_fn(64, 48, |x, y| image::Rgb([(x * 4) as u8, (y * 5) as u8, 90]));
        let mut jpeg = Vec::new();
        img.write_to(&mut Cursor::new(&mut jpeg), ImageFormat::Jpeg).unwrap();
        assert!(decode(&jpeg, 1 << 20).is_ok());
        for cut in [jpeg.len() / 3, jpeg.len() - 2] {
            let err = decode(&jpeg[..cut], 1 << 20).unwrap_err();
            assert!(matches!(err, PreprocessError::BadImage(ref m) if m.contains("truncated JPEG")), "{cut}: {err:?}");
        }
        let mut padded = jpeg.clone();
        padded.extend_from_slice(&[0, 0, 0, 0]);
        assert!(decode(&padded, 1 << 20).is_ok());
    }

    #[test]
    fn pixel_limit_is_checked_from_the_header() {
        let err = decode(&png(40, 30), 1199).unwrap_err();
        assert!(matches!(err, PreprocessError::TooLarge { width: 40, height: 30, max_pixels: 1199 }), "{err:?}");
        assert!(decode(&png(40, 30), 1200).is_ok());
    }

    #[test]
    fn header_claiming_huge_size_is_refused_without_allocating() {
        // A PNG whose IHDR claims 60000 x 60000 (10.8 GB as RGB) followed by nothing.
        let mut p = png(1, 1);
        p[16..20].copy_from_slice(&60000u32.to_be_bytes());
        p[20..24].copy_from_slice(&60000u32.to_be_bytes());
        // fix the IHDR CRC so that the decoder reads the header (CRC-32 over type + data)
        let crc = crc32(&p[12..29]);
        p[29..33].copy_from_slice(&crc.to_be_bytes());
        let err = decode(&p, 40_000_000).unwrap_err();
        assert!(matches!(err, PreprocessError::TooLarge { .. } | PreprocessError::TooLargeUnknown { .. }), "{err:?}");
    }

    /// CRC-32 (ISO 3309 / PNG spec section 5.5), bitwise.
    fn crc32(data: &[u8]) -> u32 {
        let mut c = 0xffff_ffffu32;
        for &b in data {
            c ^= u32::from(b);
            for _ in 0..8 {
                c = if c & 1 != 0 { 0xedb8_8320 ^ (c >> 1) } else { c >> 1 };
            }
        }
        !c
    }

    #[test]
    fn gif_is_recognised_but_unsupported() {
        let err = decode(b"GIF89a\x01\x00\x01\x00\x00\x00\x00;", 1000).unwrap_err();
        assert!(matches!(err, PreprocessError::Unsupported(_)), "{err:?}");
    }
}
