//! `lineside preprocess` and the serving path against Pillow + numpy (+ onnxruntime), for
//! every format a camera may send and every resize mode and filter.
//!
//! Sources: `tools/preprocess_reference.py` builds each reference tensor with Pillow 13.0.0
//! (decode, `ImageOps.exif_transpose`, `convert`, `resize`) and numpy 2.4.6, torchvision's
//! Resize + CenterCrop formulas quoted in that script, and onnxruntime 1.32.0 for the scores
//! (versions pinned in tools/requirements.txt).

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::Command;

use serde_json::Value;

use crate::util::{TestApp, config_from_text, python, root, samples, temp_dir, without_selftest};

#[test]
fn preprocess_matches_pillow_for_every_format_mode_and_filter() {
    let work = temp_dir("preprocess-ref");
    let out = Command::new(python())
        .arg(root().join("tools/preprocess_reference.py"))
        .args(["--lineside", env!("CARGO_BIN_EXE_lineside"), "--work"])
        .arg(&work)
        .output()
        .expect("run tools/preprocess_reference.py");
    assert!(out.status.success(), "reference script failed:\n{}", String::from_utf8_lossy(&out.stderr));
    let report: Vec<Value> = serde_json::from_slice(&out.stdout).unwrap();
    let mut failures = Vec::new();
    let mut summary = BTreeMap::<&str, (usize, f64, f64)>::new();
    for e in &report {
        let name = e["name"].as_str().unwrap();
        if let Some(err) = e["error"].as_str() {
            failures.push(format!("{name}: lineside preprocess failed: {err}"));
            continue;
        }
        if e["shape"] != e["ref_shape"] || e["dtype"] != e["ref_dtype"] {
            failures.push(format!(
                "{name}: shape/dtype {} {} vs reference {} {}",
                e["shape"], e["dtype"], e["ref_shape"], e["ref_dtype"]
            ));
            continue;
        }
        let (max, mean) = (e["max"].as_f64().unwrap(), e["mean"].as_f64().unwrap());
        let kind = e["kind"].as_str().unwrap();
        // In 8-bit levels. Lossless inputs decode to the same samples in both, so only
        // resampling arithmetic could differ: the issue's bound is max 1 level, mean 0.1
        // (lineside reproduces Pillow's fixed-point arithmetic, so 0 is expected; float
        // 16-bit paths differ by float rounding only). JPEG and lossy WebP decoders
        // legitimately differ: the JPEG standard (ITU-T T.81) allows any IDCT within its
        // accuracy bounds, and chroma upsampling / YUV->RGB conversion are not specified at
        // all, so zune-jpeg / image-webp and libjpeg-turbo / libwebp differ by about a level
        // per sample: mean <= 1 level.
        let ok = match kind {
            "lossless" => max <= 1.0 + 1e-3 && mean <= 0.1,
            _ => mean <= 1.0,
        };
        let s = summary.entry(kind).or_insert((0, 0.0, 0.0));
        *s = (s.0 + 1, s.1.max(max), s.2.max(mean));
        if !ok {
            failures.push(format!("{name} ({kind}): max {max:.3} mean {mean:.4} levels"));
        }
    }
    eprintln!("preprocess vs Pillow, by kind (cases, worst max, worst mean): {summary:?}");
    assert!(
        failures.is_empty(),
        "{} of {} cases differ from Pillow:\n{}",
        failures.len(),
        report.len(),
        failures.join("\n")
    );
    // Every format, mode and filter was exercised (the script's case list, not a subset).
    let names: Vec<&str> = report.iter().map(|e| e["name"].as_str().unwrap()).collect();
    for must in [
        "format/jpeg_cmyk",
        "format/jpeg_progressive",
        "format/png_palette",
        "format/png_gray_alpha16",
        "format/tiff_rgb16",
        "format/webp_lossy",
        "format/jpeg_exif6",
        "crop/lanczos/16bit",
        "letterbox/area",
        "stretch/nearest",
        "layout/uint8",
    ] {
        assert!(names.contains(&must), "case {must} missing from the report");
    }
    assert!(report.len() >= 60, "only {} cases", report.len());
}

/// Probabilities onnxruntime gives on the Pillow reference tensor of each file.
fn reference_scores(model: &Path, size: (u32, u32), pre: &Value, files: &[PathBuf]) -> BTreeMap<String, Vec<f64>> {
    let out = Command::new(python())
        .arg(root().join("tools/preprocess_reference.py"))
        .arg("scores")
        .arg(model)
        .args([size.0.to_string(), size.1.to_string(), pre.to_string()])
        .args(files)
        .output()
        .expect("run tools/preprocess_reference.py scores");
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    serde_json::from_slice(&out.stdout).unwrap()
}

