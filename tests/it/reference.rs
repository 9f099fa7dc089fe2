//! lineside against references outside the project, on the washer samples.
//!
//! Source of every expected number: `tests/fixtures/washers/reference.json` and
//! `tests/fixtures/washers/pillow96/*.png`, written by `tools/reference.py` with
//! onnxruntime 1.32.0 (PyPI, CPU, 1 thread) on tensors from Pillow 13.0.0's
//! `Image.resize((96, 96), BILINEAR)` / 255 (versions pinned in tools/requirements.txt).

use serde_json::Value;

use crate::util::{
    TestServer, engine_under_test, metric, parse_metrics, root, samples, washer_config, washer_config_with,
};
use lineside::config::Layout;
use lineside::model::load;
use lineside::preprocess::Pipeline;

fn reference() -> Value {
    serde_json::from_slice(&std::fs::read(root().join("tests/fixtures/washers/reference.json")).unwrap()).unwrap()
}

fn reference_probs(r: &Value, name: &str) -> Vec<f64> {
    r["samples"][name]["probabilities"]
        .as_array()
        .unwrap_or_else(|| panic!("reference.json has no {name}: rerun tools/reference.py"))
        .iter()
        .map(|v| v.as_f64().unwrap())
        .collect()
}

/// Pillow's 96x96 pixels for a sample, as 8-bit RGB.
fn pillow_pixels(name: &str) -> image::RgbImage {
    image::open(root().join("tests/fixtures/washers/pillow96").join(name)).unwrap().into_rgb8()
}

#[test]
fn engine_matches_onnxruntime_on_the_same_tensor() {
    let cfg = washer_config();
    let model = load::load(&cfg.models[0].spec()).unwrap();
    let mut runner = model.runner().unwrap();
    let r = reference();
    let mut worst = 0.0f64;
    for s in samples() {
        let px = pillow_pixels(&s.name);
        // The same tensor onnxruntime saw: pixel / 255, NCHW.
        let mut t = vec![0f32; 3 * 96 * 96];
        for (i, p) in px.pixels().enumerate() {
            for c in 0..3 {
                t[c * 96 * 96 + i] = f32::from(p.0[c]) / 255.0;
            }
        }
        let ours = runner.run(&t).unwrap();
        let theirs = reference_probs(&r, &s.name);
        for (a, b) in ours.iter().zip(&theirs) {
            worst = worst.max((f64::from(*a) - b).abs());
        }
    }
    // tract vs onnxruntime measured at <= 6e-6 on five architectures (FACTS.md); the
    // onnxruntime engine is the reference's own runtime through lineside's code path.
    assert!(worst <= 1e-5, "max |lineside ({}) - onnxruntime| = {worst:e}", model.engine().name());
}

