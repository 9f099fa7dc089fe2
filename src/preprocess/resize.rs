//! Resizing with Pillow's arithmetic, so that a model trained on Pillow-resized frames sees
//! the same pixels here (bit for bit on 8-bit frames).
//!
//! Pillow's `Image.resize` is separable: weights per output column from the filter kernel,
//! widened by the scale factor when downscaling (so every filter antialiases), normalised to
//! sum 1; a horizontal pass into an intermediate image, then a vertical pass. 8-bit images use
//! 22-bit fixed-point weights and round + clip to 0..255 after *each* pass; float images
//! (lineside's path for 16-bit frames, as v / 257) use double weights and store float32
//! between passes. `nearest` is not a convolution in Pillow but an affine scale that steps a
//! source coordinate by `in / out` from `in / out / 2`. This module reproduces all of that:
//! the generic `fast_image_resize` crate rounds differently (0.16 levels mean, up to 7 with
//! Lanczos, measured against Pillow 13) and changes what the model sees.
//!
//! Only the output window a crop keeps is computed (every output pixel depends only on its
//! own weights, so the kept pixels are the same as a full resize followed by a crop).

use super::Filter;
use super::PreprocessError;

/// Fractional bits of the 8-bit path's weights: 32 - 8 - 2, as Pillow uses (two bits of
/// headroom for kernels with negative lobes).
const PRECISION_BITS: u32 = 22;

/// A sample type the resampler works on: 8-bit levels or float levels.
pub trait Sample: Copy + Default + Send + Sync + 'static {}
impl Sample for u8 {}
impl Sample for f32 {}

/// An interleaved image of 1 or 3 channels.
#[derive(Debug, Clone, PartialEq)]
pub struct Plane<T> {
    /// Width in pixels.
    pub width: u32,
    /// Height in pixels.
    pub height: u32,
    /// Samples per pixel (1 or 3).
    pub channels: usize,
    /// `width * height * channels` samples, row-major.
    pub data: Vec<T>,
}

impl<T: Sample> Plane<T> {
    /// The rectangle `[x, x + w) x [y, y + h)`, copied; the caller has checked the bounds.
    pub fn crop(&self, x: u32, y: u32, w: u32, h: u32) -> Plane<T> {
        let c = self.channels;
        let row = self.width as usize * c;
        let mut data = Vec::with_capacity(w as usize * h as usize * c);
        for yy in y as usize..(y + h) as usize {
            let start = yy * row + x as usize * c;
            data.extend_from_slice(&self.data[start..start + w as usize * c]);
        }
        Plane { width: w, height: h, channels: c, data }
    }
}

/// The part of a `full_w x full_h` resize to compute: columns `[x, x + w)`, rows `[y, y + h)`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Window {
    /// First column kept.
    pub x: u32,
    /// First row kept.
    pub y: u32,
    /// Columns kept.
    pub w: u32,
    /// Rows kept.
    pub h: u32,
}

/// A filter kernel as Pillow defines it: a function and its support (radius) at scale 1.
#[derive(Clone, Copy)]
struct Kernel {
    f: fn(f64) -> f64,
    support: f64,
}

