//! Concurrency: many clients at once, every request answered and accounted for.

use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::{Duration, Instant};

use crate::util::{TestServer, metric, parse_metrics, samples, washer_config, washer_config_with, washer_requests};

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sixteen_clients_for_three_seconds_all_answered_and_counted() {
    let server = TestServer::start(washer_config()).await;
    let bodies: Arc<Vec<Vec<u8>>> = Arc::new(samples().into_iter().map(|s| s.bytes).collect());
    let ok = Arc::new(AtomicU64::new(0));
    let until = Instant::now() + Duration::from_secs(3);
    let mut tasks = Vec::new();
    for client_no in 0..16usize {
        let (bodies, ok, url) = (bodies.clone(), ok.clone(), server.url("/classify/washers"));
        tasks.push(tokio::spawn(async move {
            let c = reqwest::Client::builder().timeout(Duration::from_secs(30)).build().unwrap();
            let mut i = client_no;
            // bounded: at most 2000 requests per client
            while Instant::now() < until && i < client_no + 2000 {
                let r = c.post(&url).body(bodies[i % bodies.len()].clone()).send().await.unwrap();
                assert_eq!(r.status(), 200, "{}", r.text().await.unwrap_or_default());
                ok.fetch_add(1, Ordering::Relaxed);
                i += 1;
            }
        }));
    }
    for t in tasks {
        t.await.unwrap();
    }
    let n = ok.load(Ordering::Relaxed) as f64;
    assert!(n >= 16.0, "each client got at least one answer: {n}");
    let text = reqwest::get(server.url("/metrics")).await.unwrap().text().await.unwrap();
    let m = parse_metrics(&text);
    assert_eq!(washer_requests(&m, "ok"), n);
    assert_eq!(metric(&m, r#"lineside_http_requests_total{route="/classify/{model}",status="200"}"#), n);
    assert_eq!(metric(&m, r#"lineside_pass_size_requests_sum{model="washers"}"#), n);
    for outcome in ["overloaded", "internal", "bad_image"] {
        let key = format!(r#"lineside_request_duration_seconds_count{{model="washers",outcome="{outcome}"}}"#);
        assert_eq!(metric(&m, &key), 0.0, "{outcome}");
    }
    eprintln!("16 clients, 3 s: {n} requests answered 200");
    server.stop().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_burst_beyond_the_queues_gets_503_overloaded_at_once_and_the_rest_are_answered() {
    // One decode thread with one queue slot, one lane with a backlog of one: a burst of 64
    // simultaneous requests cannot all wait, and those that cannot are refused, not lost.
    let server = TestServer::start(washer_config_with(&[
        ("# decode_threads = 2", "decode_threads = 1"),
        ("# decode_backlog = 256", "decode_backlog = 1"),
        ("backlog = 64 ", "backlog = 1 "),
        ("lanes = \"auto\"", "lanes = 1"),
    ]))
    .await;
    // A 1600x1200 JPEG takes ~10 ms to decode, so the burst's requests overlap even on a
    // slow machine that opens its 64 connections one after another.
    let big = image::imageops::resize(
        &image::load_from_memory(&samples()[0].bytes).unwrap().into_rgb8(),
        1600,
        1200,
        image::imageops::FilterType::Triangle,
    );
    let mut body = Vec::new();
    big.write_to(&mut std::io::Cursor::new(&mut body), image::ImageFormat::Jpeg).unwrap();
    let c = reqwest::Client::builder().timeout(Duration::from_secs(30)).build().unwrap();
    let burst: Vec<_> = (0..64)
        .map(|_| {
            let (c, url, body) = (c.clone(), server.url("/classify/washers"), body.clone());
            tokio::spawn(async move {
                let r = c.post(url).body(body).send().await.unwrap();
                let status = r.status().as_u16();
                let retry = r.headers().get("retry-after").map(|v| v.to_str().unwrap().to_string());
                let v: serde_json::Value = r.json().await.unwrap();
                (status, retry, v)
            })
        })
        .collect();
    let (mut ok, mut refused) = (0.0, 0.0);
    for t in burst {
        let (status, retry, v) = t.await.unwrap();
        match status {
            200 => ok += 1.0,
            503 => {
                assert_eq!(v["error"]["kind"], "overloaded", "{v}");
                assert!(retry.is_some(), "503 overloaded carries Retry-After");
                refused += 1.0;
            }
            other => panic!("unexpected status {other}: {v}"),
        }
    }
    assert!(refused >= 1.0, "a 64-request burst into queues of one refuses some ({ok} ok)");
    assert!(ok >= 1.0);
    let m = parse_metrics(&reqwest::get(server.url("/metrics")).await.unwrap().text().await.unwrap());
    assert_eq!(washer_requests(&m, "ok"), ok);
    assert_eq!(washer_requests(&m, "overloaded"), refused);
    server.stop().await.unwrap();
}
