//! Concurrency: many clients at once, every request answered and accounted for.

use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::Duration;

use crate::fault::FaultPlan;
use crate::util::{TestServer, metric, parse_metrics, samples, washer_config, washer_config_with, washer_requests};

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sixteen_clients_twenty_requests_each_all_answered_and_counted() {
    let server = TestServer::start(washer_config()).await;
    let bodies: Arc<Vec<Vec<u8>>> = Arc::new(samples().into_iter().map(|s| s.bytes).collect());
    let ok = Arc::new(AtomicU64::new(0));
    let mut tasks = Vec::new();
    for client_no in 0..16usize {
        let (bodies, ok, url) = (bodies.clone(), ok.clone(), server.url("/classify/washers"));
        tasks.push(tokio::spawn(async move {
            let c = reqwest::Client::builder().timeout(Duration::from_secs(30)).build().unwrap();
            // A fixed count, not a time: the outcome must not depend on this machine's speed.
            for i in client_no..client_no + 20 {
                let r = c.post(&url).body(bodies[i % bodies.len()].clone()).send().await.unwrap();
                assert_eq!(r.status(), 200, "{}", r.text().await.unwrap_or_default());
                ok.fetch_add(1, Ordering::Relaxed);
            }
        }));
    }
    for t in tasks {
        t.await.unwrap();
    }
    let n = ok.load(Ordering::Relaxed) as f64;
    assert_eq!(n, 320.0, "every request answered 200");
    let text = reqwest::get(server.url("/metrics")).await.unwrap().text().await.unwrap();
    let m = parse_metrics(&text);
    assert_eq!(washer_requests(&m, "ok"), n);
    assert_eq!(metric(&m, r#"lineside_http_requests_total{route="/classify/{model}",status="200"}"#), n);
    assert_eq!(metric(&m, r#"lineside_pass_size_requests_sum{model="washers"}"#), n);
    for outcome in ["overloaded", "internal", "bad_image"] {
        let key = format!(r#"lineside_request_duration_seconds_count{{model="washers",outcome="{outcome}"}}"#);
        assert_eq!(metric(&m, &key), 0.0, "{outcome}");
    }
    eprintln!("16 clients x 20 requests: {n} answered 200");
    server.stop().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_burst_beyond_the_queues_gets_503_overloaded_at_once_and_the_rest_are_answered() {
    // One lane, held at the engine, with a backlog of one: once a request runs and one waits,
    // every further request is refused at once (while the lane is still held), not lost; the
    // two accepted are answered when the lane goes on.
    let fault = FaultPlan::default();
    let config = washer_config_with(&[("backlog = 64 ", "backlog = 1 "), ("lanes = \"auto\"", "lanes = 1")]);
    let server = TestServer::start_with_fault(config, fault.clone()).await;
    let c = reqwest::Client::builder().timeout(Duration::from_secs(30)).build().unwrap();
    let body = samples()[0].bytes.clone();
    let post = || {
        let (c, url, body) = (c.clone(), server.url("/classify/washers"), body.clone());
        tokio::spawn(async move { c.post(url).body(body).send().await.unwrap() })
    };
    fault.hold();
    let running = post();
    fault.wait_entered(1).await;
    let waiting = post();
    server.wait_backlog("washers", 1).await;
    let burst: Vec<_> = (0..10).map(|_| post()).collect();
    for t in burst {
        let r = t.await.unwrap();
        let retry = r.headers().get("retry-after").map(|v| v.to_str().unwrap().to_string());
        let v: serde_json::Value = r.json().await.unwrap();
        assert_eq!(v["error"]["kind"], "overloaded", "{v}");
        assert!(retry.is_some(), "503 overloaded carries Retry-After");
    }
    fault.release();
    for t in [running, waiting] {
        assert_eq!(t.await.unwrap().status(), 200);
    }
    let m = parse_metrics(&reqwest::get(server.url("/metrics")).await.unwrap().text().await.unwrap());
    assert_eq!(washer_requests(&m, "ok"), 2.0);
    assert_eq!(washer_requests(&m, "overloaded"), 10.0);
    server.stop().await.unwrap();
}
