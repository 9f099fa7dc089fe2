//! Configuration from the environment: one image, many stations.
//!
//! Read once by the CLI ([`crate::cli::base_overrides`]) and applied to the config file's
//! TOML before it is validated, so that a value from the environment is checked exactly like
//! the same value written in the file (and a relative path is relative to the file's folder;
//! with the built-in config, to the working folder). Order: the file, then the environment,
//! then the command line's flags.
//!
//! - `LINESIDE_SERVER_<KEY>`: any `[server]` key, upper-cased (`LINESIDE_SERVER_DRAIN_MS=15000`).
//! - `LINESIDE_MODEL_<MODEL>_<KEY>`: a key of the model named `<MODEL>` (upper-cased, every
//!   character but letters and digits as `_`), for the keys in [`MODEL_KEYS`].
//!
//! A variable with either prefix that names no key or no model is an error naming the
//! variable: a mistyped `MIN_SCORE` must not be ignored silently on a line.

/// Prefix of `[server]` keys.
pub const SERVER_PREFIX: &str = "LINESIDE_SERVER_";
/// Prefix of per-model keys.
pub const MODEL_PREFIX: &str = "LINESIDE_MODEL_";

/// The per-model keys the environment may set: the variable's suffix and the key's path in
/// the model's entry.
pub const MODEL_KEYS: &[ModelKey] = &[
    ("ONNX", &["onnx"]),
    ("LABELS", &["labels"]),
    ("SHA256", &["sha256"]),
    ("MIN_SCORE", &["min_score"]),
    ("ENGINE", &["engine"]),
    ("SCORES", &["scores"]),
    ("WATCH", &["watch"]),
    ("LANES", &["batching", "lanes"]),
    ("SELFTEST_SAMPLES", &["selftest", "samples"]),
    ("RETAIN_DIR", &["retain", "dir"]),
];

/// One per-model key: the variable's suffix and the key's path in the model's entry.
type ModelKey = (&'static str, &'static [&'static str]);

/// Whether an environment variable is one this module reads.
pub fn is_config_variable(name: &str) -> bool {
    name.starts_with(SERVER_PREFIX) || name.starts_with(MODEL_PREFIX)
}

/// A model name as it appears in a variable's name.
pub fn env_name(model: &str) -> String {
    model.chars().map(|c| if c.is_ascii_alphanumeric() { c.to_ascii_uppercase() } else { '_' }).collect()
}

/// Apply `vars` (name, value) to the config's TOML table.
///
/// # Errors
/// A variable that names no `[server]` key, no model or no model key, or whose value the key
/// cannot take; the message names the variable.
pub fn apply(table: &mut toml::Table, vars: &[(String, String)]) -> Result<(), String> {
    for (name, value) in vars {
        if let Some(key) = name.strip_prefix(SERVER_PREFIX) {
            let key = key.to_ascii_lowercase();
            let server = table
                .entry("server")
                .or_insert_with(|| toml::Value::Table(toml::Table::new()))
                .as_table_mut()
                .ok_or_else(|| "[server] is not a table".to_owned())?;
            let v = typed::<super::raw::RawServer>(name, &key, value)?;
            server.insert(key, v);
        } else if let Some(rest) = name.strip_prefix(MODEL_PREFIX) {
            apply_model(table, name, rest, value)?;
        }
    }
    Ok(())
}

fn apply_model(table: &mut toml::Table, var: &str, rest: &str, value: &str) -> Result<(), String> {
    let models = table.get_mut("models").and_then(toml::Value::as_array_mut);
    let Some(models) = models else {
        return Err(format!("{var}: the config has no [[models]] for it to change"));
    };
    let names: Vec<String> =
        models.iter().filter_map(|m| m.get("name").and_then(toml::Value::as_str)).map(str::to_owned).collect();
    // Every (model, key) reading of the variable: `LINE_MIN_SCORE` is model "line", key
    // MIN_SCORE, or model "line-min", key SCORE (no such key: not a reading).
    let readings: Vec<(usize, &String, &ModelKey)> = names
        .iter()
        .enumerate()
        .filter_map(|(i, n)| {
            let suffix = rest.strip_prefix(&env_name(n))?.strip_prefix('_')?;
            Some((i, n, MODEL_KEYS.iter().find(|(k, _)| *k == suffix)?))
        })
        .collect();
    let (index, model, (_, path)) = match readings.as_slice() {
        [one] => *one,
        [] => {
            let known: Vec<String> = names.iter().map(|n| format!("{MODEL_PREFIX}{}_<KEY>", env_name(n))).collect();
            let keys: Vec<&str> = MODEL_KEYS.iter().map(|(k, _)| *k).collect();
            return Err(format!(
                "{var}: names no model of the config with a key the environment can set (the models: {}; the keys: {})",
                known.join(", "),
                keys.join(", ")
            ));
        }
        several => {
            let models: Vec<&str> = several.iter().map(|(_, n, _)| n.as_str()).collect();
            return Err(format!(
                "{var}: fits more than one model ({models:?}: their names differ only in characters other than letters \
                 and digits, or one name extends another); rename one of them in the config"
            ));
        }
    };
    let v = typed::<super::raw::RawModelKeys>(var, path[path.len() - 1], value)?;
    let mut at = models[index].as_table_mut().ok_or_else(|| format!("{var}: model {model:?} is not a table"))?;
    for part in &path[..path.len() - 1] {
        // The environment moves a folder; it does not turn a self-test or retention on.
        // (`[models.batching]` is all defaults when absent: creating it changes nothing else.)
        if *part == "batching" {
            at.entry(*part).or_insert_with(|| toml::Value::Table(toml::Table::new()));
        }
        at = at.get_mut(*part).and_then(toml::Value::as_table_mut).ok_or_else(|| {
            format!("{var}: model {model:?} has no [models.{part}] in the config file; add it there first")
        })?;
    }
    at.insert(path[path.len() - 1].to_owned(), v);
    Ok(())
}

/// The TOML value `text` stands for as key `key` of `T`: a number, boolean or array when it
/// reads as one and the key takes it, else the text as a string.
fn typed<T: serde::de::DeserializeOwned>(var: &str, key: &str, text: &str) -> Result<toml::Value, String> {
    let check = |v: &toml::Value| -> Result<(), String> {
        let mut one = toml::Table::new();
        one.insert(key.to_owned(), v.clone());
        toml::Value::Table(one).try_into::<T>().map(|_| ()).map_err(|e| e.to_string())
    };
    let parsed = toml::from_str::<toml::Table>(&format!("v = {text}")).ok().and_then(|mut t| t.remove("v"));
    let string = toml::Value::String(text.to_owned());
    let first = match &parsed {
        Some(v) => match check(v) {
            Ok(()) => return Ok(v.clone()),
            Err(e) => Some(e),
        },
        None => None,
    };
    match check(&string) {
        Ok(()) => Ok(string),
        Err(e) if e.contains("unknown field") => {
            Err(format!("{var}: there is no key {key:?} for it to set (check the name against docs/configuration.md)"))
        }
        Err(e) => Err(format!("{var}={text:?}: not a value {key} takes: {}", first.unwrap_or(e).trim())),
    }
}