/// Camera frames derived from the washer samples: the PNG itself, a JPEG, a JPEG stored
/// sideways with an EXIF orientation tag, a 16-bit TIFF, lossless WebP, BMP.
fn derived_frames(dir: &Path) -> Vec<PathBuf> {
    let script = r#"
import io, sys, numpy as np, tifffile
from PIL import Image
src, out = sys.argv[1], sys.argv[2]
im = Image.open(src).convert("RGB")
stem = src.rsplit("/", 1)[-1].rsplit(".", 1)[0]
im.save(f"{out}/{stem}.png")
im.save(f"{out}/{stem}.jpg", quality=95)
ex = Image.Exif(); ex[0x0112] = 6
im.transpose(Image.Transpose.ROTATE_90).save(f"{out}/{stem}-exif6.jpg", quality=95, exif=ex.tobytes())
tifffile.imwrite(f"{out}/{stem}-16bit.tif", np.asarray(im).astype(np.uint16) * 257, photometric="rgb")
im.save(f"{out}/{stem}.webp", lossless=True)
im.save(f"{out}/{stem}.bmp")
"#;
    let mut files = Vec::new();
    for s in samples().iter().filter(|s| s.name.ends_with("-01.png")) {
        let st = Command::new(python())
            .args(["-c", script])
            .arg(root().join("models/washers/samples").join(&s.name))
            .arg(dir)
            .status()
            .unwrap();
        assert!(st.success());
        let stem = s.name.trim_end_matches(".png");
        for suffix in [".png", ".jpg", "-exif6.jpg", "-16bit.tif", ".webp", ".bmp"] {
            files.push(dir.join(format!("{stem}{suffix}")));
        }
    }
    files
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn served_scores_match_pillow_and_onnxruntime_on_the_original_files() {
    let dir = temp_dir("e2e");
    let files = derived_frames(&dir);
    let model = root().join("models/washers/classifier.onnx");
    let base = std::fs::read_to_string(root().join("config/lineside.toml")).unwrap();
    let plain = "resize = \"stretch\"\nfilter = \"bilinear\"\nchannels = \"rgb\"";
    assert!(base.contains(plain), "config/lineside.toml changed: update this test");
    let variants = [
        ("stretch, bilinear", plain.to_string(), serde_json::json!({"resize": "stretch", "filter": "bilinear"})),
        // The washer model was trained on RGB / 255: other statistics (ImageNet's divide by
        // std 0.225 x 255) would amplify every level of JPEG decoder difference 4.4x, beyond
        // what the model saw in training; those statistics are checked on the tensor above.
        (
            "crop from short side 110, bicubic, bgr",
            "resize = \"crop\"\nshort_side = 110\nfilter = \"bicubic\"\nchannels = \"bgr\"".into(),
            serde_json::json!({"resize": "crop", "short_side": 110, "filter": "bicubic", "channels": "bgr"}),
        ),
        (
            "roi + letterbox, area",
            "roi = [20, 10, 280, 220]\nresize = \"letterbox\"\npad_value = 40\nfilter = \"area\"\nchannels = \"rgb\""
                .into(),
            serde_json::json!({"roi": [20, 10, 280, 220], "resize": "letterbox", "pad_value": 40, "filter": "area"}),
        ),
    ];
    for (label, edit, pre) in variants {
        let text = base.replace(plain, &edit);
        let app = TestApp::start(config_from_text(&without_selftest(&text))).await;
        let theirs = reference_scores(&model, (96, 96), &pre, &files);
        let (mut worst, mut worst_lossy) = (0.0f64, 0.0f64);
        for f in &files {
            let name = f.file_name().unwrap().to_string_lossy().to_string();
            // The type is sniffed, not trusted.
            let headers = [("content-type", "application/octet-stream")];
            let resp = app.send_with("POST", "/classify/washers?top=all", &headers, std::fs::read(f).unwrap()).await;
            assert_eq!(resp.status, 200, "{label}: {name}");
            let v = resp.json();
            let labels: Vec<String> = std::fs::read_to_string(root().join("models/washers/classes.txt"))
                .unwrap()
                .lines()
                .map(String::from)
                .collect();
            let r = &theirs[&name];
            let best = (0..r.len()).max_by(|&a, &b| r[a].total_cmp(&r[b])).unwrap();
            assert_eq!(v["label"], labels[best], "{label}: {name}: top-1 differs from Pillow + onnxruntime");
            let mut file_worst = 0.0f64;
            for t in v["top"].as_array().unwrap() {
                let i = labels.iter().position(|l| l == t["label"].as_str().unwrap()).unwrap();
                file_worst = file_worst.max((t["score"].as_f64().unwrap() - r[i]).abs());
            }
            if file_worst > 1e-3 {
                eprintln!("  {label}: {name}: max score difference {file_worst:.2e}");
            }
            let lossy = name.ends_with(".jpg") || name.ends_with(".webp");
            if lossy {
                worst_lossy = worst_lossy.max(file_worst);
            } else {
                worst = worst.max(file_worst);
            }
        }
        eprintln!(
            "{label}: max |served - Pillow+onnxruntime| = {worst:.2e} lossless, {worst_lossy:.2e} JPEG/WebP over {} files",
            files.len()
        );
        // Lossless files give the same tensor, so only engine rounding is left: 0.02 is the
        // bound an earlier issue set, and far above what is seen (about 1e-5). JPEG and lossy
        // WebP are decoded by other decoders than Pillow's (zune-jpeg and image-webp against
        // libjpeg-turbo and libwebp; lineside's JPEG pixels equal the image crate's, see
        // src/preprocess/decode_tests.rs), about a level apart on average (the tensor test
        // above); how far that moves a score depends on the model's slope at the frame. The
        // retrained demo model scores good-01 under this ROI + letterbox (a transform it was
        // not trained with) 0.37 good / 0.62 cracked, on its boundary, where the two decoders
        // moved a score by 0.022: the lossy bound is 0.05 (the same top-1 is asserted above).
        assert!(worst <= 0.02, "{label}: max score difference {worst} on lossless files");
        assert!(worst_lossy <= 0.05, "{label}: max score difference {worst_lossy} on JPEG/WebP files");
    }
}
