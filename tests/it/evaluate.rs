//! `lineside evaluate` against outside references: scikit-learn's metrics and statsmodels'
//! exact test and intervals on the same predictions (tools/evaluate_reference.py), the
//! server's own answers for the same files, and sets with broken frames and unknown classes.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use serde_json::Value;

use crate::util::{TestApp, python, root, temp_dir, washer_config};
use lineside::evaluate::stats;

/// The demo's labelled evaluation set (rendered by tools/washers.py --eval-set).
fn eval_set() -> PathBuf {
    root().join("models/washers/eval")
}

fn evaluate(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_lineside")).arg("evaluate").args(args).current_dir(root()).output().unwrap()
}

fn evaluate_json(set: &Path, extra: &[&str]) -> (Output, Value) {
    let dir = temp_dir("evaluate-json");
    let json = dir.join("eval.json");
    let mut args = vec![set.to_str().unwrap(), "--json", json.to_str().unwrap()];
    args.extend_from_slice(extra);
    let out = evaluate(&args);
    let doc = std::fs::read(&json).map(|b| serde_json::from_slice(&b).unwrap()).unwrap_or(Value::Null);
    (out, doc)
}

/// What tools/evaluate_reference.py's `mode` (scikit-learn / statsmodels) prints for `input`.
fn reference(mode: &str, input: &Path) -> Value {
    let r =
        Command::new(python()).arg(root().join("tools/evaluate_reference.py")).arg(mode).arg(input).output().unwrap();
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    serde_json::from_slice(&r.stdout).unwrap()
}

fn stderr(out: &Output) -> String {
    String::from_utf8_lossy(&out.stderr).into_owned()
}

#[test]
fn figures_match_scikit_learn_and_statsmodels_on_the_demo_set() {
    let (out, doc) = evaluate_json(&eval_set(), &[]);
    assert!(out.status.success(), "{}", stderr(&out));
    assert_eq!(doc["frames"], 200, "the demo set has 40 frames of each of 5 classes");
    assert!(doc["failed"].as_array().unwrap().is_empty());
    // The demo set is meant to show real errors: the figures below would be trivial otherwise.
    assert!(doc["accuracy"].as_f64().unwrap() < 1.0, "the demo set shows no error");
    let json = temp_dir("evaluate-ref").join("eval.json");
    std::fs::write(&json, doc.to_string()).unwrap();
    let diff = reference("figures", &json);
    for (k, v) in diff.as_object().unwrap() {
        // Counts and ratios of counts are exact; the intervals come from our incomplete-beta
        // inversion (to 1e-13); ECE from f32 scores written to JSON and read back as f64.
        let tol = match k.as_str() {
            "accuracy_interval" | "recall_interval" => 1e-9,
            "ece" => 1e-6,
            _ => 1e-12,
        };
        assert!(v.as_f64().unwrap() <= tol, "{k}: lineside differs from the reference by {v}");
    }
    // The terminal text names the figures a person reads first.
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(text.contains("accuracy") && text.contains("95% CI") && text.contains("confusion"), "{text}");
}

#[test]
fn mcnemar_and_clopper_pearson_match_statsmodels() {
    let mcnemar: Vec<(u64, u64)> = vec![(0, 0), (0, 7), (12, 0), (3, 9), (40, 61), (500, 530), (1, 1), (0, 1)];
    let interval: Vec<(u64, u64)> =
        vec![(0, 10), (10, 10), (3, 17), (152, 200), (9990, 10000), (1, 1), (0, 1), (50, 100)];
    let cases = serde_json::json!({
        "mcnemar": mcnemar.iter().map(|&(b, c)| serde_json::json!({"b": b, "c": c})).collect::<Vec<_>>(),
        "interval": interval.iter().map(|&(k, n)| serde_json::json!({"k": k, "n": n})).collect::<Vec<_>>(),
    });
    let path = temp_dir("evaluate-stats").join("cases.json");
    std::fs::write(&path, cases.to_string()).unwrap();
    let theirs = reference("stats", &path);
    for (i, &(b, c)) in mcnemar.iter().enumerate() {
        let want = theirs["mcnemar"][i].as_f64().unwrap();
        let got = stats::mcnemar_exact(b, c);
        assert!(
            (got - want).abs() <= 1e-12 * want.max(1e-300).max(1.0),
            "mcnemar({b}, {c}): {got} vs statsmodels {want}"
        );
    }
    for (i, &(k, n)) in interval.iter().enumerate() {
        let (lo, hi) = stats::clopper_pearson(k, n, 0.05);
        let (wl, wh) = (theirs["interval"][i][0].as_f64().unwrap(), theirs["interval"][i][1].as_f64().unwrap());
        assert!((lo - wl).abs() < 1e-9 && (hi - wh).abs() < 1e-9, "{k}/{n}: ({lo}, {hi}) vs statsmodels ({wl}, {wh})");
    }
}

