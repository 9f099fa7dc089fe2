//! Serving overhead benchmark (`cargo bench --bench serve`): the server's throughput over
//! loopback against the raw engine's with the same lanes and threads, in one run.
//!
//! For each model (the 96x96 washer demo; ResNet-18 with random weights when
//! `target/tmp/paper-models/resnet18.onnx` exists, built by the tests from its paper's layer
//! table):
//! - raw engine: `lanes` OS threads, one engine state each, running the preprocessed tensor
//!   back to back for the step's duration (no HTTP, no decode);
//! - server: `lineside serve` as a child process with the same lanes, loaded by 16 concurrent
//!   keep-alive clients posting a small PNG of the model's input size (closed loop), from this
//!   process on one thread; the CPU time of each process is read from /proc.
//!
//! Raw and served steps alternate for five rounds (`LINESIDE_BENCH_ROUNDS`), in ABBA order
//! (raw first in even rounds, served first in odd ones), and the median ratio is reported (the
//! machine drifts between steps); `LINESIDE_BENCH_VERBOSE=1` prints every round. The served steps are loaded by
//! `lineside bench`'s own generator; the idle step uses reqwest to read `timing_ms`. Also: 16 clients with `batch_cap = 8` against
//! `batch_cap = 1` (the gathering ratio), and
//! the idle overhead at concurrency 1: the median of total − infer − decode − preprocess as the
//! server reports them in `timing_ms`. `LINESIDE_BENCH_SECS` sets the step length (default 5).

use std::io::Cursor;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

use axum::body::Bytes;
use lineside::bench::child::ChildServer;
use lineside::bench::load::{self as loadgen, Mode};
use lineside::bench::{engine, summarize};
use lineside::config::Config;
use lineside::model::load;
use lineside::served::{LoadOptions, Loaded};

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// CPU seconds a process (or "PID/task/TID" thread) has used; 0 when unreadable.
fn cpu_seconds(pid: &str) -> f64 {
    lineside::bench::cpu_seconds(pid).unwrap_or(0.0)
}

/// CPU seconds per thread role of a process: threads are grouped by the name prefix before
/// their first '-' ("lane", "decode", "lineside" for the HTTP runtime).
fn cpu_by_role(pid: &str) -> std::collections::BTreeMap<String, f64> {
    let mut out = std::collections::BTreeMap::new();
    let Ok(tasks) = std::fs::read_dir(format!("/proc/{pid}/task")) else { return out };
    for t in tasks.flatten() {
        let tid = t.file_name().to_string_lossy().to_string();
        let comm = std::fs::read_to_string(format!("/proc/{pid}/task/{tid}/comm")).unwrap_or_default();
        let role = comm.trim().split('-').next().unwrap_or("").to_string();
        *out.entry(role).or_insert(0.0) += cpu_seconds(&format!("{pid}/task/{tid}"));
    }
    out
}

struct Bundle {
    name: &'static str,
    onnx: PathBuf,
    labels: PathBuf,
    size: u32,
    config: PathBuf,
    png: Vec<u8>,
    tensor: lineside::model::Tensor,
}

/// A config for `onnx` at `size`, with `lanes` lanes of `threads` threads and `batch_cap`.
#[allow(clippy::too_many_arguments)]
fn write_config(
    dir: &Path,
    name: &str,
    onnx: &Path,
    labels: &Path,
    size: u32,
    lanes: usize,
    threads: usize,
    cap: usize,
) -> PathBuf {
    let p = dir.join(format!("{name}-{lanes}x{threads}-{cap}.toml"));
    // Extra `[server]` lines for experiments, e.g. LINESIDE_BENCH_SERVER="decode_threads = 1".
    let server = std::env::var("LINESIDE_BENCH_SERVER").unwrap_or_default().replace(';', "\n");
    let text = format!(
        "[server]\n{server}\n[[models]]\nname = \"{name}\"\nonnx = {:?}\nlabels = {:?}\n[models.preprocess]\nwidth = {size}\n\
         height = {size}\n[models.batching]\nlanes = {lanes}\nlane_threads = {threads}\nbatch_cap = {cap}\n\
         backlog = 256\n",
        onnx.display().to_string(),
        labels.display().to_string()
    );
    std::fs::write(&p, text).unwrap();
    p
}

fn png_of_size(size: u32) -> Vec<u8> {
    let frame = image::open(root().join("models/washers/samples/good-01.png")).unwrap();
    let small = frame.resize_exact(size, size, image::imageops::FilterType::Triangle).into_rgb8();
    let mut out = Vec::new();
    small.write_to(&mut Cursor::new(&mut out), image::ImageFormat::Png).unwrap();
    out
}

