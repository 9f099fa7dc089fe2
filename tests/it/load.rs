//! Concurrency: many clients at once, every request answered and accounted for.

use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::{Duration, Instant};

use crate::util::{TestServer, metric, parse_metrics, samples, washer_config};

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
            let c = reqwest::Client::builder()
                .timeout(Duration::from_secs(30))
                .build()
                .unwrap();
            let mut i = client_no;
            // bounded: at most 2000 requests per client
            while Instant::now() < until && i < client_no + 2000 {
                let r = c
                    .post(&url)
                    .body(bodies[i % bodies.len()].clone())
                    .send()
                    .await
                    .unwrap();
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
    let text = reqwest::get(server.url("/metrics"))
        .await
        .unwrap()
        .text()
        .await
        .unwrap();
    let m = parse_metrics(&text);
    assert_eq!(
        metric(
            &m,
            r#"lineside_request_duration_seconds_count{model="washers",outcome="ok"}"#
        ),
        n
    );
    assert_eq!(
        metric(
            &m,
            r#"lineside_http_requests_total{route="/classify/{model}",status="200"}"#
        ),
        n
    );
    assert_eq!(
        metric(&m, r#"lineside_pass_size_requests_sum{model="washers"}"#),
        n
    );
    for outcome in ["overloaded", "internal", "bad_image"] {
        let key = format!(
            r#"lineside_request_duration_seconds_count{{model="washers",outcome="{outcome}"}}"#
        );
        assert_eq!(metric(&m, &key), 0.0, "{outcome}");
    }
    eprintln!("16 clients, 3 s: {n} requests answered 200");
    server.stop().await.unwrap();
}
