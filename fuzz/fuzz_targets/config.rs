//! The config file: TOML text through the parser and every validation `serve` runs before
//! it loads a model (`Config::from_toml`), with paths resolved against a folder that does
//! not exist (nothing is read from disk).
//!
//! Property: no panic; a config that validates has at least one model, each named.
#![no_main]

use std::path::Path;

use libfuzzer_sys::fuzz_target;
use lineside::config::{Config, Overrides};
use lineside::source::Source;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else { return };
    let resolve = |p: &Path| Source::File(Path::new("/nonexistent/lineside-fuzz").join(p));
    if let Ok(config) = Config::from_toml(text, "fuzz.toml", &resolve, &Overrides::default()) {
        assert!(!config.models.is_empty(), "a config without models validated");
        assert!(config.models.iter().all(|m| !m.name.is_empty()));
    }
});