/// Every scored frame's scores are what `POST /classify?top=all` answers for the same file:
/// the same pipeline, engine and score transform.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn scores_equal_the_servers_answers_for_the_same_files() {
    let (out, doc) = evaluate_json(&eval_set(), &[]);
    assert!(out.status.success(), "{}", stderr(&out));
    let labels: Vec<String> =
        doc["confusion"]["labels"].as_array().unwrap().iter().map(|l| l.as_str().unwrap().to_string()).collect();
    let app = TestApp::start(washer_config()).await;
    let preds = doc["predictions"].as_array().unwrap();
    // Every fifth frame: 40 frames, all classes.
    for p in preds.iter().step_by(5) {
        let file = p["file"].as_str().unwrap();
        let bytes = std::fs::read(eval_set().join(file)).unwrap();
        let answer = app.post("/classify/washers?top=all", bytes).await;
        assert_eq!(answer.status, 200, "{file}");
        let v = answer.json();
        assert_eq!(v["label"], p["label"], "{file}");
        for t in v["top"].as_array().unwrap() {
            let i = labels.iter().position(|l| l == t["label"].as_str().unwrap()).unwrap();
            assert_eq!(t["score"].as_f64(), p["scores"][i].as_f64(), "{file}: {}", t["label"]);
        }
    }
}

/// Write a PNG of `w` x `h` grey pixels.
fn png(path: &Path, w: u32, h: u32) {
    image::GrayImage::from_pixel(w, h, image::Luma([90])).save(path).unwrap();
}

