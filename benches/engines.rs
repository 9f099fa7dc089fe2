//! Engine benchmark (`cargo bench --bench engines --features onnxruntime`): every arrangement
//! of tract, lineside's onnxruntime engine, and the reference runtime called directly from
//! Python, on the same models and the same machine, in one run.
//!
//! Models: the 96x96 washer demo, and ResNet-18, MobileNetV2 and SqueezeNet 1.1 with random
//! weights, built from their papers' layer tables by `tools/paper_models.py` (into
//! `target/tmp/paper-models`, as the tests do). Each cell is images per second: lanes (OS
//! threads, one engine state each) run passes of constant data back to back after a 0.5 s
//! warm-up, and the rate is the median of three equal windows of `LINESIDE_BENCH_SECS`
//! (default 6 s) in all; a window's rate is the images each lane finished over the time those
//! runs took, summed over lanes. The reference runtime is timed by `tools/bench_onnxruntime.py` the
//! same way (onnxruntime from the venv's PyPI wheel; its library is also what lineside's
//! onnxruntime engine loads). `LINESIDE_BENCH_ONLY=washers|resnet18|mobilenetv2|squeezenet11`
//! runs one model; every cell is measured in `LINESIDE_BENCH_ROUNDS` rounds (default 2, all
//! cells in turn) and its best round reported; `LINESIDE_BENCH_CELL=<part of a column name>` only the matching cells (to
//! profile one). Figures hold for this machine only; read the ratios, not the absolutes.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

use lineside::config::{Channels, ModelConfig, Overrides};
use lineside::model::tract::TractPlan;
use lineside::model::{EngineKind, EngineState, Input, InputType, Planned, load};

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn python() -> PathBuf {
    root().join(".venv/bin/python")
}

/// Images per second of `lanes` threads each running `pass` images per call of the state
/// `make` gives it, after a warm-up: the median of three equal windows, each the sum over
/// lanes of the images a lane finished in it over the time those runs took (so that a few
/// long runs per window do not round the rate to whole runs).
fn rate(
    lanes: usize,
    pass: usize,
    secs: f64,
    make: &(dyn Fn() -> Box<dyn EngineState> + Sync),
    input: Input<'_>,
) -> f64 {
    let warm = Duration::from_millis(500);
    let stop = AtomicBool::new(false);
    let start = Instant::now();
    let window = start + warm;
    let end = window + Duration::from_secs_f64(secs);
    let done: Vec<Vec<(Instant, Duration)>> = std::thread::scope(|s| {
        let handles: Vec<_> = (0..lanes)
            .map(|_| {
                let stop = &stop;
                s.spawn(move || {
                    let mut state = make();
                    let mut done = Vec::new();
                    while !stop.load(Ordering::Relaxed) {
                        let t0 = Instant::now();
                        std::hint::black_box(state.run(input, pass).expect("engine run"));
                        let t = Instant::now();
                        if t0 >= window && t <= end {
                            done.push((t, t - t0));
                        }
                    }
                    done
                })
            })
            .collect();
        std::thread::sleep(end.saturating_duration_since(Instant::now()));
        stop.store(true, Ordering::Relaxed);
        handles.into_iter().map(|h| h.join().unwrap()).collect()
    });
    let third = secs / 3.0;
    let mut rates: Vec<f64> = (0..3)
        .map(|w| {
            let lo = window + Duration::from_secs_f64(w as f64 * third);
            let hi = window + Duration::from_secs_f64((w + 1) as f64 * third);
            done.iter()
                .map(|lane| {
                    let runs: Vec<Duration> = lane.iter().filter(|(t, _)| *t >= lo && *t < hi).map(|r| r.1).collect();
                    let busy: f64 = runs.iter().map(Duration::as_secs_f64).sum();
                    if busy > 0.0 { (runs.len() * pass) as f64 / busy } else { 0.0 }
                })
                .sum::<f64>()
        })
        .collect();
    rates.sort_by(f64::total_cmp);
    rates[1]
}

