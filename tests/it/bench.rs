//! `lineside bench` as a user runs it: a short run's JSON report and charts, its percentiles
//! against numpy's, and the open loop against a server that stalls.

use std::path::Path;
use std::process::Command;
use std::sync::atomic::Ordering;

use serde_json::Value;

use crate::util::{TestServer, python, root, temp_dir, washer_config_with};

fn bench(args: &[&str]) -> Value {
    let dir = temp_dir("bench-json");
    let json = dir.join("run.json");
    let out = Command::new(env!("CARGO_BIN_EXE_lineside"))
        .current_dir(root())
        .arg("bench")
        .args(args)
        .arg("--json")
        .arg(&json)
        .output()
        .expect("run lineside bench");
    assert!(out.status.success(), "lineside bench failed: {}", String::from_utf8_lossy(&out.stderr));
    serde_json::from_slice(&std::fs::read(&json).unwrap()).unwrap()
}

/// Latencies per step from a `--samples` CSV.
fn samples(path: &Path) -> std::collections::BTreeMap<String, Vec<u64>> {
    let text = std::fs::read_to_string(path).unwrap();
    let mut lines = text.lines();
    assert_eq!(lines.next(), Some("step,latency_us"));
    let mut out: std::collections::BTreeMap<String, Vec<u64>> = Default::default();
    for l in lines {
        let (step, v) = l.split_once(',').unwrap();
        out.entry(step.into()).or_default().push(v.parse().unwrap());
    }
    out
}

#[test]
fn a_short_bench_on_the_demo_model_reports_consistent_figures_and_valid_charts() {
    let dir = temp_dir("bench-short");
    let (html, csv) = (dir.join("report.html"), dir.join("samples.csv"));
    let run = bench(&[
        "--config",
        "config/lineside.toml",
        "--concurrency",
        "1,4",
        "--duration",
        "1s",
        "--warmup",
        "300ms",
        "--budget-ms",
        "1000",
        "--report",
        html.to_str().unwrap(),
        "--samples",
        csv.to_str().unwrap(),
    ]);
    assert_eq!(run["lineside_version"], env!("CARGO_PKG_VERSION"));
    assert!(run["machine"]["cores"].as_u64().unwrap() >= 1);
    assert_eq!(run["model"], "washers");
    assert!(run["model_info"]["version"].is_string(), "{}", run["model_info"]);
    let steps = run["steps"].as_array().unwrap();
    assert_eq!(steps.len(), 2);
    let recorded = samples(&csv);
    for s in steps {
        let name = format!("c={}", s["concurrency"]);
        let ok = s["ok"].as_u64().unwrap();
        let errors: u64 = s["errors"].as_object().unwrap().values().map(|v| v.as_u64().unwrap()).sum();
        assert_eq!(errors, 0, "{name}: {}", s["errors"]);
        assert_eq!(s["requests"].as_u64().unwrap(), ok + errors, "{name}: requests = ok + errors");
        assert!(ok > 0, "{name}: nothing answered");
        let l = &s["latency"];
        assert_eq!(l["count"].as_u64().unwrap(), ok, "{name}: one latency per answer");
        assert_eq!(recorded[&name].len() as u64, ok, "{name}: --samples holds every latency");
        let p: Vec<f64> =
            ["p50_ms", "p90_ms", "p99_ms", "p999_ms", "max_ms"].iter().map(|k| l[k].as_f64().unwrap()).collect();
        assert!(p.windows(2).all(|w| w[0] <= w[1]), "{name}: percentiles out of order: {p:?}");
        let fps = s["throughput"].as_f64().unwrap();
        let expect = ok as f64 / s["duration_s"].as_f64().unwrap();
        assert!((fps - expect).abs() <= 1e-6 * expect, "{name}: throughput {fps} vs ok / duration {expect}");
    }
    assert!(run["engine"]["throughput"].as_f64().unwrap() > 0.0);
    // The engine the bench measured is the one the server used (both from the config and
    // LINESIDE_ENGINE), and both are named.
    let engine = crate::util::engine_under_test().name();
    assert_eq!(run["engine"]["engine"], engine);
    assert_eq!(run["model_info"]["engine"], engine);
    assert!(run["serving_ratio"].as_f64().unwrap() > 0.0);
    let verdict = run["verdict"]["text"].as_str().unwrap();
    assert!(verdict.contains("this machine") && verdict.contains("safety systems"), "{verdict}");
    assert_eq!(run["line"]["budget_ms"], 1000.0);
    // Without a line rate there is no keep-up verdict, only the most frames within budget.
    assert!(run["verdict"]["keeps_up"].is_null(), "{}", run["verdict"]);

    // The page and its charts parse as HTML and as XML (SVG) with Python's standard library.
    let check = r#"
import sys, re, html.parser, xml.etree.ElementTree as ET
page = open(sys.argv[1], encoding="utf-8").read()
html.parser.HTMLParser().feed(page)
svgs = re.findall(r"<svg.*?</svg>", page, re.S)
assert len(svgs) == 1, len(svgs)
root = ET.fromstring(svgs[0])
assert root.tag == "{http://www.w3.org/2000/svg}svg", root.tag
texts = [t.text or "" for t in root.iter("{http://www.w3.org/2000/svg}text")]
assert any("share of frames slower" in t for t in texts), texts[:5]
assert any("budget 1000 ms" in t for t in texts), texts[:12]
assert "Does this box keep up with the line?" in page
assert "<script" not in page and "http://" not in page.replace("http://www.w3.org/2000/svg", "")
print("ok")
"#;
    let out = Command::new(python()).arg("-c").arg(check).arg(&html).output().unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
}

