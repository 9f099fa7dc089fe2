//! Reloads (work in progress): a new version swapped in under load, every answer's version
//! old or new and never old again after a client first sees the new one; broken files and a
//! pin mismatch keep the old version serving with /readyz 200.

use std::path::{Path, PathBuf};
use std::time::Duration;

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
    let next = dir.join("next.onnx");
    retagged(&dir.join("classifier.onnx"), &next, "v2");
    let stop = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(false));
    let all = std::sync::Arc::new(samples());
    let url = server.url("/classify/washers");
    let clients: Vec<_> = (0..16)
        .map(|i| {
            let (stop, all, url) = (stop.clone(), all.clone(), url.clone());
            tokio::spawn(async move {
                let http = reqwest::Client::new();
                let mut seen = Vec::new();
                let mut n = 0;
                while !stop.load(std::sync::atomic::Ordering::Relaxed) || n < 20 {
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
        .collect();
    tokio::time::sleep(Duration::from_millis(300)).await;
    replace_atomically(&dir.join("classifier.onnx"), &std::fs::read(&next).unwrap());
    let r = c.post(server.url("/models/washers/reload")).send().await.unwrap();
    assert_eq!(r.status(), 200, "{}", r.text().await.unwrap());
    let new = version_of(&c, &server).await;
    assert_ne!(new, old);
    // /readyz stayed 200 (checked once more after the swap).
    assert_eq!(c.get(server.url("/readyz")).send().await.unwrap().status(), 200);
    tokio::time::sleep(Duration::from_millis(300)).await;
    stop.store(true, std::sync::atomic::Ordering::Relaxed);
    for client in clients {
        let seen = client.await.unwrap();
        let first_new = seen.iter().position(|v| *v == new).expect("every client saw the new version");
        assert!(seen[..first_new].iter().all(|v| *v == old), "only the old version before");
        assert!(seen[first_new..].iter().all(|v| *v == new), "only the new version after it first appeared");
    }
    let info: serde_json::Value = c.get(server.url("/models/washers")).send().await.unwrap().json().await.unwrap();
    assert_eq!(info["last_reload"]["outcome"], "ok", "{info}");
    assert_eq!(info["last_reload"]["serving"], new.as_str());
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

/// The real binary and a real SIGHUP: a changed model file is reloaded, a model added to the
/// config is loaded, a model removed from it stops serving; the unchanged stays as it was.
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
