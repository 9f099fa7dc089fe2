//! The deployment files against what lineside serves: the Kubernetes manifests validated in
//! strict mode by kubernetes-validate (PyPI, the Kubernetes project's published OpenAPI
//! schemas, pinned to one version), their probes, port, grace period, resources, autoscaling
//! metric and selectors checked against a server started from the ConfigMap's own config; the
//! systemd unit checked by `systemd-analyze verify` where the machine has it.

use std::path::Path;
use std::process::Command;

use serde_json::Value;

use crate::util::{TestServer, python, root, temp_dir};

/// The Kubernetes version the manifests are validated against (the newest the pinned
/// kubernetes-validate release carries schemas for).
const KUBERNETES: &str = "1.37";

fn manifests() -> Value {
    let out = Command::new(python()).arg(root().join("tools/check_deploy.py")).output().unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    serde_json::from_slice(&out.stdout).unwrap()
}

fn object<'a>(all: &'a Value, kind: &str) -> &'a Value {
    let objects = all["objects"].as_array().unwrap();
    let mut of_kind = objects.iter().filter(|o| o["kind"] == kind);
    let found = of_kind.next().unwrap_or_else(|| panic!("no {kind} in deploy/kubernetes"));
    assert!(of_kind.next().is_none(), "one {kind} expected");
    found
}

#[test]
fn the_kubernetes_manifests_are_valid_in_strict_mode() {
    let out = Command::new(python())
        .arg(root().join("tools/check_deploy.py"))
        .args(["--validate", KUBERNETES])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "kubernetes-validate (strict, {KUBERNETES}): {}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
}