fn kernel(filter: Filter) -> Option<Kernel> {
    fn boxed(x: f64) -> f64 {
        if x > -0.5 && x <= 0.5 { 1.0 } else { 0.0 }
    }
    fn triangle(x: f64) -> f64 {
        let x = x.abs();
        if x < 1.0 { 1.0 - x } else { 0.0 }
    }
    fn cubic(x: f64) -> f64 {
        // Keys' cubic convolution with a = -0.5 (Pillow's BICUBIC).
        const A: f64 = -0.5;
        let x = x.abs();
        if x < 1.0 {
            ((A + 2.0) * x - (A + 3.0)) * x * x + 1.0
        } else if x < 2.0 {
            (((x - 5.0) * x + 8.0) * x - 4.0) * A
        } else {
            0.0
        }
    }
    fn sinc(x: f64) -> f64 {
        if x == 0.0 {
            1.0
        } else {
            let x = x * std::f64::consts::PI;
            x.sin() / x
        }
    }
    fn lanczos3(x: f64) -> f64 {
        if (-3.0..3.0).contains(&x) { sinc(x) * sinc(x / 3.0) } else { 0.0 }
    }
    match filter {
        Filter::Nearest => None,
        Filter::Area => Some(Kernel { f: boxed, support: 0.5 }),
        Filter::Bilinear => Some(Kernel { f: triangle, support: 1.0 }),
        Filter::Bicubic => Some(Kernel { f: cubic, support: 2.0 }),
        Filter::Lanczos => Some(Kernel { f: lanczos3, support: 3.0 }),
    }
}

/// Per output index: first source index, tap count, and `ksize` normalised weights.
#[doc(hidden)]
pub struct Coeffs {
    ksize: usize,
    bounds: Vec<(usize, usize)>,
    weights: Vec<f64>,
}

/// Pillow's `precompute_coeffs` for the whole source range `[0, in_size)`.
fn coeffs(in_size: u32, out_size: u32, k: Kernel) -> Coeffs {
    // Pillow passes the box edges as C floats; whole-pixel sizes are exact in f32.
    let scale = f64::from(in_size as f32) / f64::from(out_size);
    let filterscale = scale.max(1.0);
    let support = k.support * filterscale;
    let ksize = support.ceil() as usize * 2 + 1;
    let mut bounds = Vec::with_capacity(out_size as usize);
    let mut weights = vec![0.0f64; out_size as usize * ksize];
    for (xx, w) in weights.chunks_exact_mut(ksize).enumerate() {
        let center = (xx as f64 + 0.5) * scale;
        let ss = 1.0 / filterscale;
        // C's (int) truncates toward zero; negatives are clamped to 0 next either way.
        let xmin = ((center - support + 0.5) as i64).max(0);
        let xmax = ((center + support + 0.5) as i64).min(i64::from(in_size)) - xmin;
        let n = xmax.max(0) as usize;
        let mut total = 0.0;
        for (x, slot) in w.iter_mut().take(n).enumerate() {
            let v = (k.f)(((x as i64 + xmin) as f64 - center + 0.5) * ss);
            *slot = v;
            total += v;
        }
        if total != 0.0 {
            w.iter_mut().take(n).for_each(|v| *v /= total);
        }
        bounds.push((xmin as usize, n));
    }
    Coeffs { ksize, bounds, weights }
}

/// Pillow's `normalize_coeffs_8bpc`: round half away from zero to 22-bit fixed point.
fn fixed(weights: &[f64]) -> Vec<i32> {
    let one = f64::from(1u32 << PRECISION_BITS);
    weights.iter().map(|&w| if w < 0.0 { (-0.5 + w * one) as i32 } else { (0.5 + w * one) as i32 }).collect()
}

/// Pillow's `clip8`: drop the fraction, clamp to 0..255.
#[inline]
fn clip8(acc: i32) -> u8 {
    (acc >> PRECISION_BITS).clamp(0, 255) as u8
}

const HALF: i32 = 1 << (PRECISION_BITS - 1);

