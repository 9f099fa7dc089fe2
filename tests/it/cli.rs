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