#[test]
fn broken_frames_are_counted_and_bad_sets_get_a_clear_message() {
    let dir = temp_dir("evaluate-broken");
    let set = dir.join("set");
    for class in ["good", "cracked", "burr"] {
        std::fs::create_dir_all(set.join(class)).unwrap();
    }
    let sample = root().join("models/washers/samples/good-01.png");
    std::fs::copy(&sample, set.join("good/good-01.png")).unwrap();
    std::fs::copy(root().join("models/washers/samples/cracked-01.png"), set.join("cracked/cracked-01.png")).unwrap();
    std::fs::write(set.join("good/corrupt.png"), b"\x89PNG\r\n\x1a\nnot really").unwrap();
    std::fs::write(set.join("good/notes.txt"), b"shift 2: lens cleaned").unwrap();
    png(&set.join("cracked/tiny.png"), 1, 1);
    // "burr" exists but is empty; no_hole and empty have no folder: all three are absent.
    let (out, doc) = evaluate_json(&set, &[]);
    assert!(out.status.success(), "exit {:?}: {}", out.status.code(), stderr(&out));
    assert_eq!(doc["frames"], 2, "good-01 and cracked-01");
    let failed: Vec<(String, String)> = doc["failed"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| (f["file"].as_str().unwrap().to_string(), f["kind"].as_str().unwrap().to_string()))
        .collect();
    let want = [("good/corrupt.png", "bad_image"), ("good/notes.txt", "bad_image"), ("cracked/tiny.png", "too_small")];
    assert_eq!(failed, want.map(|(f, k)| (f.to_string(), k.to_string())));
    assert_eq!(doc["absent"], serde_json::json!(["burr", "no_hole", "empty"]));
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(text.contains("3 failed") && text.contains("good/corrupt.png: bad_image"), "{text}");

    // A folder that is not a class: exit 2, naming it and listing the classes.
    std::fs::create_dir_all(set.join("dented")).unwrap();
    let out = evaluate(&[set.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(2));
    let msg = stderr(&out);
    assert!(msg.contains("\"dented\"") && msg.contains("good, cracked, burr, no_hole, empty"), "{msg}");
    std::fs::remove_dir_all(set.join("dented")).unwrap();

    // Nothing scored (only broken frames): exit 1.
    let only_bad = dir.join("only-bad");
    std::fs::create_dir_all(only_bad.join("good")).unwrap();
    std::fs::write(only_bad.join("good/a.png"), b"GIF89a").unwrap();
    let out = evaluate(&[only_bad.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(1), "{}", stderr(&out));

    // The same frames from a CSV, one label not a class: exit 2 naming the line.
    let csv = dir.join("labels.csv");
    std::fs::write(&csv, "file,label\nset/good/good-01.png,good\nset/cracked/cracked-01.png,scratched\n").unwrap();
    let out = evaluate(&[csv.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(2));
    assert!(stderr(&out).contains("line 3") && stderr(&out).contains("\"scratched\""), "{}", stderr(&out));
}

#[test]
fn outputs_a_candidate_comparison_a_report_a_baseline_and_the_wrong_frames() {
    let dir = temp_dir("evaluate-outputs");
    let (report, baseline, wrong) = (dir.join("r.html"), dir.join("b.json"), dir.join("wrong"));
    let onnx = root().join("models/washers/classifier.onnx");
    let (out, doc) = evaluate_json(
        &eval_set(),
        &[
            "--against",
            onnx.to_str().unwrap(),
            "--report",
            report.to_str().unwrap(),
            "--baseline-out",
            baseline.to_str().unwrap(),
            "--misclassified",
            wrong.to_str().unwrap(),
            "--target-error",
            "0.01",
        ],
    );
    assert!(out.status.success(), "{}", stderr(&out));
    // The same model as its own candidate: full agreement, no discordant pair, p = 1.
    let a = &doc["against"];
    assert_eq!((a["agreement"].as_f64(), a["mcnemar_p"].as_f64()), (Some(1.0), Some(1.0)), "{a}");
    assert_eq!(a["accuracy"], doc["accuracy"]);
    assert!(a["disagreements"].as_array().unwrap().is_empty());
    // The wrong frames, copied by true and predicted label.
    let preds = doc["predictions"].as_array().unwrap();
    let wrong_preds: Vec<&Value> = preds.iter().filter(|p| p["truth"] != p["label"]).collect();
    for p in &wrong_preds {
        let name = p["file"].as_str().unwrap().replace('/', "__");
        let copy = wrong.join(p["truth"].as_str().unwrap()).join(p["label"].as_str().unwrap()).join(name);
        assert!(copy.exists(), "{}", copy.display());
    }
    // The baseline: versioned, label shares summing to 1, a histogram of every frame.
    let b: Value = serde_json::from_slice(&std::fs::read(&baseline).unwrap()).unwrap();
    assert_eq!((b["format"].as_str(), b["format_version"].as_u64()), (Some("lineside-baseline"), Some(1)));
    assert_eq!(b["version"], doc["version"], "the model's version");
    let shares: f64 = b["label_shares"].as_array().unwrap().iter().map(|v| v.as_f64().unwrap()).sum();
    assert!((shares - 1.0).abs() < 1e-9);
    assert_eq!(b["top_score_counts"].as_array().unwrap().iter().map(|v| v.as_u64().unwrap()).sum::<u64>(), 200);
    // The report: one file, nothing fetched from elsewhere, a thumbnail per wrong frame.
    let html = std::fs::read_to_string(&report).unwrap();
    assert!(!html.contains("src=\"http") && !html.contains("href=\"http"), "the report must not fetch anything");
    assert_eq!(html.matches("data:image/png;base64,").count(), wrong_preds.len().min(120));
    assert!(html.contains("<svg") && html.contains("Confusion matrix") && html.contains("Reliability"));
    // --target-error gives a suggestion or says why not.
    assert!(doc["suggestion"]["statement"].as_str().unwrap().len() > 20);
}

/// A candidate with its own config: here the same model fed letterboxed frames, so the two
/// differ on some frames; the comparison's counts agree with the frames it lists.
#[test]
fn a_candidate_with_its_own_config_is_compared_frame_by_frame() {
    let dir = temp_dir("evaluate-against-config");
    let model = root().join("models/washers");
    let config = dir.join("letterbox.toml");
    std::fs::write(
        &config,
        format!(
            "[[models]]\nname = \"letterboxed\"\nonnx = {:?}\nlabels = {:?}\n[models.preprocess]\nwidth = 96\nheight = 96\n\
             resize = \"letterbox\"\npad_value = 40\nchannels = \"rgb\"\n",
            model.join("classifier.onnx"),
            model.join("classes.txt")
        ),
    )
    .unwrap();
    let (out, doc) = evaluate_json(&eval_set(), &["--against-config", config.to_str().unwrap()]);
    assert!(out.status.success(), "{}", stderr(&out));
    let a = &doc["against"];
    assert_eq!(a["model"], "letterboxed");
    assert_eq!(a["compared"], 200);
    let (ours, theirs) = (doc["predictions"].as_array().unwrap(), a["disagreements"].as_array().unwrap());
    assert!(!theirs.is_empty(), "letterboxing changes some answers of a model trained on stretched frames");
    let agreement = a["agreement"].as_f64().unwrap();
    assert!((agreement - (1.0 - theirs.len() as f64 / 200.0)).abs() < 1e-12);
    // Discordant counts from the two accuracies: only_model - only_candidate = right_model - right_candidate.
    let right = |acc: &Value| (acc.as_f64().unwrap() * 200.0).round() as i64;
    let (b, c) = (a["only_model_right"].as_i64().unwrap(), a["only_candidate_right"].as_i64().unwrap());
    assert_eq!(b - c, right(&doc["accuracy"]) - right(&a["accuracy"]));
    assert_eq!(ours.len(), 200);
    assert!(String::from_utf8_lossy(&out.stdout).contains("McNemar exact p"));
}
