//! Retained frames' cost on serving (`cargo bench --bench retain`): the washer demo served by
//! `lineside serve` with `[models.retain]` on (rejected and review frames kept, written on the
//! writer thread with fsync) against the same server without it, loaded by 16 closed-loop
//! clients with a mix of 80% accepted ("good") frames and 20% rejected ones. Off and on steps
//! alternate for five rounds (`LINESIDE_BENCH_ROUNDS`) in ABBA order; the median ratio of
//! throughputs is reported, with the frames written and dropped, and the CPU's extensions.
//! `LINESIDE_BENCH_SECS` sets the step length (default 5).

use std::path::{Path, PathBuf};

use axum::body::Bytes;
use lineside::bench::child::ChildServer;
use lineside::bench::load::{self as loadgen, Mode};

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn config(dir: &Path, retain: Option<&Path>) -> PathBuf {
    let text = std::fs::read_to_string(root().join("config/lineside.toml"))
        .unwrap()
        .replace("../models/", &format!("{}/", root().join("models").display()));
    let extra = retain.map_or_else(String::new, |d| {
        format!(
            "\n[models.retain]\ndir = {:?}\nverdicts = [\"reject\", \"review\"]\nmax_frames = 2000\n",
            d.display().to_string()
        )
    });
    let p = dir.join(if retain.is_some() { "on.toml" } else { "off.toml" });
    std::fs::write(&p, format!("{text}{extra}")).unwrap();
    p
}

fn throughput(s: &ChildServer, bodies: &[Bytes], secs: f64) -> (f64, u64) {
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
    let m = rt.block_on(loadgen::bench_step(&s.target("washers"), bodies, Mode::Closed(16), secs));
    (m.throughput(), m.errors.values().sum())
}

fn retained_counts(s: &ChildServer) -> String {
    let text = http_get(&format!("{}/metrics", s.url()));
    text.lines()
        .filter(|l| l.starts_with("lineside_retained_frames_total"))
        .map(|l| l.replace("lineside_retained_frames_total", ""))
        .collect::<Vec<_>>()
        .join(" ")
}

/// A GET over a plain TCP connection, the whole answer as text (headers included).
fn http_get(url: &str) -> String {
    use std::io::{Read as _, Write as _};
    let rest = url.trim_start_matches("http://");
    let (host, path) = rest.split_once('/').unwrap_or((rest, ""));
    let mut s = std::net::TcpStream::connect(host).unwrap();
    write!(s, "GET /{path} HTTP/1.1\r\nHost: {host}\r\nConnection: close\r\n\r\n").unwrap();
    let mut out = String::new();
    s.read_to_string(&mut out).unwrap();
    out
}

fn main() {
    let secs: f64 = std::env::var("LINESIDE_BENCH_SECS").ok().and_then(|v| v.parse().ok()).unwrap_or(5.0);
    let rounds: usize = std::env::var("LINESIDE_BENCH_ROUNDS").ok().and_then(|v| v.parse().ok()).unwrap_or(5);
    let dir = std::env::temp_dir().join(format!("lineside-bench-retain-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    let samples = root().join("models/washers/samples");
    let read = |name: &str| Bytes::from(std::fs::read(samples.join(name)).unwrap());
    // 80% accepted: eight good frames to two rejected ones.
    let mut bodies: Vec<Bytes> =
        ["good-01.png", "good-02.png", "good-03.png", "good-01.png"].iter().map(|n| read(n)).collect();
    bodies.extend(bodies.clone());
    bodies.extend(["burr-01.png", "cracked-01.png"].iter().map(|n| read(n)));
    let exe = Path::new(env!("CARGO_BIN_EXE_lineside"));
    let off = ChildServer::start_exe(exe, Some(&config(&dir, None)), &[]).expect("start the server without retain");
    let on = ChildServer::start_exe(exe, Some(&config(&dir, Some(&dir.join("retained")))), &[])
        .expect("start the server with retain");
    let machine = lineside::bench::Machine::this();
    println!("machine: {} ({} cores), {}", machine.cpu, machine.cores, machine.simd.join(" "));
    let mut ratios = Vec::new();
    for round in 0..rounds {
        let order: [(&str, &ChildServer); 2] =
            if round % 2 == 0 { [("off", &off), ("on", &on)] } else { [("on", &on), ("off", &off)] };
        let mut rate = std::collections::HashMap::new();
        for (name, server) in order {
            let (r, errors) = throughput(server, &bodies, secs);
            assert_eq!(errors, 0, "{name}: errors under load");
            rate.insert(name, r);
        }
        let ratio = rate["on"] / rate["off"];
        println!("round {round}: off {:.0} req/s, on {:.0} req/s, ratio {ratio:.3}", rate["off"], rate["on"]);
        ratios.push(ratio);
    }
    ratios.sort_by(f64::total_cmp);
    println!(
        "retain on / off, 16 clients, 80% accepted frames: median ratio {:.3} over {rounds} rounds",
        ratios[rounds / 2]
    );
    println!("retained frames (on): {}", retained_counts(&on));
}
