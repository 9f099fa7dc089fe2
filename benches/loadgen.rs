//! Speed of `lineside bench`'s load generator (`cargo bench --bench loadgen`): can it drive a
//! server much faster than the demo model could ever answer, from one core?
//!
//! - A server that answers every POST at once (hyper, HTTP/1.1, one OS thread with its own
//!   runtime; it reads each body and answers a short JSON), on a loopback port.
//! - The load generator as `lineside bench` runs it (`lineside::bench::load`, on this thread),
//!   closed loop with 32 keep-alive clients posting the demo's sample frames.
//! - In the same run, the demo model's engine alone with its default lanes (the ceiling of
//!   any served throughput for it).
//!
//! Reported: requests per second, the CPU time of the generator's thread and of the server's,
//! and the generator's rate over the engine's. `LINESIDE_BENCH_SECS` sets the step length
//! (default 5).

use std::convert::Infallible;
use std::sync::Arc;
use std::time::{Duration, Instant};

use axum::body::Bytes;
use http_body_util::{BodyExt, Full};
use hyper::service::service_fn;
use hyper_util::rt::TokioIo;

use lineside::bench::load::{self, Mode, Target};
use lineside::bench::{cpu_seconds, engine};
use lineside::config::Config;
use lineside::served::{LoadOptions, Loaded};

fn root() -> std::path::PathBuf {
    std::path::PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// Start the answer-at-once server on its own thread; returns its port and thread id.
fn start_server() -> (u16, String) {
    let listener = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
    listener.set_nonblocking(true).unwrap();
    let port = listener.local_addr().unwrap().port();
    let (tid_tx, tid_rx) = std::sync::mpsc::channel();
    std::thread::Builder::new()
        .name("answer".into())
        .spawn(move || {
            let tid = std::fs::read_link("/proc/thread-self")
                .ok()
                .and_then(|p| p.file_name().map(|n| n.to_string_lossy().to_string()));
            let _ = tid_tx.send(tid.unwrap_or_default());
            let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
            rt.block_on(async move {
                let listener = tokio::net::TcpListener::from_std(listener).unwrap();
                loop {
                    let (stream, _) = listener.accept().await.unwrap();
                    let _ = stream.set_nodelay(true);
                    tokio::spawn(async move {
                        let svc = service_fn(|req: hyper::Request<hyper::body::Incoming>| async move {
                            let _ = req.into_body().collect().await;
                            Ok::<_, Infallible>(hyper::Response::new(Full::new(Bytes::from_static(
                                b"{\"label\":\"good\"}",
                            ))))
                        });
                        let _ = hyper::server::conn::http1::Builder::new()
                            .serve_connection(TokioIo::new(stream), svc)
                            .await;
                    });
                }
            });
        })
        .unwrap();
    (port, tid_rx.recv().unwrap())
}

fn main() {
    let secs: f64 = std::env::var("LINESIDE_BENCH_SECS").ok().and_then(|s| s.parse().ok()).unwrap_or(5.0);
    let duration = Duration::from_secs_f64(secs);
    let config =
        Config::from_file(&root().join("config/lineside.toml"), &lineside::cli::base_overrides().unwrap()).unwrap();
    let m = &config.models[0];
    let frames = lineside::selftest::Samples::images_only(m.selftest.as_ref().unwrap()).unwrap();
    let bodies: Vec<Bytes> = frames.iter().map(|f| Bytes::from(f.1.clone())).collect();

    let (port, server_tid) = start_server();
    let target = Target {
        addr: ([127, 0, 0, 1], port).into(),
        host: format!("127.0.0.1:{port}"),
        path: "/classify/washers".into(),
    };
    let pid = std::process::id().to_string();
    let thread_cpu = |tid: &str| cpu_seconds(&format!("{pid}/task/{tid}")).unwrap_or(0.0);
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
    let (c0, s0, t0) = (thread_cpu(&pid), thread_cpu(&server_tid), Instant::now());
    let measured = rt.block_on(load::run_step(
        &target,
        &bodies,
        Mode::Closed(32),
        Duration::from_secs(1),
        duration,
        duration,
        &|_| {},
    ));
    let wall = t0.elapsed().as_secs_f64();
    let (client_cores, server_cores) = ((thread_cpu(&pid) - c0) / wall, (thread_cpu(&server_tid) - s0) / wall);
    assert!(measured.errors.is_empty(), "errors: {:?}", measured.errors);

    let loaded = Loaded::load(m, &LoadOptions::single()).unwrap();
    let (model, lanes) = (Arc::clone(&loaded.model), loaded.lanes);
    let tensors: Vec<lineside::model::Tensor> =
        frames.iter().map(|f| loaded.pipeline.run(&f.1).unwrap().tensor).collect();
    let e = engine::run(
        &model,
        &tensors,
        lanes,
        m.batching.lane_threads,
        m.batching.batch_cap,
        Duration::from_millis(500),
        duration,
    )
    .unwrap();

    println!("lineside load generator benchmark ({secs} s per step; loopback; this machine only)");
    println!(
        "  generator, 32 clients, one thread: {:.0} req/s ({} answers), generator thread {:.2} cores, \
         answering server thread {:.2} cores",
        measured.throughput(),
        measured.ok,
        client_cores,
        server_cores
    );
    println!("  demo model engine alone, {lanes} lane(s): {:.0} img/s", e.throughput());
    println!(
        "  generator / engine: {:.1}x (target: at least 10x); per core of generator: {:.1}x",
        measured.throughput() / e.throughput(),
        measured.throughput() / client_cores.max(1e-9) / e.throughput()
    );
}
