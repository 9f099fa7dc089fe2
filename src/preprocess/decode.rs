//! Decoding: bytes from a camera into a [`Frame`] (8-bit, or 16-bit as float levels), with
//! the size checked from the header before any pixel buffer is allocated.
//!
//! The format is sniffed from the bytes (the request's Content-Type is not trusted). A frame's
//! header is read once: [`probe`] reads it and keeps what it read in the [`Probe`], which
//! [`decode`] consumes. JPEG (what line cameras send) is decoded by zune-jpeg directly, so
//! the decoder that read the header decodes the scan, over the caller's bytes, uncopied.
//! Other formats go through the `image` crate, whose decoders read the header again when
//! built (PNG, BMP, TIFF, WebP headers are a few dozen bytes). The `image` crate does not
//! honour its allocation limit through `into_decoder` (FACTS.md: a 631-byte JPEG took 12 GB),
//! so the width/height limits are always set and the pixel count is checked from the header
//! first, for every format.
//!
//! What the frame keeps, as Pillow's `convert("RGB")` / `convert("L")` would see it: gray
//! stays one channel (mono industrial cameras; expanded to RGB only at the tensor, which is
//! the same numbers), alpha is dropped, palettes are expanded, CMYK becomes RGB. 16-bit
//! samples become float levels v / 257 on the 8-bit scale, unrounded (common practice).

use std::io::Cursor;

use image::metadata::Orientation as ExifOrientation;
use image::{DynamicImage, ImageBuffer, ImageDecoder, ImageError, ImageFormat, ImageReader, Limits};
use zune_jpeg::JpegDecoder;
use zune_jpeg::zune_core::bytestream::ZCursor;
use zune_jpeg::zune_core::colorspace::ColorSpace;
use zune_jpeg::zune_core::options::DecoderOptions;

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
    /// Most memory one decode may take, estimated from the header ([`decode_bytes`]): more
    /// is 413 `too_large`.
    pub max_decode_bytes: u64,
}

/// What a frame's header says, read once per frame before any pixel is decoded: the format
/// (sniffed from the bytes) and the size, with the format's own refusals (a truncated or
/// YCCK JPEG) and the size limits already applied. The HTTP side decides from it where the
/// frame is decoded; [`decode`] then goes on from it. It holds the frame's bytes (`B`: a
/// shared `Bytes` on the request path, a borrowed slice elsewhere) and, for a JPEG, the
/// decoder with its header read.
pub struct Probe<B: AsRef<[u8]>> {
    /// The sniffed format.
    pub format: ImageFormat,
    /// Width as stored (before EXIF orientation).
    pub width: u32,
    /// Height as stored.
    pub height: u32,
    /// The memory its decode takes at most, estimated from the header ([`decode_bytes`]).
    pub decode_bytes: u64,
    body: Body<B>,
}

/// A JPEG decoder over the frame's bytes (boxed: a few kilobytes of tables).
type Jpeg<B> = Box<JpegDecoder<ZCursor<B>>>;

enum Body<B: AsRef<[u8]>> {
    /// A JPEG's decoder with its header read.
    Jpeg(Jpeg<B>),
    /// Any other format: the `image` crate decodes it from the bytes.
    Other(B),
}

impl<B: AsRef<[u8]>> Probe<B> {
    /// Width x height.
    pub fn pixels(&self) -> u64 {
        u64::from(self.width) * u64::from(self.height)
    }
}

impl<B: AsRef<[u8]>> std::fmt::Debug for Probe<B> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Probe")
            .field("format", &self.format)
            .field("width", &self.width)
            .field("height", &self.height)
            .finish()
    }
}

