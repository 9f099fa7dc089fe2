//! The soak benchmark: the mixed abuse of tests/it/soak.rs (src/bench/abuse.rs) for ten
//! minutes against the release binary serving the washer demo, then two minutes with
//! `max_connections` raised out of the way, to show what that bound holds down.
//!
//! Prints, per minute: resident memory, open descriptors, answers by kind; then whether
//! every answer was one its client may get and every 200 matched the frame's answer alone.
//!
//!   cargo bench --bench soak                          # 10 + 2 minutes
//!   LINESIDE_SOAK_MINUTES=2 cargo bench --bench soak  # shorter
//!
//! Record the CPU's flags beside the figures (they are printed first).

use std::path::{Path, PathBuf};
use std::time::Duration;

use lineside::bench::abuse::{self, Outcome, Setup};
use lineside::bench::child::{self, ChildServer};

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// The server's resident memory in MB and its open descriptors.
fn rss_mb_and_fds(s: &ChildServer) -> (f64, usize) {
    (s.rss_mb(), child::open_fds(s.pid().parse().unwrap_or(0)))
}

/// The washer config of the soak test ([`abuse::SOAK_CONFIG`]), with `extra` changes.
fn config(dir: &Path, extra: &[(&str, &str)]) -> PathBuf {
    let washer = std::fs::read_to_string(root().join("config/lineside.toml"))
        .unwrap()
        .replace("../models/", &format!("{}/", root().join("models").display()));
    let text = abuse::SOAK_CONFIG.iter().chain(extra).fold(washer, |t, (from, to)| t.replace(from, to));
    let p = dir.join("soak.toml");
    std::fs::write(&p, text).unwrap();
    p
}

fn frames() -> Vec<Vec<u8>> {
    let dir = root().join("models/washers/samples");
    let mut names: Vec<_> = std::fs::read_dir(&dir)
        .unwrap()
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.extension().is_some_and(|x| x == "png"))
        .collect();
    names.sort();
    names.iter().map(|p| std::fs::read(p).unwrap()).collect()
}

fn soak(title: &str, extra: &[(&str, &str)], minutes: u64) {
    let dir = std::env::temp_dir().join(format!("lineside-soak-bench-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let s = ChildServer::start_exe(Path::new(env!("CARGO_BIN_EXE_lineside")), Some(&config(&dir, extra)), &[])
        .expect("start lineside serve");
    let rt = tokio::runtime::Builder::new_multi_thread().worker_threads(2).enable_all().build().unwrap();
    let addr = s.url().trim_start_matches("http://").parse().unwrap();
    let frames = frames();
    let reference = rt.block_on(abuse::reference(addr, "washers", &frames)).expect("reference answers");
    let setup = Setup {
        addr,
        model: "washers".into(),
        frames: frames.into_iter().zip(reference).collect(),
        body_limit: abuse::SOAK_BODY_LIMIT,
        bombs: abuse::soak_bombs(),
    };
    let (rss0, fds0) = rss_mb_and_fds(&s);
    println!("\n{title}: RSS {rss0:.1} MB and {fds0} descriptors after loading");
    println!("minute | RSS MB | fds | good 200 | 503 | hang-ups | wrong");
    let mut total = Outcome::default();
    for minute in 1..=minutes {
        let o = rt.block_on(abuse::run(setup.clone(), Duration::from_secs(60)));
        let (rss, fds) = rss_mb_and_fds(&s);
        println!(
            "{minute:>6} | {rss:>6.1} | {fds:>3} | {:>8} | {:>3} | {:>8} | {}",
            o.answers.get(&("good", 200)).copied().unwrap_or(0),
            o.answered(503),
            o.sent.get("hang_up").copied().unwrap_or(0),
            o.wrong.len()
        );
        total.checked += o.checked;
        total.wrong.extend(o.wrong.iter().take(5).cloned());
        for (k, v) in o.answers {
            *total.answers.entry(k).or_default() += v;
        }
        for (k, v) in o.sent {
            *total.sent.entry(k).or_default() += v;
        }
    }
    std::thread::sleep(Duration::from_secs(5));
    let (rss, fds) = rss_mb_and_fds(&s);
    println!("after 5 s quiet: RSS {rss:.1} MB, {fds} descriptors (started with {fds0})");
    println!("{}", total.table());
    println!("{} answers checked against the frame alone; wrong answers: {:?}", total.checked, total.wrong);
    let _ = std::fs::remove_dir_all(&dir);
}

fn main() {
    let flags = std::fs::read_to_string("/proc/cpuinfo").unwrap_or_default();
    let model = flags.lines().find(|l| l.starts_with("model name")).unwrap_or("").to_owned();
    let vector: Vec<&str> = flags
        .lines()
        .find(|l| l.starts_with("flags"))
        .unwrap_or("")
        .split_whitespace()
        .filter(|f| ["avx2", "fma", "avx512f", "avx512_vnni", "amx_tile"].contains(f))
        .collect();
    println!(
        "CPU: {model}; {} cores; flags {}",
        std::thread::available_parallelism().map_or(0, |n| n.get()),
        vector.join(" ")
    );
    let minutes = std::env::var("LINESIDE_SOAK_MINUTES").ok().and_then(|m| m.parse().ok()).unwrap_or(10);
    soak("bounded (max_connections = 1024, the default)", &[], minutes);
    soak(
        "max_connections out of the way (1048576)",
        &[("# max_connections = 1024", "max_connections = 1048576")],
        (minutes / 5).max(1),
    );
}
