//! `evaluate` throughput against the raw engine (`cargo bench --bench evaluate`): ResNet-18
//! (random weights, built from its paper's layer table by `tools/paper_models.py`, as the
//! engine benchmark does) on all cores. In one run, alternating A B A B:
//!
//! - raw engine: one lane per core (`lanes = "auto"`), each running its engine state back to
//!   back on one fixed preprocessed tensor; images per second;
//! - evaluate: `lineside evaluate`'s work on 320x240 JPEG frames (read, decode, resize to
//!   224x224, normalise, score through the lanes as background work); frames per second.
//!
//! The ratio evaluate / raw is the figure to read (machines differ; the ratio holds better).
//! `LINESIDE_BENCH_FRAMES` sets the frames per evaluate round (default 96).

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::Arc;
use std::time::Instant;

use lineside::config::{Channels, ModelConfig, Overrides};
use lineside::evaluate::{self, dataset::Dataset};
use lineside::metrics::Metrics;
use lineside::model::{EngineKind, Model, Tensor};
use lineside::served::{LoadOptions, Loaded};

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// `n` camera-like 320x240 JPEG frames labelled round-robin, as a `file,label` CSV.
fn frames(dir: &Path, n: usize, labels: &[String]) -> PathBuf {
    std::fs::create_dir_all(dir).unwrap();
    let mut csv = String::from("file,label\n");
    for i in 0..n {
        let img = image::RgbImage::from_fn(320, 240, |x, y| {
            let v = ((x * 7 + y * 3 + i as u32 * 29) % 251) as u8;
            image::Rgb([v, v.wrapping_mul(3), 255 - v])
        });
        let name = format!("frame-{i:04}.jpg");
        img.save(dir.join(&name)).unwrap();
        csv.push_str(&format!("{name},{}\n", labels[i % labels.len()]));
    }
    let path = dir.join("set.csv");
    std::fs::write(&path, csv).unwrap();
    path
}

/// Images per second of `lanes` threads, each running its own engine state back to back on
/// `tensor` for `secs` after one warm-up run.
fn raw_rate(model: &Model, tensor: &Tensor, lanes: usize, threads: usize, secs: f64) -> f64 {
    let images: usize = std::thread::scope(|s| {
        let handles: Vec<_> = (0..lanes)
            .map(|_| {
                s.spawn(move || {
                    let mut r = model.runner_with_threads(threads).unwrap();
                    r.run(tensor).unwrap();
                    let t0 = Instant::now();
                    let mut n = 0;
                    while t0.elapsed().as_secs_f64() < secs {
                        r.run(tensor).unwrap();
                        n += 1;
                    }
                    n
                })
            })
            .collect();
        handles.into_iter().map(|h| h.join().unwrap()).sum()
    });
    images as f64 / secs
}

fn main() {
    let n: usize = std::env::var("LINESIDE_BENCH_FRAMES").ok().and_then(|s| s.parse().ok()).unwrap_or(96);
    let papers = root().join("target/tmp/paper-models");
    if !papers.join("resnet18.onnx").exists() {
        let py = root().join(".venv/bin/python");
        let ok = Command::new(py).arg(root().join("tools/paper_models.py")).arg("--out").arg(&papers).status();
        assert!(ok.is_ok_and(|s| s.success()), "tools/paper_models.py failed (run tools/test once for the venv)");
    }
    let tract = Overrides { engine: Some(EngineKind::Tract), ..lineside::cli::base_overrides().unwrap() };
    let mc = ModelConfig::bare(papers.join("resnet18.onnx"), None, None, Some(Channels::Rgb), &tract);
    let loaded = Loaded::load(&mc, &LoadOptions::single()).unwrap();
    let labels = loaded.model.labels.clone();
    let csv = frames(&root().join("target/tmp/evaluate-bench"), n, &labels[..5]);
    let set = Dataset::open(&csv, &labels).unwrap();
    let cores = std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1);
    let flags: Vec<String> = std::fs::read_to_string("/proc/cpuinfo")
        .unwrap_or_default()
        .lines()
        .find(|l| l.starts_with("flags"))
        .map(|l| {
            l.split_whitespace()
                .filter(|f| ["avx2", "fma", "avx512f", "avx512_vnni", "avx512_bf16", "amx_tile"].contains(f))
                .map(String::from)
                .collect()
        })
        .unwrap_or_default();
    println!(
        "lineside evaluate benchmark: ResNet-18 (random weights), tract, {} lanes on {cores} cores, {n} frames a round; CPU flags: {}",
        loaded.lanes,
        flags.join(" ")
    );
    let rt = tokio::runtime::Builder::new_multi_thread().worker_threads(cores).enable_all().build().unwrap();
    let mut raw = Vec::new();
    let mut eval = Vec::new();
    let lanes = loaded.lanes;
    let batch_cap = loaded.config.batching.batch_cap;
    let threads = loaded.config.batching.lane_threads;
    let model = Arc::clone(&loaded.model);
    let frame = std::fs::read(root().join("benches/frames/line-1280x1024.jpg")).unwrap();
    let tensor = loaded.pipeline.run(&frame).unwrap().tensor;
    let (served, guard) = loaded.start(&Metrics::new(), None, None).unwrap();
    let models = vec![Arc::new(served)];
    for round in 0..2 {
        let t0 = Instant::now();
        let scored = rt.block_on(evaluate::score_all(&models, &set.items, 2 * cores + lanes * batch_cap, &|| {}));
        let fps = n as f64 / t0.elapsed().as_secs_f64();
        assert!(scored.iter().all(Result::is_ok), "every frame scores");
        eval.push(fps);
        // The raw engine between evaluate rounds (A B A B): same lanes, same model (the
        // served lanes wait idle on an empty backlog meanwhile).
        let r = raw_rate(&model, &tensor, lanes, threads, 4.0);
        raw.push(r);
        println!("  round {}: raw engine {r:.1} img/s, evaluate {fps:.1} frames/s, ratio {:.2}x", round + 1, fps / r);
    }
    drop(guard);
    let (re, rr) = (eval.iter().sum::<f64>() / 2.0, raw.iter().sum::<f64>() / 2.0);
    println!("  mean: raw engine {rr:.1} img/s, evaluate {re:.1} frames/s, ratio {:.2}x", re / rr);
}