/// Read and check a frame's header.
///
/// # Errors
/// `Empty`, `BadImage` (not an image, a broken header, a truncated JPEG), `Unsupported` (a
/// YCCK JPEG, or a recognised format this build cannot decode), `TooLarge`, `TooSmall`.
pub fn probe<B: AsRef<[u8]>>(bytes: B, limits: FrameLimits) -> Result<Probe<B>, PreprocessError> {
    let data = bytes.as_ref();
    if data.is_empty() {
        return Err(PreprocessError::Empty);
    }
    let format = image::guess_format(data).map_err(|_| {
        PreprocessError::BadImage("not a recognised image format (expected JPEG, PNG, BMP, TIFF or WebP)".into())
    })?;
    if format == ImageFormat::Tiff {
        refuse_jpeg_in_tiff(data)?;
    }
    let (width, height, decode_bytes, body) = if format == ImageFormat::Jpeg {
        let (w, h, decoder) = jpeg_header(bytes)?;
        let cost = jpeg_decode_bytes(&decoder, w, h);
        (w, h, cost, Body::Jpeg(decoder))
    } else {
        let (w, h, color) = {
            let decoder =
                reader(data, format, limits.max_pixels).into_decoder().map_err(|e| classify(e, limits.max_pixels))?;
            let (w, h) = decoder.dimensions();
            (w, h, decoder.color_type())
        };
        (w, h, decode_bytes(w, h, bytes_per_pixel(color, format)), Body::Other(bytes))
    };
    check_size(width, height, limits)?;
    if decode_bytes > limits.max_decode_bytes {
        return Err(PreprocessError::TooCostly { width, height, format, decode_bytes, max: limits.max_decode_bytes });
    }
    Ok(Probe { format, width, height, decode_bytes, body })
}

/// The memory a decode takes at most, from the frame's size and the bytes per pixel its
/// format and colour type need at the decode's peak ([`bytes_per_pixel`],
/// [`jpeg_bytes_per_pixel`]). The decoders cannot be interrupted once started, so this is
/// the one point where a frame that is legal by `max_pixels` but costly (16-bit RGBA, a
/// progressive JPEG) can still be refused; its time grows with the same bytes.
pub fn decode_bytes(width: u32, height: u32, per_pixel: u64) -> u64 {
    (u64::from(width) * u64::from(height)).saturating_mul(per_pixel)
}

/// Peak bytes per pixel of an `image` decode into the frame lineside keeps: the decoded
/// image, a second copy when EXIF orientation rotates it, and the plane kept (8-bit levels,
/// or 4-byte floats per channel from 16-bit samples). WebP adds the canvas and frame buffer
/// an animated file is composed in (4 bytes each).
fn bytes_per_pixel(color: image::ColorType, format: ImageFormat) -> u64 {
    let decoded = u64::from(color.bytes_per_pixel());
    let channels = if color.has_color() { 3 } else { 1 };
    let sample = if color.bytes_per_pixel() / color.channel_count().max(1) >= 2 { 4 } else { 1 };
    let composing = if format == ImageFormat::WebP { 8 } else { 0 };
    2 * decoded + channels * sample + composing
}

/// Peak bytes of a JPEG decode: the output (gray or RGB) and a rotated copy, 1 or 3 bytes a
/// pixel each; and for a progressive JPEG, or a colour one whose components may arrive in
/// separate scans, every component's DCT coefficients (2 bytes each at full resolution, an
/// upper bound for subsampled chroma), on the frame padded to whole MCUs (at most 32 pixels
/// a side), held until the last scan.
fn jpeg_decode_bytes<B: AsRef<[u8]>>(decoder: &JpegDecoder<ZCursor<B>>, width: u32, height: u32) -> u64 {
    let gray = matches!(decoder.output_colorspace(), Some(ColorSpace::Luma | ColorSpace::LumaA));
    let out = if gray { 1 } else { 3 };
    let info = decoder.info();
    let components = u64::from(info.as_ref().map_or(3, |i| i.components));
    let progressive = info.as_ref().is_some_and(|i| i.sof.is_progressive());
    let coefficients = if progressive || components > 1 { 2 * components } else { 0 };
    let padded = |side: u32| u64::from(side).div_ceil(32) * 32;
    decode_bytes(width, height, 2 * out).saturating_add((padded(width) * padded(height)).saturating_mul(coefficients))
}