/// The reference runtime from Python, same model, threads, batch and lanes.
fn reference(onnx: &Path, lanes: usize, threads: usize, batch: usize, secs: f64) -> f64 {
    let out = Command::new(python())
        .arg(root().join("tools/bench_onnxruntime.py"))
        .arg(onnx)
        .args(["--lanes", &lanes.to_string(), "--threads", &threads.to_string(), "--batch", &batch.to_string()])
        .args(["--secs", &secs.to_string()])
        .output()
        .expect("run tools/bench_onnxruntime.py (run tools/test once to create .venv)");
    assert!(out.status.success(), "bench_onnxruntime.py: {}", String::from_utf8_lossy(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    v["images_per_s"].as_f64().unwrap()
}

struct Bench {
    name: &'static str,
    onnx: PathBuf,
}

/// One row of the table: (column, images/s).
fn measure(b: &Bench, secs: f64, cores: usize, rounds: usize) -> Vec<(String, f64)> {
    let tract_first = Overrides { engine: Some(EngineKind::Tract), ..lineside::cli::base_overrides().unwrap() };
    let mut mc = ModelConfig::bare(b.onnx.clone(), None, None, Some(Channels::Rgb), &tract_first);
    let model = load::load(&mc.spec()).unwrap_or_else(|e| panic!("{}: {e:#}", b.onnx.display()));
    let c = model.contract.clone();
    assert_eq!(c.input_type, InputType::Float32, "the benchmark models take floats");
    let bytes = std::fs::read(&b.onnx).unwrap();
    let data = |n: usize| -> Vec<f32> { (0..n * model.input_len()).map(|i| (i % 255) as f32 / 255.0).collect() };
    let (x1, x8) = (data(1), data(8));
    let file = b.onnx.display().to_string();
    let inference = || tract_onnx_model(&bytes);
    // tract: the concrete batch-1 plan lineside serves with; a symbolic batch axis run at
    // batch 1; a concrete batch-8 plan (stacked).
    let plan = TractPlan::build(inference(), c.input_type, c.input_shape(1), &file).unwrap();
    let sym = TractPlan::build_symbolic(inference(), c.input_type, c.input_shape(1), &file).unwrap();
    let b8 = TractPlan::build(inference(), c.input_type, c.input_shape(8), &file).unwrap();
    // lineside's onnxruntime engine (and the same runtime from Python).
    mc.engine = EngineKind::Onnxruntime;
    let ort = load::load(&mc.spec()).unwrap_or_else(|e| panic!("{}: {e:#}", b.onnx.display()));
    let ort = &ort;
    let ort_state = |threads: usize| move || ort.engine_state(threads).unwrap();
    let (i1, i8) = (Input::F32(&x1), Input::F32(&x8));

    type Cell<'a> = (String, Box<dyn Fn() -> f64 + 'a>);
    let cells: Vec<Cell<'_>> = vec![
        ("tract b1 1 thr".into(), Box::new(|| rate(1, 1, secs, &|| plan.state(1).unwrap(), i1))),
        ("tract symbolic b1".into(), Box::new(|| rate(1, 1, secs, &|| sym.state(1).unwrap(), i1))),
        ("tract b8 stacked".into(), Box::new(|| rate(1, 8, secs, &|| b8.state(1).unwrap(), i8))),
        (format!("tract b1 {cores} lanes"), Box::new(|| rate(cores, 1, secs, &|| plan.state(1).unwrap(), i1))),
        (format!("tract b1 1 lane x {cores} thr"), Box::new(|| rate(1, 1, secs, &|| plan.state(cores).unwrap(), i1))),
        ("ort b1 1 thr".into(), Box::new(|| rate(1, 1, secs, &ort_state(1), i1))),
        ("py b1 1 thr".into(), Box::new(|| reference(&b.onnx, 1, 1, 1, secs))),
        ("ort b8 1 thr".into(), Box::new(|| rate(1, 8, secs, &ort_state(1), i8))),
        ("py b8 1 thr".into(), Box::new(|| reference(&b.onnx, 1, 1, 8, secs))),
        (format!("ort b8 {cores} thr"), Box::new(|| rate(1, 8, secs, &ort_state(cores), i8))),
        (format!("py b8 {cores} thr"), Box::new(|| reference(&b.onnx, 1, cores, 8, secs))),
        (format!("ort b8 {cores} lanes"), Box::new(|| rate(cores, 8, secs, &ort_state(1), i8))),
        (format!("py b8 {cores} lanes"), Box::new(|| reference(&b.onnx, cores, 1, 8, secs))),
    ];

    // Rounds of every cell in turn; a cell's figure is its best round (the machine's noise only
    // ever slows a run down).
    let only = std::env::var("LINESIDE_BENCH_CELL").unwrap_or_default();
    let mut row: Vec<(String, f64)> = Vec::new();
    for _ in 0..rounds {
        for (name, f) in cells.iter().filter(|(n, _)| only.is_empty() || n.contains(&only)) {
            let v = f();
            match row.iter_mut().find(|(n, _)| n == name) {
                Some((_, best)) => *best = best.max(v),
                None => row.push((name.clone(), v)),
            }
        }
    }
    row
}

