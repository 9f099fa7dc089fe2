//! Reloads: a new version swapped in under load (through the route, SIGHUP to the real binary,
//! and a watched file), every answer 200 and its version old or new and never old again
//! after a client first sees the new one; broken files, a pin mismatch and another class
//! count keep the old version serving with /readyz 200; 20 reloads leave no lane behind and
//! the memory within a stated bound.

use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Duration;

use lineside::bench::child::rss_kb;

use crate::util::{TestServer, parse_metrics, samples, temp_dir};

/// The washer bundle copied into `dir` (model, labels, self-test samples), with a config
/// there that names it, read from its file (so that a reload reads it again).
fn bundle(dir: &Path, extra: &str) -> (PathBuf, lineside::config::Config) {
    let models = crate::util::root().join("models/washers");
    for f in ["classifier.onnx", "classes.txt"] {
        std::fs::copy(models.join(f), dir.join(f)).unwrap();
    }
    let samples = dir.join("samples");
    std::fs::create_dir_all(&samples).unwrap();
    for e in std::fs::read_dir(models.join("samples")).unwrap() {
        let e = e.unwrap();
        std::fs::copy(e.path(), samples.join(e.file_name())).unwrap();
    }
    let text = std::fs::read_to_string(crate::util::root().join("config/lineside.toml"))
        .unwrap()
        .replace("../models/washers/", "")
        .replace("[[models]]\n", &format!("[[models]]\n{extra}"));
    let path = dir.join("lineside.toml");
    std::fs::write(&path, text).unwrap();
    let overrides =
        lineside::config::Overrides { listen: Some("127.0.0.1:0".into()), ..lineside::cli::base_overrides().unwrap() };
    let config = lineside::config::Config::from_file(&path, &overrides).unwrap();
    (path, config)
}

/// The same network with another producer string: another file and version, the same scores
/// (onnx, the reference library, rewrites it).
fn retagged(src: &Path, dst: &Path, tag: &str) {
    let code = format!(
        "import onnx,sys; m=onnx.load(sys.argv[1]); m.producer_name='lineside-test-{tag}'; onnx.save(m, sys.argv[2])"
    );
    let out = std::process::Command::new(crate::util::python()).args(["-c", &code]).arg(src).arg(dst).output().unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
}

/// Replace `target` atomically: write beside it, then rename (what docs/reload.md tells operators).
fn replace_atomically(target: &Path, bytes: &[u8]) {
    let temp = target.with_extension("incoming");
    std::fs::write(&temp, bytes).unwrap();
    std::fs::rename(&temp, target).unwrap();
}

/// Sixteen clients posting the washer samples to `url` until `stop` is set, each having sent
/// at least 20 frames and been answered by a second version (at most 60 s after `stop`, so a
/// slow box cannot end a client before the swap reaches it): every answer must be 200 with
/// the sample's label. Each returns the versions it was answered by, in order.
fn start_clients(url: &str, stop: &Arc<AtomicBool>) -> Vec<tokio::task::JoinHandle<Vec<String>>> {
    let all = Arc::new(samples());
    (0..16)
        .map(|i| {
            let (stop, all, url) = (Arc::clone(stop), Arc::clone(&all), url.to_owned());
            tokio::spawn(async move {
                let http = reqwest::Client::new();
                let mut seen = Vec::new();
                let mut n = 0;
                let mut stopped: Option<std::time::Instant> = None;
                loop {
                    if stop.load(Ordering::Relaxed) {
                        let since = *stopped.get_or_insert_with(std::time::Instant::now);
                        let swapped = seen.first().is_some_and(|f| seen.last() != Some(f));
                        if n >= 20 && (swapped || since.elapsed() > Duration::from_secs(60)) {
                            break;
                        }
                    }
                    let s = &all[(i + n) % all.len()];
                    let r = http.post(&url).body(s.bytes.clone()).send().await.unwrap();
                    assert_eq!(r.status(), 200, "every request answered 200 through the reload");
                    let v: serde_json::Value = r.json().await.unwrap();
                    assert_eq!(v["label"], s.label.as_str());
                    seen.push(v["version"].as_str().unwrap().to_owned());
                    n += 1;
                }
                seen
            })
        })
        .collect()
}