/// Issue 14: with the line's rate the bench posts frames at that rate and its multiples, counts
/// every frame later than the budget, and its verdict follows its own figures. Nothing here
/// depends on the machine's speed: the assertions compare the report with itself and with
/// the exported samples.
#[test]
fn at_the_line_rate_the_verdict_follows_the_late_frames() {
    let dir = temp_dir("bench-line");
    let csv = dir.join("samples.csv");
    let common = ["--config", "config/lineside.toml", "--duration", "1s", "--warmup", "200ms", "--line-fps", "20"];
    let run = bench(&[&common[..], &["--budget-ms", "1000", "--samples", csv.to_str().unwrap()]].concat());
    let steps = run["steps"].as_array().unwrap();
    let multiples: Vec<f64> = steps.iter().map(|s| s["multiple"].as_f64().unwrap()).collect();
    assert_eq!(multiples, [1.0, 1.5, 2.0, 3.0, 4.0][..multiples.len()], "the line's rate first, then multiples");
    let recorded = samples(&csv);
    for s in steps {
        let name = format!("{}x ({}/s)", s["multiple"].as_f64().unwrap(), s["rate"].as_f64().unwrap());
        let late = recorded[&name].iter().filter(|&&v| v > 1_000_000).count() as u64;
        assert_eq!(s["late"].as_u64(), Some(late), "{name}: late frames as the samples show");
        assert_eq!(s["rate"].as_f64().unwrap(), 20.0 * s["multiple"].as_f64().unwrap());
    }
    let first = &steps[0];
    let holds = first["errors"].as_object().unwrap().is_empty()
        && first["latency"]["p999_ms"].as_f64().unwrap() <= 1000.0
        && first["latency"]["max_ms"].as_f64().unwrap() <= 1000.0;
    let v = &run["verdict"];
    assert_eq!(v["keeps_up"].as_bool(), Some(holds), "{v}");
    assert_eq!(v["at_line_rate"]["frames"], first["requests"], "{v}");
    let margin = 1000.0 - first["latency"]["max_ms"].as_f64().unwrap();
    assert!((v["latency_margin_ms"].as_f64().unwrap() - margin).abs() < 1e-9, "{v}");

    // No HTTP answer comes back within a microsecond: every frame is late, the bench says so
    // and stops after the line's own rate.
    let run = bench(&[&common[..], &["--budget-ms", "0.001"]].concat());
    assert_eq!(run["steps"].as_array().unwrap().len(), 1, "stops at the first rate that breaks the budget");
    assert_eq!(run["verdict"]["keeps_up"], false);
    assert_eq!(run["steps"][0]["late"], run["steps"][0]["ok"]);
    let text = run["verdict"]["text"].as_str().unwrap();
    assert!(text.starts_with("Does not keep up") && text.contains("uninspected"), "{text}");
}

