//! Decode + preprocess benchmark: lineside's full path against Pillow's on the same frames,
//! same machine, same run, reported as ratios (`cargo bench --bench preprocess`).
//!
//! Frames (benches/frames/): a 1280x1024 JPEG camera frame (rendered by
//! tools/preprocess_reference.py's scene(), quality 90) to a 224x224 NCHW tensor with the
//! usual evaluation transform (short side to 256, centre 224, bilinear, ImageNet statistics),
//! and a 320x240 washer PNG to 96x96 (stretch, bilinear, / 255). Pillow is timed by
//! tools/bench_pillow.py doing the same work (open, convert, resize, crop, normalise with
//! numpy). Medians of repeated runs; the machine is noisy, so compare ratios from one run.
//!
//! Also measured, to choose crates: zune-jpeg (inside `image`) against `jpeg-decoder`, and
//! jpeg-decoder's DCT-domain reduced decode (1/2, 1/4, 1/8), the lever behind
//! `jpeg_fast_scale`.

use std::hint::black_box;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

use lineside::config::{Channels, Filter, Layout, Orientation, PreprocessConfig, ResizeMode, defaults};
use lineside::model::{BatchAxis, Contract, InputType, ScoreTransform};
use lineside::preprocess::{DecodeLimits, Pipeline, decode};

/// Median wall time of `f` over `iters` runs after 3 warm-up runs.
fn median(iters: usize, mut f: impl FnMut()) -> Duration {
    for _ in 0..3 {
        f();
    }
    let mut t: Vec<Duration> = (0..iters)
        .map(|_| {
            let s = Instant::now();
            f();
            s.elapsed()
        })
        .collect();
    t.sort();
    t[iters / 2]
}

fn ms(d: Duration) -> f64 {
    d.as_secs_f64() * 1e3
}

fn contract(size: u32) -> Contract {
    Contract {
        input_name: "input".into(),
        input_shape: vec!["N".into(), "3".into(), size.to_string(), size.to_string()],
        layout: Layout::Nchw,
        channels: 3,
        height: size,
        width: size,
        input_type: InputType::Float32,
        batch: BatchAxis::Dynamic("N".into()),
        output_name: "logits".into(),
        output_shape: vec!["N".into(), "5".into()],
        classes: 5,
        scores: ScoreTransform::Softmax,
        ends_in: None,
    }
}

fn config(resize: ResizeMode, short_side: Option<u32>, mean: Vec<f32>, std: Vec<f32>) -> PreprocessConfig {
    PreprocessConfig {
        width: None,
        height: None,
        resize,
        short_side,
        pad_value: 0,
        filter: Filter::Bilinear,
        channels: Channels::Rgb,
        channels_given: true,
        orientation: Orientation::Exif,
        roi: None,
        min_side: defaults::MIN_SIDE,
        layout: None,
        divisor: 255.0,
        mean,
        std,
    }
}

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// Pillow's medians in ms for the same work, from tools/bench_pillow.py (None without the venv).
fn pillow(jpeg: &Path, png: &Path) -> Option<serde_json::Value> {
    let py = root().join(".venv/bin/python");
    let out = Command::new(py).arg(root().join("tools/bench_pillow.py")).arg(jpeg).arg(png).output().ok()?;
    if !out.status.success() {
        eprintln!("tools/bench_pillow.py failed: {}", String::from_utf8_lossy(&out.stderr));
        return None;
    }
    serde_json::from_slice(&out.stdout).ok()
}

/// The server's default frame limits.
fn limits() -> DecodeLimits {
    DecodeLimits { max_pixels: defaults::MAX_PIXELS, max_decode_bytes: defaults::MAX_DECODE_BYTES }
}