/// Stop the clients; each must have seen `old` only, then `new` only, and `new` at least once.
async fn check_versions(stop: &AtomicBool, clients: Vec<tokio::task::JoinHandle<Vec<String>>>, old: &str, new: &str) {
    stop.store(true, Ordering::Relaxed);
    for client in clients {
        let seen = client.await.unwrap();
        let first_new = seen.iter().position(|v| v == new).expect("every client saw the new version");
        assert!(seen[..first_new].iter().all(|v| v == old), "only the old version before: {seen:?}");
        assert!(seen[first_new..].iter().all(|v| v == new), "only the new version after it first appeared: {seen:?}");
    }
}

async fn version_of(c: &reqwest::Client, server: &TestServer) -> String {
    let v: serde_json::Value = c.get(server.url("/models/washers")).send().await.unwrap().json().await.unwrap();
    v["version"].as_str().unwrap().to_owned()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_reload_under_load_swaps_versions_without_a_failed_answer() {
    let dir = temp_dir("reload-load");
    let (_, config) = bundle(&dir, "");
    let server = TestServer::start(config).await;
    let c = reqwest::Client::new();
    let old = version_of(&c, &server).await;
    let before: serde_json::Value = c.get(server.url("/models/washers")).send().await.unwrap().json().await.unwrap();
    let next = dir.join("next.onnx");
    retagged(&dir.join("classifier.onnx"), &next, "v2");
    let stop = Arc::new(AtomicBool::new(false));
    let clients = start_clients(&server.url("/classify/washers"), &stop);
    tokio::time::sleep(Duration::from_millis(300)).await;
    replace_atomically(&dir.join("classifier.onnx"), &std::fs::read(&next).unwrap());
    let r = c.post(server.url("/models/washers/reload")).send().await.unwrap();
    assert_eq!(r.status(), 200, "{}", r.text().await.unwrap());
    let new = version_of(&c, &server).await;
    assert_ne!(new, old);
    // /readyz stayed 200 (checked once more after the swap).
    assert_eq!(c.get(server.url("/readyz")).send().await.unwrap().status(), 200);
    tokio::time::sleep(Duration::from_millis(300)).await;
    check_versions(&stop, clients, &old, &new).await;
    let info: serde_json::Value = c.get(server.url("/models/washers")).send().await.unwrap().json().await.unwrap();
    assert_eq!(info["last_reload"]["outcome"], "ok", "{info}");
    assert_eq!(info["last_reload"]["serving"], new.as_str());
    // A stacking decision calibrated at load (onnxruntime) is kept, not timed again under
    // load; on tract the engine decides, as before.
    let (was, now) = (&before["stacking"], &info["stacking"]);
    if was["decided_by"] == "calibrated" {
        assert_eq!((&now["decided_by"], &now["stacked"]), (&serde_json::json!("kept"), &was["stacked"]), "{now}");
    } else {
        assert_eq!(now, was);
    }
    let m = parse_metrics(&c.get(server.url("/metrics")).send().await.unwrap().text().await.unwrap());
    assert_eq!(crate::util::metric(&m, r#"lineside_reloads_total{model="washers",outcome="ok"}"#), 1.0);
    let info_series = m.keys().filter(|k| k.starts_with("lineside_model_info{")).count();
    assert_eq!(info_series, 1, "one version series per model after the swap: {m:?}");
    server.stop().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn broken_files_and_a_pin_mismatch_keep_the_old_version_serving() {
    let dir = temp_dir("reload-broken");
    let onnx = crate::util::root().join("models/washers/classifier.onnx");
    let digest = {
        use sha2::Digest as _;
        sha2::Sha256::digest(std::fs::read(&onnx).unwrap()).iter().map(|b| format!("{b:02x}")).collect::<String>()
    };
    let (config_path, config) = bundle(&dir, &format!("sha256 = \"{digest}\"\n"));
    let server = TestServer::start(config).await;
    let c = reqwest::Client::new();
    let old = version_of(&c, &server).await;
    let good = std::fs::read(dir.join("classifier.onnx")).unwrap();
    let reload = || c.post(server.url("/models/washers/reload")).send();
    // A truncated file.
    replace_atomically(&dir.join("classifier.onnx"), &good[..good.len() / 2]);
    let r = reload().await.unwrap();
    let m = crate::util::expect_error(r, 422, "reload_failed").await;
    assert!(m.contains("SHA-256") || m.contains("Protobuf") || m.contains("decode"), "{m}");
    // The pin: a valid model that is not the pinned file.
    let other = dir.join("other.onnx");
    retagged(&onnx, &other, "unpinned");
    replace_atomically(&dir.join("classifier.onnx"), &std::fs::read(&other).unwrap());
    let m = crate::util::expect_error(reload().await.unwrap(), 422, "reload_failed").await;
    assert!(m.contains("pins sha256"), "{m}");
    // Another class count (the pin lifted, the labels file given a sixth class).
    let text = std::fs::read_to_string(&config_path).unwrap().replace(&format!("sha256 = \"{digest}\"\n"), "");
    std::fs::write(&config_path, text).unwrap();
    replace_atomically(&dir.join("classifier.onnx"), &good);
    std::fs::write(dir.join("classes.txt"), "good\ncracked\nburr\nno_hole\nempty\nscratched\n").unwrap();
    let m = crate::util::expect_error(reload().await.unwrap(), 422, "reload_failed").await;
    assert!(m.contains("classes") || m.contains("labels"), "{m}");
    // A failing self-test: the shipped expectations name another label for one sample.
    std::fs::write(
        dir.join("classes.txt"),
        std::fs::read(crate::util::root().join("models/washers/classes.txt")).unwrap(),
    )
    .unwrap();
    let expected_path = dir.join("samples/expected.json");
    let expected = std::fs::read_to_string(&expected_path).unwrap();
    let mut wrong: serde_json::Value = serde_json::from_str(&expected).unwrap();
    let first = wrong.as_object().unwrap().keys().next().unwrap().clone();
    let label = if wrong[&first]["label"] == "good" { "cracked" } else { "good" };
    wrong[&first]["label"] = label.into();
    std::fs::write(&expected_path, wrong.to_string()).unwrap();
    let m = crate::util::expect_error(reload().await.unwrap(), 422, "reload_failed").await;
    assert!(m.contains("self-test failed") && m.contains(&first), "{m}");
    std::fs::write(&expected_path, &expected).unwrap();
    // A contract that does not fit: the config's entry now says NHWC, the model is NCHW.
    let text = std::fs::read_to_string(&config_path).unwrap();
    std::fs::write(&config_path, text.replace("layout = \"nchw\"", "layout = \"nhwc\"")).unwrap();
    let m = crate::util::expect_error(reload().await.unwrap(), 422, "reload_failed").await;
    assert!(m.to_lowercase().contains("nhwc") || m.contains("layout"), "{m}");
    std::fs::write(&config_path, text).unwrap();
    let m = parse_metrics(&c.get(server.url("/metrics")).send().await.unwrap().text().await.unwrap());
    assert_eq!(crate::util::metric(&m, r#"lineside_reloads_total{model="washers",outcome="failed"}"#), 5.0, "{m:?}");
    // Throughout: the old version serves and /readyz is 200.
    assert_eq!(version_of(&c, &server).await, old);
    assert_eq!(c.get(server.url("/readyz")).send().await.unwrap().status(), 200);
    let r = c.post(server.url("/classify/washers")).body(samples()[0].bytes.clone()).send().await.unwrap();
    assert_eq!(r.status(), 200);
    let info: serde_json::Value = c.get(server.url("/models/washers")).send().await.unwrap().json().await.unwrap();
    assert_eq!(
        (info["last_reload"]["outcome"].as_str(), info["last_reload"]["serving"].as_str()),
        (Some("failed"), Some(old.as_str()))
    );
    // An unknown model: 404.
    let r = c.post(server.url("/models/nosuch/reload")).send().await.unwrap();
    crate::util::expect_error(r, 404, "unknown_model").await;
    server.stop().await.unwrap();
}

/// The real binary and a real SIGHUP, under 16 clients: a changed model file is reloaded
/// (every answer 200, versions old then new), a model added to the config is loaded, a model
/// removed from it stops serving; the unchanged stays as it was.
#[test]
fn sighup_reloads_changed_models_adds_new_ones_and_retires_removed_ones() {
    let dir = temp_dir("reload-sighup");
    let (config_path, _) = bundle(&dir, "");
    let text = std::fs::read_to_string(&config_path).unwrap();
    let section = &text[text.find("[[models]]").unwrap()..];
    let second = section.replacen("name = \"washers\"", "name = \"washers2\"", 1);
    let (child, port) = crate::util::serve_child(&dir, &["serve", "--config", "lineside.toml"]);
    let base = format!("http://127.0.0.1:{port}");
    let hup = || {
        assert!(std::process::Command::new("kill").args(["-HUP", &child.id().to_string()]).status().unwrap().success())
    };
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
    rt.block_on(async {
        crate::util::wait_ready_at(&base).await;
        let c = reqwest::Client::new();
        let info = |name: &'static str| {
            let (c, base) = (c.clone(), base.clone());
            async move {
                let r = c.get(format!("{base}/models/{name}")).send().await.unwrap();
                (r.status().as_u16(), r.json::<serde_json::Value>().await.unwrap())
            }
        };
        let old = info("washers").await.1["version"].as_str().unwrap().to_owned();
        let next = dir.join("next.onnx");
        retagged(&dir.join("classifier.onnx"), &next, "signal");
        let stop = Arc::new(AtomicBool::new(false));
        let clients = start_clients(&format!("{base}/classify/washers"), &stop);
        tokio::time::sleep(Duration::from_millis(300)).await;
        replace_atomically(&dir.join("classifier.onnx"), &std::fs::read(&next).unwrap());
        std::fs::write(&config_path, format!("{text}\n{second}")).unwrap();
        hup();
        let mut seen = (0, serde_json::Value::Null);
        for _ in 0..600 {
            seen = info("washers2").await;
            if seen.0 == 200 && info("washers").await.1["version"] != old.as_str() {
                break;
            }
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
        assert_eq!(seen.0, 200, "washers2 was added: {}", seen.1);
        let w = info("washers").await.1;
        assert_ne!(w["version"], old.as_str(), "the changed file was reloaded: {w}");
        assert_eq!(w["last_reload"]["trigger"]["by"], "signal", "{w}");
        assert_eq!(c.get(format!("{base}/readyz")).send().await.unwrap().status(), 200);
        tokio::time::sleep(Duration::from_millis(300)).await;
        check_versions(&stop, clients, &old, w["version"].as_str().unwrap()).await;
        // washers2 removed again: it stops serving, washers stays.
        std::fs::write(&config_path, &text).unwrap();
        hup();
        for _ in 0..600 {
            if info("washers2").await.0 == 404 {
                break;
            }
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
        assert_eq!(info("washers2").await.0, 404);
        let r = c.post(format!("{base}/classify/washers")).body(samples()[0].bytes.clone()).send().await.unwrap();
        assert_eq!(r.status(), 200);
    });
    let (code, log) = crate::util::stop_child(child);
    assert_eq!(code, Some(0), "{log}");
    assert!(log.contains("model reloaded") && log.contains("Signal"), "{log}");
}

/// Wait (at most 60 s) until `/models/washers` satisfies `done`; its last answer.
async fn wait_for_model(
    c: &reqwest::Client,
    server: &TestServer,
    done: impl Fn(&serde_json::Value) -> bool,
) -> serde_json::Value {
    let mut info = serde_json::Value::Null;
    for _ in 0..600 {
        info = c.get(server.url("/models/washers")).send().await.unwrap().json().await.unwrap();
        if done(&info) {
            return info;
        }
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    panic!("/models/washers never got there: {info}");
}

/// `watch = true`: a model file replaced atomically under 16 clients is reloaded without a
/// signal or a call; a truncated file is refused once and not tried again until it changes.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_watched_model_reloads_when_its_file_is_replaced() {
    let dir = temp_dir("reload-watch");
    let (_, config) = bundle(&dir, "watch = true\n");
    let server = TestServer::start(config).await;
    let c = reqwest::Client::new();
    let old = version_of(&c, &server).await;
    let good = std::fs::read(dir.join("classifier.onnx")).unwrap();
    let next = dir.join("next.onnx");
    retagged(&dir.join("classifier.onnx"), &next, "watched");
    let stop = Arc::new(AtomicBool::new(false));
    let clients = start_clients(&server.url("/classify/washers"), &stop);
    tokio::time::sleep(Duration::from_millis(300)).await;
    replace_atomically(&dir.join("classifier.onnx"), &std::fs::read(&next).unwrap());
    let info = wait_for_model(&c, &server, |i| i["version"] != old.as_str()).await;
    let new = info["version"].as_str().unwrap().to_owned();
    assert_eq!(info["last_reload"]["trigger"]["by"], "watch", "{info}");
    assert_eq!(info["last_reload"]["outcome"], "ok", "{info}");
    tokio::time::sleep(Duration::from_millis(300)).await;
    check_versions(&stop, clients, &old, &new).await;
    // A truncated file: refused, the new version keeps serving, not tried again.
    replace_atomically(&dir.join("classifier.onnx"), &good[..good.len() / 3]);
    let info = wait_for_model(&c, &server, |i| i["last_reload"]["outcome"] == "failed").await;
    assert_eq!(info["version"], new.as_str(), "{info}");
    assert_eq!(c.get(server.url("/readyz")).send().await.unwrap().status(), 200);
    // Three more looks at the same broken file (one a second): no second attempt.
    tokio::time::sleep(lineside::reload::WATCH_POLL * 3).await;
    let m = server_metrics(&c, &server).await;
    assert_eq!(crate::util::metric(&m, r#"lineside_reloads_total{model="washers",outcome="failed"}"#), 1.0, "{m:?}");
    // The good file back: reloaded (the original version serves again).
    replace_atomically(&dir.join("classifier.onnx"), &good);
    let info = wait_for_model(&c, &server, |i| i["version"] == old.as_str()).await;
    assert_eq!(info["last_reload"]["outcome"], "ok", "{info}");
    server.stop().await.unwrap();
}

async fn server_metrics(c: &reqwest::Client, server: &TestServer) -> std::collections::HashMap<String, f64> {
    parse_metrics(&c.get(server.url("/metrics")).send().await.unwrap().text().await.unwrap())
}

/// Threads of a process whose name starts with `prefix` (/proc/PID/task/*/comm).
fn threads_named(pid: u32, prefix: &str) -> usize {
    std::fs::read_dir(format!("/proc/{pid}/task"))
        .unwrap()
        .filter_map(|t| std::fs::read_to_string(t.ok()?.path().join("comm")).ok())
        .filter(|name| name.starts_with(prefix))
        .count()
}

/// The bound docs/reload.md states: resident memory after 20 more reloads at most this much
/// above what it was after the first two (the washer demo, 0.36 MB of ONNX).
const RELOAD_RSS_BOUND_KB: u64 = 16 * 1024;

/// 20 reloads through the route on the real binary, frames classified between them: every
/// old version's lanes end (the lane threads come back to the count of one version) and
/// resident memory stays within [`RELOAD_RSS_BOUND_KB`] of its level after two reloads.
#[test]
fn twenty_reloads_leave_no_lane_behind_and_memory_within_its_bound() {
    let dir = temp_dir("reload-rss");
    let _ = bundle(&dir, "");
    let (child, port) = crate::util::serve_child(&dir, &["serve", "--config", "lineside.toml"]);
    let pid = child.id();
    let base = format!("http://127.0.0.1:{port}");
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
    let (lanes, before, after, peak) = rt.block_on(async {
        crate::util::wait_ready_at(&base).await;
        let c = reqwest::Client::new();
        let all = Arc::new(samples());
        let lanes = threads_named(pid, "lane-");
        assert!(lanes >= 1, "the lanes are named lane-…");
        let round = |c: reqwest::Client, base: String| {
            let all = Arc::clone(&all);
            async move {
                let r = c.post(format!("{base}/models/washers/reload")).send().await.unwrap();
                assert_eq!(r.status(), 200, "{}", r.text().await.unwrap());
                for s in all.iter() {
                    let r = c.post(format!("{base}/classify/washers")).body(s.bytes.clone()).send().await.unwrap();
                    assert_eq!(r.status(), 200);
                }
            }
        };
        let settle = || async {
            // An old version's lanes stop once no request holds it (a 20 ms look) and its
            // lane threads then end: wait for the count of one version, at most 30 s.
            for _ in 0..300 {
                if threads_named(pid, "lane-") == lanes && threads_named(pid, "reload-") == 0 {
                    break;
                }
                tokio::time::sleep(Duration::from_millis(100)).await;
            }
            assert_eq!(threads_named(pid, "lane-"), lanes, "an old version's lanes were left running");
            assert_eq!(threads_named(pid, "reload-"), 0, "a reload thread was left behind");
        };
        for _ in 0..2 {
            round(c.clone(), base.clone()).await;
        }
        settle().await;
        let before = rss_kb(pid);
        let mut peak = before;
        for _ in 0..20 {
            round(c.clone(), base.clone()).await;
            peak = peak.max(rss_kb(pid));
        }
        settle().await;
        (lanes, before, rss_kb(pid), peak)
    });
    let (code, log) = crate::util::stop_child(child);
    assert_eq!(code, Some(0), "{log}");
    eprintln!("20 reloads, {lanes} lanes: RSS {before} kB after 2 reloads, {after} kB after 22 (peak {peak} kB)");
    assert!(
        after <= before + RELOAD_RSS_BOUND_KB,
        "RSS grew from {before} kB to {after} kB over 20 reloads (bound {RELOAD_RSS_BOUND_KB} kB)"
    );
}