#[test]
fn bench_percentiles_agree_with_numpy_inverted_cdf_on_the_same_samples() {
    let dir = temp_dir("bench-numpy");
    let csv = dir.join("samples.csv");
    let run = bench(&[
        "--config",
        "config/lineside.toml",
        "--concurrency",
        "2",
        "--duration",
        "1s",
        "--warmup",
        "200ms",
        "--samples",
        csv.to_str().unwrap(),
    ]);
    // Reference: numpy.percentile(..., method="inverted_cdf") (numpy from PyPI, pinned in
    // tools/requirements.txt) over the exported samples. lineside's histogram keeps 3
    // significant digits (the hdrhistogram crate's documented precision for that setting), so
    // each percentile may sit up to one bucket (1/1024 of the value) above the sample, plus
    // the 1 us unit.
    let script = r#"
import sys, json, numpy as np
v = np.loadtxt(sys.argv[1], delimiter=",", skiprows=1, usecols=1, ndmin=1)
print(json.dumps([float(x) for x in np.percentile(v, [50, 90, 99, 99.9], method="inverted_cdf")] + [float(v.max())]))
"#;
    let out = Command::new(python()).arg("-c").arg(script).arg(&csv).output().unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let theirs: Vec<f64> = serde_json::from_slice(&out.stdout).unwrap();
    let l = &run["steps"][0]["latency"];
    for (k, want_us) in ["p50_ms", "p90_ms", "p99_ms", "p999_ms", "max_ms"].iter().zip(theirs) {
        let got_us = l[k].as_f64().unwrap() * 1e3;
        let tol = want_us / 1024.0 + 1.0;
        assert!(
            got_us >= want_us - 1.0 && got_us <= want_us + tol,
            "{k}: lineside {got_us} us vs numpy {want_us} us (allowed +{tol})"
        );
    }
}

/// A server with one lane that stalls 300 ms once, after 30 passes of the step (counted, not
/// timed). Closed loop with one client: the client waits through the stall and sends nothing
/// meanwhile, so only the one request in flight is slow and the percentiles barely move. Open
/// loop at 100/s: frames keep falling due during the stall and their latency counts from when
/// they were due, so about 30 frames show it.
///
/// Only lower bounds that no machine's speed can undercut are relied on: the stalled request
/// takes at least the 300 ms the lane sleeps, and every frame due in the stall's first 200 ms
/// (20 at 100/s) is answered after it ends, at least 100 ms after it was due (the one lane is
/// asleep). The closed loop's "only one" needs no other request to take 300 ms.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_open_loop_shows_a_stall_that_the_closed_loop_hides() {
    let mut slow = Vec::new();
    for (mode, slow_us) in [(["--concurrency", "1"], 300_000), (["--rate", "100/s"], 100_000)] {
        let fault = crate::fault::FaultPlan::default();
        let config = washer_config_with(&[("lanes = \"auto\"", "lanes = 1")]);
        let server = TestServer::start_with_fault(config, fault.clone()).await;
        let dir = temp_dir("bench-stall");
        let csv = dir.join("samples.csv");
        let url = server.url("");
        let args: Vec<String> = [
            "--config",
            "config/lineside.toml",
            "--url",
            &url,
            mode[0],
            mode[1],
            "--duration",
            "2s",
            "--warmup",
            "0s",
            "--samples",
            csv.to_str().unwrap(),
        ]
        .iter()
        .map(|s| s.to_string())
        .collect();
        let before = fault.entered();
        let run = tokio::task::spawn_blocking(move || {
            let a: Vec<&str> = args.iter().map(String::as_str).collect();
            bench(&a)
        });
        fault.wait_entered(before + 30).await;
        fault.stall_once_ms.store(300, Ordering::SeqCst);
        let run = run.await.unwrap();
        server.stop().await.unwrap();
        let lat: Vec<u64> = samples(&csv).into_values().next().unwrap();
        assert!(lat.len() >= 20, "{mode:?}: only {} answers", lat.len());
        let over = lat.iter().filter(|&&v| v >= slow_us).count();
        slow.push((over, run["steps"][0]["latency"]["p99_ms"].as_f64().unwrap(), lat.len()));
    }
    let ((closed_slow, _, _), (open_slow, open_p99, open_n)) = (slow[0], slow[1]);
    assert_eq!(closed_slow, 1, "closed loop: {closed_slow} answers took 300 ms or more; only the one in flight should");
    assert!(
        open_slow >= 20,
        "open loop: {open_slow} of {open_n} answers took 100 ms or more; the 20 due in the stall's first 200 ms should"
    );
    assert!(open_p99 >= 100.0, "open loop p99 {open_p99} ms hides the 300 ms stall");
}