fn bundle(dir: &Path, name: &'static str, onnx: &Path, labels: &Path, size: u32) -> Bundle {
    let config = write_config(dir, name, onnx, labels, size, 2, 1, 8);
    let png = png_of_size(size);
    let cfg = Config::from_file(&config, &lineside::cli::base_overrides().unwrap()).unwrap();
    let loaded = Loaded::load(&cfg.models[0], &LoadOptions::single()).unwrap();
    let tensor = loaded.pipeline.run(&png).unwrap().tensor;
    Bundle { name, onnx: onnx.to_path_buf(), labels: labels.to_path_buf(), size, config, png, tensor }
}

/// Images per second of `lanes` lanes of `threads` threads each running the engine back to
/// back, as the server's lanes do.
fn raw_engine(b: &Bundle, lanes: usize, threads: usize, secs: f64) -> f64 {
    let cfg = Config::from_file(&b.config, &lineside::cli::base_overrides().unwrap()).unwrap();
    let model = Arc::new(load::load(&cfg.models[0].spec()).unwrap());
    let warm = Duration::from_millis(500);
    engine::run(&model, std::slice::from_ref(&b.tensor), lanes, threads, 8, warm, Duration::from_secs_f64(secs))
        .unwrap()
        .throughput()
}

/// `lineside serve` with `config`, quiet, on a free loopback port (the binary cargo built).
fn start(config: &Path) -> ChildServer {
    ChildServer::start_exe(Path::new(env!("CARGO_BIN_EXE_lineside")), Some(config), &[]).expect("start lineside serve")
}

struct Load {
    rate: f64,
    errors: u64,
    overhead_p50_ms: f64,
    /// Mean engine time per image as the server measured it.
    infer_mean_ms: f64,
    latency_p50_ms: f64,
    latency_p99_ms: f64,
    server_cores: f64,
    /// Server CPU milliseconds per answered request, by thread role.
    cpu_ms_per_request: Vec<(String, f64)>,
    client_cores: f64,
}

/// Closed-loop load with `lineside bench`'s generator (hyper keep-alive clients, no JSON
/// parsing: about a third of reqwest's CPU per request): `conc` clients posting `body` for
/// `secs` seconds after 0.5 s of warm-up, on this thread. No per-request timings.
fn saturate(s: &ChildServer, model: &str, body: &[u8], conc: usize, secs: f64) -> Load {
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
    let target = s.target(model);
    let pid = s.pid();
    let warm = Duration::from_millis(500);
    let (srv0, cli0, t0, roles0) = (cpu_seconds(&pid), cpu_seconds("self"), Instant::now(), cpu_by_role(&pid));
    let bodies = [Bytes::from(body.to_vec())];
    let m = rt.block_on(loadgen::run_step(
        &target,
        &bodies,
        Mode::Closed(conc),
        warm,
        Duration::from_secs_f64(secs),
        Duration::from_secs(30),
        &|_| {},
    ));
    let wall = t0.elapsed().as_secs_f64();
    let (srv, cli) = (cpu_seconds(&pid) - srv0, cpu_seconds("self") - cli0);
    let roles: Vec<(String, f64)> = cpu_by_role(&pid)
        .into_iter()
        .map(|(k, v)| {
            (
                k.clone(),
                (v - roles0.get(&k).copied().unwrap_or(0.0)) / (m.ok as f64 * wall / m.wall_s.max(1e-9)).max(1.0) * 1e3,
            )
        })
        .filter(|(_, v)| *v > 0.0)
        .collect();
    let l = summarize(&m.samples_us);
    Load {
        rate: m.throughput(),
        errors: m.errors.values().sum(),
        overhead_p50_ms: f64::NAN,
        infer_mean_ms: f64::NAN,
        latency_p50_ms: l.p50_ms,
        latency_p99_ms: l.p99_ms,
        server_cores: srv / wall,
        cpu_ms_per_request: roles,
        client_cores: cli / wall,
    }
}