#[test]
fn preprocessing_matches_pillow_bilinear_exactly() {
    let cfg = washer_config();
    let m = &cfg.models[0];
    let model = load::load(&m.spec()).unwrap();
    assert_eq!(model.contract.layout, Layout::Nchw);
    let pipeline = Pipeline::new(m.preprocess.clone(), &model.contract, cfg.server.decode_limits()).unwrap();
    let (mut worst, mut total, mut count) = (0i32, 0i64, 0i64);
    for s in samples() {
        let ours = pipeline.run(&s.bytes).unwrap().tensor.to_f32();
        let px = pillow_pixels(&s.name);
        for (i, p) in px.pixels().enumerate() {
            for c in 0..3 {
                let level = (ours[c * 96 * 96 + i] * 255.0).round() as i32;
                let d = (level - i32::from(p.0[c])).abs();
                worst = worst.max(d);
                total += i64::from(d);
                count += 1;
            }
        }
    }
    // lineside reproduces Pillow's resampling arithmetic (22-bit fixed-point weights, rounding
    // after each pass), so the 8-bit frames are identical, not merely close: a different
    // filter, a missing antialias or another rounding would show here.
    let mean = total as f64 / count as f64;
    assert_eq!((worst, mean), (0, 0.0), "pixel difference from Pillow: max {worst} levels, mean {mean:.4}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn served_scores_match_onnxruntime() {
    // The default lanes, and one lane of two threads (tract's multithread-mm executor).
    let two_threads =
        washer_config_with(&[("lanes = \"auto\"", "lanes = 1"), ("lane_threads = 1 ", "lane_threads = 2 ")]);
    for config in [washer_config(), two_threads] {
        served_scores_match_onnxruntime_with(config).await;
    }
}

async fn served_scores_match_onnxruntime_with(config: lineside::config::Config) {
    let threads = config.models[0].batching.lane_threads;
    let app = crate::util::TestApp::start(config).await;
    let r = reference();
    let labels: Vec<String> = r["labels"].as_array().unwrap().iter().map(|l| l.as_str().unwrap().into()).collect();
    let mut worst = 0.0f64;
    for s in samples() {
        let v = app.post("/classify/washers?top=all", s.bytes.clone()).await.json();
        let theirs = reference_probs(&r, &s.name);
        assert_eq!(v["label"], r["samples"][&s.name]["label"], "{}: top-1 differs from onnxruntime", s.name);
        for t in v["top"].as_array().unwrap() {
            let i = labels.iter().position(|l| l == t["label"].as_str().unwrap()).unwrap();
            worst = worst.max((t["score"].as_f64().unwrap() - theirs[i]).abs());
        }
    }
    // The tensors are the same (test above, up to float rounding in the normalisation), so
    // what is left is the engines' rounding: <= 1e-5 measured on the same tensor.
    assert!(worst <= 1e-4, "lane_threads = {threads}: max |served - onnxruntime| = {worst:e}");
}

/// Requests gathered into one pass each get their own image's scores back, whether the pass
/// is stacked into one tensor (onnxruntime with `stack = true`) or run image by image (tract):
/// the 15 samples posted at once to one lane. The lane is held at the engine on the first
/// until the other 14 wait in the backlog, so the passes that follow are formed from a full
/// backlog however fast this machine is: 1 + ceil(14 / batch_cap 8) = 3 passes.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn gathered_passes_answer_each_image_with_its_own_scores() {
    let stacking = engine_under_test() == lineside::model::EngineKind::Onnxruntime;
    let stack = if stacking { "stack = true  " } else { "stack = \"auto\"" };
    let config = washer_config_with(&[("lanes = \"auto\"", "lanes = 1"), ("stack = \"auto\"", stack)]);
    let fault = crate::fault::FaultPlan::default();
    let server = TestServer::start_with_fault(config, fault.clone()).await;
    let c = reqwest::Client::new();
    let r = reference();
    let labels: Vec<String> = r["labels"].as_array().unwrap().iter().map(|l| l.as_str().unwrap().into()).collect();
    let post = |s: crate::util::Sample| {
        let c = c.clone();
        let url = server.url("/classify/washers?top=all");
        tokio::spawn(async move {
            let v: Value = c.post(url).body(s.bytes.clone()).send().await.unwrap().json().await.unwrap();
            (s.name, v)
        })
    };
    // The first alone into the held lane, then the other 14 into the backlog.
    fault.hold();
    let mut all = samples().into_iter();
    let mut posts = vec![post(all.next().unwrap())];
    fault.wait_entered(1).await;
    posts.extend(all.map(post));
    server.wait_backlog("washers", 14).await;
    fault.release();
    let answers: Vec<(String, Value)> =
        futures_util::future::join_all(posts).await.into_iter().map(Result::unwrap).collect();
    let mut worst = 0.0f64;
    for (name, v) in &answers {
        assert_eq!(v["label"], r["samples"][name]["label"], "{name}: top-1 differs from onnxruntime: {v}");
        let theirs = reference_probs(&r, name);
        for t in v["top"].as_array().unwrap() {
            let i = labels.iter().position(|l| l == t["label"].as_str().unwrap()).unwrap();
            worst = worst.max((t["score"].as_f64().unwrap() - theirs[i]).abs());
        }
    }
    assert!(worst <= 1e-4, "max |served - onnxruntime| = {worst:e} with gathered passes");
    let text = reqwest::get(server.url("/metrics")).await.unwrap().text().await.unwrap();
    let m = parse_metrics(&text);
    let (sum, count) = (
        metric(&m, r#"lineside_pass_size_requests_sum{model="washers"}"#),
        metric(&m, r#"lineside_pass_size_requests_count{model="washers"}"#),
    );
    assert_eq!(sum, 15.0, "every image ran exactly once");
    assert_eq!(count, 3.0, "passes for 15 images: the held one, then 8 and 6 from the backlog");
    server.stop().await.unwrap();
}

/// The HTTP API against its own OpenAPI document, driven by schemathesis 4.32.5 (PyPI): it
/// generates requests from the document (valid and invalid: random bodies, PNGs, multipart,
/// odd headers and query values) and checks every answer: no 5xx, status codes, content
/// types, headers and bodies as documented.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_api_conforms_to_its_openapi_document_under_schemathesis() {
    let server = TestServer::start(washer_config()).await;
    let dir = crate::util::temp_dir("schemathesis");
    // Path parameters would otherwise be random names, which only ever reach the 404 branch.
    // X-Deadline-Ms is fixed at the server's own deadline: a client that asks for 1 ms gets
    // the documented 504 `deadline` on a busy machine, which is its choice, not a server
    // fault, while every other 5xx is.
    let config = "[parameters]\n\"path.model\" = \"washers\"\n\"header.X-Deadline-Ms\" = \"2000\"\n";
    std::fs::write(dir.join("schemathesis.toml"), config).unwrap();
    let url = server.url("/openapi.json");
    let exe = crate::util::python().with_file_name("schemathesis");
    let out = tokio::task::spawn_blocking(move || {
        std::process::Command::new(exe)
            .current_dir(&dir)
            .args(["--config-file", "schemathesis.toml", "run", &url, "--checks", "all"])
            // Every byte string is schema-valid as an image body, but not every one is an
            // image: refusing those (400/415/422) is right, so this one check does not apply.
            .args(["--exclude-checks", "positive_data_acceptance"])
            .args(["--max-examples", "60", "--seed", "7", "--request-timeout", "20"])
            .output()
            .expect("run schemathesis from the venv (tools/test installs it)")
    })
    .await
    .unwrap();
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(out.status.success(), "schemathesis found problems:\n{stdout}\n{}", String::from_utf8_lossy(&out.stderr));
    assert!(stdout.contains("passed") && !stdout.contains("❌"), "{stdout}");
    server.stop().await.unwrap();
}