/// Refuse a TIFF whose strips are JPEG (compression 6 or 7): the embedded JPEG is decoded at
/// its own size, which the TIFF header does not bound (a header saying 8 x 8 could hold a
/// 16384 x 16384 JPEG), so neither `max_pixels` nor `max_decode_bytes` would hold.
fn refuse_jpeg_in_tiff(data: &[u8]) -> Result<(), PreprocessError> {
    let mut tiff =
        tiff::decoder::Decoder::new(Cursor::new(data)).map_err(|e| PreprocessError::BadImage(format!("TIFF: {e}")))?;
    match tiff.find_tag_unsigned::<u32>(tiff::tags::Tag::Compression) {
        Ok(Some(c @ (6 | 7))) => Err(PreprocessError::Unsupported(format!(
            "TIFF with JPEG compression ({c}): its embedded JPEG's size is not bound by the TIFF header, so it \
             is refused; send uncompressed, LZW or Deflate TIFF, or the JPEG itself"
        ))),
        _ => Ok(()),
    }
}

/// A JPEG's header, read by the decoder that will decode it.
fn jpeg_header<B: AsRef<[u8]>>(bytes: B) -> Result<(u32, u32, Jpeg<B>), PreprocessError> {
    // The JPEG decoder fills a truncated scan with grey and reports success; a cut-off
    // frame (a dropped camera connection) must not be classified as if it were whole.
    if !ends_with_eoi(bytes.as_ref()) {
        return Err(PreprocessError::BadImage(
            "truncated JPEG: the data does not end with the end-of-image marker (FF D9)".into(),
        ));
    }
    // Not strict: camera firmware writes stray bytes between segments, which libjpeg and
    // Pillow accept too. No size limit here: ours is checked from the header right after.
    let options = DecoderOptions::default().set_strict_mode(false).set_max_width(usize::MAX).set_max_height(usize::MAX);
    let mut decoder = Box::new(JpegDecoder::new_with_options(ZCursor::new(bytes), options));
    decoder.decode_headers().map_err(jpeg_error)?;
    let (w, h) = decoder.dimensions().ok_or_else(|| PreprocessError::BadImage("JPEG without a frame header".into()))?;
    // 2-component JPEGs exist (rarely) and would be decoded into an RGB buffer band by band:
    // a scrambled frame classified without an error. Only gray, colour and CMYK are taken.
    let components = decoder.info().map_or(0, |i| i.components);
    if !matches!(components, 1 | 3 | 4) {
        return Err(PreprocessError::Unsupported(format!(
            "JPEG with {components} colour components: only 1 (gray), 3 (colour) or 4 (CMYK) are decoded; \
             send gray, RGB or CMYK JPEG, or PNG"
        )));
    }
    match decoder.input_colorspace() {
        // Adobe transform 2 on a 3-component frame is decoded as the YCbCr it is.
        Some(ColorSpace::YCCK) if components == 4 => Err(PreprocessError::Unsupported(
            "Adobe YCCK JPEG (4-channel YCbCr + K): this build's JPEG decoder inverts its colours \
             (a known upstream bug), so it is refused rather than classified wrongly; \
             send RGB, grayscale or plain CMYK JPEG, or PNG/TIFF"
                .into(),
        )),
        // Gray stays gray; everything else (YCbCr, RGB, CMYK) is decoded to RGB, as the
        // `image` crate asks of the same decoder.
        Some(space @ (ColorSpace::Luma | ColorSpace::LumaA)) => {
            decoder.set_options(decoder.options().jpeg_set_out_colorspace(space));
            Ok((to_u32(w), to_u32(h), decoder))
        }
        _ => {
            decoder.set_options(decoder.options().jpeg_set_out_colorspace(ColorSpace::RGB));
            Ok((to_u32(w), to_u32(h), decoder))
        }
    }
}

/// JPEG sides are 16-bit (ITU-T T.81 B.2.2), so they always fit.
fn to_u32(side: usize) -> u32 {
    u32::try_from(side).unwrap_or(u32::MAX)
}

