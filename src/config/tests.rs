//! Config rejections and defaults, through the public entry points.

use super::*;

fn parse(text: &str) -> Result<Config, String> {
    parse_env(text, &Overrides::default())
}

const MINIMAL: &str = r#"
[[models]]
name = "m"
onnx = "m.onnx"
labels = "m.txt"
[models.preprocess]
width = 32
height = 32
"#;

#[test]
fn builtin_config_embeds_every_file_it_names() {
    let cfg = Config::builtin(&Overrides::default()).expect("built-in config is valid");
    assert_eq!(cfg.models.len(), 1);
    let m = &cfg.models[0];
    assert_eq!(m.name, "washers");
    for src in [&m.onnx, m.labels.as_ref().unwrap()] {
        assert!(matches!(src, Source::Embedded { .. }), "not embedded: {src:?}");
    }
    let selftest = m.selftest.as_ref().expect("the washer bundle has a self-test");
    assert!(matches!(selftest.samples, Source::EmbeddedDir { .. }), "not embedded: {:?}", selftest.samples);
    // every sample expected.json lists is embedded
    let files = selftest.samples.read_dir().unwrap();
    let expected: serde_json::Value =
        serde_json::from_slice(&files.iter().find(|(n, _)| n == "expected.json").unwrap().1).unwrap();
    for name in expected.as_object().unwrap().keys() {
        assert!(files.iter().any(|(n, _)| n == name), "{name} is not embedded");
    }
    assert_eq!(cfg.server.listen.to_string(), "127.0.0.1:8080");
}

#[test]
fn defaults_fill_missing_keys() {
    let cfg = parse(MINIMAL).unwrap();
    let m = &cfg.models[0];
    assert_eq!(m.batching.batch_cap, 8);
    assert_eq!(m.batching.gather, Duration::from_micros(2000));
    assert_eq!(m.batching.backlog, 64);
    assert_eq!(m.batching.lanes, Lanes::Auto);
    assert_eq!(m.preprocess.mean, vec![0.0; 3]);
    assert_eq!(m.preprocess.std, vec![1.0; 3]);
    assert_eq!(cfg.server.body_limit_bytes, 16 * 1024 * 1024);
    assert_eq!(cfg.server.http_threads, 1);
    assert_eq!(cfg.server.decode_inline_pixels, 16384);
    assert!(matches!(&m.onnx, Source::File(p) if p == Path::new("/base/m.onnx")));
}

#[test]
fn unknown_key_is_named_with_its_line() {
    let text = format!("{MINIMAL}colour = \"red\"\n");
    let err = parse(&text).unwrap_err();
    assert!(err.contains("colour"), "{err}");
    assert!(err.contains("line 9"), "{err}");
    assert!(err.starts_with("test.toml"), "{err}");
}

#[test]
fn unknown_key_in_server_is_refused() {
    let err = parse(&format!("[server]\nlisten_port = 1\n{MINIMAL}")).unwrap_err();
    assert!(err.contains("listen_port") && err.contains("line 2"), "{err}");
}

#[test]
fn mean_length_must_match_channels() {
    let text = MINIMAL.replace("height = 32", "height = 32\nmean = [0.5, 0.5]");
    let err = parse(&text).unwrap_err();
    assert!(err.contains("preprocess.mean has 2 values, expected 3"), "{err}");
    let gray = MINIMAL.replace("height = 32", "height = 32\nchannels = \"gray\"\nmean = [0.5]\nstd = [0.25]");
    assert_eq!(parse(&gray).unwrap().models[0].preprocess.std, vec![0.25]);
}