/// Closed-loop load: `conc` clients posting `body` for `secs` seconds, on one thread.
fn load(s: &ChildServer, model: &str, body: &[u8], conc: usize, secs: f64) -> Load {
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
    let url = format!("{}/classify/{model}", s.url());
    let pid = s.pid();
    rt.block_on(async {
        let client = reqwest::Client::builder().pool_max_idle_per_host(conc).build().unwrap();
        let run = |until: Instant| {
            let tasks: Vec<_> = (0..conc)
                .map(|_| {
                    let (client, url, body) = (client.clone(), url.clone(), body.to_vec());
                    tokio::spawn(async move {
                        let (mut lat, mut over, mut errors) = (Vec::new(), Vec::new(), 0u64);
                        let mut inf = Vec::new();
                        while Instant::now() < until {
                            let t = Instant::now();
                            match client.post(&url).body(body.clone()).send().await {
                                Ok(r) if r.status() == 200 => {
                                    let v: serde_json::Value = r.json().await.unwrap();
                                    lat.push(t.elapsed().as_secs_f64() * 1e3);
                                    let tm = &v["timing_ms"];
                                    let f = |k: &str| tm[k].as_f64().unwrap_or(0.0);
                                    over.push(f("total") - f("infer") - f("decode") - f("preprocess"));
                                    inf.push(f("infer"));
                                }
                                _ => errors += 1,
                            }
                        }
                        (lat, over, errors, inf)
                    })
                })
                .collect();
            async move {
                let mut all = (Vec::new(), Vec::new(), 0u64, Vec::new());
                for t in tasks {
                    let (l, o, e, i) = t.await.unwrap();
                    all.0.extend(l);
                    all.1.extend(o);
                    all.2 += e;
                    all.3.extend(i);
                }
                all
            }
        };
        run(Instant::now() + Duration::from_millis(500)).await; // warm connections and lanes
        let (srv0, cli0, t0) = (cpu_seconds(&pid), cpu_seconds("self"), Instant::now());
        let roles0 = cpu_by_role(&pid);
        let (mut lat, mut over, errors, mut inf) = run(Instant::now() + Duration::from_secs_f64(secs)).await;
        let wall = t0.elapsed().as_secs_f64();
        let (srv, cli) = (cpu_seconds(&pid) - srv0, cpu_seconds("self") - cli0);
        let roles: Vec<(String, f64)> = cpu_by_role(&pid)
            .into_iter()
            .map(|(k, v)| (k.clone(), (v - roles0.get(&k).copied().unwrap_or(0.0)) / lat.len().max(1) as f64 * 1e3))
            .filter(|(_, v)| *v > 0.0)
            .collect();
        lat.sort_by(f64::total_cmp);
        over.sort_by(f64::total_cmp);
        inf.sort_by(f64::total_cmp);
        let q = |v: &[f64], p: f64| if v.is_empty() { f64::NAN } else { v[((v.len() - 1) as f64 * p) as usize] };
        Load {
            rate: lat.len() as f64 / wall,
            errors,
            overhead_p50_ms: q(&over, 0.5),
            infer_mean_ms: inf.iter().sum::<f64>() / inf.len().max(1) as f64,
            latency_p50_ms: q(&lat, 0.5),
            latency_p99_ms: q(&lat, 0.99),
            server_cores: srv / wall,
            cpu_ms_per_request: roles,
            client_cores: cli / wall,
        }
    })
}