/// Resize `src` to `full_w x full_h` with `filter` and return only `win` of the result.
///
/// # Errors
/// Only a window outside the full size (a bug, reported rather than panicked).
pub fn resize<T: Pass>(
    src: &Plane<T>,
    full_w: u32,
    full_h: u32,
    win: Window,
    filter: Filter,
) -> Result<Plane<T>, PreprocessError> {
    if win.w == 0 || win.h == 0 || win.x + win.w > full_w || win.y + win.h > full_h || src.width == 0 || src.height == 0
    {
        return Err(PreprocessError::Internal(format!(
            "resize window {win:?} outside {full_w}x{full_h}, or an empty source {}x{}",
            src.width, src.height
        )));
    }
    if (src.width, src.height) == (full_w, full_h) {
        // Pillow copies when the size does not change.
        return Ok(src.crop(win.x, win.y, win.w, win.h));
    }
    let Some(k) = kernel(filter) else {
        return Ok(nearest(src, full_w, full_h, win));
    };
    let need_h = src.width != full_w;
    let need_v = src.height != full_h;
    let cv = coeffs(src.height, full_h, k);
    let rows = win.y as usize..(win.y + win.h) as usize;
    // Source rows the kept output rows read.
    let first = cv.bounds[rows.start].0;
    let last = cv.bounds[rows.end - 1].0 + cv.bounds[rows.end - 1].1;
    let mid = if need_h {
        let ch = coeffs(src.width, full_w, k);
        T::horizontal(src, &ch, first..last, win.x as usize..(win.x + win.w) as usize)
    } else {
        src.crop(win.x, first as u32, win.w, (last - first) as u32)
    };
    if !need_v {
        // Pillow skips the vertical pass when the height does not change.
        return Ok(mid.crop(0, win.y - first as u32, win.w, win.h));
    }
    Ok(T::vertical(&mid, &cv, first, rows))
}

/// The two passes for one sample type.
pub trait Pass: Sample {
    /// Horizontal pass over source rows `rows`, output columns `cols`.
    #[doc(hidden)]
    fn horizontal(
        src: &Plane<Self>,
        c: &Coeffs,
        rows: std::ops::Range<usize>,
        cols: std::ops::Range<usize>,
    ) -> Plane<Self>;
    /// Vertical pass: `mid` holds source rows from `first`; output rows `rows`.
    #[doc(hidden)]
    fn vertical(mid: &Plane<Self>, c: &Coeffs, first: usize, rows: std::ops::Range<usize>) -> Plane<Self>;
}

impl Pass for u8 {
    fn horizontal(
        src: &Plane<u8>,
        c: &Coeffs,
        rows: std::ops::Range<usize>,
        cols: std::ops::Range<usize>,
    ) -> Plane<u8> {
        let kk = fixed(&c.weights);
        match src.channels {
            1 => horizontal_u8::<1>(src, c, &kk, rows, cols),
            _ => horizontal_u8::<3>(src, c, &kk, rows, cols),
        }
    }

    fn vertical(mid: &Plane<u8>, c: &Coeffs, first: usize, rows: std::ops::Range<usize>) -> Plane<u8> {
        let kk = fixed(&c.weights);
        let row_len = mid.width as usize * mid.channels;
        let mut data = Vec::with_capacity(rows.len() * row_len);
        let mut acc = vec![0i32; row_len];
        for yy in rows.clone() {
            let (ymin, n) = c.bounds[yy];
            let k = &kk[yy * c.ksize..yy * c.ksize + n];
            acc.fill(HALF);
            for (t, &w) in k.iter().enumerate() {
                let r = ymin - first + t;
                let src = &mid.data[r * row_len..(r + 1) * row_len];
                for (a, &p) in acc.iter_mut().zip(src) {
                    *a += i32::from(p) * w;
                }
            }
            data.extend(acc.iter().map(|&a| clip8(a)));
        }
        Plane { width: mid.width, height: rows.len() as u32, channels: mid.channels, data }
    }
}

fn horizontal_u8<const C: usize>(
    src: &Plane<u8>,
    c: &Coeffs,
    kk: &[i32],
    rows: std::ops::Range<usize>,
    cols: std::ops::Range<usize>,
) -> Plane<u8> {
    let row_len = src.width as usize * C;
    let mut data = Vec::with_capacity(rows.len() * cols.len() * C);
    for y in rows.clone() {
        let row = &src.data[y * row_len..(y + 1) * row_len];
        for xx in cols.clone() {
            let (xmin, n) = c.bounds[xx];
            let k = &kk[xx * c.ksize..xx * c.ksize + n];
            let mut acc = [HALF; C];
            for (px, &w) in row[xmin * C..(xmin + n) * C].chunks_exact(C).zip(k) {
                for ch in 0..C {
                    acc[ch] += i32::from(px[ch]) * w;
                }
            }
            data.extend(acc.iter().map(|&a| clip8(a)));
        }
    }
    Plane { width: cols.len() as u32, height: rows.len() as u32, channels: C, data }
}

