//! `lineside serve`: bind the listener, then hand over to [`crate::server::run`].

use anyhow::Context as _;

use super::{ConfigArg, Outcome};
use crate::config::{BatchingOverrides, Config, Overrides};
use crate::model::EngineKind;

/// Arguments of `lineside serve`.
#[derive(Debug, clap::Args)]
pub struct ServeArgs {
    /// Config file.
    #[command(flatten)]
    pub config: ConfigArg,
    /// Address to listen on (overrides `[server] listen`), e.g. 0.0.0.0:8080.
    #[arg(long, value_name = "ADDR")]
    pub listen: Option<String>,
    /// Batching settings for every model, overriding `[models.batching]` (for trials; `lineside
    /// bench --try-settings` uses them).
    #[command(flatten)]
    pub batching: BatchingArgs,
    /// Engine for every model, overriding each model's `engine`: tract, or onnxruntime in a
    /// build with that feature.
    #[arg(long, value_name = "NAME")]
    pub engine: Option<EngineKind>,
    /// Threads that run HTTP (overrides `[server] http_threads`).
    #[arg(long, value_name = "N")]
    pub http_threads: Option<usize>,
}

/// `[models.batching]` keys as flags.
#[derive(Debug, Default, clap::Args)]
pub struct BatchingArgs {
    /// Override `batch_cap` for every model.
    #[arg(long, value_name = "N")]
    pub batch_cap: Option<usize>,
    /// Override `gather_us` for every model.
    #[arg(long, value_name = "US")]
    pub gather_us: Option<u64>,
    /// Override `lanes` for every model (a number or "auto").
    #[arg(long, value_name = "N|auto")]
    pub lanes: Option<String>,
    /// Override `lane_threads` for every model.
    #[arg(long, value_name = "N")]
    pub lane_threads: Option<usize>,
}

impl BatchingArgs {
    /// As config overrides.
    pub fn overrides(&self) -> BatchingOverrides {
        BatchingOverrides {
            batch_cap: self.batch_cap,
            gather_us: self.gather_us,
            lanes: self.lanes.clone(),
            lane_threads: self.lane_threads,
        }
    }
}

/// Run the server until Ctrl-C or SIGTERM.
///
/// # Errors
/// Config errors, a port that cannot be bound, a model that fails to load.
pub fn run(args: ServeArgs, log: Option<std::sync::Arc<crate::logging::LogControl>>) -> anyhow::Result<Outcome> {
    let overrides = Overrides {
        listen: args.listen,
        batching: args.batching.overrides(),
        engine: args.engine,
        http_threads: args.http_threads,
        ..super::base_overrides()?
    };
    let config = Config::load(args.config.config.as_deref(), &overrides)?;
    // One HTTP thread by default: on a small box the lanes own the cores, and every extra
    // async worker is one more thread to wake per request (docs/performance.md).
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(config.server.http_threads)
        .enable_all()
        .thread_name("lineside-http")
        .build()
        .context("cannot start the async runtime")?;
    runtime.block_on(async move {
        let addr = config.server.listen;
        let listener = tokio::net::TcpListener::bind(addr).await.with_context(|| format!("cannot listen on {addr}"))?;
        tracing::info!(config = %config.origin, "starting");
        let options = crate::server::RunOptions { log, overrides: Some(overrides), ..Default::default() };
        crate::server::run(config, listener, crate::shutdown::signal(), options).await
    })?;
    Ok(Outcome::Ok)
}
