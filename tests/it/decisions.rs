//! Decisions and retained frames: verdicts for every label and for low scores (single and
//! multipart), part and camera ids, config errors, the retain folder under load and when it
//! cannot be written, and the export of confirmed frames back into an evaluation set.

use std::collections::HashMap;
use std::path::Path;
use std::process::Command;
use std::time::Duration;

use crate::util::{
    TestApp, TestServer, config_from_text, metric, parse_metrics, samples, temp_dir, washer_config, washer_config_with,
};

/// The demo config's decision table (config/lineside.toml), restated as the rule to check.
fn table_verdict(label: &str) -> &'static str {
    match label {
        "good" => "accept",
        "cracked" | "burr" | "no_hole" => "reject",
        "empty" => "no_part",
        other => panic!("unexpected label {other}"),
    }
}

fn multipart(frames: &[(&str, &[u8])]) -> Vec<u8> {
    let mut body = Vec::new();
    for (name, bytes) in frames {
        let head = format!("--zz\r\nContent-Disposition: form-data; name=\"f\"; filename=\"{name}\"\r\n\r\n");
        body.extend_from_slice(head.as_bytes());
        body.extend_from_slice(bytes);
        body.extend_from_slice(b"\r\n");
    }
    body.extend_from_slice(b"--zz--\r\n");
    body
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_label_takes_its_verdict_and_low_scores_go_to_review() {
    // No min_score: the label's list decides, for every class of the demo.
    let app = TestApp::start(washer_config()).await;
    let mut seen = HashMap::new();
    for s in samples() {
        let v = app.post("/classify/washers", s.bytes.clone()).await.json();
        assert_eq!(v["label"], s.label.as_str(), "{v}");
        assert_eq!(v["verdict"], table_verdict(&s.label), "{}: {v}", s.name);
        *seen.entry(table_verdict(&s.label)).or_insert(0) += 1;
    }
    assert_eq!(seen.len(), 3, "accept, reject and no_part all seen: {seen:?}");
    let m = app.metrics().await;
    for (verdict, n) in &seen {
        assert_eq!(
            metric(&m, &format!(r#"lineside_verdicts_total{{model="washers",verdict="{verdict}"}}"#)),
            f64::from(*n)
        );
    }
    assert_eq!(metric(&m, r#"lineside_verdicts_total{model="washers",verdict="review"}"#), 0.0);
    // The table as the server holds it, for operators.
    let info = app.get("/models/washers").await.json();
    for label in ["good", "cracked", "burr", "no_hole", "empty"] {
        assert_eq!(info["decision"][label], table_verdict(label), "{}", info["decision"]);
    }

    // A high min_score: whatever scores below it is held for a person, whatever its label.
    let app =
        TestApp::start(washer_config_with(&[("scores = \"auto\"", "scores = \"auto\"\nmin_score = 0.9999")])).await;
    let (mut reviews, mut singles) = (0, Vec::new());
    for s in samples() {
        let v = app.post("/classify/washers", s.bytes.clone()).await.json();
        let score = v["score"].as_f64().unwrap() as f32;
        let expected = if score >= 0.9999 { table_verdict(&s.label) } else { "review" };
        assert_eq!(v["verdict"], expected, "{}: {v}", s.name);
        assert_eq!(v["confident"], expected != "review", "review and `confident` agree: {v}");
        reviews += usize::from(expected == "review");
        singles.push(v);
    }
    assert!(reviews > 0 && reviews < singles.len(), "some, not all, samples below 0.9999: {reviews}");
    // Multipart: each part's verdict is the single answer's.
    let all = samples();
    let frames: Vec<(&str, &[u8])> = all.iter().map(|s| (s.name.as_str(), s.bytes.as_slice())).collect();
    let r = app
        .send_with(
            "POST",
            "/classify/washers",
            &[
                ("content-type", "multipart/form-data; boundary=zz"),
                ("x-part-id", "W-000123"),
                ("x-camera-id", "cam-2"),
            ],
            multipart(&frames),
        )
        .await;
    let v = r.json();
    assert_eq!((v["part_id"].as_str(), v["camera_id"].as_str()), (Some("W-000123"), Some("cam-2")), "{v}");
    assert_eq!(v["results"].as_array().unwrap().len(), singles.len(), "one result per part");
    for (part, single) in v["results"].as_array().unwrap().iter().zip(&singles) {
        assert_eq!(part["verdict"], single["verdict"], "{part} vs {single}");
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn part_and_camera_ids_are_echoed_and_checked() {
    let app = TestApp::start(washer_config()).await;
    let frame = samples()[0].bytes.clone();
    let ok = app
        .send_with(
            "POST",
            "/classify/washers",
            &[("x-part-id", "LOT7/W-0042#3"), ("x-camera-id", "station2.top")],
            frame.clone(),
        )
        .await
        .json();
    assert_eq!((ok["part_id"].as_str(), ok["camera_id"].as_str()), (Some("LOT7/W-0042#3"), Some("station2.top")));
    let none = app.post("/classify/washers", frame.clone()).await.json();
    assert!(none.get("part_id").is_none() && none.get("camera_id").is_none(), "{none}");
    for (header, value) in
        [("x-part-id", "has space"), ("x-part-id", &"x".repeat(65)), ("x-camera-id", "cam;2"), ("x-part-id", "")]
    {
        let r = app.send_with("POST", "/classify/washers", &[(header, value)], frame.clone()).await;
        let m = r.error(400, "bad_request");
        assert!(m.to_lowercase().contains(header), "{m}");
    }
}

#[test]
fn decision_and_retain_config_errors_name_the_label_or_key() {
    let text = std::fs::read_to_string(crate::util::root().join("config/lineside.toml")).unwrap();
    let parse = |edit: &dyn Fn(&str) -> String| {
        let edited = edit(&text);
        lineside::config::Config::from_toml(
            &edited,
            "edited",
            &|p: &Path| lineside::config::Source::File(crate::util::root().join("config").join(p)),
            &lineside::config::Overrides {
                listen: Some("127.0.0.1:0".into()),
                ..lineside::cli::base_overrides().unwrap()
            },
        )
    };
    // A label in two lists: refused while reading the file.
    let e = parse(&|t| t.replace("accept = [\"good\"]", "accept = [\"good\", \"burr\"]")).unwrap_err();
    let e = format!("{e:#}");
    assert!(e.contains("\"burr\"") && e.contains("`accept`") && e.contains("`reject`"), "{e}");
    // A retain verdict that does not exist; a retain key that is 0.
    for (body, expected) in [
        ("verdicts = [\"discard\"]", "retain.verdicts: \"discard\""),
        ("max_frames = 0", "retain.max_frames = 0"),
        ("sample_other = 1.5", "retain.sample_other = 1.5"),
    ] {
        let e = format!("{:#}", parse(&|t| format!("{t}\n[models.retain]\ndir = \"r\"\n{body}\n")).unwrap_err());
        assert!(e.contains(expected), "{e}");
    }
    // A label missing from every list, and a list naming a label the model does not have:
    // known only once the labels file is read, so refused at load, by every command.
    for (edit, expected) in [
        (
            ("reject = [\"cracked\", \"burr\", \"no_hole\"]", "reject = [\"cracked\", \"burr\"]"),
            "\"no_hole\" is in none of",
        ),
        (("no_part = [\"empty\"]", "no_part = [\"empty\", \"scratched\"]"), "\"scratched\""),
    ] {
        let config = parse(&|t| t.replace(edit.0, edit.1)).unwrap();
        let e = lineside::server::ready_app(&config, None).err().expect("refused at load");
        let e = format!("{e:#}");
        assert!(e.contains(expected) && e.contains("washers"), "{e}");
    }
}

/// The washer config retaining into `dir` with `keys` added to `[models.retain]`.
fn retaining(dir: &Path, keys: &str) -> lineside::config::Config {
    let text = std::fs::read_to_string(crate::util::root().join("config/lineside.toml")).unwrap();
    config_from_text(&format!("{text}\n[models.retain]\ndir = {:?}\n{keys}\n", dir.display().to_string()))
}

/// Poll /metrics until the writer has settled `eligible` frames (bounded).
async fn settled(server: &TestServer, eligible: f64) -> HashMap<String, f64> {
    let c = reqwest::Client::new();
    for _ in 0..600 {
        let m = parse_metrics(&c.get(server.url("/metrics")).send().await.unwrap().text().await.unwrap());
        let done: f64 = ["written", "queue_full", "write_failed", "writer_stopped"]
            .iter()
            .map(|o| metric(&m, &format!(r#"lineside_retained_frames_total{{model="washers",outcome="{o}"}}"#)))
            .sum();
        if done >= eligible {
            return m;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    panic!("the retain writer never settled {eligible} frames");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn under_load_the_newest_frames_are_kept_and_every_frame_is_accounted_for() {
    let dir = temp_dir("retain-load");
    let retained = dir.join("retained");
    std::fs::create_dir_all(&retained).unwrap();
    std::fs::write(retained.join("README.txt"), "the line's own note").unwrap();
    let server = TestServer::start(retaining(&retained, "verdicts = [\"reject\", \"review\"]\nmax_frames = 100")).await;
    let all = std::sync::Arc::new(samples());
    let url = server.url("/classify/washers");
    // 16 clients, 150 frames each: 2400 requests over the demo's samples.
    let clients: Vec<_> = (0..16)
        .map(|c| {
            let (all, url) = (all.clone(), url.clone());
            tokio::spawn(async move {
                let http = reqwest::Client::new();
                let mut out = Vec::new();
                for i in 0..150 {
                    let s = &all[(c * 7 + i) % all.len()];
                    let part = format!("C{c}-{i}");
                    let r = http.post(&url).header("x-part-id", &part).body(s.bytes.clone()).send().await.unwrap();
                    assert_eq!(r.status(), 200, "every request answered");
                    let v: serde_json::Value = r.json().await.unwrap();
                    out.push((part, s.name.clone(), v["verdict"].as_str().unwrap().to_owned()));
                }
                out
            })
        })
        .collect();
    let mut answers = Vec::new();
    for c in clients {
        answers.extend(c.await.unwrap());
    }
    assert_eq!(answers.len(), 2400);
    let eligible = answers.iter().filter(|(_, _, v)| v == "reject" || v == "review").count() as f64;
    assert!(eligible > 100.0, "more eligible frames than max_frames: {eligible}");
    let m = settled(&server, eligible).await;
    let count = |o: &str| metric(&m, &format!(r#"lineside_retained_frames_total{{model="washers",outcome="{o}"}}"#));
    let (written, dropped) = (count("written"), count("queue_full") + count("write_failed") + count("writer_stopped"));
    assert_eq!(written + dropped, eligible, "written + dropped = eligible");
    assert!(written >= 100.0, "at least max_frames written: {written}");
    assert_eq!(metric(&m, r#"lineside_retained_evicted_total{model="washers"}"#), written - 100.0);
    assert_eq!(metric(&m, r#"lineside_retained_stored_frames{model="washers"}"#), 100.0);
    // The folder: 100 frames with valid sidecars whose bytes are the frame sent for that part.
    let by_part: HashMap<&str, &str> = answers.iter().map(|(p, n, _)| (p.as_str(), n.as_str())).collect();
    let bytes_of: HashMap<&str, &[u8]> = all.iter().map(|s| (s.name.as_str(), s.bytes.as_slice())).collect();
    let mut stems = Vec::new();
    for entry in std::fs::read_dir(&retained).unwrap() {
        let path = entry.unwrap().path();
        if path.extension().is_some_and(|e| e == "json") {
            let side: serde_json::Value = serde_json::from_slice(&std::fs::read(&path).unwrap()).unwrap();
            assert_eq!(side["format"], "lineside-retained");
            assert!(matches!(side["verdict"].as_str(), Some("reject" | "review")), "{side}");
            assert_eq!(side["kept_because"], "verdict");
            let frame = std::fs::read(retained.join(side["frame"].as_str().unwrap())).unwrap();
            let sent = by_part[side["part_id"].as_str().unwrap()];
            assert_eq!(frame, bytes_of[sent], "the frame as received, for {sent}");
            assert_eq!(side["bytes"], frame.len());
            stems.push(path.file_stem().unwrap().to_string_lossy().into_owned());
        }
    }
    assert_eq!(stems.len(), 100);
    assert!(retained.join("README.txt").exists(), "a file that is not lineside's is left alone");
    assert!(
        std::fs::read_dir(&retained).unwrap().all(|e| !e
            .unwrap()
            .file_name()
            .to_string_lossy()
            .starts_with(".lineside-tmp"))
    );
    server.stop().await.unwrap();
    // A restart with a smaller bound applies it to what is there (the newest stay).
    let mut stems_sorted = stems.clone();
    stems_sorted.sort();
    let server = TestServer::start(retaining(&retained, "verdicts = [\"reject\"]\nmax_frames = 10")).await;
    // Nothing is sent: the writer applies the new bound to what it finds when it starts.
    let c = reqwest::Client::new();
    let mut m = HashMap::new();
    for _ in 0..600 {
        m = parse_metrics(&c.get(server.url("/metrics")).send().await.unwrap().text().await.unwrap());
        if metric(&m, r#"lineside_retained_evicted_total{model="washers"}"#) == 90.0 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    assert_eq!(metric(&m, r#"lineside_retained_evicted_total{model="washers"}"#), 90.0);
    assert_eq!(metric(&m, r#"lineside_retained_stored_frames{model="washers"}"#), 10.0);
    let mut left: Vec<String> = std::fs::read_dir(&retained)
        .unwrap()
        .filter_map(|e| e.unwrap().file_name().to_str()?.strip_suffix(".json").map(str::to_owned))
        .collect();
    left.sort();
    assert_eq!(left, stems_sorted[90..], "the ten newest stay");
    server.stop().await.unwrap();
}

/// The real binary with a retain folder that cannot be created (its path runs through a
/// file: refused even for root): every request is answered 200, the counter counts the lost
/// frames, and the log says why, once.
#[test]
fn an_unwritable_retain_folder_loses_frames_not_answers() {
    let dir = temp_dir("retain-unwritable");
    std::fs::write(dir.join("a-file"), "not a folder").unwrap();
    let text = crate::util::washer_text_anywhere();
    std::fs::write(
        dir.join("lineside.toml"),
        format!("{text}\n[models.retain]\ndir = \"a-file/retained\"\nverdicts = [\"reject\"]\n"),
    )
    .unwrap();
    let (child, port) = crate::util::serve_child(&dir, &["serve", "--config", "lineside.toml"]);
    let base = format!("http://127.0.0.1:{port}");
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
    let failed = rt.block_on(async {
        let c = reqwest::Client::new();
        crate::util::wait_ready_at(&base).await;
        let burr = samples().into_iter().find(|s| s.label == "burr").unwrap();
        for _ in 0..20 {
            let r = c.post(format!("{base}/classify/washers")).body(burr.bytes.clone()).send().await.unwrap();
            assert_eq!(r.status(), 200);
            assert_eq!(r.json::<serde_json::Value>().await.unwrap()["verdict"], "reject");
        }
        let mut failed = 0.0;
        for _ in 0..600 {
            let m = parse_metrics(&c.get(format!("{base}/metrics")).send().await.unwrap().text().await.unwrap());
            failed = metric(&m, r#"lineside_retained_frames_total{model="washers",outcome="write_failed"}"#);
            if failed >= 20.0 {
                break;
            }
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
        failed
    });
    let (code, log) = crate::util::stop_child(child);
    assert_eq!(code, Some(0), "{log}");
    assert_eq!(failed, 20.0, "every eligible frame counted as not written");
    assert!(log.contains("cannot use the retain folder") && log.contains("a-file/retained"), "{log}");
    let lines = log.lines().filter(|l| l.contains("could not be written")).count();
    assert_eq!(lines, 1, "the write failures are logged once a minute at most, not 20 times:\n{log}");
}

/// Confirmed frames come back out as an evaluation set: `lineside retained export`, then
/// `lineside evaluate` on its output.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn confirmed_frames_export_into_a_set_evaluate_reads() {
    let dir = temp_dir("retain-export");
    let retained = dir.join("retained");
    let server = TestServer::start(retaining(&retained, "verdicts = []\nlabels = [\"burr\", \"good\"]")).await;
    let c = reqwest::Client::new();
    let kept: Vec<_> = samples().into_iter().filter(|s| s.label == "burr" || s.label == "good").collect();
    for s in &kept {
        c.post(server.url("/classify/washers")).body(s.bytes.clone()).send().await.unwrap();
    }
    settled(&server, kept.len() as f64).await;
    server.stop().await.unwrap();
    // A person confirms all but one; one of the good frames is relabelled as cracked.
    let mut sidecars: Vec<_> = std::fs::read_dir(&retained)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|e| e == "json"))
        .collect();
    sidecars.sort();
    let mut relabelled = false;
    for p in &sidecars[1..] {
        let mut v: serde_json::Value = serde_json::from_slice(&std::fs::read(p).unwrap()).unwrap();
        let label = v["label"].as_str().unwrap().to_owned();
        let confirmed = if label == "good" && !relabelled {
            relabelled = true;
            "cracked".to_owned()
        } else {
            label
        };
        v["confirmed"] = confirmed.into();
        std::fs::write(p, serde_json::to_vec_pretty(&v).unwrap()).unwrap();
    }
    let text = crate::util::washer_text_anywhere();
    let config = dir.join("lineside.toml");
    std::fs::write(&config, format!("{text}\n[models.retain]\ndir = \"retained\"\nlabels = [\"burr\"]\n")).unwrap();
    let out = dir.join("set");
    let run = |args: &[&str]| Command::new(env!("CARGO_BIN_EXE_lineside")).args(args).output().unwrap();
    let r =
        run(&["retained", "export", "--config", config.to_str().unwrap(), "--out", out.to_str().unwrap(), "--json"]);
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    let summary: serde_json::Value = serde_json::from_slice(&r.stdout).unwrap();
    assert_eq!(summary["unconfirmed"], 1, "{summary}");
    assert_eq!(summary["corrected"], 1, "{summary}");
    let total: u64 = summary["exported"].as_object().unwrap().values().map(|v| v.as_u64().unwrap()).sum();
    assert_eq!(total as usize, kept.len() - 1);
    assert_eq!(summary["exported"]["cracked"], 1);
    // The exported set is what evaluate reads: one wrong frame (the relabelled one).
    let json = dir.join("eval.json");
    let r = run(&[
        "evaluate",
        "--config",
        config.to_str().unwrap(),
        out.to_str().unwrap(),
        "--json",
        json.to_str().unwrap(),
    ]);
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    let doc: serde_json::Value = serde_json::from_slice(&std::fs::read(&json).unwrap()).unwrap();
    assert_eq!(doc["frames"], total);
    let right = (doc["accuracy"].as_f64().unwrap() * total as f64).round() as u64;
    assert_eq!(right, total - 1, "{}", doc["accuracy"]);
    // The decision table's figures are in the report: the relabelled frame (truly cracked,
    // answered good) is an escape.
    assert_eq!(doc["verdicts"]["escapes"]["k"], 1, "{}", doc["verdicts"]);
}