fn main() {
    // `cargo bench` passes --bench; a filter argument is not supported (the set is small).
    let jpeg_path = root().join("benches/frames/line-1280x1024.jpg");
    let png_path = root().join("benches/frames/washer-320x240.png");
    let jpeg = std::fs::read(&jpeg_path).expect("benches/frames/line-1280x1024.jpg");
    let png = std::fs::read(&png_path).expect("benches/frames/washer-320x240.png");
    let n = 41;

    let imagenet =
        config(ResizeMode::Crop, Some(256), defaults::IMAGENET_MEAN.to_vec(), defaults::IMAGENET_STD.to_vec());
    let p224 = Pipeline::new(imagenet, &contract(224), limits()).unwrap();
    let p96 =
        Pipeline::new(config(ResizeMode::Stretch, None, vec![0.0; 3], vec![1.0; 3]), &contract(96), limits()).unwrap();

    let full224 = median(n, || {
        black_box(p224.run(black_box(&jpeg)).unwrap());
    });
    let split = p224.run(&jpeg).unwrap();
    let full96 = median(n * 4, || {
        black_box(p96.run(black_box(&png)).unwrap());
    });
    let zune = median(n, || {
        black_box(image::load_from_memory_with_format(black_box(&jpeg), image::ImageFormat::Jpeg).unwrap());
    });
    // lineside's own JPEG path: header read once by the decoder that decodes, body uncopied.
    let limits = decode::FrameLimits { max_pixels: defaults::MAX_PIXELS, min_side: 1, max_decode_bytes: u64::MAX };
    let ours = median(n, || {
        let probe = decode::probe(black_box(&jpeg[..]), limits).unwrap();
        black_box(decode::decode(probe, defaults::MAX_PIXELS, Orientation::Exif).unwrap());
    });
    let header_ours = median(n * 4, || {
        black_box(decode::probe(black_box(&jpeg[..]), limits).unwrap());
    });
    let header_image = median(n * 4, || {
        let r = image::ImageReader::with_format(std::io::Cursor::new(black_box(&jpeg[..])), image::ImageFormat::Jpeg);
        black_box(r.into_dimensions().unwrap());
    });
    let jd = median(n, || {
        let mut d = jpeg_decoder::Decoder::new(std::io::Cursor::new(black_box(&jpeg)));
        black_box(d.decode().unwrap());
    });
    let mut scaled = Vec::new();
    for (label, w, h) in [("1/2", 640u16, 512u16), ("1/4", 320, 256), ("1/8", 160, 128)] {
        let t = median(n, || {
            let mut d = jpeg_decoder::Decoder::new(std::io::Cursor::new(black_box(&jpeg)));
            d.scale(w, h).unwrap();
            black_box(d.decode().unwrap());
        });
        scaled.push((label, t));
    }

    println!("lineside preprocess benchmark (medians; this machine only)");
    println!("  1280x1024 JPEG -> 224x224 NCHW (crop 256/224, bilinear, ImageNet): {:.3} ms", ms(full224));
    println!(
        "      of which decode {:.3} ms, crop+resize+normalise {:.3} ms (one run)",
        ms(split.decode),
        ms(split.preprocess)
    );
    println!("  320x240 PNG -> 96x96 NCHW (stretch, bilinear, /255):                {:.3} ms", ms(full96));
    println!(
        "  JPEG decode only: lineside (zune-jpeg direct) {:.3} ms, zune-jpeg through image 0.25 {:.3} ms ({:.2}x), jpeg-decoder {:.3} ms",
        ms(ours),
        ms(zune),
        ms(ours) / ms(zune),
        ms(jd)
    );
    println!(
        "  JPEG header read: lineside's probe {:.4} ms, image 0.25's into_dimensions {:.4} ms (copies the body)",
        ms(header_ours),
        ms(header_image)
    );
    for (label, t) in &scaled {
        println!(
            "  jpeg-decoder reduced decode {label}: {:.3} ms ({:.1}x faster than its full decode)",
            ms(*t),
            ms(jd) / ms(*t)
        );
    }
    match pillow(&jpeg_path, &png_path) {
        None => println!("  Pillow: not measured (create the venv with tools/test first)"),
        Some(p) => {
            let f = |k: &str| p[k].as_f64().unwrap_or(f64::NAN);
            println!(
                "  Pillow {}: JPEG full path {:.3} ms (decode {:.3}), PNG full path {:.3} ms",
                p["version"].as_str().unwrap_or("?"),
                f("jpeg_full_ms"),
                f("jpeg_decode_ms"),
                f("png_full_ms")
            );
            println!(
                "  ratio lineside / Pillow (lower is faster): JPEG full path {:.2}x, PNG full path {:.2}x, JPEG decode {:.2}x",
                ms(full224) / f("jpeg_full_ms"),
                ms(full96) / f("png_full_ms"),
                ms(zune) / f("jpeg_decode_ms")
            );
        }
    }
}
