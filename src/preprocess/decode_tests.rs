//! Tests of the decode stage (sniffing, header limits, JPEG against the image crate).
use super::*;

use image::RgbImage;

fn lim(max_pixels: u64) -> FrameLimits {
    FrameLimits { max_pixels, min_side: 1, max_decode_bytes: u64::MAX }
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
    super::decode(p, limits.max_pixels, o)
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
    assert!(matches!(decode(b"hello, this is text", lim(1000), Orientation::Exif), Err(PreprocessError::BadImage(_))));
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
    let small = png(40, 30);
    let p = probe(&small, lim(1200)).unwrap();
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
    let err = decode(
        &png(40, 7),
        FrameLimits { max_pixels: 1000, min_side: 8, max_decode_bytes: u64::MAX },
        Orientation::Exif,
    )
    .unwrap_err();
    assert!(matches!(err, PreprocessError::TooSmall { width: 40, height: 7, min_side: 8 }), "{err:?}");
    assert!(
        decode(
            &png(8, 8),
            FrameLimits { max_pixels: 1000, min_side: 8, max_decode_bytes: u64::MAX },
            Orientation::Exif
        )
        .is_ok()
    );
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

/// A 16x16 CMYK JPEG written by Pillow 11 (`Image.fromarray(a, "CMYK").save(q=95)`, C = 10x,
/// M = 12y, Y = 60, K = 20), whose Adobe APP14 segment says transform 0 (plain CMYK).
fn cmyk_jpeg() -> Vec<u8> {
    std::fs::read(concat!(env!("CARGO_MANIFEST_DIR"), "/tests/fixtures/images/cmyk_16x16.jpg")).unwrap()
}

#[test]
fn plain_cmyk_decodes_as_the_image_crate_does_and_ycck_is_refused() {
    let jpeg = cmyk_jpeg();
    let ours = rgb(decode(&jpeg, lim(1000), Orientation::Exif).unwrap());
    // Reference: the `image` crate's own JPEG path (which this module replaced for JPEG).
    let theirs = image::load_from_memory(&jpeg).unwrap().into_rgb8();
    assert_eq!((ours.width, ours.height, ours.channels), (16, 16, 3));
    assert_eq!(ours.data, theirs.into_raw());
    // The same file marked YCCK (APP14 transform byte = 2, Adobe's layout: "Adobe",
    // version u16, flags0 u16, flags1 u16, transform u8) is refused from its header.
    let mut ycck = jpeg.clone();
    let at = ycck.windows(5).position(|w| w == b"Adobe").unwrap() + 11;
    assert_eq!(ycck[at], 0);
    ycck[at] = 2;
    let err = probe(&ycck[..], lim(1000)).unwrap_err();
    assert!(matches!(err, PreprocessError::Unsupported(ref m) if m.contains("YCCK")), "{err:?}");
}

#[test]
fn jpeg_decodes_as_the_image_crate_does_in_colour_gray_and_every_exif_orientation() {
    // Reference: the `image` crate 0.25 (decode, then `apply_orientation` from the EXIF
    // chunk), the path JPEG took before this decoder was driven directly.
    let colour = RgbImage::from_fn(24, 16, |x, y| image::Rgb([(x * 10) as u8, (y * 15) as u8, 90]));
    let gray = image::GrayImage::from_fn(24, 16, |x, y| image::Luma([(x * 7 + y * 3) as u8]));
    for img in [DynamicImage::ImageRgb8(colour), DynamicImage::ImageLuma8(gray)] {
        let mut plain = Vec::new();
        img.write_to(&mut Cursor::new(&mut plain), ImageFormat::Jpeg).unwrap();
        for o in 1..=8u16 {
            let jpeg = with_exif_orientation(&plain, o);
            let ours = rgb(decode(&jpeg, lim(1000), Orientation::Exif).unwrap());
            let mut theirs = image::load_from_memory(&jpeg).unwrap();
            theirs.apply_orientation(ExifOrientation::from_exif(o as u8).unwrap());
            let theirs = match theirs {
                DynamicImage::ImageLuma8(i) => (1, i.width(), i.height(), i.into_raw()),
                other => {
                    let i = other.into_rgb8();
                    (3, i.width(), i.height(), i.into_raw())
                }
            };
            assert_eq!((ours.channels, ours.width, ours.height, ours.data), theirs, "orientation {o}");
            let ignored = rgb(decode(&jpeg, lim(1000), Orientation::Ignore).unwrap());
            assert_eq!((ignored.width, ignored.height), (24, 16), "orientation {o} ignored");
        }
    }
}

#[test]
fn a_three_component_jpeg_marked_ycck_decodes_as_the_ycbcr_it_is() {
    // libjpeg and the image crate treat Adobe transform 2 on 3 components as YCbCr: only a
    // 4-component YCCK frame is refused.
    let img = RgbImage::from_fn(16, 8, |x, y| image::Rgb([(x * 15) as u8, (y * 30) as u8, 99]));
    let mut plain = Vec::new();
    img.write_to(&mut Cursor::new(&mut plain), ImageFormat::Jpeg).unwrap();
    let mut marked = plain[..2].to_vec();
    marked.extend_from_slice(&[0xff, 0xee, 0x00, 0x0e]);
    marked.extend_from_slice(b"Adobe");
    marked.extend_from_slice(&[0x00, 0x64, 0, 0, 0, 0, 2]);
    marked.extend_from_slice(&plain[2..]);
    let ours = rgb(decode(&marked, lim(1000), Orientation::Exif).unwrap());
    assert_eq!(ours.data, rgb(decode(&plain, lim(1000), Orientation::Exif).unwrap()).data);
}

#[test]
fn a_pillow_written_subsampled_jpeg_decodes_as_the_image_crate_does() {
    // A 40x30 RGB JPEG written by Pillow 13 with 4:2:0 chroma subsampling (what cameras and
    // Pillow write by default) and EXIF orientation 6 (rotate 90 clockwise to display).
    let jpeg =
        std::fs::read(concat!(env!("CARGO_MANIFEST_DIR"), "/tests/fixtures/images/rgb420_exif6_40x30.jpg")).unwrap();
    let ours = rgb(decode(&jpeg, lim(10_000), Orientation::Exif).unwrap());
    let mut theirs = image::load_from_memory(&jpeg).unwrap();
    theirs.apply_orientation(ExifOrientation::Rotate90);
    let theirs = theirs.into_rgb8();
    assert_eq!((ours.width, ours.height), (30, 40), "turned upright");
    assert_eq!(ours.data, theirs.into_raw());
}

/// `jpeg` with an APP1 EXIF segment holding one IFD0 entry: Orientation (tag 0x0112,
/// SHORT, count 1) = `o` (EXIF 2.32 section 4.6.4; TIFF 6.0 little-endian header "II*").
fn with_exif_orientation(jpeg: &[u8], o: u16) -> Vec<u8> {
    let mut tiff = b"II*\0".to_vec();
    tiff.extend_from_slice(&8u32.to_le_bytes()); // IFD0 offset
    tiff.extend_from_slice(&1u16.to_le_bytes()); // one entry
    tiff.extend_from_slice(&0x0112u16.to_le_bytes());
    tiff.extend_from_slice(&3u16.to_le_bytes()); // SHORT
    tiff.extend_from_slice(&1u32.to_le_bytes());
    tiff.extend_from_slice(&o.to_le_bytes());
    tiff.extend_from_slice(&[0, 0]);
    tiff.extend_from_slice(&0u32.to_le_bytes()); // no next IFD
    let mut app1 = b"Exif\0\0".to_vec();
    app1.extend_from_slice(&tiff);
    let mut out = jpeg[..2].to_vec(); // SOI
    out.extend_from_slice(&[0xff, 0xe1]);
    out.extend_from_slice(&u16::try_from(app1.len() + 2).unwrap().to_be_bytes());
    out.extend_from_slice(&app1);
    out.extend_from_slice(&jpeg[2..]);
    out
}

/// The header's estimate of a decode's memory (`decode_bytes`), per format and colour type,
/// as docs/configuration.md tabulates it.
#[test]
fn decode_cost_is_estimated_from_the_header() {
    let encode = |color: image::ExtendedColorType, format: image::ImageFormat| {
        let data = vec![9u8; 10 * 10 * color.bits_per_pixel() as usize / 8];
        let mut out = Vec::new();
        image::write_buffer_with_format(&mut Cursor::new(&mut out), &data, 10, 10, color, format).unwrap();
        out
    };
    let cost = |bytes: &[u8]| probe(bytes, lim(1000)).unwrap().decode_bytes;
    use image::ExtendedColorType as C;
    // PNG: decoded bytes twice (a rotated copy) + the plane kept (1 a channel, 4 from 16 bits).
    assert_eq!(cost(&encode(C::Rgb8, image::ImageFormat::Png)), 100 * (2 * 3 + 3));
    assert_eq!(cost(&encode(C::Rgba8, image::ImageFormat::Png)), 100 * (2 * 4 + 3));
    assert_eq!(cost(&encode(C::L8, image::ImageFormat::Png)), 100 * (2 + 1));
    assert_eq!(cost(&encode(C::Rgba16, image::ImageFormat::Png)), 100 * (2 * 8 + 12));
    // JPEG: output twice; a colour one's coefficients (2 bytes x 3 components) on the frame
    // padded to 32 x 32; a gray baseline one has none.
    assert_eq!(cost(&encode(C::Rgb8, image::ImageFormat::Jpeg)), 100 * 6 + 32 * 32 * 6);
    assert_eq!(cost(&encode(C::L8, image::ImageFormat::Jpeg)), 100 * 2);
    // Over the limit: 413 too_large before any pixel is decoded.
    let small = FrameLimits { max_pixels: 1000, min_side: 1, max_decode_bytes: 2000 };
    let e = probe(&encode(C::Rgba16, image::ImageFormat::Png)[..], small).unwrap_err();
    assert!(matches!(e, PreprocessError::TooCostly { decode_bytes: 2800, max: 2000, .. }), "{e:?}");
    assert_eq!(e.kind(), "too_large");
}

/// A TIFF whose strips are JPEG (written by Pillow with libtiff, compression 7): refused,
/// since its embedded JPEG's size is not the TIFF header's.
#[test]
fn jpeg_compressed_tiff_is_refused() {
    let tif =
        std::fs::read(concat!(env!("CARGO_MANIFEST_DIR"), "/tests/fixtures/images/jpeg_in_tiff_16x16.tif")).unwrap();
    let e = probe(&tif[..], lim(1000)).unwrap_err();
    assert!(matches!(e, PreprocessError::Unsupported(ref m) if m.contains("JPEG compression (7)")), "{e:?}");
}