fn main() {
    let secs: f64 = std::env::var("LINESIDE_BENCH_SECS").ok().and_then(|s| s.parse().ok()).unwrap_or(5.0);
    let dir = std::env::temp_dir().join(format!("lineside-bench-serve-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let mut bundles = vec![bundle(
        &dir,
        "washers",
        &root().join("models/washers/classifier.onnx"),
        &root().join("models/washers/classes.txt"),
        96,
    )];
    let resnet = root().join("target/tmp/paper-models/resnet18.onnx");
    let only = std::env::var("LINESIDE_BENCH_ONLY").unwrap_or_default();
    if only == "resnet18" {
        bundles.clear();
    }
    if only == "washers" || only == "lanes-washers" {
        println!("(LINESIDE_BENCH_ONLY=washers: ResNet-18 skipped)");
    } else if resnet.exists() {
        let labels = dir.join("imagenet-1000.txt");
        std::fs::write(&labels, (0..1000).map(|i| format!("class{i}\n")).collect::<String>()).unwrap();
        bundles.push(bundle(&dir, "resnet18", &resnet, &labels, 224));
    } else {
        println!("(ResNet-18 skipped: run the tests once to build target/tmp/paper-models/resnet18.onnx)");
    }
    println!("lineside serving benchmark ({secs} s per step; loopback; this machine only)");
    if only == "lanes" {
        for b in &bundles {
            lane_arrangements(&dir, b, secs);
        }
        let _ = std::fs::remove_dir_all(&dir);
        return;
    }
    // The machine drifts by 10-20% between steps: alternate raw and served steps and report
    // the median of the per-round ratios, with their range.
    let rounds_n: usize = std::env::var("LINESIDE_BENCH_ROUNDS").ok().and_then(|s| s.parse().ok()).unwrap_or(5);
    for b in &bundles {
        let s = start(&b.config);
        let mut rounds = Vec::new();
        for round in 0..rounds_n {
            // ABBA order: a drift that favours whichever step comes first in a round (the
            // raw step's model load leaves the cores a moment's rest) cancels out.
            let raw_first = round % 2 == 0;
            let (raw, l) = if raw_first {
                let raw = raw_engine(b, 2, 1, secs);
                (raw, saturate(&s, b.name, &b.png, 16, secs))
            } else {
                let l = saturate(&s, b.name, &b.png, 16, secs);
                (raw_engine(b, 2, 1, secs), l)
            };
            if std::env::var_os("LINESIDE_BENCH_VERBOSE").is_some() {
                let order = if raw_first { "raw first" } else { "served first" };
                println!(
                    "    round {round} ({order}): ratio {:.3}, raw {raw:.1} img/s, served {:.1} req/s",
                    l.rate / raw,
                    l.rate
                );
            }
            rounds.push((l.rate / raw, raw, l));
        }
        drop(s);
        rounds.sort_by(|a, b| a.0.total_cmp(&b.0));
        let (ratio, raw, l) = &rounds[rounds_n / 2];
        println!(
            "  {}: median of {rounds_n} rounds: server {:.3}x the raw engine (range {:.3} - {:.3}); in that round \
             raw engine, 2 lanes x 1 thread: {raw:.1} img/s, server, 16 clients: {:.1} req/s ({} errors), \
             p50 {:.2} ms, p99 {:.2} ms; raw engine {:.3} ms per image per lane; CPU: server {:.2} cores ({}), \
             load client {:.2} cores",
            b.name,
            ratio,
            rounds[0].0,
            rounds[rounds_n - 1].0,
            l.rate,
            l.errors,
            l.latency_p50_ms,
            l.latency_p99_ms,
            2e3 / raw,
            l.server_cores,
            l.cpu_ms_per_request.iter().map(|(k, v)| format!("{k} {v:.3} ms/request")).collect::<Vec<_>>().join(", "),
            l.client_cores
        );
    }
    if only == "lanes-washers" {
        lane_arrangements(&dir, &bundles[0], secs);
    }
    if !only.is_empty() {
        println!("(LINESIDE_BENCH_ONLY={only}: gathering, idle and lane steps skipped)");
        let _ = std::fs::remove_dir_all(&dir);
        return;
    }
    let b = &bundles[0];
    let onnx = root().join("models/washers/classifier.onnx");
    let labels = root().join("models/washers/classes.txt");
    let cap1 = write_config(&dir, "washers", &onnx, &labels, 96, 2, 1, 1);
    let s8 = start(&b.config);
    let l8 = saturate(&s8, "washers", &b.png, 16, secs);
    let idle = load(&s8, "washers", &b.png, 1, secs);
    drop(s8);
    let s1 = start(&cap1);
    let l1 = saturate(&s1, "washers", &b.png, 16, secs);
    drop(s1);
    println!(
        "  gathering, washers, 16 clients: batch_cap 8 {:.1} req/s, batch_cap 1 {:.1} req/s: ratio {:.3}",
        l8.rate,
        l1.rate,
        l8.rate / l1.rate
    );
    println!(
        "  idle overhead, washers, 1 client: p50 of total - infer - decode - preprocess = {:.3} ms \
         (latency p50 {:.2} ms, {:.1} req/s)",
        idle.overhead_p50_ms, idle.latency_p50_ms, idle.rate
    );
    for b in &bundles {
        lane_arrangements(&dir, b, secs);
    }
    let _ = std::fs::remove_dir_all(&dir);
}

/// Two lanes of one thread against one lane of two threads (tract's multithread-mm executor):
/// raw throughput, and the served latency of one client (the line at low load).
fn lane_arrangements(dir: &Path, b: &Bundle, secs: f64) {
    for (lanes, threads) in [(2, 1), (1, 2)] {
        let raw = raw_engine(b, lanes, threads, secs);
        let config = write_config(dir, b.name, &b.onnx, &b.labels, b.size, lanes, threads, 8);
        let s = start(&config);
        let one = load(&s, b.name, &b.png, 1, secs);
        drop(s);
        println!(
            "  lanes, {}: {lanes} lane(s) x {threads} thread(s): raw engine {raw:.1} img/s; served to 1 client: \
             latency p50 {:.2} ms, p99 {:.2} ms, engine {:.3} ms per image, server {:.2} cores",
            b.name, one.latency_p50_ms, one.latency_p99_ms, one.infer_mean_ms, one.server_cores
        );
    }
}
