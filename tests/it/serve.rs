//! The HTTP contract of `lineside serve`: handler behaviour through the router without a
//! socket (`TestApp`), and what needs a connection (drain, timeouts, shutdown, load gating)
//! against the real server on a loopback port (`TestServer`).

use std::sync::atomic::Ordering;
use std::time::{Duration, Instant};

use crate::fault::FaultPlan;
use serde_json::Value;
use sha2::{Digest, Sha256};
use tokio::io::AsyncWriteExt;

use crate::util::{
    TestApp, TestServer, engine_under_test, expect_error, metric, parse_metrics, root, samples, washer_config,
    washer_config_with, washer_config_without_selftest, washer_requests,
};

fn client() -> reqwest::Client {
    reqwest::Client::builder().timeout(Duration::from_secs(30)).build().unwrap()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_sample_gets_its_expected_label() {
    let app = TestApp::start(washer_config()).await;
    let onnx = std::fs::read(root().join("models/washers/classifier.onnx")).unwrap();
    let version: String = Sha256::digest(&onnx).iter().take(6).map(|b| format!("{b:02x}")).collect();
    for s in samples() {
        // The format is sniffed from the bytes; the content type is not trusted.
        let ct = [("content-type", "application/x-whatever")];
        let resp = app.send_with("POST", "/classify/washers", &ct, s.bytes.clone()).await;
        assert_eq!(resp.status, 200, "{}", s.name);
        let v = resp.json();
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
        // The stages are disjoint intervals inside the request, so they add up to at most
        // the total (each rounded to the microsecond: 4 us of slack).
        let t = |k: &str| v["timing_ms"][k].as_f64().unwrap_or_else(|| panic!("timing_ms.{k}: {v}"));
        let parts = t("decode") + t("preprocess") + t("wait") + t("infer");
        assert!(parts <= t("total") + 0.004, "stages {parts} ms > total {} ms: {v}", t("total"));
    }
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
    // Issue 14: the bodies are lineside's own ("accepting", "alive" with the lane count).
    assert_eq!(v["accepting"], true, "{v}");
    assert_eq!(v["models"][0]["name"], "washers");
    assert_eq!(v["models"][0]["accepting"], true, "{v}");
    let alive: Value = c.get(server.url("/healthz")).send().await.unwrap().json().await.unwrap();
    assert_eq!(alive["alive"], true, "{alive}");
    let cores = std::thread::available_parallelism().map(|n| n.get()).unwrap();
    assert_eq!(alive["lanes"].as_u64(), Some(lineside::served::share_lanes(cores, 1, 1) as u64), "{alive}");
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
    let app = TestApp::start(washer_config()).await;
    let jpeg = sample_jpeg();
    // The whole JPEG is fine...
    assert_eq!(app.post("/classify/washers", jpeg.clone()).await.status, 200, "a JPEG of a sample decodes");
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
        let msg = app.post("/classify/washers", body).await.error(400, "bad_image");
        assert!(msg.contains("decode") || msg.contains("empty"), "{what}: {msg}");
    }
    // still serving
    for s in samples().iter().take(3) {
        assert_eq!(app.post("/classify/washers", s.bytes.clone()).await.status, 200);
    }
    assert_eq!(app.get("/healthz").await.status, 200);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn request_errors_have_precise_statuses() {
    let app = TestApp::start(washer_config_with(&[
        ("body_limit_bytes = 16777216", "body_limit_bytes = 1000000"),
        ("max_pixels = 40000000", "max_pixels = 100000"),
    ]))
    .await;
    let s = &samples()[0];
    let post = |path: &'static str, body: Vec<u8>| app.post(path, body);

    let msg = post("/classify/bolts", s.bytes.clone()).await.error(404, "unknown_model");
    assert!(msg.contains("bolts") && msg.contains("washers"), "{msg}");
    let msg = post("/classify/washers?top=0", s.bytes.clone()).await.error(400, "bad_request");
    assert!(msg.contains("top"), "{msg}");
    post("/classify/washers?top=x", s.bytes.clone()).await.error(400, "bad_request");
    post("/classify/washers?topp=2", s.bytes.clone()).await.error(400, "bad_request");

    let v = post("/classify/washers?top=99", s.bytes.clone()).await.json();
    assert_eq!(v["top"].as_array().unwrap().len(), 5, "top above the label count is clamped: {v}");
    let v = post("/classify/washers?top=all", s.bytes.clone()).await.json();
    let total: f64 = v["top"].as_array().unwrap().iter().map(|t| t["score"].as_f64().unwrap()).sum();
    assert!((total - 1.0).abs() < 1e-4, "probabilities over all labels sum to 1: {total}");

    // body over body_limit_bytes
    let msg = post("/classify/washers", vec![0u8; 1_000_001]).await.error(413, "too_large");
    assert!(msg.contains("body_limit_bytes = 1000000"), "{msg}");
    // 400x300 = 120000 pixels > max_pixels = 100000, read from the header
    let big = image::RgbImage::new(400, 300);
    let mut png = Vec::new();
    big.write_to(&mut std::io::Cursor::new(&mut png), image::ImageFormat::Png).unwrap();
    let msg = post("/classify/washers", png).await.error(413, "too_large");
    assert!(msg.contains("400x300") && msg.contains("max_pixels = 100000"), "{msg}");
    // a recognised but unsupported format (GIF header)
    let gif = b"GIF89a\x01\x00\x01\x00\x80\x00\x00\xff\xff\xff\x00\x00\x00!\xf9\x04\x01\x00\x00\x00\x00,\x00\x00\x00\x00\x01\x00\x01\x00\x00\x02\x02D\x01\x00;".to_vec();
    post("/classify/washers", gif).await.error(415, "unsupported_format");

    app.get("/classify/washers").await.error(405, "method_not_allowed");
    app.get("/nowhere").await.error(404, "not_found");
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
    let app = TestApp::start(washer_config_without_selftest(&[(
        "resize = \"stretch\"",
        "resize = \"stretch\"\nroi = [10, 10, 200, 150]\nmin_side = 16",
    )]))
    .await;
    let post = |body: Vec<u8>| app.post("/classify/washers", body);
    // 40x12: the short side is below min_side = 16, known from the header.
    let msg = post(gray_png(40, 12)).await.error(422, "too_small");
    assert!(msg.contains("40x12") && msg.contains("min_side = 16"), "{msg}");
    // 100x100 frame: the ROI reaches (210, 160).
    let msg = post(gray_png(100, 100)).await.error(422, "roi_outside");
    assert!(msg.contains("[10, 10, 200, 150]") && msg.contains("(210, 160)") && msg.contains("100x100"), "{msg}");
    // A frame the ROI fits is served (a gray frame feeds the RGB model replicated).
    assert_eq!(post(gray_png(320, 240)).await.status, 200);
    // A 4-component JPEG whose Adobe APP14 segment says YCCK: refused, not miscoloured. Made
    // from Pillow's CMYK fixture by setting its transform byte (Adobe's APP14 layout: "Adobe",
    // version u16, flags0 u16, flags1 u16, transform u8) to 2.
    let mut jpeg = std::fs::read(crate::util::root().join("tests/fixtures/images/cmyk_16x16.jpg")).unwrap();
    let at = jpeg.windows(5).position(|w| w == b"Adobe").unwrap() + 11;
    jpeg[at] = 2;
    let msg = post(jpeg).await.error(415, "unsupported_format");
    assert!(msg.contains("YCCK"), "{msg}");
}

/// Small frames are decoded on the HTTP thread that received them, large ones on the decode
/// pool (`server.decode_inline_pixels`); where a frame is decoded must not change its answer.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn small_frames_decode_on_the_http_thread_with_the_same_answer() {
    // A full 320x240 sample (76 800 pixels, above the default 16 384) and the same frame
    // stretched to 96x96 (9 216 pixels, below it).
    let big = samples().remove(0).bytes;
    let frame = image::load_from_memory(&big).unwrap();
    let mut small = Vec::new();
    frame
        .resize_exact(96, 96, image::imageops::FilterType::Triangle)
        .write_to(&mut std::io::Cursor::new(&mut small), image::ImageFormat::Png)
        .unwrap();
    let mut answers = Vec::new();
    for (config, http, pool) in [
        (washer_config(), 1.0, 1.0),
        (washer_config_with(&[("# decode_inline_pixels = 16384", "decode_inline_pixels = 0")]), 0.0, 2.0),
    ] {
        let app = TestApp::start(config).await;
        let mut tops = Vec::new();
        for body in [&small, &big] {
            let r = app.post("/classify/washers?top=all", body.clone()).await;
            assert_eq!(r.status, 200);
            tops.push(r.json()["top"].clone());
        }
        // A multipart burst's parts decode on the pool, however small: in parallel there.
        let mut burst = Vec::new();
        for name in ["a.png", "b.png"] {
            let head = format!("--zz\r\nContent-Disposition: form-data; name=\"f\"; filename=\"{name}\"\r\n\r\n");
            burst.extend_from_slice(head.as_bytes());
            burst.extend_from_slice(&small);
            burst.extend_from_slice(b"\r\n");
        }
        burst.extend_from_slice(b"--zz--\r\n");
        let r = app
            .send_with("POST", "/classify/washers", &[("content-type", "multipart/form-data; boundary=zz")], burst)
            .await;
        assert_eq!(r.status, 200);
        let v = r.json();
        assert_eq!(v["results"].as_array().unwrap().len(), 2, "{v}");
        let m = app.metrics().await;
        assert_eq!(metric(&m, r#"lineside_frames_decoded_total{model="washers",thread="http"}"#), http);
        assert_eq!(metric(&m, r#"lineside_frames_decoded_total{model="washers",thread="pool"}"#), pool + 2.0);
        answers.push(tops);
    }
    // Same pipeline code on either thread: the same scores to the bit.
    assert_eq!(answers[0], answers[1]);
    assert_ne!(answers[0][0], answers[0][1], "the two frames differ, so the comparison means something");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn metrics_parse_and_count_every_request() {
    let app = TestApp::start(washer_config()).await;
    let all = samples();
    for s in &all {
        assert_eq!(app.post("/classify/washers", s.bytes.clone()).await.status, 200);
    }
    for _ in 0..2 {
        assert_eq!(app.post("/classify/washers", b"not an image".to_vec()).await.status, 400);
    }
    let r = app.get("/metrics").await;
    assert!(r.headers["content-type"].to_str().unwrap().starts_with("text/plain; version=0.0.4"));
    let m = parse_metrics(&r.text());
    let n = all.len() as f64;
    assert_eq!(washer_requests(&m, "ok"), n);
    assert_eq!(washer_requests(&m, "bad_image"), 2.0);
    assert_eq!(metric(&m, r#"lineside_http_requests_total{route="/classify/{model}",status="200"}"#), n);
    assert_eq!(metric(&m, r#"lineside_http_requests_total{route="/classify/{model}",status="400"}"#), 2.0);
    // every image that reached a lane is in exactly one pass
    assert_eq!(metric(&m, r#"lineside_pass_size_requests_sum{model="washers"}"#), n);
    // One at a time: each request found the lanes idle and ran alone.
    let passes = metric(&m, r#"lineside_pass_size_requests_count{model="washers"}"#);
    assert_eq!(passes, n);
    assert_eq!(metric(&m, r#"lineside_inference_duration_seconds_count{model="washers"}"#), passes);
    assert_eq!(metric(&m, r#"lineside_preprocess_duration_seconds_count{model="washers"}"#), n);
    assert_eq!(metric(&m, r#"lineside_backlog_depth{model="washers"}"#), 0.0);
    let cores = std::thread::available_parallelism().map(|n| n.get()).unwrap();
    assert_eq!(metric(&m, r#"lineside_lanes{model="washers"}"#), lineside::served::share_lanes(cores, 1, 1) as f64);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn shutdown_answers_requests_in_flight_and_is_not_held_by_a_half_sent_request() {
    // drain_ms far above the header timeout: were the half-sent request to hold the
    // shutdown, it would take a minute instead of about half a second.
    let mut server = TestServer::start(washer_config_with(&[
        ("header_timeout_ms = 5000", "header_timeout_ms = 500"),
        ("drain_ms = 10000", "drain_ms = 60000"),
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
    server.wait_in_flight(1).await;
    let t = Instant::now();
    server.trigger_shutdown();
    server.wait_draining().await;
    in_flight.write_all(&body[body.len() / 2..]).await.unwrap();
    let mut answer = Vec::new();
    tokio::io::AsyncReadExt::read_to_end(&mut in_flight, &mut answer).await.unwrap();
    let answer = String::from_utf8_lossy(&answer);
    assert!(answer.starts_with("HTTP/1.1 200"), "in-flight request answered: {answer}");
    assert!(answer.contains("\"label\""), "{answer}");
    server.join().await.unwrap();
    // header_timeout 0.5 s closes the stalled connection; drain_ms = 60 s was not waited for.
    assert!(t.elapsed() < Duration::from_secs(30), "shutdown took {:?}", t.elapsed());
}

/// Washer config edits for a server with one lane, so that one stalled job holds the rest.
const ONE_LANE: (&str, &str) = ("lanes = \"auto\"", "lanes = 1");

/// Passes run so far (`lineside_pass_size_requests_count`).
async fn passes(c: &reqwest::Client, server: &TestServer) -> f64 {
    let m = parse_metrics(&c.get(server.url("/metrics")).send().await.unwrap().text().await.unwrap());
    metric(&m, r#"lineside_pass_size_requests_count{model="washers"}"#)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_request_past_its_deadline_gets_504_and_never_reaches_the_engine() {
    let fault = FaultPlan::default();
    let server = TestServer::start_with_fault(washer_config_with(&[ONE_LANE]), fault.clone()).await;
    let c = client();
    let s = &samples()[0];
    let before = passes(&c, &server).await;
    // The first request holds the only lane at the engine (it still gets its answer) ...
    fault.hold();
    let first = tokio::spawn(c.post(server.url("/classify/washers")).body(s.bytes.clone()).send());
    fault.wait_entered(1).await;
    // ... so one asking for 150 ms waits in the backlog past its deadline. Its 504 arrives
    // while the lane is still held: the handler answered at the deadline, not the lane.
    let r = c.post(server.url("/classify/washers")).header("X-Deadline-Ms", "150").body(s.bytes.clone()).send();
    let msg = expect_error(r.await.unwrap(), 504, "deadline").await;
    assert!(msg.contains("150"), "{msg}");
    assert_eq!(fault.entered(), 1, "nothing else reached the engine meanwhile");
    fault.release();
    assert_eq!(first.await.unwrap().unwrap().status(), 200);
    // One more request through the only lane, which takes its backlog in order: by its
    // answer, the expired job has been taken and dropped without running.
    let r = c.post(server.url("/classify/washers")).body(s.bytes.clone()).send().await.unwrap();
    assert_eq!(r.status(), 200);
    let m = parse_metrics(&c.get(server.url("/metrics")).send().await.unwrap().text().await.unwrap());
    assert_eq!(metric(&m, r#"lineside_pass_size_requests_count{model="washers"}"#), before + 2.0, "passes");
    assert_eq!(metric(&m, r#"lineside_pass_size_requests_sum{model="washers"}"#), before + 2.0, "jobs run");
    assert_eq!(fault.entered(), 2, "the expired job never reached the engine");
    assert_eq!(washer_requests(&m, "deadline"), 1.0);
    // A deadline header may only shorten: a huge one is accepted and the server's applies.
    let r = c.post(server.url("/classify/washers")).header("X-Deadline-Ms", "86400000").body(s.bytes.clone());
    assert_eq!(r.send().await.unwrap().status(), 200);
    expect_error(
        c.post(server.url("/classify/washers"))
            .header("X-Deadline-Ms", "soon")
            .body(s.bytes.clone())
            .send()
            .await
            .unwrap(),
        400,
        "bad_request",
    )
    .await;
    server.stop().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_panic_in_a_lane_answers_500_inference_failed_and_the_lane_serves_on() {
    let fault = FaultPlan::default();
    fault.panic_countdown.store(2, Ordering::SeqCst);
    let app = TestApp::start_with_fault(washer_config_with(&[ONE_LANE]), &fault).await;
    let s = &samples()[0];
    let mut statuses = Vec::new();
    for _ in 0..5 {
        let r = app.post("/classify/washers", s.bytes.clone()).await;
        statuses.push(r.status);
        if r.status == 500 {
            let msg = r.error(500, "inference_failed");
            assert!(msg.contains("restarted") && !msg.contains("injected"), "generic message: {msg}");
        }
    }
    assert_eq!(statuses, [200, 500, 200, 200, 200]);
    let m = app.metrics().await;
    assert_eq!(metric(&m, r#"lineside_lane_restarts_total{model="washers"}"#), 1.0);
    assert_eq!(metric(&m, r#"lineside_lane_failures_total{model="washers"}"#), 1.0);
    assert_eq!(washer_requests(&m, "inference_failed"), 1.0);
    assert_eq!(app.get("/healthz").await.status, 200);
}

/// Through a real client's multipart encoder (reqwest's) and a socket: the parser must read
/// what clients actually send, not only bodies written by hand.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn multipart_answers_every_part_in_order_good_and_bad() {
    let server = TestServer::start(washer_config()).await;
    let c = client();
    let all = samples();
    let (good, burr) =
        (all.iter().find(|s| s.label == "good").unwrap(), all.iter().find(|s| s.label == "burr").unwrap());
    let part = |bytes: Vec<u8>| reqwest::multipart::Part::bytes(bytes);
    let form = reqwest::multipart::Form::new()
        .part("cam1", part(good.bytes.clone()).file_name("station1.png"))
        .part("cam2", part(b"not an image".to_vec()))
        .part("cam3", part(burr.bytes.clone()).file_name("station3.png"))
        .part("cam4", part(good.bytes[..good.bytes.len() / 2].to_vec()).file_name("cut.png"));
    let r = c.post(server.url("/classify/washers?top=2")).multipart(form).send().await.unwrap();
    assert_eq!(r.status(), 200);
    let v: Value = r.json().await.unwrap();
    assert_eq!(v["model"], "washers");
    let results = v["results"].as_array().unwrap();
    assert_eq!(results.len(), 4, "{v}");
    for (i, (part, label, kind)) in [
        ("station1.png", Some("good"), None),
        ("cam2", None, Some("bad_image")),
        ("station3.png", Some("burr"), None),
        ("cut.png", None, Some("bad_image")),
    ]
    .into_iter()
    .enumerate()
    {
        let e = &results[i];
        assert_eq!((e["index"].as_u64(), e["part"].as_str()), (Some(i as u64), Some(part)), "{e}");
        match (label, kind) {
            (Some(l), _) => {
                assert_eq!(e["label"], l, "{e}");
                assert_eq!(e["top"].as_array().unwrap().len(), 2, "{e}");
                assert_eq!(e["confident"], true, "no min_score configured: {e}");
                assert!(e.get("error").is_none(), "{e}");
            }
            (None, Some(k)) => {
                assert_eq!(e["error"]["kind"], k, "{e}");
                assert!(e.get("label").is_none(), "{e}");
            }
            _ => unreachable!(),
        }
    }
    // A multipart body that is not well-formed is the request's fault: 400.
    let r = c
        .post(server.url("/classify/washers"))
        .header("content-type", "multipart/form-data; boundary=zz")
        .body("--zz\r\nno end")
        .send()
        .await
        .unwrap();
    expect_error(r, 400, "bad_request").await;
    server.stop().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn shutdown_drains_answers_in_flight_and_refuses_new_requests_with_draining() {
    let fault = FaultPlan::default();
    let mut server = TestServer::start_with_fault(washer_config_with(&[ONE_LANE]), fault.clone()).await;
    let c = client();
    let s = samples();
    // Four requests in flight: the first held at the engine, the others in the backlog.
    // (The first alone, so that the lane's pass holds it only.)
    fault.hold();
    let mut in_flight = Vec::new();
    for (i, x) in s.iter().take(4).enumerate() {
        in_flight.push(tokio::spawn(c.post(server.url("/classify/washers")).body(x.bytes.clone()).send()));
        if i == 0 {
            fault.wait_entered(1).await;
        }
    }
    server.wait_backlog("washers", 3).await;
    server.trigger_shutdown();
    server.wait_draining().await;
    // While draining: the listener still answers, new work is refused, readiness is off.
    let msg = expect_error(
        c.post(server.url("/classify/washers")).body(s[0].bytes.clone()).send().await.unwrap(),
        503,
        "draining",
    )
    .await;
    assert!(msg.contains("shutting down"), "{msg}");
    let r = c.get(server.url("/readyz")).send().await.unwrap();
    assert!(r.headers().contains_key("retry-after"));
    expect_error(r, 503, "draining").await;
    assert_eq!(c.get(server.url("/healthz")).send().await.unwrap().status(), 200, "still alive while draining");
    fault.release();
    for (i, h) in in_flight.into_iter().enumerate() {
        assert_eq!(h.await.unwrap().unwrap().status(), 200, "request {i} accepted before the signal is answered");
    }
    server.join().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn after_drain_ms_whatever_still_waits_is_answered_draining() {
    let fault = FaultPlan::default();
    let config = washer_config_with(&[ONE_LANE, ("drain_ms = 10000", "drain_ms = 300")]);
    let mut server = TestServer::start_with_fault(config, fault.clone()).await;
    let c = client();
    let s = samples();
    fault.hold();
    let stalled = tokio::spawn(c.post(server.url("/classify/washers")).body(s[0].bytes.clone()).send());
    fault.wait_entered(1).await;
    let waiting = tokio::spawn(c.post(server.url("/classify/washers")).body(s[1].bytes.clone()).send());
    server.wait_backlog("washers", 1).await;
    server.trigger_shutdown();
    // The queued request is answered when drain_ms passes, while the lane is still held.
    let r = waiting.await.unwrap().unwrap();
    expect_error(r, 503, "draining").await;
    // The pass already running completes and is answered.
    fault.release();
    assert_eq!(stalled.await.unwrap().unwrap().status(), 200);
    server.join().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_client_that_trickles_its_body_gets_408_body_timeout() {
    let server =
        TestServer::start(washer_config_with(&[("drain_ms = 10000", "drain_ms = 10000\nbody_timeout_ms = 300")])).await;
    // Taken before anything is sent: the server's timer cannot start earlier, so the answer
    // comes at least body_timeout_ms after it, however slow this machine is.
    let t = Instant::now();
    let mut slow = tokio::net::TcpStream::connect(server.addr).await.unwrap();
    slow.write_all(b"POST /classify/washers HTTP/1.1\r\nHost: x\r\nContent-Length: 5000\r\n\r\nabc").await.unwrap();
    let mut answer = vec![0u8; 4096];
    let n = tokio::time::timeout(Duration::from_secs(5), tokio::io::AsyncReadExt::read(&mut slow, &mut answer))
        .await
        .expect("answered within 5 s")
        .unwrap();
    let answer = String::from_utf8_lossy(&answer[..n]);
    assert!(answer.starts_with("HTTP/1.1 408"), "{answer}");
    assert!(answer.contains("body_timeout") && answer.contains("body_timeout_ms = 300"), "{answer}");
    assert!(t.elapsed() >= Duration::from_millis(300), "not before the timeout: {:?}", t.elapsed());
    server.stop().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn healthz_fails_while_a_lane_is_stuck_and_readyz_while_the_backlog_is_nearly_full() {
    let fault = FaultPlan::default();
    let config = washer_config_with(&[
        ONE_LANE,
        ("backlog = 64", "backlog = 4"),
        ("drain_ms = 10000", "drain_ms = 10000\nstall_ms = 300\nready_backlog = 0.5"),
    ]);
    let server = TestServer::start_with_fault(config, fault.clone()).await;
    let c = client();
    let s = samples();
    fault.hold();
    let mut reqs = Vec::new();
    for (i, x) in s.iter().take(4).enumerate() {
        reqs.push(tokio::spawn(c.post(server.url("/classify/washers")).body(x.bytes.clone()).send()));
        if i == 0 {
            fault.wait_entered(1).await; // the first alone in the lane's pass
        }
    }
    server.wait_backlog("washers", 3).await;
    // Three wait behind the held one: 3 of 4 >= 0.5.
    let r = c.get(server.url("/readyz")).send().await.unwrap();
    let body: Value = r.json().await.unwrap();
    assert_eq!(body["error"]["kind"], "not_ready", "{body}");
    assert_eq!(body["error"]["details"]["models"][0]["name"], "washers", "{body}");
    assert_eq!(body["error"]["details"]["models"][0]["accepting"], false, "{body}");
    // Past stall_ms the lane counts as stuck (polled: the lane is held until released).
    let mut body = Value::Null;
    for _ in 0..300 {
        body = c.get(server.url("/healthz")).send().await.unwrap().json().await.unwrap();
        if body["error"]["kind"] == "stalled" {
            break;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    assert_eq!(body["error"]["kind"], "stalled", "{body}");
    assert_eq!(body["error"]["details"]["stalled"][0]["model"], "washers", "{body}");
    fault.release();
    for h in reqs {
        assert_eq!(h.await.unwrap().unwrap().status(), 200);
    }
    assert_eq!(c.get(server.url("/healthz")).send().await.unwrap().status(), 200, "alive again");
    assert_eq!(c.get(server.url("/readyz")).send().await.unwrap().status(), 200, "ready again");
    server.stop().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn models_request_ids_and_low_confidence() {
    let app = TestApp::start(washer_config_with(&[("scores = \"auto\"", "scores = \"auto\"\nmin_score = 0.99")])).await;
    let v = app.get("/models").await.json();
    let m = &v["models"][0];
    assert_eq!(m["name"], "washers");
    assert_eq!(m["input"]["served_shape"], serde_json::json!([1, 3, 96, 96]));
    assert_eq!(m["input"]["layout"], "nchw");
    assert_eq!(m["preprocess"]["resize"], "stretch");
    assert_eq!(m["labels"].as_array().unwrap().len(), 5);
    let engine = engine_under_test();
    assert_eq!(m["engine"], engine.name());
    assert_eq!(m["stacked_passes"], m["stacking"]["stacked"]);
    let decided_by = if engine == lineside::model::EngineKind::Tract { "engine" } else { "calibrated" };
    assert_eq!(m["stacking"]["decided_by"], decided_by);
    assert_eq!(m["selftest"]["samples"], 15);
    let cores = std::thread::available_parallelism().map(|n| n.get()).unwrap();
    assert_eq!(m["batching"]["lanes"].as_u64(), Some(lineside::served::share_lanes(cores, 1, 1) as u64));
    let one = app.get("/models/washers").await.json();
    assert_eq!(&one, m);
    app.get("/models/bolts").await.error(404, "unknown_model");
    // Request ids: the client's echoed, otherwise generated and unique.
    let r = app.send_with("GET", "/healthz", &[("X-Request-Id", "station-4/frame-77")], vec![]).await;
    assert_eq!(r.headers["x-request-id"], "station-4/frame-77");
    let a = app.get("/healthz").await.headers["x-request-id"].clone();
    let b = app.get("/healthz").await.headers["x-request-id"].clone();
    assert_ne!(a, b);
    let r = app.send_with("GET", "/healthz", &[("X-Request-Id", "a b")], vec![]).await;
    assert_ne!(r.headers["x-request-id"], "a b", "an id with a space is replaced");
    // min_score = 0.99: every answer says whether it reaches it, and the misses are counted.
    let mut low = 0.0;
    for s in samples() {
        let v = app.post("/classify/washers", s.bytes).await.json();
        let confident = v["score"].as_f64().unwrap() >= 0.99;
        assert_eq!(v["confident"], confident, "{v}");
        low += f64::from(u8::from(!confident));
    }
    let m = parse_metrics(&app.get("/metrics").await.text());
    assert_eq!(metric(&m, r#"lineside_low_confidence_total{model="washers"}"#), low);
    assert!(low > 0.0, "some sample scores below 0.99 (cracked-03 is near 0.5)");
    let predicted: f64 = ["good", "cracked", "burr", "no_hole", "empty"]
        .iter()
        .map(|l| metric(&m, &format!(r#"lineside_predictions_total{{label="{l}",model="washers"}}"#)))
        .sum();
    assert_eq!(predicted, 15.0);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn two_models_are_served_side_by_side_each_with_its_own_backlog() {
    // The washer model twice under two names, the second with one lane, backlog 3 and a
    // letterbox: each has its own contract, backlog and metrics.
    let base = std::fs::read_to_string(root().join("config/lineside.toml")).unwrap();
    let second = base[base.find("[[models]]").unwrap()..]
        .replace("name = \"washers\"", "name = \"washers_side\"")
        .replace("lanes = \"auto\"", "lanes = 1")
        .replace("backlog = 64", "backlog = 3")
        .replace("resize = \"stretch\"", "resize = \"letterbox\"");
    let text = format!("{base}\n{}", crate::util::without_selftest(&second));
    let fault = FaultPlan::default();
    let server = TestServer::start_with_fault(crate::util::config_from_text(&text), fault.clone()).await;
    let c = client();
    // Fill washers_side's backlog behind its one held lane: its next request is refused,
    // while washers still takes frames.
    fault.hold();
    let post = |name: &str| {
        tokio::spawn(c.post(server.url(&format!("/classify/{name}"))).body(samples()[0].bytes.clone()).send())
    };
    let mut held = vec![post("washers_side")];
    fault.wait_entered(1).await;
    held.extend((0..3).map(|_| post("washers_side")));
    server.wait_backlog("washers_side", 3).await;
    let r = c.post(server.url("/classify/washers_side")).body(samples()[0].bytes.clone()).send().await.unwrap();
    expect_error(r, 503, "overloaded").await;
    held.push(post("washers"));
    fault.wait_entered(2).await;
    fault.release();
    for h in held {
        assert_eq!(h.await.unwrap().unwrap().status(), 200);
    }
    let v: Value = c.get(server.url("/models")).send().await.unwrap().json().await.unwrap();
    let names: Vec<&str> = v["models"].as_array().unwrap().iter().map(|m| m["name"].as_str().unwrap()).collect();
    assert_eq!(names, ["washers", "washers_side"]);
    assert_eq!(v["models"][1]["batching"]["backlog"], 3);
    assert_eq!(v["models"][1]["preprocess"]["resize"], "letterbox");
    for s in samples().iter().take(4) {
        for name in ["washers", "washers_side"] {
            let r = c.post(server.url(&format!("/classify/{name}"))).body(s.bytes.clone()).send().await.unwrap();
            assert_eq!(r.status(), 200, "{name}");
            let v: Value = r.json().await.unwrap();
            assert_eq!(v["model"], name);
        }
    }
    let m = parse_metrics(&c.get(server.url("/metrics")).send().await.unwrap().text().await.unwrap());
    for name in ["washers", "washers_side"] {
        let key = format!(r#"lineside_request_duration_seconds_count{{model="{name}",outcome="ok"}}"#);
        let before = if name == "washers" { 1.0 } else { 4.0 };
        assert_eq!(metric(&m, &key), 4.0 + before, "{name}");
    }
    assert_eq!(metric(&m, r#"lineside_lanes{model="washers_side"}"#), 1.0);
    server.stop().await.unwrap();
}

/// Send `head` (a whole request without a body) on a new connection and read the answer to
/// its end (the server closes, or answers with `Connection: close`): status and body.
async fn raw_exchange(addr: std::net::SocketAddr, head: &[u8]) -> (u16, String) {
    use tokio::io::AsyncReadExt as _;
    let mut s = tokio::net::TcpStream::connect(addr).await.unwrap();
    s.write_all(head).await.unwrap();
    let mut out = Vec::new();
    let _ = tokio::time::timeout(Duration::from_secs(30), s.read_to_end(&mut out)).await;
    let text = String::from_utf8_lossy(&out).into_owned();
    let status = text.get(9..12).and_then(|c| c.parse().ok()).unwrap_or(0);
    let body = text.split_once("\r\n\r\n").map(|(_, b)| b.to_owned()).unwrap_or_default();
    (status, body)
}

/// `max_header_bytes`: a head just over it gets 431 `headers_too_large` in the error shape;
/// one far beyond the parser's buffer (a 200 kB header line, accepted before this bound) gets
/// 431 from the parser and a close; a head within it is served. Status per RFC 6585, section 5.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn request_heads_over_max_header_bytes_get_431_and_the_server_carries_on() {
    let config = washer_config_with(&[("[server]\n", "[server]\nmax_header_bytes = 4096\n")]);
    let server = TestServer::start(config).await;
    let head = |filler: usize| {
        format!(
            "GET /healthz HTTP/1.1\r\nHost: localhost\r\nX-Filler: {}\r\nConnection: close\r\n\r\n",
            "a".repeat(filler)
        )
    };
    let (status, body) = raw_exchange(server.addr, head(3000).as_bytes()).await;
    assert_eq!(status, 200, "within the bound: {body}");
    let (status, body) = raw_exchange(server.addr, head(5000).as_bytes()).await;
    assert_eq!(status, 431, "{body}");
    let v: Value = serde_json::from_str(&body).unwrap();
    assert_eq!(v["error"]["kind"], "headers_too_large", "{v}");
    assert!(v["error"]["message"].as_str().unwrap().contains("max_header_bytes allows 4096"), "{v}");
    let (status, _) = raw_exchange(server.addr, head(200_000).as_bytes()).await;
    assert_eq!(status, 431, "a 200 kB header line");
    let r = client().post(server.url("/classify/washers")).body(samples()[0].bytes.clone()).send().await.unwrap();
    assert_eq!(r.status(), 200, "the server carries on");
    server.stop().await.unwrap();
}

/// `max_connections`: with 4 allowed, keep-alive connections are opened one by one until one
/// is refused: it is refused at the fifth at the latest (the readiness poll's connection may
/// still count), with 503 `too_many_connections` and `Retry-After`; counted on /metrics once
/// a place is free again, and a new connection is served once one closes.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn connections_beyond_max_connections_get_503_and_a_freed_place_is_used_again() {
    use tokio::io::AsyncReadExt as _;
    let config = washer_config_with(&[("[server]\n", "[server]\nmax_connections = 4\n")]);
    let server = TestServer::start(config).await;
    let request = b"GET /healthz HTTP/1.1\r\nHost: localhost\r\n\r\n";
    let mut held = Vec::new();
    let mut refused = None;
    for i in 0..10 {
        let mut s = tokio::net::TcpStream::connect(server.addr).await.unwrap();
        s.write_all(request).await.unwrap();
        let mut buf = vec![0u8; 4096];
        let n = tokio::time::timeout(Duration::from_secs(30), s.read(&mut buf)).await.unwrap().unwrap();
        let text = String::from_utf8_lossy(&buf[..n]).into_owned();
        if text.starts_with("HTTP/1.1 200") {
            held.push(s); // kept open: it holds its place
        } else {
            refused = Some((i, text));
            break;
        }
    }
    let (i, text) = refused.expect("a connection beyond max_connections was refused");
    assert!(i <= 4, "refused at connection {i} with max_connections = 4");
    assert!(text.starts_with("HTTP/1.1 503"), "{text}");
    assert!(text.to_ascii_lowercase().contains("retry-after: 1"), "{text}");
    let body = text.split_once("\r\n\r\n").unwrap().1;
    let v: Value = serde_json::from_str(body).unwrap();
    assert_eq!(v["error"]["kind"], "too_many_connections", "{v}");
    // Free one place: a new connection is served (the close is seen by the server a moment
    // later; bounded retries, not a timing assumption).
    drop(held.pop());
    let mut served = false;
    for _ in 0..100 {
        let (status, _) =
            raw_exchange(server.addr, b"GET /metrics HTTP/1.1\r\nHost: localhost\r\nConnection: close\r\n\r\n").await;
        if status == 200 {
            served = true;
            break;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    assert!(served, "a freed place is used again");
    drop(held);
    let mut m = Default::default();
    for _ in 0..100 {
        let (status, body) =
            raw_exchange(server.addr, b"GET /metrics HTTP/1.1\r\nHost: localhost\r\nConnection: close\r\n\r\n").await;
        if status == 200 {
            m = parse_metrics(&body);
            break;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    let (refused, open) =
        (metric(&m, "lineside_connections_refused_total{}"), metric(&m, "lineside_connections_open{}"));
    assert!(refused >= 1.0, "refused connections counted: {refused}");
    assert!(open >= 1.0, "this scrape's own connection is open: {open}");
    server.stop().await.unwrap();
}

/// A PNG of `w` x `h` pixels of `color` type (contents: a gradient, so it is not all one level).
fn png_of(w: u32, h: u32, color: image::ExtendedColorType) -> Vec<u8> {
    use image::ImageEncoder as _;
    let bytes = color.bits_per_pixel() as usize / 8;
    let data: Vec<u8> = (0..w as usize * h as usize * bytes).map(|i| (i * 7 % 251) as u8).collect();
    let mut png = Vec::new();
    image::codecs::png::PngEncoder::new(&mut png).write_image(&data, w, h, color).unwrap();
    png
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn decode_cost_part_size_and_part_count_are_bounded_from_headers() {
    let app = TestApp::start(washer_config_with(&[
        ("max_decode_bytes = 536870912", "max_decode_bytes = 1048576"),
        ("max_parts = 64", "max_parts = 2"),
        ("max_part_bytes = 8388608", "max_part_bytes = 4000"),
    ]))
    .await;
    // 200 x 200 16-bit RGBA: 40 000 pixels x 28 bytes = 1 120 000 > 1 MiB (the estimate:
    // 8 bytes decoded, again when rotated, 12 bytes of float plane; src/preprocess/decode.rs).
    let msg =
        app.post("/classify/washers", png_of(200, 200, image::ExtendedColorType::Rgba16)).await.error(413, "too_large");
    assert!(msg.contains("200x200") && msg.contains("max_decode_bytes = 1048576"), "{msg}");
    // The same size in 8-bit RGB is 9 bytes a pixel (360 000): decoded and answered.
    assert_eq!(app.post("/classify/washers", png_of(200, 200, image::ExtendedColorType::Rgb8)).await.status, 200);

    let small = gray_png(64, 64);
    let large = png_of(64, 64, image::ExtendedColorType::Rgb8);
    assert!(small.len() < 4000 && large.len() > 4000, "{} {}", small.len(), large.len());
    let form = |parts: &[&[u8]]| lineside::bench::abuse::multipart("b0", parts);
    let multipart = [("content-type", "multipart/form-data; boundary=b0")];
    // Two parts, one above max_part_bytes: that part gets its own 413, the other its answer.
    let v = app.send_with("POST", "/classify/washers", &multipart, form(&[&small, &large])).await.json();
    assert!(v["results"][0]["label"].is_string(), "{v}");
    assert_eq!(v["results"][1]["error"]["kind"], "too_large", "{v}");
    assert!(v["results"][1]["error"]["message"].as_str().unwrap().contains("max_part_bytes = 4000"), "{v}");
    // Three parts: more than max_parts = 2 refuses the request.
    let three = form(&[&small, &small, &small]);
    let msg = app.send_with("POST", "/classify/washers", &multipart, three).await.error(400, "bad_request");
    assert!(msg.contains("more than 2 parts") && msg.contains("server.max_parts"), "{msg}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_centre_crop_of_a_long_thin_frame_is_refused_before_it_is_resized() {
    let app = TestApp::start(washer_config_without_selftest(&[
        ("max_pixels = 40000000", "max_pixels = 1000000"),
        ("resize = \"stretch\"", "resize = \"crop\""),
    ]))
    .await;
    // 8 x 20 000 = 160 000 pixels, within max_pixels; the crop's short-side resize would make
    // it 96 x 240 000 = 23 040 000 pixels before cutting the 96 x 96 centre.
    let msg = app.post("/classify/washers", gray_png(8, 20_000)).await.error(413, "too_large");
    assert!(msg.contains("crop") && msg.contains("96x240000"), "{msg}");
    // A camera-shaped frame through the same crop is answered.
    assert_eq!(app.post("/classify/washers", gray_png(320, 240)).await.status, 200);
}

/// A deadline that passes while the body is still arriving answers 504 `deadline` with
/// `Connection: close` (RFC 9112 section 9.6: the unread rest of the body leaves the
/// connection unusable), and the server closes it; so does a body over its limit (413).
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_answer_that_leaves_the_body_unread_closes_the_connection_and_says_so() {
    use tokio::io::AsyncReadExt as _;
    let server =
        TestServer::start(washer_config_with(&[("body_limit_bytes = 16777216", "body_limit_bytes = 1000")])).await;
    for (head, tail, status) in [
        // 100 of 900 promised bytes, then nothing: the 100 ms deadline passes mid-body.
        ("x-deadline-ms: 100\r\ncontent-length: 900\r\n", vec![0u8; 100], "504"),
        // 2000 bytes against body_limit_bytes = 1000.
        ("content-length: 2000\r\n", vec![0u8; 2000], "413"),
    ] {
        let mut s = tokio::net::TcpStream::connect(server.addr).await.unwrap();
        s.write_all(format!("POST /classify/washers HTTP/1.1\r\nhost: x\r\n{head}\r\n").as_bytes()).await.unwrap();
        s.write_all(&tail).await.unwrap();
        let mut out = Vec::new();
        // The server closes the connection after the answer (bounded wait: 30 s).
        let closed = tokio::time::timeout(Duration::from_secs(30), s.read_to_end(&mut out)).await;
        let text = String::from_utf8_lossy(&out).to_ascii_lowercase();
        assert!(closed.is_ok(), "the connection stayed open after: {text}");
        assert_eq!(text.get(9..12), Some(status), "{text}");
        assert!(text.contains("\r\nconnection: close\r\n"), "{text}");
    }
}