impl Pass for f32 {
    fn horizontal(
        src: &Plane<f32>,
        c: &Coeffs,
        rows: std::ops::Range<usize>,
        cols: std::ops::Range<usize>,
    ) -> Plane<f32> {
        let ch = src.channels;
        let row_len = src.width as usize * ch;
        let mut data = Vec::with_capacity(rows.len() * cols.len() * ch);
        for y in rows.clone() {
            let row = &src.data[y * row_len..(y + 1) * row_len];
            for xx in cols.clone() {
                let (xmin, n) = c.bounds[xx];
                let k = &c.weights[xx * c.ksize..xx * c.ksize + n];
                for channel in 0..ch {
                    // Pillow's float path: double accumulator, stored as float32.
                    let mut acc = 0.0f64;
                    for (t, &w) in k.iter().enumerate() {
                        acc += f64::from(row[(xmin + t) * ch + channel]) * w;
                    }
                    data.push(acc as f32);
                }
            }
        }
        Plane { width: cols.len() as u32, height: rows.len() as u32, channels: ch, data }
    }

    fn vertical(mid: &Plane<f32>, c: &Coeffs, first: usize, rows: std::ops::Range<usize>) -> Plane<f32> {
        let row_len = mid.width as usize * mid.channels;
        let mut data = Vec::with_capacity(rows.len() * row_len);
        let mut acc = vec![0f64; row_len];
        for yy in rows.clone() {
            let (ymin, n) = c.bounds[yy];
            let k = &c.weights[yy * c.ksize..yy * c.ksize + n];
            acc.fill(0.0);
            for (t, &w) in k.iter().enumerate() {
                let r = ymin - first + t;
                for (a, &p) in acc.iter_mut().zip(&mid.data[r * row_len..(r + 1) * row_len]) {
                    *a += f64::from(p) * w;
                }
            }
            data.extend(acc.iter().map(|&a| a as f32));
        }
        Plane { width: mid.width, height: rows.len() as u32, channels: mid.channels, data }
    }
}