fn tract_onnx_model(bytes: &[u8]) -> tract_onnx::prelude::InferenceModel {
    use tract_onnx::prelude::Framework as _;
    tract_onnx::onnx().model_for_read(&mut &bytes[..]).unwrap()
}

fn main() {
    let secs: f64 = std::env::var("LINESIDE_BENCH_SECS").ok().and_then(|s| s.parse().ok()).unwrap_or(6.0);
    let only = std::env::var("LINESIDE_BENCH_ONLY").unwrap_or_default();
    let rounds: usize = std::env::var("LINESIDE_BENCH_ROUNDS").ok().and_then(|s| s.parse().ok()).unwrap_or(2);
    let cores = std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1);
    if std::env::var_os("ORT_DYLIB_PATH").is_none() {
        // The venv's wheel, as tools/test uses it.
        let lib = glob_one(&root().join(".venv/lib"), "libonnxruntime.so");
        // SAFETY: set before any other thread starts.
        unsafe { std::env::set_var("ORT_DYLIB_PATH", lib.expect("no .venv: run tools/test once")) };
    }
    let papers = root().join("target/tmp/paper-models");
    if !papers.join("squeezenet11.onnx").exists() {
        let ok = Command::new(python()).arg(root().join("tools/paper_models.py")).arg("--out").arg(&papers).status();
        assert!(ok.is_ok_and(|s| s.success()), "tools/paper_models.py failed (run tools/test once for the venv)");
    }
    let all = [
        Bench { name: "washers", onnx: root().join("models/washers/classifier.onnx") },
        Bench { name: "resnet18", onnx: papers.join("resnet18.onnx") },
        Bench { name: "mobilenetv2", onnx: papers.join("mobilenetv2.onnx") },
        Bench { name: "squeezenet11", onnx: papers.join("squeezenet11.onnx") },
    ];
    println!(
        "lineside engine benchmark: images/s, best of {rounds} rounds of {secs} s per cell, {cores} cores, this machine only"
    );
    let mut header_done = false;
    for b in all.iter().filter(|b| only.is_empty() || only == b.name) {
        let row = measure(b, secs, cores, rounds);
        if !header_done {
            println!("{:<14}{}", "model", row.iter().map(|(k, _)| format!("{k:>24}")).collect::<String>());
            header_done = true;
        }
        println!("{:<14}{}", b.name, row.iter().map(|(_, v)| format!("{v:>24.1}")).collect::<String>());
        let get = |k: &str| row.iter().find(|(n, _)| n == k).map_or(f64::NAN, |(_, v)| *v);
        let tract_best = row.iter().filter(|(k, _)| k.starts_with("tract")).map(|(_, v)| *v).fold(0.0, f64::max);
        let py_best = row.iter().filter(|(k, _)| k.starts_with("py")).map(|(_, v)| *v).fold(0.0, f64::max);
        println!(
            "  {}: tract best / reference best = {:.2}; lineside's onnxruntime / Python's: b1 1 thr {:.2}, b8 {cores} thr {:.2}, b8 {cores} lanes {:.2}; tract symbolic / concrete b1 = {:.2}; tract b8 stacked / b1 = {:.2}; onnxruntime b8 / b1 on 1 thread = {:.2}",
            b.name,
            tract_best / py_best,
            get("ort b1 1 thr") / get("py b1 1 thr"),
            get(&format!("ort b8 {cores} thr")) / get(&format!("py b8 {cores} thr")),
            get(&format!("ort b8 {cores} lanes")) / get(&format!("py b8 {cores} lanes")),
            get("tract symbolic b1") / get("tract b1 1 thr"),
            get("tract b8 stacked") / get("tract b1 1 thr"),
            get("ort b8 1 thr") / get("ort b1 1 thr"),
        );
    }
}

/// The first file under `dir` whose name starts with `prefix`.
fn glob_one(dir: &Path, prefix: &str) -> Option<PathBuf> {
    for entry in std::fs::read_dir(dir).ok()?.flatten() {
        let p = entry.path();
        if p.is_dir() {
            if let Some(found) = glob_one(&p, prefix) {
                return Some(found);
            }
        } else if p.file_name().is_some_and(|n| n.to_string_lossy().starts_with(prefix)) {
            return Some(p);
        }
    }
    None
}
