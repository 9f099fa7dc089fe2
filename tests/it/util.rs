//! Shared test helpers: start the real server on a loopback port, read the washer fixtures,
//! and call the Python reference tools from the project's venv.

use std::collections::HashMap;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::Duration;

use lineside::config::{Config, Overrides};
use lineside::server::{RunOptions, run};
use tokio::sync::oneshot;
use tokio::task::JoinHandle;

/// The repository root.
/// The engine the suite runs against: `LINESIDE_ENGINE` (models without an `engine` key use
/// it), else tract. tools/test runs the whole suite once per engine the build includes.
pub(crate) fn engine_under_test() -> lineside::model::EngineKind {
    lineside::cli::base_overrides().expect("LINESIDE_ENGINE names an engine").default_engine
}

pub(crate) fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// A fresh, empty scratch folder for one test (named after it and this process).
pub(crate) fn temp_dir(name: &str) -> PathBuf {
    // A fresh folder per call: tests run in parallel, and two that asked for the same name
    // (the bench tests' JSON report) overwrote each other's files.
    static CALLS: std::sync::atomic::AtomicUsize = std::sync::atomic::AtomicUsize::new(0);
    let n = CALLS.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
    let d = std::env::temp_dir().join(format!("lineside-it-{name}-{}-{n}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    d
}

/// The documented washer config, listening on an ephemeral loopback port.
pub(crate) fn washer_config() -> Config {
    config_from_text(&std::fs::read_to_string(root().join("config/lineside.toml")).unwrap())
}

/// The washer config with some of its lines edited. Each `(from, to)` must match, so that an
/// edit cannot silently do nothing when the example config changes.
pub(crate) fn washer_config_with(edits: &[(&str, &str)]) -> Config {
    config_from_text(&washer_text_with(edits))
}

/// The documented washer config's text with `edits` applied; each must match.
fn washer_text_with(edits: &[(&str, &str)]) -> String {
    let mut text = std::fs::read_to_string(root().join("config/lineside.toml")).unwrap();
    for (from, to) in edits {
        assert!(text.contains(from), "config/lineside.toml has no {from:?}");
        text = text.replace(from, to);
    }
    text
}

/// The washer config text with its self-test removed, for tests that change the
/// preprocessing (the self-test's expected scores hold for the documented settings only).
pub(crate) fn without_selftest(text: &str) -> String {
    let (head, rest) = text.split_once("[models.selftest]").expect("the washer config has a self-test");
    let (_, tail) = rest.split_once("[models.batching]").expect("[models.batching] follows the self-test");
    format!("{head}[models.batching]{tail}")
}

/// The washer config with some lines edited (as [`washer_config_with`]) and no self-test.
pub(crate) fn washer_config_without_selftest(edits: &[(&str, &str)]) -> Config {
    config_from_text(&without_selftest(&washer_text_with(edits)))
}

/// A config from TOML text, with paths relative to `config/` and an ephemeral port.
pub(crate) fn config_from_text(text: &str) -> Config {
    let base = root().join("config");
    Config::from_toml(
        text,
        "test config",
        &|p: &Path| lineside::config::Source::File(base.join(p)),
        &Overrides { listen: Some("127.0.0.1:0".into()), ..lineside::cli::base_overrides().unwrap() },
    )
    .expect("test config is valid")
}

/// A running in-process server.
pub(crate) struct TestServer {
    /// Where it listens.
    pub(crate) addr: SocketAddr,
    shutdown: Option<oneshot::Sender<()>>,
    gate: Option<oneshot::Sender<()>>,
    handle: JoinHandle<anyhow::Result<()>>,
}

impl TestServer {
    /// Start and wait until ready.
    pub(crate) async fn start(config: Config) -> TestServer {
        let mut s = Self::start_gated(config).await;
        s.release_load();
        s.wait_ready().await;
        s
    }

    /// Start with a fault injected into the lanes, and wait until ready.
    pub(crate) async fn start_with_fault(config: Config, fault: crate::fault::FaultPlan) -> TestServer {
        let mut s = Self::spawn(config, Some(fault.wrap())).await;
        s.release_load();
        s.wait_ready().await;
        s
    }

    /// Start and return at once, without waiting for `/readyz` (for servers that speak only
    /// HTTPS, whose readiness the test polls itself).
    pub(crate) async fn start_no_wait(config: Config) -> TestServer {
        let mut s = Self::spawn(config, None).await;
        s.release_load();
        s
    }

    /// Start with model loading held until [`TestServer::release_load`].
    pub(crate) async fn start_gated(config: Config) -> TestServer {
        Self::spawn(config, None).await
    }

    async fn spawn(config: Config, wrap_lanes: Option<lineside::model::StateWrap>) -> TestServer {
        let listener = tokio::net::TcpListener::bind(config.server.listen).await.unwrap();
        let addr = listener.local_addr().unwrap();
        let (stop_tx, stop_rx) = oneshot::channel::<()>();
        let (gate_tx, gate_rx) = oneshot::channel::<()>();
        let shutdown = async move {
            let _ = stop_rx.await;
        };
        let handle = tokio::spawn(run(
            config,
            listener,
            shutdown,
            RunOptions { load_gate: Some(gate_rx), wrap_lanes, ..Default::default() },
        ));
        TestServer { addr, shutdown: Some(stop_tx), gate: Some(gate_tx), handle }
    }

    /// Wait (polling `/readyz`, bounded at 30 s so that a broken test fails instead of
    /// hanging) until `n` requests wait in `model`'s backlog.
    pub(crate) async fn wait_backlog(&self, model: &str, n: usize) {
        let mut last = serde_json::Value::Null;
        for _ in 0..3000 {
            last = reqwest::get(self.url("/readyz")).await.unwrap().json().await.unwrap();
            let models = last["models"].as_array().or_else(|| last["error"]["details"]["models"].as_array());
            let depth =
                models.and_then(|ms| ms.iter().find(|m| m["name"] == model)).and_then(|m| m["backlog"].as_u64());
            if depth == Some(n as u64) {
                return;
            }
            tokio::time::sleep(Duration::from_millis(10)).await;
        }
        panic!("{model}'s backlog never reached {n}: last /readyz {last}");
    }

    /// Wait (polling `/metrics`, bounded at 300 polls) until `n` classify requests are in
    /// flight.
    pub(crate) async fn wait_in_flight(&self, n: usize) {
        let key = "lineside_requests_in_flight{}";
        let mut last = f64::NAN;
        for _ in 0..300 {
            let text = reqwest::get(self.url("/metrics")).await.unwrap().text().await.unwrap();
            last = metric(&parse_metrics(&text), key);
            if last == n as f64 {
                return;
            }
            tokio::time::sleep(Duration::from_millis(10)).await;
        }
        panic!("{key} never reached {n} (last {last})");
    }

    /// Wait (polling `/readyz`, bounded at 30 s) until the server says it is draining.
    pub(crate) async fn wait_draining(&self) {
        for _ in 0..3000 {
            let v: serde_json::Value = reqwest::get(self.url("/readyz")).await.unwrap().json().await.unwrap();
            if v["error"]["kind"] == "draining" {
                return;
            }
            tokio::time::sleep(Duration::from_millis(10)).await;
        }
        panic!("the server never started draining");
    }

    /// Let the models load.
    pub(crate) fn release_load(&mut self) {
        if let Some(g) = self.gate.take() {
            let _ = g.send(());
        }
    }

    /// Full URL of `path`.
    pub(crate) fn url(&self, path: &str) -> String {
        format!("http://{}{}", self.addr, path)
    }

    /// Poll `/readyz` until 200 (at most 60 s: a cold CI machine loads slowly).
    pub(crate) async fn wait_ready(&self) {
        let client = reqwest::Client::new();
        for _ in 0..600 {
            if let Ok(r) = client.get(self.url("/readyz")).send().await
                && r.status() == 200
            {
                return;
            }
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
        panic!("server at {} did not become ready in 60 s", self.addr);
    }

    /// Ask the server to stop.
    pub(crate) fn trigger_shutdown(&mut self) {
        if let Some(s) = self.shutdown.take() {
            let _ = s.send(());
        }
    }

    /// Stop and return what `server::run` returned.
    pub(crate) async fn stop(mut self) -> anyhow::Result<()> {
        self.trigger_shutdown();
        tokio::time::timeout(Duration::from_secs(30), self.handle).await.expect("server stopped within 30 s").unwrap()
    }

    /// Await the server's end without asking it to stop.
    pub(crate) async fn join(self) -> anyhow::Result<()> {
        tokio::time::timeout(Duration::from_secs(30), self.handle).await.expect("server ended within 30 s").unwrap()
    }
}

/// A washer sample: file name, bytes, expected top-1 label.
pub(crate) struct Sample {
    pub(crate) name: String,
    pub(crate) bytes: Vec<u8>,
    pub(crate) label: String,
}

/// Every sample frame listed in `models/washers/samples/expected.json`.
pub(crate) fn samples() -> Vec<Sample> {
    let dir = root().join("models/washers/samples");
    let expected: serde_json::Value =
        serde_json::from_slice(&std::fs::read(dir.join("expected.json")).unwrap()).unwrap();
    let mut out: Vec<Sample> = expected
        .as_object()
        .unwrap()
        .iter()
        .map(|(name, v)| Sample {
            name: name.clone(),
            bytes: std::fs::read(dir.join(name)).unwrap(),
            label: v["label"].as_str().unwrap().to_string(),
        })
        .collect();
    out.sort_by(|a, b| a.name.cmp(&b.name));
    assert!(out.len() >= 10, "expected at least two samples per class");
    out
}

/// The Python interpreter of the project's venv (created by `tools/test`). A missing
/// reference tool fails the test: it never skips silently.
pub(crate) fn python() -> PathBuf {
    let p = std::env::var_os("LINESIDE_PYTHON").map(PathBuf::from).unwrap_or_else(|| root().join(".venv/bin/python"));
    assert!(
        p.exists(),
        "the reference tools need {}: run `tools/test` (it creates the venv from tools/requirements.txt) \
         or set LINESIDE_PYTHON",
        p.display()
    );
    p
}

/// Parse Prometheus text with prometheus_client's parser (via tools/check_metrics.py, which
/// also checks bucket monotonicity and +Inf == _count). Keys are `name{k="v",...}` with
/// labels sorted.
pub(crate) fn parse_metrics(text: &str) -> HashMap<String, f64> {
    use std::io::Write as _;
    let mut child = Command::new(python())
        .arg(root().join("tools/check_metrics.py"))
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("run tools/check_metrics.py");
    child.stdin.take().unwrap().write_all(text.as_bytes()).unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(
        out.status.success(),
        "prometheus_client rejected /metrics: {}\n--- text ---\n{text}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

/// `lineside_request_duration_seconds_count` of the washer model for `outcome`.
pub(crate) fn washer_requests(m: &HashMap<String, f64>, outcome: &str) -> f64 {
    metric(m, &format!(r#"lineside_request_duration_seconds_count{{model="washers",outcome="{outcome}"}}"#))
}

/// Value of a parsed sample, 0 when absent.
pub(crate) fn metric(m: &HashMap<String, f64>, key: &str) -> f64 {
    m.get(key).copied().unwrap_or(0.0)
}

/// Check an error answer: status, JSON shape and kind. Returns the message.
pub(crate) async fn expect_error(resp: reqwest::Response, status: u16, kind: &str) -> String {
    assert_eq!(resp.status().as_u16(), status, "status for kind {kind}");
    let body: serde_json::Value = resp.json().await.expect("error body is JSON");
    assert_eq!(body["error"]["kind"], kind, "{body}");
    let msg = body["error"]["message"].as_str().expect("error.message is a string").to_string();
    assert!(!msg.is_empty());
    msg
}

/// The app without a socket (`server::ready_app`), driven with `tower::ServiceExt::oneshot`:
/// for handler tests where a real connection adds nothing.
pub(crate) struct TestApp {
    router: axum::Router,
    _guards: Vec<lineside::batch::BatcherGuard>,
}

/// One answer from a [`TestApp`].
pub(crate) struct Answer {
    pub(crate) status: u16,
    pub(crate) headers: axum::http::HeaderMap,
    pub(crate) body: axum::body::Bytes,
}

impl Answer {
    /// The body as text.
    pub(crate) fn text(&self) -> String {
        String::from_utf8_lossy(&self.body).into_owned()
    }

    /// The body as JSON.
    pub(crate) fn json(&self) -> serde_json::Value {
        serde_json::from_slice(&self.body).unwrap_or_else(|e| panic!("not JSON ({e}): {:?}", self.body))
    }

    /// Assert the error status and kind; the message.
    pub(crate) fn error(&self, status: u16, kind: &str) -> String {
        let ct = self.headers.get("content-type").and_then(|v| v.to_str().ok()).unwrap_or("");
        assert!(ct.starts_with("application/json"), "an error's content type is JSON, not {ct:?}");
        let body = self.json();
        assert_eq!(self.status, status, "status for kind {kind}: {body}");
        assert_eq!(body["error"]["kind"], kind, "{body}");
        let msg = body["error"]["message"].as_str().expect("error.message is a string").to_string();
        assert!(!msg.is_empty());
        msg
    }
}

impl TestApp {
    /// Load `config`'s models and build the app.
    pub(crate) async fn start(config: Config) -> TestApp {
        Self::start_wrapped(config, None).await
    }

    /// Load `config`'s models with `fault` around every lane's engine, and build the app.
    pub(crate) async fn start_with_fault(config: Config, fault: &crate::fault::FaultPlan) -> TestApp {
        Self::start_wrapped(config, Some(fault.wrap())).await
    }

    async fn start_wrapped(config: Config, wrap: Option<lineside::model::StateWrap>) -> TestApp {
        let (router, guards) = tokio::task::spawn_blocking(move || lineside::server::ready_app(&config, wrap.as_ref()))
            .await
            .unwrap()
            .unwrap();
        TestApp { router, _guards: guards }
    }

    /// The metrics as `parse_metrics` reads them.
    pub(crate) async fn metrics(&self) -> std::collections::HashMap<String, f64> {
        parse_metrics(&self.get("/metrics").await.text())
    }

    /// Send one request.
    pub(crate) async fn send(&self, method: &str, path: &str, body: Vec<u8>) -> Answer {
        self.send_with(method, path, &[], body).await
    }

    /// Send one request with these headers.
    pub(crate) async fn send_with(&self, method: &str, path: &str, headers: &[(&str, &str)], body: Vec<u8>) -> Answer {
        use http_body_util::BodyExt as _;
        use tower::ServiceExt as _;
        let mut req = axum::http::Request::builder().method(method).uri(path);
        for (k, v) in headers {
            req = req.header(*k, *v);
        }
        let req = req.body(axum::body::Body::from(body)).unwrap();
        let resp = self.router.clone().oneshot(req).await.unwrap();
        let (parts, body) = resp.into_parts();
        Answer { status: parts.status.as_u16(), headers: parts.headers, body: body.collect().await.unwrap().to_bytes() }
    }

    /// POST `body` to `path`.
    pub(crate) async fn post(&self, path: &str, body: Vec<u8>) -> Answer {
        self.send("POST", path, body).await
    }

    /// GET `path`.
    pub(crate) async fn get(&self, path: &str) -> Answer {
        self.send("GET", path, Vec::new()).await
    }
}

/// The documented washer config's text with its model paths made absolute, for a config file
/// written into a test's own folder.
pub(crate) fn washer_text_anywhere() -> String {
    std::fs::read_to_string(root().join("config/lineside.toml"))
        .unwrap()
        .replace("../models/", &format!("{}/", root().join("models").display()))
}

/// `lineside serve` as a child process, its stderr read as it comes (a child whose log pipe
/// filled up would block in its next log line: a server under load logs).
pub(crate) struct ServeChild {
    child: std::process::Child,
    log: Option<std::thread::JoinHandle<String>>,
}

impl Drop for ServeChild {
    /// A test that fails before [`stop_child`] must not leave the server running.
    fn drop(&mut self) {
        if let Ok(None) = self.child.try_wait() {
            let _ = self.child.kill();
            let _ = self.child.wait();
        }
    }
}

impl std::ops::Deref for ServeChild {
    type Target = std::process::Child;
    fn deref(&self) -> &std::process::Child {
        &self.child
    }
}

/// `lineside serve` as a child process in `dir` with `args`, on a free loopback port; returns
/// it and the port ([`stop_child`] gives its log).
pub(crate) fn serve_child(dir: &Path, args: &[&str]) -> (ServeChild, u16) {
    serve_child_with(dir, args, &[])
}

/// As [`serve_child`], with these environment variables set.
pub(crate) fn serve_child_with(dir: &Path, args: &[&str], env: &[(&str, &str)]) -> (ServeChild, u16) {
    let port = std::net::TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port();
    let mut child = std::process::Command::new(env!("CARGO_BIN_EXE_lineside"))
        .envs(env.iter().copied())
        .args(args)
        .args(["--listen", &format!("127.0.0.1:{port}")])
        .current_dir(dir)
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    let mut stderr = child.stderr.take().unwrap();
    let log = std::thread::spawn(move || {
        let mut bytes = Vec::new();
        let _ = std::io::Read::read_to_end(&mut stderr, &mut bytes);
        String::from_utf8_lossy(&bytes).into_owned()
    });
    (ServeChild { child, log: Some(log) }, port)
}

/// Poll `base`/readyz until 200 (bounded at 60 s: a server that never gets ready fails the
/// test at its next request instead of hanging it).
pub(crate) async fn wait_ready_at(base: &str) {
    let c = reqwest::Client::new();
    for _ in 0..600 {
        if c.get(format!("{base}/readyz")).send().await.is_ok_and(|r| r.status() == 200) {
            return;
        }
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
}

/// SIGTERM `child`, wait for it, and return its exit code and its whole stderr.
pub(crate) fn stop_child(mut child: ServeChild) -> (Option<i32>, String) {
    let killed = std::process::Command::new("kill").args(["-TERM", &child.id().to_string()]).status().unwrap();
    assert!(killed.success());
    let status = child.child.wait().unwrap();
    (status.code(), child.log.take().map(|l| l.join().unwrap()).unwrap_or_default())
}
