//! lineside's integration tests, built as one binary (faster to link than one per file).
//!
//! Where new tests go: a test of one HTTP behaviour goes in `serve.rs`; a comparison with an
//! outside reference (onnxruntime, Pillow, prometheus_client) in `reference.rs`; model checking and
//! the layer report (published layer tables, onnxruntime on the fixtures) in `check.rs`; load and
//! concurrency in `load.rs`; the `lineside` binary as a user runs it in `cli.rs`. Shared
//! helpers (starting a server, fixtures, the Python reference tools) live in `util.rs`.
//! Regression tests are named after their issue (`issue_N_...`).

mod access;
mod bench;
mod check;
mod cli;
mod decisions;
mod deploy;
mod evaluate;
mod fault;
mod load;
mod preprocess;
mod reference;
mod reload;
mod serve;
mod soak;
mod util;
