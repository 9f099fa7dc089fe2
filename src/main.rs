//! The `lineside` binary: parse arguments, start logging, run a subcommand, map its result
//! to an exit code (0 ok, 1 `check` found a model unservable or `evaluate` scored no frame,
//! 2 usage, config, data set or I/O error).

use std::process::ExitCode;

use clap::Parser as _;
use lineside::cli::{Cli, Command, Outcome};

fn main() -> ExitCode {
    if let Err(missing) = lineside::build_cpu_fits() {
        eprintln!(
            "lineside: this binary was built for CPUs with {missing} (RUSTFLAGS -C target-cpu), and this CPU lacks it; \
             use a build without a target-cpu flag (the default) on this box"
        );
        return ExitCode::from(2);
    }
    let cli = Cli::parse();
    let filter = match &cli.log_level {
        Some(level) => match tracing_subscriber::EnvFilter::try_new(level) {
            Ok(f) => f,
            Err(e) => {
                eprintln!("lineside: --log-level {level:?}: {e}; expected error, warn, info, debug or trace");
                return ExitCode::from(2);
            }
        },
        None => tracing_subscriber::EnvFilter::try_from_env("LINESIDE_LOG")
            .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info")),
    };
    let logs = tracing_subscriber::fmt().with_env_filter(filter).with_writer(std::io::stderr);
    if cli.log_format == "json" {
        logs.json().init();
    } else {
        // Colours only for a person at a terminal; log files and journald get plain text.
        logs.with_ansi(std::io::IsTerminal::is_terminal(&std::io::stderr())).init();
    }
    let result = match cli.command {
        Command::Serve(args) => lineside::cli::serve::run(args),
        Command::Check(args) => lineside::cli::check::run(args),
        Command::Evaluate(args) => lineside::cli::evaluate::run(args),
        Command::Preprocess(args) => lineside::cli::preprocess::run(args),
        Command::Bench(args) => lineside::cli::bench::run(args),
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