#[test]
fn channels_left_open_follow_the_model_and_mean_std_imply_them() {
    let open = parse(MINIMAL).unwrap().models[0].preprocess.clone();
    assert!(!open.channels_given);
    let gray = open.clone().follow_model(1);
    assert_eq!((gray.channels, gray.mean, gray.std), (Channels::Gray, vec![0.0], vec![1.0]));
    assert_eq!(open.follow_model(3).channels, Channels::Rgb);
    let one = parse(&MINIMAL.replace("height = 32", "height = 32\nmean = [0.5]\nstd = [0.25]")).unwrap();
    let p = one.models[0].preprocess.clone();
    assert_eq!((p.channels, p.channels_given), (Channels::Gray, true));
    // A stated channel order is never replaced by the model's.
    let bgr = parse(&MINIMAL.replace("height = 32", "height = 32\nchannels = \"bgr\"")).unwrap();
    assert_eq!(bgr.models[0].preprocess.clone().follow_model(1).channels, Channels::Bgr);
}

#[test]
fn bad_values_are_refused_with_the_key() {
    for (edit, needle) in [
        ("height = 32\nstd = [1.0, 0.0, 1.0]", "every std must be > 0"),
        ("height = 32\ndivisor = 0.0", "preprocess.divisor"),
        ("height = 32\nresize = \"squash\"", "squash"),
        ("height = 0", "preprocess.height = 0"),
    ] {
        let err = parse(&MINIMAL.replace("height = 32", edit)).unwrap_err();
        assert!(err.contains(needle), "{edit}: {err}");
    }
    for (batching, needle) in [
        ("batch_cap = 0", "batching.batch_cap = 0"),
        ("lanes = \"many\"", "batching.lanes"),
        ("lanes = 0", "batching.lanes = 0"),
        ("backlog = 0", "batching.backlog = 0"),
        ("lane_threads = 0", "lane_threads = 0"),
    ] {
        let err = parse(&format!("{MINIMAL}[models.batching]\n{batching}\n")).unwrap_err();
        assert!(err.contains(needle), "{batching}: {err}");
    }
    for (server, needle) in [
        ("listen = \"localhost\"", "server.listen"),
        ("http_threads = 0", "server.http_threads = 0"),
        ("decode_inline_pixels = 5000000", "server.decode_inline_pixels = 5000000"),
        ("decode_threads = 0", "server.decode_threads = 0"),
    ] {
        let err = parse(&format!("[server]\n{server}\n{MINIMAL}")).unwrap_err();
        assert!(err.contains(needle), "{server}: {err}");
    }
    let zero = parse(&format!("[server]\ndecode_inline_pixels = 0\nhttp_threads = 2\n{MINIMAL}")).unwrap();
    assert_eq!((zero.server.decode_inline_pixels, zero.server.http_threads), (0, 2));
    // `--http-threads` wins over the file, and is checked like the key.
    let flag = |n| Overrides { http_threads: Some(n), ..Overrides::default() };
    let text = format!("[server]\nhttp_threads = 2\n{MINIMAL}");
    let over = Config::from_toml(&text, "test.toml", &|p| Source::File(p.to_path_buf()), &flag(3)).unwrap();
    assert_eq!(over.server.http_threads, 3);
    let err = Config::from_toml(&text, "test.toml", &|p| Source::File(p.to_path_buf()), &flag(0)).unwrap_err();
    assert!(format!("{err:#}").contains("server.http_threads = 0"), "{err:#}");
}

#[test]
fn duplicate_model_names_and_no_models_are_refused() {
    let twice = format!("{MINIMAL}{MINIMAL}");
    assert!(parse(&twice).unwrap_err().contains("used twice"));
    assert!(parse("[server]\n").unwrap_err().contains("no [[models]]"));
}

#[test]
fn listen_flag_overrides_file() {
    let o = Overrides { listen: Some("0.0.0.0:9000".into()), ..Default::default() };
    let cfg = Config::builtin(&o).unwrap();
    assert_eq!(cfg.server.listen.to_string(), "0.0.0.0:9000");
}

#[test]
fn lanes_accepts_number_or_auto() {
    let cfg = parse(&format!("{MINIMAL}[models.batching]\nlanes = 3\n")).unwrap();
    assert_eq!(cfg.models[0].batching.lanes, Lanes::Fixed(3));
    let cfg = parse(&format!("{MINIMAL}[models.batching]\nlanes = \"auto\"\n")).unwrap();
    assert_eq!(cfg.models[0].batching.lanes, Lanes::Auto);
}