/// Pillow's nearest-neighbour scale (`ImagingScaleAffine`): the source coordinate starts at
/// half a step and is advanced by adding the step, so its rounding is reproduced too.
fn nearest<T: Sample>(src: &Plane<T>, full_w: u32, full_h: u32, win: Window) -> Plane<T> {
    let ch = src.channels;
    let index = |in_size: u32, out_size: u32| -> Vec<usize> {
        let step = f64::from(in_size) / f64::from(out_size);
        let mut pos = step * 0.5;
        (0..out_size)
            .map(|_| {
                let i = (pos as usize).min(in_size as usize - 1);
                pos += step;
                i
            })
            .collect()
    };
    let xs = index(src.width, full_w);
    let ys = index(src.height, full_h);
    let row_len = src.width as usize * ch;
    let mut data = Vec::with_capacity(win.w as usize * win.h as usize * ch);
    for &y in &ys[win.y as usize..(win.y + win.h) as usize] {
        let row = &src.data[y * row_len..(y + 1) * row_len];
        for &x in &xs[win.x as usize..(win.x + win.w) as usize] {
            data.extend_from_slice(&row[x * ch..(x + 1) * ch]);
        }
    }
    Plane { width: win.w, height: win.h, channels: ch, data }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn full(w: u32, h: u32) -> Window {
        Window { x: 0, y: 0, w, h }
    }

    fn plane(w: u32, h: u32, c: usize, data: Vec<u8>) -> Plane<u8> {
        Plane { width: w, height: h, channels: c, data }
    }

    #[test]
    fn flat_image_stays_flat_under_every_filter() {
        let src = plane(40, 30, 3, vec![77u8; 40 * 30 * 3]);
        for f in [Filter::Nearest, Filter::Bilinear, Filter::Bicubic, Filter::Lanczos, Filter::Area] {
            let out = resize(&src, 7, 9, full(7, 9), f).unwrap();
            assert_eq!(out.data.len(), 7 * 9 * 3);
            assert!(out.data.iter().all(|&v| v == 77), "{f:?}: {:?}", out.data);
        }
    }

    #[test]
    fn box_downscale_by_two_is_the_block_mean() {
        // 4x2 gray image, halved: Pillow's BOX averages each 2x2 block.
        let src = plane(4, 2, 1, vec![0, 100, 200, 250, 0, 100, 200, 250]);
        assert_eq!(resize(&src, 2, 1, full(2, 1), Filter::Area).unwrap().data, vec![50, 225]);
    }

    #[test]
    fn bilinear_weights_widen_when_downscaling() {
        // 4 -> 2 with the triangle: scale 2, support 2; output 0 centres at 1.0 and weighs
        // source pixels 0..3 as triangle((x - 1 + 0.5) / 2) = 0.75, 0.75, 0.25 (+ 0 at x = 3),
        // normalised by 1.75: the standard antialiased (area-widened) kernel.
        let c = coeffs(4, 2, kernel(Filter::Bilinear).unwrap());
        assert_eq!(c.ksize, 5);
        assert_eq!(c.bounds[0], (0, 3));
        let w = &c.weights[..3];
        for (a, b) in w.iter().zip([0.75 / 1.75, 0.75 / 1.75, 0.25 / 1.75]) {
            assert!((a - b).abs() < 1e-12, "{w:?}");
        }
    }

    #[test]
    fn window_equals_full_resize_then_crop() {
        let data: Vec<u8> = (0..37 * 23 * 3).map(|i| ((i * 7919) % 251) as u8).collect();
        let src = plane(37, 23, 3, data);
        for f in [Filter::Nearest, Filter::Bilinear, Filter::Bicubic, Filter::Lanczos, Filter::Area] {
            let all = resize(&src, 16, 12, full(16, 12), f).unwrap();
            let part = resize(&src, 16, 12, Window { x: 3, y: 2, w: 10, h: 10 }, f).unwrap();
            assert_eq!(part, all.crop(3, 2, 10, 10), "{f:?}");
        }
    }

    #[test]
    fn float_path_matches_the_8bit_path_on_whole_levels_within_rounding() {
        let data: Vec<u8> = (0..31 * 17).map(|i| ((i * 31) % 256) as u8).collect();
        let a = resize(&plane(31, 17, 1, data.clone()), 11, 7, full(11, 7), Filter::Bicubic).unwrap();
        let fsrc = Plane { width: 31, height: 17, channels: 1, data: data.iter().map(|&v| f32::from(v)).collect() };
        let b = resize(&fsrc, 11, 7, full(11, 7), Filter::Bicubic).unwrap();
        for (x, y) in a.data.iter().zip(&b.data) {
            // The 8-bit path rounds after each pass; the float path does not: <= 1 level apart.
            assert!((f32::from(*x) - y.clamp(0.0, 255.0)).abs() <= 1.0, "{x} vs {y}");
        }
    }

    #[test]
    fn nearest_picks_pixel_centres() {
        // 6 -> 3: step 2, positions 1, 3, 5.
        let src = plane(6, 1, 1, vec![10, 11, 12, 13, 14, 15]);
        assert_eq!(resize(&src, 3, 1, full(3, 1), Filter::Nearest).unwrap().data, vec![11, 13, 15]);
    }
}
