//! The `lineside` binary as a user runs it: exit codes, messages, serving from any folder.

use std::process::Command;

use crate::util::{root, samples, temp_dir};

fn lineside() -> Command {
    Command::new(env!("CARGO_BIN_EXE_lineside"))
}

#[test]
fn check_on_the_builtin_model_from_any_folder_exits_0() {
    let dir = temp_dir("check-builtin");
    let out = lineside().arg("check").current_dir(&dir).output().unwrap();
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert_eq!(out.status.code(), Some(0), "{stdout}\n{}", String::from_utf8_lossy(&out.stderr));
    assert!(stdout.contains("built-in"), "{stdout}");
    assert!(stdout.contains("model \"washers\": ok, would serve"), "{stdout}");
    assert!(stdout.contains("good, cracked, burr, no_hole, empty"), "{stdout}");
    assert!(stdout.contains("[N, 3, 96, 96]"), "{stdout}");
    assert!(stdout.contains("lineside applies softmax"), "{stdout}");
}

#[test]
fn check_exits_1_for_an_unservable_model_and_2_for_a_bad_config() {
    let dir = temp_dir("check-bad");
    let onnx = root().join("models/washers/classifier.onnx");
    std::fs::write(dir.join("four.txt"), "good\ncracked\nburr\nempty\n").unwrap();
    std::fs::write(dir.join("not.onnx"), "this is not a model").unwrap();
    let cfg = |onnx: &str, labels: &str, extra: &str| {
        format!(
            "[[models]]\nname = \"w\"\nonnx = \"{onnx}\"\nlabels = \"{labels}\"\n{extra}[models.preprocess]\nwidth = 96\nheight = 96\n"
        )
    };
    let run = |text: String| {
        std::fs::write(dir.join("c.toml"), text).unwrap();
        let out = lineside().args(["check", "--config"]).arg(dir.join("c.toml")).output().unwrap();
        (out.status.code(), String::from_utf8_lossy(&out.stdout).to_string() + &String::from_utf8_lossy(&out.stderr))
    };

    let (code, text) = run(cfg(onnx.to_str().unwrap(), "four.txt", ""));
    assert_eq!(code, Some(1), "{text}");
    assert!(text.contains("5 class scores but the labels file has 4 labels"), "{text}");

    let (code, text) = run(cfg("not.onnx", "four.txt", ""));
    assert_eq!(code, Some(1), "{text}");
    assert!(text.contains("not.onnx") && text.contains("not a loadable ONNX model"), "{text}");

    let (code, text) = run(cfg("not.onnx", "four.txt", "colour = \"red\"\n"));
    assert_eq!(code, Some(2), "{text}");
    assert!(text.contains("colour") && text.contains("line 5"), "{text}");

    let out = lineside().args(["check", "--bogus"]).output().unwrap();
    assert_eq!(out.status.code(), Some(2), "usage errors exit 2");
}

#[test]
fn serve_from_any_folder_answers_and_exits_0_on_sigterm() {
    let dir = temp_dir("serve");
    let (child, port) = crate::util::serve_child(&dir, &["serve"]);
    let base = format!("http://127.0.0.1:{port}");
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
    rt.block_on(async {
        crate::util::wait_ready_at(&base).await;
        let s = &samples()[0];
        let v: serde_json::Value = reqwest::Client::new()
            .post(format!("{base}/classify/washers"))
            .body(s.bytes.clone())
            .send()
            .await
            .unwrap()
            .json()
            .await
            .unwrap();
        assert_eq!(v["label"], s.label.as_str(), "{v}");
    });
    let (code, log) = crate::util::stop_child(child);
    assert_eq!(code, Some(0), "{log}");
    assert!(log.contains("shutting down"), "{log}");
}

/// One image, many stations: the real binary takes its config file from LINESIDE_CONFIG, a
/// model's key and a `[server]` key from LINESIDE_MODEL_* / LINESIDE_SERVER_*, and a flag
/// beats the environment (the config's listen address, then the environment's, then
/// `--listen`, which the server answers on); a mistyped variable stops it, naming the variable.
#[test]
fn serve_reads_its_config_from_the_environment_under_the_flags() {
    let dir = temp_dir("serve-env");
    std::fs::write(dir.join("station.toml"), crate::util::washer_text_anywhere()).unwrap();
    let config = dir.join("station.toml").display().to_string();
    let env = [
        ("LINESIDE_CONFIG", config.as_str()),
        ("LINESIDE_MODEL_WASHERS_MIN_SCORE", "0.75"),
        ("LINESIDE_SERVER_LISTEN", "127.0.0.1:1"),
    ];
    let (child, port) = crate::util::serve_child_with(&dir, &["serve"], &env);
    let base = format!("http://127.0.0.1:{port}");
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
    rt.block_on(async {
        crate::util::wait_ready_at(&base).await;
        let v: serde_json::Value = reqwest::get(format!("{base}/models/washers")).await.unwrap().json().await.unwrap();
        assert_eq!(v["min_score"], 0.75, "{v}");
        let file = v["file"].as_str().unwrap();
        assert!(file.ends_with("classifier.onnx") && !file.contains("embedded"), "LINESIDE_CONFIG's file: {v}");
    });
    let (code, log) = crate::util::stop_child(child);
    assert_eq!(code, Some(0), "{log}");
    let out = lineside().arg("check").envs(env).env("LINESIDE_MODEL_WASHERS_MINSCORE", "0.5").output().unwrap();
    let text = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{text}");
    assert!(text.contains("LINESIDE_MODEL_WASHERS_MINSCORE") && text.contains("MIN_SCORE"), "{text}");
}