/// The ConfigMap's config with its volume paths pointed at the repository's bundle and a
/// temporary retain folder, listening on a free loopback port.
fn configmap_config(all: &Value, retained: &Path) -> (String, lineside::config::Config) {
    let text = object(all, "ConfigMap")["data"]["lineside.toml"].as_str().unwrap().to_owned();
    let local = text
        .replace("/srv/lineside/models/", &format!("{}/", root().join("models").display()))
        .replace("/var/lib/lineside/retained", &retained.display().to_string());
    let overrides =
        lineside::config::Overrides { listen: Some("127.0.0.1:0".into()), ..lineside::cli::base_overrides().unwrap() };
    let config = lineside::config::Config::from_toml(
        &local,
        "configmap.yaml",
        &|p| lineside::source::Source::File(p.to_path_buf()),
        &overrides,
    )
    .unwrap();
    (text, config)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_manifests_match_what_lineside_serves_and_its_config() {
    let all = manifests();
    let dir = temp_dir("deploy");
    let (text, config) = configmap_config(&all, &dir.join("retained"));
    let file_config = lineside::config::Config::from_toml(
        &text,
        "configmap.yaml",
        &|p| lineside::source::Source::File(p.to_path_buf()),
        &lineside::config::Overrides::default(),
    )
    .unwrap();
    let deployment = object(&all, "Deployment");
    let pod = &deployment["spec"]["template"];
    let container = &pod["spec"]["containers"][0];
    // The port: the config's listen port is the container's, the Service's target.
    let port = container["ports"][0]["containerPort"].as_u64().unwrap();
    assert_eq!(u64::from(file_config.server.listen.port()), port, "listen in the ConfigMap vs containerPort");
    assert!(file_config.server.listen.ip().is_unspecified(), "a pod must listen beyond loopback");
    let service = object(&all, "Service");
    let target = &service["spec"]["ports"][0]["targetPort"];
    assert!(target == &container["ports"][0]["name"] || target.as_u64() == Some(port), "{service}");
    // The config file is the one the ConfigMap mounts.
    let args: Vec<&str> = container["args"].as_array().unwrap().iter().map(|a| a.as_str().unwrap()).collect();
    let config_arg = args[args.iter().position(|a| *a == "--config").unwrap() + 1];
    let mount = container["volumeMounts"].as_array().unwrap().iter().find(|m| m["name"] == "config").unwrap();
    assert_eq!(Path::new(config_arg).parent().unwrap(), Path::new(mount["mountPath"].as_str().unwrap()));
    // Grace: the preStop sleep, then drain_ms, then a margin, all within the grace period.
    let grace = pod["spec"]["terminationGracePeriodSeconds"].as_u64().unwrap();
    let sleep = container["lifecycle"]["preStop"]["sleep"]["seconds"].as_u64().unwrap();
    let drain = file_config.server.drain.as_secs_f64();
    assert!(grace as f64 >= sleep as f64 + drain + 1.0, "grace {grace} s < preStop {sleep} s + drain {drain} s + 1 s");
    // Whole CPUs equal to the lanes; requests = limits (Guaranteed QoS).
    let res = &container["resources"];
    assert_eq!(res["requests"], res["limits"], "requests = limits for the Guaranteed class");
    let lanes: usize = file_config
        .models
        .iter()
        .map(|m| match m.batching.lanes {
            lineside::batch::Lanes::Fixed(n) => n,
            lineside::batch::Lanes::Auto => panic!("give lanes a number in a pod: auto counts the node's cores"),
        })
        .sum();
    assert_eq!(res["requests"]["cpu"].as_str().unwrap(), lanes.to_string(), "CPUs vs lanes");
    // Hardening.
    let sc = &container["securityContext"];
    assert_eq!(
        (sc["readOnlyRootFilesystem"].as_bool(), sc["allowPrivilegeEscalation"].as_bool()),
        (Some(true), Some(false))
    );
    assert_eq!(sc["capabilities"]["drop"], serde_json::json!(["ALL"]));
    assert_eq!(pod["spec"]["securityContext"]["runAsNonRoot"], true);
    // Selectors: the Service, the budget and the autoscaler find the Deployment's pods.
    let labels = &pod["metadata"]["labels"];
    for (kind, selector) in [
        ("Service", &service["spec"]["selector"]),
        ("PodDisruptionBudget", &object(&all, "PodDisruptionBudget")["spec"]["selector"]["matchLabels"]),
        ("Deployment", &deployment["spec"]["selector"]["matchLabels"]),
    ] {
        for (k, v) in selector.as_object().unwrap() {
            assert_eq!(&labels[k], v, "{kind} selects {k}={v}, the pods have {labels}");
        }
    }
    let hpa = object(&all, "HorizontalPodAutoscaler");
    assert_eq!(hpa["spec"]["scaleTargetRef"]["name"], deployment["metadata"]["name"]);
    let pods_metric = hpa["spec"]["metrics"]
        .as_array()
        .unwrap()
        .iter()
        .find(|m| m["type"] == "Pods")
        .expect("a Pods metric (backlog depth)");
    let metric = pods_metric["pods"]["metric"]["name"].as_str().unwrap().to_owned();
    let adapter = std::fs::read_to_string(root().join("deploy/prometheus/adapter-rules.yaml")).unwrap();
    assert!(adapter.contains(&format!("\"{metric}\"")), "the adapter rule exposes {metric}");

    // A server started from the ConfigMap's config answers the probes' paths and exports the
    // autoscaler's metric.
    let server = TestServer::start(config).await;
    let c = reqwest::Client::new();
    for probe in ["startupProbe", "readinessProbe", "livenessProbe"] {
        let path = container[probe]["httpGet"]["path"].as_str().unwrap();
        assert_eq!(container[probe]["httpGet"]["port"], container["ports"][0]["name"], "{probe} port");
        let r = c.get(server.url(path)).send().await.unwrap();
        assert_eq!(r.status(), 200, "{probe} {path}");
    }
    assert_eq!(container["startupProbe"]["httpGet"]["path"], "/readyz", "started = loaded and self-tested");
    assert_eq!(container["livenessProbe"]["httpGet"]["path"], "/healthz");
    let metrics = c.get(server.url("/metrics")).send().await.unwrap().text().await.unwrap();
    assert!(metrics.lines().any(|l| l.starts_with(&format!("{metric}{{"))), "/metrics exports {metric}");
    server.stop().await.unwrap();
}

/// `systemd-analyze verify` on the unit with ExecStart pointed at the binary cargo built (the
/// check needs the executable to exist); its stop timeout covers drain_ms, and reload sends
/// SIGHUP.
#[test]
fn the_service_unit_verifies_and_matches_the_drain() {
    let unit = std::fs::read_to_string(root().join("deploy/systemd/lineside.service")).unwrap();
    let value = |key: &str| {
        unit.lines().find_map(|l| l.strip_prefix(&format!("{key}="))).unwrap_or_else(|| panic!("no {key}=")).to_owned()
    };
    assert_eq!(value("ExecReload"), "/bin/kill -HUP $MAINPID");
    let stop: u64 = value("TimeoutStopSec").parse().unwrap();
    let drain = lineside::config::defaults::DRAIN_MS / 1000;
    assert!(stop > drain, "TimeoutStopSec {stop} must exceed drain_ms ({drain} s)");
    assert_eq!(value("NoNewPrivileges"), "yes");
    assert_eq!(value("ProtectSystem"), "strict");
    let Ok(found) = Command::new("systemd-analyze").arg("--version").output() else {
        // .ci/run installs it and sets LINESIDE_CI: there, its absence is a failure.
        assert!(std::env::var_os("LINESIDE_CI").is_none(), "systemd-analyze is missing on CI");
        eprintln!("systemd-analyze is not installed here: the unit's syntax is not verified (.ci/run installs it)");
        return;
    };
    assert!(found.status.success());
    let dir = temp_dir("systemd");
    let exec = value("ExecStart");
    let local = unit.replace(
        &format!("ExecStart={exec}"),
        &format!("ExecStart={}", exec.replacen("/usr/local/bin/lineside", env!("CARGO_BIN_EXE_lineside"), 1)),
    );
    let path = dir.join("lineside.service");
    std::fs::write(&path, local).unwrap();
    let out = Command::new("systemd-analyze").arg("verify").arg(&path).output().unwrap();
    let text = format!("{}{}", String::from_utf8_lossy(&out.stdout), String::from_utf8_lossy(&out.stderr));
    assert!(out.status.success(), "systemd-analyze verify: {text}");
    // Warnings about this unit (not about the host's other units) fail it too.
    assert!(!text.contains("lineside.service:"), "systemd-analyze verify: {text}");
}
