//! Decoding: bytes from a camera into a [`Frame`] (8-bit, or 16-bit as float levels), with
//! the size checked from the header before any pixel buffer is allocated.
//!
//! The format is sniffed from the bytes (the request's Content-Type is not trusted). The
//! `image` crate does not honour its allocation limit through `into_decoder` (FACTS.md: a
//! 631-byte JPEG took 12 GB), so the width/height limits are always set and the pixel count
//! is checked from `dimensions()` first.
//!
//! What the frame keeps, as Pillow's `convert("RGB")` / `convert("L")` would see it: gray
//! stays one channel (mono industrial cameras; expanded to RGB only at the tensor, which is
//! the same numbers), alpha is dropped, palettes are expanded, CMYK becomes RGB. 16-bit
//! samples become float levels v / 257 on the 8-bit scale, unrounded (common practice).

use std::io::Cursor;

use image::{DynamicImage, ImageDecoder, ImageError, ImageFormat, ImageReader, Limits};

use super::Orientation;
use super::resize::Plane;
use super::{Frame, PreprocessError};

/// The limits a frame must meet, checked from its header.
#[derive(Debug, Clone, Copy)]
pub struct FrameLimits {
    /// Most pixels (width x height): more is 413 `too_large`.
    pub max_pixels: u64,
    /// Shortest side accepted: shorter is 422 `too_small`.
    pub min_side: u32,
}

/// What a frame's header says, read once per frame before any pixel is decoded: the format
/// (sniffed from the bytes) and the size, with the format's own refusals (a truncated or
/// YCCK JPEG) and the size limits already applied. The HTTP side decides from it where the
/// frame is decoded; [`decode`] then uses its format instead of sniffing again.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Probe {
    /// The sniffed format.
    pub format: ImageFormat,
    /// Width as stored (before EXIF orientation).
    pub width: u32,
    /// Height as stored.
    pub height: u32,
}

impl Probe {
    /// Width x height.
    pub fn pixels(&self) -> u64 {
        u64::from(self.width) * u64::from(self.height)
    }
}

/// Read and check a frame's header.
///
/// # Errors
/// `Empty`, `BadImage` (not an image, a broken header, a truncated JPEG), `Unsupported` (a
/// YCCK JPEG, or a recognised format this build cannot decode), `TooLarge`, `TooSmall`.
pub fn probe(bytes: &[u8], limits: FrameLimits) -> Result<Probe, PreprocessError> {
    if bytes.is_empty() {
        return Err(PreprocessError::Empty);
    }
    let format = image::guess_format(bytes).map_err(|_| {
        PreprocessError::BadImage("not a recognised image format (expected JPEG, PNG, BMP, TIFF or WebP)".into())
    })?;
    if format == ImageFormat::Jpeg {
        // The JPEG decoder fills a truncated scan with grey and reports success; a cut-off
        // frame (a dropped camera connection) must not be classified as if it were whole.
        if !ends_with_eoi(bytes) {
            return Err(PreprocessError::BadImage(
                "truncated JPEG: the data does not end with the end-of-image marker (FF D9)".into(),
            ));
        }
        if is_adobe_ycck(bytes) {
            return Err(PreprocessError::Unsupported(
                "Adobe YCCK JPEG (4-channel YCbCr + K): this build's JPEG decoder inverts its colours \
                 (a known upstream bug), so it is refused rather than classified wrongly; \
                 send RGB, grayscale or plain CMYK JPEG, or PNG/TIFF"
                    .into(),
            ));
        }
    }
    let (width, height) =
        reader(bytes, format, limits.max_pixels).into_dimensions().map_err(|e| classify(e, limits.max_pixels))?;
    check_size(width, height, limits)?;
    Ok(Probe { format, width, height })
}

/// A reader of `format` over `bytes`, with the allocation limits every decode runs under.
fn reader(bytes: &[u8], format: ImageFormat, max_pixels: u64) -> ImageReader<Cursor<&[u8]>> {
    let mut reader = ImageReader::with_format(Cursor::new(bytes), format);
    let side = u32::try_from(max_pixels).unwrap_or(u32::MAX);
    let mut lim = Limits::default();
    lim.max_image_width = Some(side);
    lim.max_image_height = Some(side);
    // 16-bit RGBA is the widest decode target: 8 bytes a pixel, plus decoder scratch.
    lim.max_alloc = Some(max_pixels.saturating_mul(8).saturating_add(64 << 20));
    reader.limits(lim);
    reader
}