#[test]
fn preprocess_keys_are_checked_with_their_names() {
    for (edit, needle) in [
        ("height = 32\nnormalize = \"imagenet\"\nmean = [0.5, 0.5, 0.5]", "both given"),
        ("height = 32\nnormalize = \"coco\"", "normalize = \"coco\""),
        ("height = 32\nchannels = \"gray\"\nnormalize = \"imagenet\"", "needs 3 channels"),
        ("height = 32\nresize = \"crop\"\nshort_side = 0", "short_side = 0"),
        ("height = 32\nresize = \"crop\"\nshort_side = 31", "short_side = 31 is below the crop size 32"),
        ("height = 32\nshort_side = 36", "applies only to resize = \"crop\""),
        ("height = 32\nresize = \"letterbox\"\npad_value = 300", "pad_value = 300"),
        ("height = 32\npad_value = 40", "applies only to resize = \"letterbox\""),
        ("height = 32\nroi = [0, 0, 10]", "preprocess.roi = [0, 0, 10]"),
        ("height = 32\nroi = [0, 0, 0, 10]", "w and h >= 1"),
        ("height = 32\nmin_side = 0", "min_side = 0"),
        ("height = 32\norientation = \"auto\"", "auto"),
    ] {
        let err = parse(&MINIMAL.replace("height = 32", edit)).unwrap_err();
        assert!(err.contains(needle), "{edit}: {err}");
    }
}

#[test]
fn imagenet_statistics_follow_the_channel_order() {
    let bgr = MINIMAL.replace("height = 32", "height = 32\nchannels = \"bgr\"\nnormalize = \"imagenet\"");
    let p = parse(&bgr).unwrap().models[0].preprocess.clone();
    // ImageNet statistics in RGB order (common practice), listed here in BGR order.
    assert_eq!(p.mean, vec![0.406, 0.456, 0.485]);
    assert_eq!(p.std, vec![0.225, 0.224, 0.229]);
    let crop = MINIMAL.replace("height = 32", "height = 32\nresize = \"crop\"\nshort_side = 36\nroi = [1, 2, 3, 4]");
    let p = parse(&crop).unwrap().models[0].preprocess.clone();
    assert_eq!((p.short_side, p.roi), (Some(36), Some(Roi { x: 1, y: 2, w: 3, h: 4 })));
    assert_eq!((p.min_side, p.orientation, p.pad_value), (8, Orientation::Exif, 0));
}

fn with_env(vars: &[(&str, &str)]) -> Overrides {
    Overrides { env: vars.iter().map(|(n, v)| ((*n).to_owned(), (*v).to_owned())).collect(), ..Overrides::default() }
}

fn parse_env(text: &str, o: &Overrides) -> Result<Config, String> {
    Config::from_toml(text, "test.toml", &|p| Source::File(PathBuf::from("/base").join(p)), o)
        .map_err(|e| format!("{e:#}"))
}

#[test]
fn the_environment_sets_server_keys_over_the_file_and_flags_over_the_environment() {
    let text = format!(
        "[server]\ndrain_ms = 5000\nlisten = \"127.0.0.1:7000\"\n{}",
        &MINIMAL[MINIMAL.find("[[models]]").unwrap()..]
    );
    let o = with_env(&[
        ("LINESIDE_SERVER_DRAIN_MS", "15000"),
        ("LINESIDE_SERVER_LISTEN", "0.0.0.0:8080"),
        ("LINESIDE_SERVER_READY_BACKLOG", "0.5"),
        ("LINESIDE_SERVER_ADMIN_TOKEN_FILE", "secrets/admin.token"),
    ]);
    let c = parse_env(&text, &o).unwrap();
    assert_eq!(c.server.drain, Duration::from_millis(15_000), "environment over file");
    assert_eq!(c.server.listen.to_string(), "0.0.0.0:8080");
    assert!((c.server.ready_backlog - 0.5).abs() < 1e-12);
    // A flag over the environment.
    let flagged = Overrides { listen: Some("127.0.0.1:9100".into()), ..o };
    assert_eq!(parse_env(&text, &flagged).unwrap().server.listen.to_string(), "127.0.0.1:9100");
    // The file alone.
    assert_eq!(parse_env(&text, &Overrides::default()).unwrap().server.drain, Duration::from_millis(5000));
}