fn jpeg_error(e: zune_jpeg::errors::DecodeErrors) -> PreprocessError {
    use zune_jpeg::errors::DecodeErrors;
    match e {
        DecodeErrors::Unsupported(u) => PreprocessError::Unsupported(format!("JPEG: {u:?}")),
        other => PreprocessError::BadImage(format!("JPEG: {other}")),
    }
}

/// A reader of `format` over `bytes`, with the allocation limits every decode runs under.
fn reader(bytes: &[u8], format: ImageFormat, max_pixels: u64) -> ImageReader<Cursor<&[u8]>> {
    let mut reader = ImageReader::with_format(Cursor::new(bytes), format);
    let side = u32::try_from(max_pixels).unwrap_or(u32::MAX);
    let mut lim = Limits::default();
    lim.max_image_width = Some(side);
    lim.max_image_height = Some(side);
    // 16-bit RGBA is the widest decode target: 8 bytes a pixel, plus decoder scratch (a
    // backstop: `max_decode_bytes` has refused what costs more from the header already).
    lim.max_alloc = Some(max_pixels.saturating_mul(8).saturating_add(64 << 20));
    reader.limits(lim);
    reader
}

/// Decode the frame [`probe`] read, applying EXIF orientation when asked and dropping alpha.
///
/// # Errors
/// `BadImage` (corrupt data), `Unsupported`, `TooLarge` (the decoder's allocation limit).
pub fn decode<B: AsRef<[u8]>>(
    probe: Probe<B>,
    max_pixels: u64,
    orientation: Orientation,
) -> Result<Frame, PreprocessError> {
    let (width, height) = (probe.width, probe.height);
    let bytes = match probe.body {
        Body::Jpeg(decoder) => return decode_jpeg(*decoder, width, height, orientation),
        Body::Other(bytes) => bytes,
    };
    let mut decoder =
        reader(bytes.as_ref(), probe.format, max_pixels).into_decoder().map_err(|e| classify(e, max_pixels))?;
    if decoder.dimensions() != (width, height) {
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

/// Decode a JPEG's scan with the decoder that read its header (the size was checked then).
fn decode_jpeg<B: AsRef<[u8]>>(
    mut decoder: JpegDecoder<ZCursor<B>>,
    width: u32,
    height: u32,
    orientation: Orientation,
) -> Result<Frame, PreprocessError> {
    let exif = match orientation {
        Orientation::Exif => decoder
            .exif()
            .and_then(|chunk| ExifOrientation::from_exif_chunk(chunk))
            .filter(|o| *o != ExifOrientation::NoTransforms),
        Orientation::Ignore => None,
    };
    let gray = matches!(decoder.output_colorspace(), Some(ColorSpace::Luma | ColorSpace::LumaA));
    let size = decoder.output_buffer_size().ok_or_else(|| PreprocessError::BadImage("JPEG: header not read".into()))?;
    let mut data = vec![0u8; size];
    decoder.decode_into(&mut data).map_err(jpeg_error)?;
    let channels = match (gray, data.len() / (width as usize * height as usize).max(1)) {
        (true, 2) => {
            // Luma + alpha: the alpha dropped, as for any other format.
            data = data.chunks_exact(2).map(|p| p[0]).collect();
            1
        }
        (true, _) => 1,
        (false, _) => 3,
    };
    let Some(o) = exif else {
        return Ok(Frame::U8(Plane { width, height, channels, data }));
    };
    // Rotations and mirrors through the `image` crate's own (the other formats use it too).
    let mut img = if channels == 1 {
        ImageBuffer::from_raw(width, height, data).map(DynamicImage::ImageLuma8)
    } else {
        ImageBuffer::from_raw(width, height, data).map(DynamicImage::ImageRgb8)
    }
    .ok_or_else(|| PreprocessError::BadImage("JPEG: decoded size does not match the header".into()))?;
    img.apply_orientation(o);
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
#[path = "decode_tests.rs"]
mod tests;