/// Decode `bytes`, whose header [`probe`] read, applying EXIF orientation when asked and
/// dropping alpha.
///
/// # Errors
/// `BadImage` (corrupt data), `Unsupported`, `TooLarge` (the decoder's allocation limit).
pub fn decode(
    bytes: &[u8],
    probe: &Probe,
    max_pixels: u64,
    orientation: Orientation,
) -> Result<Frame, PreprocessError> {
    let mut decoder = reader(bytes, probe.format, max_pixels).into_decoder().map_err(|e| classify(e, max_pixels))?;
    if decoder.dimensions() != (probe.width, probe.height) {
        return Err(PreprocessError::BadImage("the header's size changed between reads".into()));
    }
    let exif = match orientation {
        Orientation::Exif => Some(decoder.orientation().map_err(|e| classify(e, max_pixels))?),
        Orientation::Ignore => None,
    };
    let mut img = DynamicImage::from_decoder(decoder).map_err(|e| classify(e, max_pixels))?;
    if let Some(o) = exif {
        img.apply_orientation(o);
    }
    Ok(frame(img))
}

/// Keep what Pillow's `convert("RGB")` keeps: gray or RGB, without alpha, 16-bit as floats.
fn frame(img: DynamicImage) -> Frame {
    let (width, height) = (img.width(), img.height());
    let u8_plane = |channels, data| Frame::U8(Plane { width, height, channels, data });
    let f32_plane = |channels, data: Vec<u16>| {
        Frame::F32(Plane { width, height, channels, data: data.into_iter().map(|v| f32::from(v) / 257.0).collect() })
    };
    match img {
        DynamicImage::ImageLuma8(i) => u8_plane(1, i.into_raw()),
        DynamicImage::ImageLumaA8(_) => u8_plane(1, img.into_luma8().into_raw()),
        DynamicImage::ImageRgb8(i) => u8_plane(3, i.into_raw()),
        DynamicImage::ImageLuma16(i) => f32_plane(1, i.into_raw()),
        DynamicImage::ImageLumaA16(_) => f32_plane(1, img.into_luma16().into_raw()),
        DynamicImage::ImageRgb16(i) => f32_plane(3, i.into_raw()),
        DynamicImage::ImageRgba16(_) => f32_plane(3, img.into_rgb16().into_raw()),
        // RGBA8 and float images: alpha dropped (Pillow drops it too, without premultiplying).
        other => u8_plane(3, other.into_rgb8().into_raw()),
    }
}

/// Whether JPEG data ends with its EOI marker (ITU-T T.81, B.2.1), ignoring zero padding that
/// some cameras append after it.
fn ends_with_eoi(bytes: &[u8]) -> bool {
    let end = bytes.iter().rposition(|&b| b != 0).map_or(0, |i| i + 1);
    bytes[..end].ends_with(&[0xff, 0xd9])
}

/// Whether a JPEG carries an Adobe APP14 segment with transform = 2 (YCCK), read from the
/// marker segments before the first scan (ITU-T T.81 B.1.1.4 segment framing; the APP14
/// layout is Adobe's: "Adobe", version u16, flags0 u16, flags1 u16, transform u8).
fn is_adobe_ycck(bytes: &[u8]) -> bool {
    let mut i = 2; // after SOI
    while i + 4 <= bytes.len() {
        if bytes[i] != 0xff {
            return false;
        }
        let marker = bytes[i + 1];
        if marker == 0xff {
            i += 1; // fill byte
            continue;
        }
        if marker == 0xda || marker == 0xd9 {
            return false; // start of scan / end of image: no APP14 before the data
        }
        let len = usize::from(u16::from_be_bytes([bytes[i + 2], bytes[i + 3]]));
        let payload = &bytes[(i + 4).min(bytes.len())..(i + 2 + len).min(bytes.len())];
        if marker == 0xee && payload.len() >= 12 && payload.starts_with(b"Adobe") {
            return payload[11] == 2;
        }
        i += 2 + len;
    }
    false
}

