//! The `lineside` binary: parse arguments, start logging, run a subcommand, map its result
//! to an exit code (0 ok, 1 `check` found a model unservable or `evaluate` scored no frame,
//! 2 usage, config, data set or I/O error).

use std::process::ExitCode;

use clap::Parser as _;
use lineside::cli::{Cli, Command, Outcome};
use lineside::logging::{ApplyFilter, LogControl};

fn main() -> ExitCode {
    if let Err(missing) = lineside::build_cpu_fits() {
        eprintln!(
            "lineside: this binary was built for CPUs with {missing} (RUSTFLAGS -C target-cpu), and this CPU lacks it; \
             use a build without a target-cpu flag (the default) on this box"
        );
        return ExitCode::from(2);
    }
    let cli = Cli::parse();
    let startup = match &cli.log_level {
        Some(level) => level.clone(),
        None => std::env::var("LINESIDE_LOG")
            .ok()
            .filter(|v| tracing_subscriber::EnvFilter::try_new(v).is_ok())
            .unwrap_or_else(|| "info".into()),
    };
    let filter = match tracing_subscriber::EnvFilter::try_new(&startup) {
        Ok(f) => f,
        Err(e) => {
            eprintln!("lineside: --log-level {startup:?}: {e}; expected error, warn, info, debug or trace");
            return ExitCode::from(2);
        }
    };
    let logs = tracing_subscriber::fmt().with_env_filter(filter).with_writer(std::io::stderr);
    // The filter stays changeable while serving (`PUT /log-filter`, an admin action).
    let apply: ApplyFilter = if cli.log_format == "json" {
        let logs = logs.json().with_filter_reloading();
        let handle = logs.reload_handle();
        logs.init();
        Box::new(move |f| handle.reload(parse_filter(f)?).map_err(|e| e.to_string()))
    } else {
        // Colours only for a person at a terminal; log files and journald get plain text.
        let logs = logs.with_ansi(std::io::IsTerminal::is_terminal(&std::io::stderr())).with_filter_reloading();
        let handle = logs.reload_handle();
        logs.init();
        Box::new(move |f| handle.reload(parse_filter(f)?).map_err(|e| e.to_string()))
    };
    let log = std::sync::Arc::new(LogControl::new(startup, apply));
    let result = match cli.command {
        Command::Serve(args) => lineside::cli::serve::run(args, Some(log)),
        Command::Check(args) => lineside::cli::check::run(args),
        Command::Evaluate(args) => lineside::cli::evaluate::run(args),
        Command::Preprocess(args) => lineside::cli::preprocess::run(args),
        Command::Bench(args) => lineside::cli::bench::run(args),
        Command::Retained(args) => lineside::cli::retained::run(args),
    };
    match result {
        Ok(Outcome::Ok) => ExitCode::SUCCESS,
        Ok(Outcome::ModelUnservable | Outcome::NothingEvaluated) => ExitCode::from(1),
        Err(e) => {
            eprintln!("lineside: {e:#}");
            ExitCode::from(2)
        }
    }
}

/// A filter in tracing-subscriber's syntax, or why not.
fn parse_filter(text: &str) -> Result<tracing_subscriber::EnvFilter, String> {
    tracing_subscriber::EnvFilter::builder().with_regex(false).parse(text).map_err(|e| e.to_string())
}