#[test]
fn the_environment_sets_a_models_files_and_keys_checked_like_the_file() {
    let two = format!(
        "{MINIMAL}\n{}",
        MINIMAL[MINIMAL.find("[[models]]").unwrap()..].replacen("name = \"m\"", "name = \"m-2\"", 1)
            + "[models.selftest]\nsamples = \"samples\"\n"
    );
    let o = with_env(&[
        ("LINESIDE_MODEL_M_2_ONNX", "station7/model.onnx"),
        ("LINESIDE_MODEL_M_2_MIN_SCORE", "0.8"),
        ("LINESIDE_MODEL_M_2_WATCH", "true"),
        ("LINESIDE_MODEL_M_2_LANES", "3"),
        ("LINESIDE_MODEL_M_2_SELFTEST_SAMPLES", "station7/samples"),
        ("LINESIDE_MODEL_M_MIN_SCORE", "0.5"),
        ("LINESIDE_MODEL_M_SHA256", &"ab".repeat(32)),
    ]);
    let c = parse_env(&two, &o).unwrap();
    let (m, m2) = (c.model("m").unwrap(), c.model("m-2").unwrap());
    // Paths as if written in the file: relative to its folder.
    assert_eq!(m2.onnx.display(), "/base/station7/model.onnx");
    assert_eq!(m2.min_score, Some(0.8));
    assert!(m2.watch && !m.watch);
    assert_eq!(m2.batching.lanes, crate::batch::Lanes::Fixed(3));
    assert_eq!(m2.selftest.as_ref().unwrap().samples.display(), "/base/station7/samples");
    assert_eq!(m.sha256.as_deref(), Some("ab".repeat(32).as_str()));
    assert_eq!(m.onnx.display(), "/base/m.onnx", "model m keeps its file");
    assert_eq!(m.min_score, Some(0.5), "M_MIN_SCORE is model m's, not a key of m-2");
}

#[test]
fn a_variable_that_names_nothing_or_a_wrong_value_is_refused_naming_it() {
    for (var, value, needle) in [
        ("LINESIDE_SERVER_DRAIN_SECONDS", "10", "LINESIDE_SERVER_DRAIN_SECONDS: there is no key \"drain_seconds\""),
        ("LINESIDE_SERVER_DRAIN_MS", "soon", "LINESIDE_SERVER_DRAIN_MS=\"soon\": not a value drain_ms takes"),
        ("LINESIDE_MODEL_OTHER_ONNX", "x.onnx", "LINESIDE_MODEL_OTHER_ONNX: names no model of the config with a key"),
        ("LINESIDE_MODEL_M_MINSCORE", "0.5", "(the models: LINESIDE_MODEL_M_<KEY>; the keys: ONNX, LABELS"),
        ("LINESIDE_MODEL_M_RETAIN_DIR", "frames", "model \"m\" has no [models.retain] in the config file"),
        ("LINESIDE_MODEL_M_SELFTEST_SAMPLES", "s", "model \"m\" has no [models.selftest] in the config file"),
        ("LINESIDE_MODEL_M_MIN_SCORE", "high", "LINESIDE_MODEL_M_MIN_SCORE=\"high\": not a value min_score takes"),
        ("LINESIDE_MODEL_M_MIN_SCORE", "1.5", "min_score"),
    ] {
        let err = parse_env(MINIMAL, &with_env(&[(var, value)])).unwrap_err();
        assert!(err.contains(needle), "{var}={value}: {err}");
    }
}