/// Refuse a frame larger than `max_pixels` or with a side below `min_side`.
fn check_size(w: u32, h: u32, limits: FrameLimits) -> Result<(), PreprocessError> {
    if u64::from(w) * u64::from(h) > limits.max_pixels {
        return Err(PreprocessError::TooLarge { width: w, height: h, max_pixels: limits.max_pixels });
    }
    if w.min(h) < limits.min_side {
        return Err(PreprocessError::TooSmall { width: w, height: h, min_side: limits.min_side });
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

    use image::RgbImage;

    fn lim(max_pixels: u64) -> FrameLimits {
        FrameLimits { max_pixels, min_side: 1 }
    }

    fn rgb(f: Frame) -> Plane<u8> {
        match f {
            Frame::U8(p) => p,
            Frame::F32(_) => panic!("expected an 8-bit frame"),
        }
    }

    /// Probe, then decode: the two reads every frame gets.
    fn decode(bytes: &[u8], limits: FrameLimits, o: Orientation) -> Result<Frame, PreprocessError> {
        let p = probe(bytes, limits)?;
        super::decode(bytes, &p, limits.max_pixels, o)
    }

    fn png(w: u32, h: u32) -> Vec<u8> {
        let img = RgbImage::from_fn(w, h, |x, y| image::Rgb([x as u8, y as u8, 7]));
        let mut out = Vec::new();
        img.write_to(&mut Cursor::new(&mut out), image::ImageFormat::Png).unwrap();
        out
    }

    #[test]
    fn decodes_png_exactly() {
        let img = rgb(decode(&png(5, 4), lim(1000), Orientation::Exif).unwrap());
        assert_eq!((img.width, img.height, img.channels), (5, 4, 3));
        let i = (2 * 5 + 3) * 3;
        assert_eq!(img.data[i..i + 3], [3, 2, 7]);
    }

    #[test]
    fn empty_random_and_truncated_bodies_are_bad_images() {
        assert!(matches!(decode(b"", lim(1000), Orientation::Exif), Err(PreprocessError::Empty)));
        assert!(matches!(
            decode(b"hello, this is text", lim(1000), Orientation::Exif),
            Err(PreprocessError::BadImage(_))
        ));
        let p = png(20, 20);
        assert!(matches!(decode(&p[..p.len() / 2], lim(1000), Orientation::Exif), Err(PreprocessError::BadImage(_))));
    }

    #[test]
    fn truncated_jpeg_is_a_bad_image_and_padding_after_eoi_is_fine() {
        let img = RgbImage::from_fn(64, 48, |x, y| image::Rgb([(x * 4) as u8, (y * 5) as u8, 90]));
        let mut jpeg = Vec::new();
        img.write_to(&mut Cursor::new(&mut jpeg), ImageFormat::Jpeg).unwrap();
        assert!(decode(&jpeg, lim(1 << 20), Orientation::Exif).is_ok());
        for cut in [jpeg.len() / 3, jpeg.len() - 2] {
            let err = decode(&jpeg[..cut], lim(1 << 20), Orientation::Exif).unwrap_err();
            assert!(matches!(err, PreprocessError::BadImage(ref m) if m.contains("truncated JPEG")), "{cut}: {err:?}");
        }
        let mut padded = jpeg.clone();
        padded.extend_from_slice(&[0, 0, 0, 0]);
        assert!(decode(&padded, lim(1 << 20), Orientation::Exif).is_ok());
    }

    #[test]
    fn pixel_limit_is_checked_from_the_header() {
        let err = decode(&png(40, 30), lim(1199), Orientation::Exif).unwrap_err();
        assert!(matches!(err, PreprocessError::TooLarge { width: 40, height: 30, max_pixels: 1199 }), "{err:?}");
        assert!(decode(&png(40, 30), lim(1200), Orientation::Exif).is_ok());
    }

    #[test]
    fn the_probe_reads_format_and_size_from_the_header_only() {
        let p = probe(&png(40, 30), lim(1200)).unwrap();
        assert_eq!((p.format, p.width, p.height, p.pixels()), (ImageFormat::Png, 40, 30, 1200));
        let img = RgbImage::from_fn(64, 48, |x, y| image::Rgb([x as u8, y as u8, 7]));
        let mut jpeg = Vec::new();
        img.write_to(&mut Cursor::new(&mut jpeg), ImageFormat::Jpeg).unwrap();
        assert_eq!(probe(&jpeg, lim(1 << 20)).unwrap().pixels(), 64 * 48);
        // A header claiming 60000 x 60000 is refused from the header: no pixel is decoded and
        // no decode thread is used for it.
        let mut p = png(1, 1);
        p[16..20].copy_from_slice(&60000u32.to_be_bytes());
        p[20..24].copy_from_slice(&60000u32.to_be_bytes());
        let crc = crc32(&p[12..29]);
        p[29..33].copy_from_slice(&crc.to_be_bytes());
        assert!(matches!(probe(&p, lim(40_000_000)), Err(PreprocessError::TooLarge { .. })), "{:?}", probe(&p, lim(1)));
        assert!(matches!(probe(b"not an image", lim(1000)), Err(PreprocessError::BadImage(_))));
        assert!(matches!(probe(&png(40, 30)[..12], lim(1000)), Err(PreprocessError::BadImage(_))));
        assert!(matches!(probe(&[], lim(1000)), Err(PreprocessError::Empty)));
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
        let err = decode(&p, lim(40_000_000), Orientation::Exif).unwrap_err();
        assert!(matches!(err, PreprocessError::TooLarge { .. } | PreprocessError::TooLargeUnknown { .. }), "{err:?}");
    }

    #[test]
    fn jpeg_header_claiming_huge_size_is_refused_without_allocating() {
        let img = RgbImage::from_fn(16, 16, |x, y| image::Rgb([x as u8 * 9, y as u8 * 9, 50]));
        let mut jpeg = Vec::new();
        img.write_to(&mut Cursor::new(&mut jpeg), ImageFormat::Jpeg).unwrap();
        // SOF0 (FF C0): length u16, precision u8, then height and width as u16 (ITU-T T.81 B.2.2).
        let sof = jpeg.windows(2).position(|w| w == [0xff, 0xc0]).expect("a baseline JPEG has SOF0");
        jpeg[sof + 5..sof + 9].copy_from_slice(&[0xea, 0x60, 0xea, 0x60]); // 60000 x 60000
        let err = decode(&jpeg, lim(40_000_000), Orientation::Exif).unwrap_err();
        assert!(matches!(err, PreprocessError::TooLarge { width: 60000, height: 60000, .. }), "{err:?}");
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
        let err = decode(b"GIF89a\x01\x00\x01\x00\x00\x00\x00;", lim(1000), Orientation::Exif).unwrap_err();
        assert!(matches!(err, PreprocessError::Unsupported(_)), "{err:?}");
    }

    #[test]
    fn side_below_min_side_is_too_small() {
        let err = decode(&png(40, 7), FrameLimits { max_pixels: 1000, min_side: 8 }, Orientation::Exif).unwrap_err();
        assert!(matches!(err, PreprocessError::TooSmall { width: 40, height: 7, min_side: 8 }), "{err:?}");
        assert!(decode(&png(8, 8), FrameLimits { max_pixels: 1000, min_side: 8 }, Orientation::Exif).is_ok());
    }

    #[test]
    fn sixteen_bit_gray_becomes_unrounded_float_levels() {
        // v / 257 maps 0..65535 onto 0..255 exactly at the ends (common practice).
        let img = image::ImageBuffer::<image::Luma<u16>, _>::from_raw(3, 1, vec![0u16, 1000, 65535]).unwrap();
        let mut bytes = Vec::new();
        img.write_to(&mut Cursor::new(&mut bytes), ImageFormat::Png).unwrap();
        let Frame::F32(f) = decode(&bytes, lim(100), Orientation::Exif).unwrap() else { panic!("expected floats") };
        assert_eq!(f.channels, 1);
        assert_eq!(f.data, vec![0.0, 1000.0 / 257.0, 255.0]);
    }

    #[test]
    fn gray_and_alpha_frames_keep_one_or_three_channels() {
        let la = image::GrayAlphaImage::from_raw(2, 1, vec![10, 0, 200, 255]).unwrap();
        let mut bytes = Vec::new();
        la.write_to(&mut Cursor::new(&mut bytes), ImageFormat::Png).unwrap();
        let f = rgb(decode(&bytes, lim(100), Orientation::Exif).unwrap());
        assert_eq!((f.channels, f.data.clone()), (1, vec![10, 200]), "alpha dropped, not premultiplied");
        let rgba = image::RgbaImage::from_raw(1, 1, vec![1, 2, 3, 0]).unwrap();
        let mut bytes = Vec::new();
        rgba.write_to(&mut Cursor::new(&mut bytes), ImageFormat::Png).unwrap();
        assert_eq!(rgb(decode(&bytes, lim(100), Orientation::Exif).unwrap()).data, vec![1, 2, 3]);
    }

    #[test]
    fn adobe_ycck_marker_is_detected() {
        // SOI, APP14 "Adobe" (version 100, flags 0, 0, transform), then SOS.
        let jpeg = |transform: u8| {
            let mut j = vec![0xff, 0xd8, 0xff, 0xee, 0x00, 0x0e];
            j.extend_from_slice(b"Adobe");
            j.extend_from_slice(&[0x00, 0x64, 0, 0, 0, 0, transform]);
            j.extend_from_slice(&[0xff, 0xda, 0x00, 0x02, 0xff, 0xd9]);
            j
        };
        assert!(is_adobe_ycck(&jpeg(2)));
        assert!(!is_adobe_ycck(&jpeg(1)), "transform 1 is YCbCr");
        assert!(!is_adobe_ycck(&jpeg(0)), "transform 0 is plain RGB/CMYK");
        let err = decode(&jpeg(2), lim(100), Orientation::Exif).unwrap_err();
        assert!(matches!(err, PreprocessError::Unsupported(ref m) if m.contains("YCCK")), "{err:?}");
    }
}
