//! The HTTP contract of `lineside serve`, against the real server on a loopback port.

use std::time::{Duration, Instant};

use serde_json::Value;
use sha2::{Digest, Sha256};
use tokio::io::AsyncWriteExt;

use crate::util::{
    TestServer, expect_error, metric, parse_metrics, root, samples, washer_config, washer_config_with,
    washer_config_without_selftest, washer_requests,
};

fn client() -> reqwest::Client {
    reqwest::Client::builder().timeout(Duration::from_secs(30)).build().unwrap()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_sample_gets_its_expected_label() {
    let server = TestServer::start(washer_config()).await;
    let c = client();
    let onnx = std::fs::read(root().join("models/washers/classifier.onnx")).unwrap();
    let version: String = Sha256::digest(&onnx).iter().take(6).map(|b| format!("{b:02x}")).collect();
    for s in samples() {
        let resp = c
            .post(server.url("/classify/washers"))
            .header("content-type", "application/x-whatever") // sniffed from bytes, not trusted
            .body(s.bytes.clone())
            .send()
            .await
            .unwrap();
        assert_eq!(resp.status(), 200, "{}", s.name);
        let v: Value = resp.json().await.unwrap();
        assert_eq!(v["label"], s.label.as_str(), "{}: {v}", s.name);
        assert_eq!(v["model"], "washers");
        assert_eq!(v["version"], version.as_str());
        let top = v["top"].as_array().unwrap();
        assert_eq!(top.len(), 3, "default top=3");
        assert_eq!(top[0]["label"], v["label"]);
        assert_eq!(top[0]["score"], v["score"]);
        let scores: Vec<f64> = top.iter().map(|t| t["score"].as_f64().unwrap()).collect();
        assert!(scores.windows(2).all(|w| w[0] >= w[1]), "best first: {scores:?}");
        assert!(scores.iter().sum::<f64>() <= 1.0 + 1e-5);
        for k in ["decode", "preprocess", "wait", "infer", "total"] {
            assert!(v["timing_ms"][k].as_f64().unwrap() >= 0.0, "timing_ms.{k}: {v}");
        }
    }
    server.stop().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn readyz_is_503_until_the_models_are_loaded() {
    let mut server = TestServer::start_gated(washer_config()).await;
    let c = client();
    // Bound and answering while loading is held.
    assert_eq!(c.get(server.url("/healthz")).send().await.unwrap().status(), 200);
    let msg = expect_error(c.get(server.url("/readyz")).send().await.unwrap(), 503, "not_ready").await;
    assert!(msg.contains("waiting") || msg.contains("loading"), "{msg}");
    let sample = &samples()[0];
    let r = c.post(server.url("/classify/washers")).body(sample.bytes.clone()).send().await.unwrap();
    assert!(r.headers().contains_key("retry-after"));
    expect_error(r, 503, "not_ready").await;

    server.release_load();
    server.wait_ready().await;
    let v: Value = c.get(server.url("/readyz")).send().await.unwrap().json().await.unwrap();
    assert_eq!(v["ready"], true);
    assert_eq!(v["models"][0]["name"], "washers");
    let r = c.post(server.url("/classify/washers")).body(sample.bytes.clone()).send().await.unwrap();
    assert_eq!(r.status(), 200);
    server.stop().await.unwrap();
}

/// A JPEG of the first sample, for truncation tests.
fn sample_jpeg() -> Vec<u8> {
    let img = image::load_from_memory(&samples()[0].bytes).unwrap();
    let mut out = Vec::new();
    img.write_to(&mut std::io::Cursor::new(&mut out), image::ImageFormat::Jpeg).unwrap();
    out
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn bad_bodies_get_400_with_a_json_error_and_the_server_keeps_serving() {
    let server = TestServer::start(washer_config()).await;
    let c = client();
    let jpeg = sample_jpeg();
    // The whole JPEG is fine...
    let r = c.post(server.url("/classify/washers")).body(jpeg.clone()).send().await.unwrap();
    assert_eq!(r.status(), 200, "a JPEG of a sample decodes");
    // deterministic "random" bytes (xorshift64), not an image
    let mut x = 0x9e37_79b9_7f4a_7c15u64;
    let noise: Vec<u8> = (0..4096)
        .map(|_| {
            x ^= x << 13;
            x ^= x >> 7;
            x ^= x << 17;
            x as u8
        })
        .collect();
    let bodies: Vec<(&str, Vec<u8>)> = vec![
        ("empty", vec![]),
        ("random bytes", noise),
        ("truncated JPEG", jpeg[..jpeg.len() / 3].to_vec()),
        ("truncated PNG", samples()[0].bytes[..200].to_vec()),
        ("text", b"{\"image\": \"washer.png\"}".to_vec()),
    ];
    for (what, body) in bodies {
        let r = c.post(server.url("/classify/washers")).body(body).send().await.unwrap();
        let msg = expect_error(r, 400, "bad_image").await;
        assert!(msg.contains("decode") || msg.contains("empty"), "{what}: {msg}");
    }
    // still serving
    for s in samples().iter().take(3) {
        let r = c.post(server.url("/classify/washers")).body(s.bytes.clone()).send().await.unwrap();
        assert_eq!(r.status(), 200);
    }
    assert_eq!(c.get(server.url("/healthz")).send().await.unwrap().status(), 200);
    server.stop().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn request_errors_have_precise_statuses() {
    let server = TestServer::start(washer_config_with(&[
        ("body_limit_bytes = 16777216", "body_limit_bytes = 1000000"),
        ("max_pixels = 40000000", "max_pixels = 100000"),
    ]))
    .await;
    let c = client();
    let s = &samples()[0];
    let post = |path: &str, body: Vec<u8>| c.post(server.url(path)).body(body).send();

    let msg = expect_error(post("/classify/bolts", s.bytes.clone()).await.unwrap(), 404, "unknown_model").await;
    assert!(msg.contains("bolts") && msg.contains("washers"), "{msg}");
    let msg = expect_error(post("/classify/washers?top=0", s.bytes.clone()).await.unwrap(), 400, "bad_request").await;
    assert!(msg.contains("top"), "{msg}");
    expect_error(post("/classify/washers?top=x", s.bytes.clone()).await.unwrap(), 400, "bad_request").await;
    expect_error(post("/classify/washers?topp=2", s.bytes.clone()).await.unwrap(), 400, "bad_request").await;

    let v: Value = post("/classify/washers?top=99", s.bytes.clone()).await.unwrap().json().await.unwrap();
    assert_eq!(v["top"].as_array().unwrap().len(), 5, "top above the label count is clamped: {v}");
    let v: Value = post("/classify/washers?top=all", s.bytes.clone()).await.unwrap().json().await.unwrap();
    let total: f64 = v["top"].as_array().unwrap().iter().map(|t| t["score"].as_f64().unwrap()).sum();
    assert!((total - 1.0).abs() < 1e-4, "probabilities over all labels sum to 1: {total}");

    // body over body_limit_bytes
    let msg = expect_error(post("/classify/washers", vec![0u8; 1_000_001]).await.unwrap(), 413, "too_large").await;
    assert!(msg.contains("body_limit_bytes = 1000000"), "{msg}");
    // 400x300 = 120000 pixels > max_pixels = 100000, read from the header
    let big = image::RgbImage::new(400, 300);
    let mut png = Vec::new();
    big.write_to(&mut std::io::Cursor::new(&mut png), image::ImageFormat::Png).unwrap();
    let msg = expect_error(post("/classify/washers", png).await.unwrap(), 413, "too_large").await;
    assert!(msg.contains("400x300") && msg.contains("max_pixels = 100000"), "{msg}");
    // a recognised but unsupported format (GIF header)
    let gif = b"GIF89a\x01\x00\x01\x00\x80\x00\x00\xff\xff\xff\x00\x00\x00!\xf9\x04\x01\x00\x00\x00\x00,\x00\x00\x00\x00\x01\x00\x01\x00\x00\x02\x02D\x01\x00;".to_vec();
    expect_error(post("/classify/washers", gif).await.unwrap(), 415, "unsupported_format").await;

    expect_error(c.get(server.url("/classify/washers")).send().await.unwrap(), 405, "method_not_allowed").await;
    expect_error(c.get(server.url("/nowhere")).send().await.unwrap(), 404, "not_found").await;
    server.stop().await.unwrap();
}

/// A PNG of `w` x `h` mid-gray pixels.
fn gray_png(w: u32, h: u32) -> Vec<u8> {
    let mut png = Vec::new();
    image::GrayImage::from_pixel(w, h, image::Luma([128]))
        .write_to(&mut std::io::Cursor::new(&mut png), image::ImageFormat::Png)
        .unwrap();
    png
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn frames_too_small_outside_the_roi_or_ycck_get_their_own_statuses() {
    let server = TestServer::start(washer_config_without_selftest(&[(
        "resize = \"stretch\"",
        "resize = \"stretch\"\nroi = [10, 10, 200, 150]\nmin_side = 16",
    )]))
    .await;
    let c = client();
    let post = |body: Vec<u8>| c.post(server.url("/classify/washers")).body(body).send();
    // 40x12: the short side is below min_side = 16, known from the header.
    let msg = expect_error(post(gray_png(40, 12)).await.unwrap(), 422, "too_small").await;
    assert!(msg.contains("40x12") && msg.contains("min_side = 16"), "{msg}");
    // 100x100 frame: the ROI reaches (210, 160).
    let msg = expect_error(post(gray_png(100, 100)).await.unwrap(), 422, "roi_outside").await;
    assert!(msg.contains("[10, 10, 200, 150]") && msg.contains("(210, 160)") && msg.contains("100x100"), "{msg}");
    // A frame the ROI fits is served (a gray frame feeds the RGB model replicated).
    assert_eq!(post(gray_png(320, 240)).await.unwrap().status(), 200);
    // A JPEG whose Adobe APP14 segment says YCCK (transform byte 2): refused, not miscoloured.
    let mut jpeg = Vec::new();
    let frame = image::RgbImage::from_pixel(32, 32, image::Rgb([200, 100, 50]));
    frame.write_to(&mut std::io::Cursor::new(&mut jpeg), image::ImageFormat::Jpeg).unwrap();
    let mut app14 = vec![0xff, 0xee, 0x00, 0x0e];
    app14.extend_from_slice(b"Adobe\x00\x64\x00\x00\x00\x00\x02");
    jpeg.splice(2..2, app14);
    let msg = expect_error(post(jpeg).await.unwrap(), 415, "unsupported_format").await;
    assert!(msg.contains("YCCK"), "{msg}");
    server.stop().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn metrics_parse_and_count_every_request() {
    let server = TestServer::start(washer_config()).await;
    let c = client();
    let all = samples();
    for s in &all {
        assert_eq!(c.post(server.url("/classify/washers")).body(s.bytes.clone()).send().await.unwrap().status(), 200);
    }
    for _ in 0..2 {
        let r = c.post(server.url("/classify/washers")).body("not an image").send().await.unwrap();
        assert_eq!(r.status(), 400);
    }
    let r = c.get(server.url("/metrics")).send().await.unwrap();
    assert!(r.headers()["content-type"].to_str().unwrap().starts_with("text/plain; version=0.0.4"));
    let m = parse_metrics(&r.text().await.unwrap());
    let n = all.len() as f64;
    assert_eq!(washer_requests(&m, "ok"), n);
    assert_eq!(washer_requests(&m, "bad_image"), 2.0);
    assert_eq!(metric(&m, r#"lineside_http_requests_total{route="/classify/{model}",status="200"}"#), n);
    assert_eq!(metric(&m, r#"lineside_http_requests_total{route="/classify/{model}",status="400"}"#), 2.0);
    // every image that reached a lane is in exactly one pass
    assert_eq!(metric(&m, r#"lineside_pass_size_requests_sum{model="washers"}"#), n);
    let passes = metric(&m, r#"lineside_pass_size_requests_count{model="washers"}"#);
    assert!(passes >= 1.0 && passes <= n);
    assert_eq!(metric(&m, r#"lineside_inference_duration_seconds_count{model="washers"}"#), passes);
    assert_eq!(metric(&m, r#"lineside_preprocess_duration_seconds_count{model="washers"}"#), n);
    assert_eq!(metric(&m, r#"lineside_backlog_depth{model="washers"}"#), 0.0);
    assert!(metric(&m, r#"lineside_lanes{model="washers"}"#) >= 1.0);
    server.stop().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn shutdown_answers_requests_in_flight_and_is_not_held_by_a_half_sent_request() {
    let mut server = TestServer::start(washer_config_with(&[
        ("header_timeout_ms = 5000", "header_timeout_ms = 500"),
        ("drain_ms = 10000", "drain_ms = 3000"),
    ]))
    .await;
    // A client that sends half its headers and then nothing.
    let mut stalled = tokio::net::TcpStream::connect(server.addr).await.unwrap();
    stalled.write_all(b"POST /classify/washers HTTP/1.1\r\nHost: x\r\n").await.unwrap();
    // A request in flight when the signal arrives: headers and half the body sent, so it is
    // accepted and being read; the rest follows after the signal.
    let body = samples()[0].bytes.clone();
    let mut in_flight = tokio::net::TcpStream::connect(server.addr).await.unwrap();
    let head = format!("POST /classify/washers HTTP/1.1\r\nHost: x\r\nContent-Length: {}\r\n\r\n", body.len());
    in_flight.write_all(head.as_bytes()).await.unwrap();
    in_flight.write_all(&body[..body.len() / 2]).await.unwrap();
    tokio::time::sleep(Duration::from_millis(200)).await;
    let t = Instant::now();
    server.trigger_shutdown();
    tokio::time::sleep(Duration::from_millis(100)).await;
    in_flight.write_all(&body[body.len() / 2..]).await.unwrap();
    let mut answer = Vec::new();
    tokio::io::AsyncReadExt::read_to_end(&mut in_flight, &mut answer).await.unwrap();
    let answer = String::from_utf8_lossy(&answer);
    assert!(answer.starts_with("HTTP/1.1 200"), "in-flight request answered: {answer}");
    assert!(answer.contains("\"label\""), "{answer}");
    server.join().await.unwrap();
    // header_timeout 0.5 s closes the stalled connection well before drain_ms = 3 s
    assert!(t.elapsed() < Duration::from_millis(2500), "shutdown took {:?}", t.elapsed());
}