#[test]
fn every_server_key_from_the_environment_equals_the_same_key_in_the_file() {
    let models = &MINIMAL[MINIMAL.find("[[models]]").unwrap()..];
    // Every [server] key, with a value other than its default (env text, the file's TOML).
    for (key, env, toml) in [
        ("listen", "0.0.0.0:9001", "\"0.0.0.0:9001\""),
        ("body_limit_bytes", "1000000", "1000000"),
        ("max_pixels", "1000000", "1000000"),
        ("max_decode_bytes", "2097152", "2097152"),
        ("max_parts", "3", "3"),
        ("max_part_bytes", "5000", "5000"),
        ("max_connections", "77", "77"),
        ("max_header_bytes", "2048", "2048"),
        ("decode_threads", "3", "3"),
        ("decode_backlog", "17", "17"),
        ("decode_inline_pixels", "0", "0"),
        ("http_threads", "2", "2"),
        ("header_timeout_ms", "1234", "1234"),
        ("drain_ms", "2345", "2345"),
        ("deadline_ms", "3456", "3456"),
        ("body_timeout_ms", "4567", "4567"),
        ("stall_ms", "5678", "5678"),
        ("ready_backlog", "0.25", "0.25"),
        ("admin_token_file", "a.token", "\"a.token\""),
        ("client_token_file", "c.token", "\"c.token\""),
        ("session_minutes", "5", "5"),
        ("tls_cert", "tls/s.pem", "\"tls/s.pem\""),
        ("tls_key", "tls/s.key", "\"tls/s.key\""),
        ("tls_client_ca", "tls/ca.pem", "\"tls/ca.pem\""),
    ] {
        // TLS keys come as a pair at least (certificate and key), in both.
        let pair: &[(&str, &str)] =
            if key.starts_with("tls_") { &[("tls_cert", "pair/s.pem"), ("tls_key", "pair/s.key")] } else { &[] };
        let pair: Vec<_> = pair.iter().filter(|(k, _)| *k != key).collect();
        let file_pair: String = pair.iter().map(|(k, v)| format!("{k} = \"{v}\"\n")).collect();
        let from_file = parse(&format!("[server]\n{key} = {toml}\n{file_pair}{models}")).unwrap();
        let var = format!("LINESIDE_SERVER_{}", key.to_ascii_uppercase());
        let mut vars: Vec<(String, &str)> = vec![(var.clone(), env)];
        vars.extend(pair.iter().map(|(k, v)| (format!("LINESIDE_SERVER_{}", k.to_ascii_uppercase()), *v)));
        let vars: Vec<(&str, &str)> = vars.iter().map(|(k, v)| (k.as_str(), *v)).collect();
        let from_env = parse_env(MINIMAL, &with_env(&vars)).unwrap_or_else(|e| panic!("{var}: {e}"));
        assert_eq!(format!("{:?}", from_env.server), format!("{:?}", from_file.server), "{var}");
        assert_ne!(
            format!("{:?}", from_env.server),
            format!("{:?}", parse(MINIMAL).unwrap().server),
            "{var} changed nothing"
        );
    }
}

#[test]
fn a_variable_that_fits_two_models_is_refused_and_one_reading_wins_over_none() {
    let model = |name: &str| {
        MINIMAL[MINIMAL.find("[[models]]").unwrap()..].replacen("name = \"m\"", &format!("name = \"{name}\""), 1)
    };
    // "line" + MIN_SCORE is the only reading ("line-min" has no key SCORE).
    let text = format!("{}{}", model("line"), model("line-min"));
    let c = parse_env(&text, &with_env(&[("LINESIDE_MODEL_LINE_MIN_SCORE", "0.6")])).unwrap();
    assert_eq!((c.model("line").unwrap().min_score, c.model("line-min").unwrap().min_score), (Some(0.6), None));
    // "press-1" and "press_1" both read as PRESS_1: refused, naming both.
    let text = format!("{}{}", model("press-1"), model("press_1"));
    let err = parse_env(&text, &with_env(&[("LINESIDE_MODEL_PRESS_1_MIN_SCORE", "0.6")])).unwrap_err();
    assert!(err.contains("fits more than one model") && err.contains("press-1") && err.contains("press_1"), "{err}");
}
