//! A reload's cost to live traffic (`cargo bench --bench reload`): the model served by
//! `lineside serve` under open-loop load at about half its saturation throughput, with and
//! without reloads running back to back through `POST /models/{model}/reload` for the whole
//! step (each one loads, plans, warms and self-tests a new version at idle priority, starts
//! its lanes, swaps it in and retires the old one). Quiet and reloading steps alternate in
//! ABBA order for five rounds (`LINESIDE_BENCH_ROUNDS`); each round's p99 ratio (reloading /
//! quiet) is reported with the median, the reloads done, and the server's resident memory
//! before and after. The washer demo always; ResNet-18 (46.8 MB of ONNX) when the tests have
//! built `target/tmp/paper-models/resnet18.onnx`. `LINESIDE_BENCH_SECS` sets the step length
//! (default 5); `LINESIDE_BENCH_ONLY=washers|resnet18` runs one.

use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::time::Duration;

use axum::body::Bytes;
use lineside::bench::child::ChildServer;
use lineside::bench::load::{self as loadgen, Mode};

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// The demo's config with its paths made absolute (its self-test runs at every reload).
fn washers_config(dir: &Path) -> PathBuf {
    let text = std::fs::read_to_string(root().join("config/lineside.toml"))
        .unwrap()
        .replace("../models/", &format!("{}/", root().join("models").display()));
    let p = dir.join("washers.toml");
    std::fs::write(&p, text).unwrap();
    p
}

/// ResNet-18 at 224 x 224 with 1 000 labels, two lanes of one thread.
fn resnet_config(dir: &Path, onnx: &Path) -> PathBuf {
    let labels = dir.join("imagenet-1000.txt");
    std::fs::write(&labels, (0..1000).map(|i| format!("class{i}\n")).collect::<String>()).unwrap();
    let text = format!(
        "[[models]]\nname = \"resnet18\"\nonnx = {:?}\nlabels = {:?}\n[models.preprocess]\nwidth = 224\nheight = 224\n\
         [models.batching]\nlanes = 2\nlane_threads = 1\nbatch_cap = 8\nbacklog = 256\n",
        onnx.display().to_string(),
        labels.display().to_string()
    );
    let p = dir.join("resnet18.toml");
    std::fs::write(&p, text).unwrap();
    p
}

struct Step {
    p50_ms: f64,
    p99_ms: f64,
    answered: u64,
    errors: u64,
    reloads: u64,
}

/// One open-loop step at `rate`; with `reload`, reloads run back to back throughout it.
fn step(
    rt: &tokio::runtime::Runtime,
    s: &ChildServer,
    model: &str,
    bodies: &[Bytes],
    rate: f64,
    secs: f64,
    reload: bool,
) -> Step {
    let target = s.target(model);
    let url = format!("{}/models/{model}/reload", s.url());
    let done = Arc::new(AtomicBool::new(false));
    let reloads = Arc::new(AtomicU64::new(0));
    rt.block_on(async {
        let reloader = {
            let (done, reloads) = (Arc::clone(&done), Arc::clone(&reloads));
            tokio::spawn(async move {
                let http = reqwest::Client::new();
                while reload && !done.load(Ordering::Relaxed) {
                    let r = http.post(&url).send().await.expect("the reload route answers");
                    assert_eq!(r.status(), 200, "reload failed: {}", r.text().await.unwrap_or_default());
                    reloads.fetch_add(1, Ordering::Relaxed);
                }
            })
        };
        let m = loadgen::bench_step(&target, bodies, Mode::Open(rate), secs).await;
        done.store(true, Ordering::Relaxed);
        reloader.await.unwrap();
        let l = lineside::bench::summarize(&m.samples_us);
        Step {
            p50_ms: l.p50_ms,
            p99_ms: l.p99_ms,
            answered: m.ok,
            errors: m.errors.values().sum(),
            reloads: reloads.load(Ordering::Relaxed),
        }
    })
}

fn bench(model: &str, config: &Path, bodies: &[Bytes], secs: f64, rounds: usize) {
    let s = ChildServer::start_exe(Path::new(env!("CARGO_BIN_EXE_lineside")), Some(config), &[])
        .expect("start lineside serve");
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
    let saturation = rt.block_on(loadgen::bench_step(&s.target(model), bodies, Mode::Closed(16), secs)).throughput();
    let rate = saturation / 2.0;
    println!("{model}: saturation {saturation:.0} frames/s (16 closed-loop clients); open loop at {rate:.0} frames/s");
    let rss_before = s.rss_mb();
    let mut ratios = Vec::new();
    let mut reloads = 0;
    for round in 0..rounds {
        let quiet_first = round % 2 == 0;
        let mut pair = [None, None];
        for reloading in if quiet_first { [false, true] } else { [true, false] } {
            pair[usize::from(reloading)] = Some(step(&rt, &s, model, bodies, rate, secs, reloading));
        }
        let [Some(q), Some(r)] = pair else { unreachable!() };
        reloads += r.reloads;
        let ratio = r.p99_ms / q.p99_ms;
        ratios.push(ratio);
        println!(
            "  round {}: quiet p50 {:.2} ms p99 {:.2} ms ({} answered, {} errors); during reloads p50 {:.2} ms p99 {:.2} ms \
             ({} answered, {} errors, {} reloads); p99 ratio {ratio:.2}",
            round + 1,
            q.p50_ms,
            q.p99_ms,
            q.answered,
            q.errors,
            r.p50_ms,
            r.p99_ms,
            r.answered,
            r.errors,
            r.reloads
        );
    }
    // Old versions retire once no request holds them: give the last one a moment.
    std::thread::sleep(Duration::from_secs(2));
    ratios.sort_by(f64::total_cmp);
    println!(
        "  p99 during reloads / quiet: median {:.2} (rounds {:.2}-{:.2}); {reloads} reloads; RSS {rss_before:.1} MB before \
         them, {:.1} MB after",
        ratios[ratios.len() / 2],
        ratios[0],
        ratios[ratios.len() - 1],
        s.rss_mb()
    );
}

fn main() {
    let secs: f64 = std::env::var("LINESIDE_BENCH_SECS").ok().and_then(|v| v.parse().ok()).unwrap_or(5.0);
    let rounds: usize = std::env::var("LINESIDE_BENCH_ROUNDS").ok().and_then(|v| v.parse().ok()).unwrap_or(5);
    let only = std::env::var("LINESIDE_BENCH_ONLY").unwrap_or_default();
    let dir = std::env::temp_dir().join(format!("lineside-bench-reload-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let flags = lineside::bench::Machine::this().simd.join(" ");
    println!("lineside reload benchmark ({secs} s per step, {rounds} rounds, ABBA; loopback; CPU: {flags})");
    let samples = root().join("models/washers/samples");
    let bodies: Vec<Bytes> = std::fs::read_dir(&samples)
        .unwrap()
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.extension().is_some_and(|x| x == "png"))
        .map(|p| Bytes::from(std::fs::read(p).unwrap()))
        .collect();
    if only.is_empty() || only == "washers" {
        bench("washers", &washers_config(&dir), &bodies, secs, rounds);
    }
    let resnet = root().join("target/tmp/paper-models/resnet18.onnx");
    if (only.is_empty() || only == "resnet18") && resnet.exists() {
        bench("resnet18", &resnet_config(&dir, &resnet), &bodies[..1], secs, rounds);
    } else if !resnet.exists() {
        println!("(ResNet-18 skipped: run the tests once to build target/tmp/paper-models/resnet18.onnx)");
    }
    let _ = std::fs::remove_dir_all(&dir);
}
