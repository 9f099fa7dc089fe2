//! The built-in washer default: the repository's own `config/lineside.toml`, compiled in, with
//! the model files it names embedded in the binary, so that `lineside serve` works anywhere.

use std::path::Path;

use crate::source::Source;

/// The documented example config, which is also the built-in default.
pub(super) const BUILTIN_TOML: &str = include_str!("../../config/lineside.toml");

/// Files the built-in config refers to, embedded so that `lineside serve` works anywhere.
/// Keys are the paths exactly as `config/lineside.toml` writes them.
const EMBEDDED: &[(&str, &[u8])] = &[
    ("../models/washers/classifier.onnx", include_bytes!("../../models/washers/classifier.onnx")),
    ("../models/washers/classes.txt", include_bytes!("../../models/washers/classes.txt")),
];

/// Folders the built-in config refers to (the self-test samples), embedded file by file.
const EMBEDDED_DIRS: &[(&str, Files)] = &[("../models/washers/samples", WASHER_SAMPLES)];

/// File names and their bytes.
type Files = &'static [(&'static str, &'static [u8])];

macro_rules! washer_samples {
    ($($f:literal),* $(,)?) => { &[$(($f, include_bytes!(concat!("../../models/washers/samples/", $f)))),*] };
}
const WASHER_SAMPLES: &[(&str, &[u8])] = washer_samples!(
    "expected.json",
    "good-01.png",
    "good-02.png",
    "good-03.png",
    "cracked-01.png",
    "cracked-02.png",
    "cracked-03.png",
    "burr-01.png",
    "burr-02.png",
    "burr-03.png",
    "no_hole-01.png",
    "no_hole-02.png",
    "no_hole-03.png",
    "empty-01.png",
    "empty-02.png",
    "empty-03.png",
);

/// The source of a path the built-in config writes: the embedded file or folder.
pub(super) fn resolve(p: &Path) -> Source {
    let key = p.to_string_lossy();
    if let Some((name, bytes)) = EMBEDDED.iter().find(|(name, _)| *name == key) {
        return Source::Embedded { name, bytes };
    }
    match EMBEDDED_DIRS.iter().find(|(name, _)| *name == key) {
        Some((name, files)) => Source::EmbeddedDir { name, files },
        // Unreachable for the shipped config (a unit test checks every path).
        None => Source::File(p.to_path_buf()),
    }
}
