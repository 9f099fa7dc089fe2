//! The server's life: bind first, then load; serve; on shutdown, drain and stop the lanes.
//!
//! [`run`] takes a bound listener and a shutdown future, so tests drive it on port 0 with a
//! future they control. It marks the server `Loading`, loads every model on a blocking
//! thread (optionally held by a test's `load_gate`), and serves meanwhile, so `/healthz`
//! answers and `/readyz` says 503 until the models are warm.
//!
//! The accept loop is our own (hyper-util) rather than `axum::serve`: the latter has no
//! header-read timeout, and a client that sends half its headers held its graceful shutdown
//! for over 45 s (FACTS.md). Here HTTP/1 connections must send their headers within
//! `header_timeout_ms`, and the drain is bounded by `drain_ms`.

use std::future::Future;
use std::sync::Arc;

use anyhow::Context as _;
use hyper_util::rt::{TokioExecutor, TokioIo, TokioTimer};
use hyper_util::server::conn::auto::Builder;
use hyper_util::server::graceful::GracefulShutdown;
use hyper_util::service::TowerToHyperService;
use tokio::net::TcpListener;
use tokio::sync::{oneshot, watch};

use crate::batch::{Batcher, BatcherGuard, FaultPlan};
use crate::config::Config;
use crate::http::state::{AppState, InFlight, Readiness, RequestIds, RequestLimits, Served, ServedModel};
use crate::metrics::Metrics;
use crate::model::load;
use crate::preprocess::Pipeline;
use crate::preprocess::pool::CpuPool;
use crate::selftest;

/// Extra controls for tests.
#[derive(Default)]
pub struct RunOptions {
    /// Loading starts only when this resolves (tests hold it to observe `/readyz` = 503).
    pub load_gate: Option<oneshot::Receiver<()>>,
    /// A fault to inject into every model's lanes (tests of lane recovery).
    #[doc(hidden)]
    pub fault: FaultPlan,
}

/// Serve `config` on `listener` until `shutdown` resolves, then drain.
///
/// Draining: `/readyz` turns 503 at once and new classify requests get 503 `draining`, while
/// the listener stays open and every request already accepted is answered. Once none is left,
/// or after `drain_ms`, the lanes stop (whatever still waits is answered 503 `draining`) and
/// `run` returns.
///
/// # Errors
/// When a model fails to load (the process should exit non-zero so that the orchestrator
/// sees it), or the decode pool cannot start.
pub async fn run(
    config: Config,
    listener: TcpListener,
    shutdown: impl Future<Output = ()> + Send,
    options: RunOptions,
) -> anyhow::Result<()> {
    let metrics = Metrics::new();
    let pool = CpuPool::new("decode", config.server.decode_threads, config.server.decode_backlog)
        .context("cannot start the decode threads")?;
    let (ready_tx, ready_rx) = watch::channel(Readiness::Loading("waiting to start".into()));
    let s = &config.server;
    let limits = RequestLimits {
        body_limit: s.body_limit_bytes,
        body_timeout: s.body_timeout,
        deadline: s.deadline,
        stall: s.stall,
        ready_backlog: s.ready_backlog,
        decode_inline_pixels: s.decode_inline_pixels,
    };
    let in_flight = Arc::new(InFlight::default());
    let state = AppState {
        readiness: ready_rx,
        metrics: metrics.clone(),
        pool,
        limits,
        in_flight: Arc::clone(&in_flight),
        request_ids: Arc::new(RequestIds::new()),
    };
    let app = crate::http::router(state);

    // The loader owns nothing the server needs; it reports back once.
    let (loaded_tx, mut loaded_rx) = oneshot::channel::<anyhow::Result<Loaded>>();
    {
        let config = config.clone();
        let ready_tx = ready_tx.clone();
        let gate = options.load_gate;
        let fault = options.fault;
        tokio::spawn(async move {
            if let Some(gate) = gate {
                let _ = gate.await;
            }
            let _ = ready_tx.send(Readiness::Loading(format!("loading {} model(s)", config.models.len())));
            let result = tokio::task::spawn_blocking(move || load_all(&config, &metrics, &fault))
                .await
                .unwrap_or_else(|e| Err(anyhow::anyhow!("model loader panicked: {e}")));
            let _ = loaded_tx.send(result);
        });
    }

    let mut builder = Builder::new(TokioExecutor::new());
    builder.http1().timer(TokioTimer::new()).header_read_timeout(config.server.header_timeout);
    let graceful = GracefulShutdown::new();
    let accept = |stream: tokio::net::TcpStream| {
        let _ = stream.set_nodelay(true);
        let svc = TowerToHyperService::new(app.clone());
        let conn = builder.serve_connection_with_upgrades(TokioIo::new(stream), svc).into_owned();
        let conn = graceful.watch(conn);
        tokio::spawn(async move {
            if let Err(e) = conn.await {
                tracing::debug!(cause = %e, "connection ended with an error");
            }
        });
    };
    let mut guards: Vec<BatcherGuard> = Vec::new();
    let mut served: Option<Arc<Served>> = None;
    let mut load_pending = true;
    let mut failure: Option<anyhow::Error> = None;
    tokio::pin!(shutdown);
    tracing::info!(
        addr = %listener.local_addr()?,
        http_threads = s.http_threads,
        decode_threads = s.decode_threads,
        decode_inline_pixels = s.decode_inline_pixels,
        "listening"
    );

    loop {
        tokio::select! {
            conn = listener.accept() => match conn {
                Ok((stream, _)) => accept(stream),
                Err(e) => backoff(e).await,
            },
            loaded = &mut loaded_rx, if load_pending => {
                load_pending = false;
                match loaded {
                    Ok(Ok(loaded)) => {
                        served = Some(loaded.served.clone());
                        guards = loaded.guards;
                        if loaded.selftest_failures.is_empty() {
                            tracing::info!(models = loaded.served.len(), "models loaded, accepting frames");
                            let _ = ready_tx.send(Readiness::Ready(loaded.served));
                        } else {
                            // Stay up, but never ready: the orchestrator keeps traffic away and
                            // the reason is on /readyz and in the log.
                            let reason = format!("self-test failed: {}", loaded.selftest_failures.join("; "));
                            tracing::error!(%reason, "not ready");
                            let _ = ready_tx.send(Readiness::Failed(reason));
                        }
                    }
                    Ok(Err(e)) => {
                        tracing::error!(cause = %format!("{e:#}"), "model loading failed");
                        let _ = ready_tx.send(Readiness::Failed(format!("model loading failed: {e:#}")));
                        failure = Some(e);
                        break;
                    }
                    Err(_) => {
                        failure = Some(anyhow::anyhow!("model loader vanished"));
                        break;
                    }
                }
            }
            () = &mut shutdown => break,
        }
    }

    // Drain: not ready at once, new classify requests refused with `draining`, the listener
    // still open, until every accepted request is answered or drain_ms passes.
    let drain = config.server.drain;
    if let Some(s) = served {
        let _ = ready_tx.send(Readiness::Draining(s));
        tracing::info!(in_flight = in_flight.count(), drain_ms = drain.as_millis() as u64, "draining");
        let until = tokio::time::Instant::now() + drain;
        while in_flight.count() > 0 {
            tokio::select! {
                conn = listener.accept() => match conn {
                    Ok((stream, _)) => accept(stream),
                    Err(e) => backoff(e).await,
                },
                () = tokio::time::sleep_until(until) => {
                    tracing::warn!(in_flight = in_flight.count(), "drain deadline passed; answering the rest `draining`");
                    break;
                }
                () = tokio::time::sleep(POLL) => {}
            }
        }
    }
    // Stops the lanes; anything still queued is answered `draining`. Give those answers a
    // moment to be written before the connections close.
    drop(guards);
    let tail = tokio::time::Instant::now() + ANSWER_TAIL;
    while in_flight.count() > 0 && tokio::time::Instant::now() < tail {
        tokio::time::sleep(POLL).await;
    }
    drop(listener);
    if tokio::time::timeout(ANSWER_TAIL, graceful.shutdown()).await.is_err() {
        tracing::warn!("connections still open after the drain; closing them");
    }
    match failure {
        Some(e) => Err(e),
        None => {
            tracing::info!("stopped");
            Ok(())
        }
    }
}

/// How often the drain looks at the in-flight count.
const POLL: std::time::Duration = std::time::Duration::from_millis(5);
/// Longest wait for the last answers and idle connections after the lanes stop.
const ANSWER_TAIL: std::time::Duration = std::time::Duration::from_secs(2);

/// After a failed accept (typically EMFILE): back off instead of spinning.
async fn backoff(e: std::io::Error) {
    tracing::warn!(cause = %e, "accept failed");
    tokio::time::sleep(std::time::Duration::from_millis(50)).await;
}

/// What the loader hands the server.
struct Loaded {
    served: Arc<Served>,
    guards: Vec<BatcherGuard>,
    selftest_failures: Vec<String>,
}

/// Load every model, run its self-test and start its lanes.
fn load_all(config: &Config, metrics: &Metrics, fault: &FaultPlan) -> anyhow::Result<Loaded> {
    let mut served = Served::new();
    let mut guards = Vec::new();
    let mut selftest_failures = Vec::new();
    for mc in &config.models {
        let model = Arc::new(load::load(mc).with_context(|| format!("model {:?}", mc.name))?);
        tracing::info!(
            model = %model.name,
            version = %model.version,
            load_ms = model.load_time.as_millis() as u64,
            "model loaded"
        );
        let mm = metrics.for_model(&mc.name, &model.version, model.engine().name(), &model.labels);
        let (batcher, guard) = Batcher::start(Arc::clone(&model), &mc.batching, mm.clone(), fault.clone())?;
        let pipeline = Pipeline::new(mc.preprocess.clone(), &model.contract, config.server.max_pixels);
        let mut selftest = None;
        if let Some(st) = &mc.selftest {
            let samples = selftest::Samples::read(st).with_context(|| format!("model {:?}: self-test", mc.name))?;
            let outcome = selftest::run(&model, &pipeline, &samples, st.tolerance);
            tracing::info!(model = %mc.name, samples = outcome.samples, failures = outcome.failures.len(), "self-test");
            selftest_failures.extend(outcome.failures.iter().map(|f| format!("model {:?}: {f}", mc.name)));
            selftest = Some(outcome);
        }
        guards.push(guard);
        let lanes = batcher.lanes();
        let entry = ServedModel {
            model,
            pipeline: Arc::new(pipeline),
            batcher,
            metrics: mm,
            min_score: mc.min_score,
            batching: mc.batching.clone(),
            lanes,
            selftest,
        };
        served.insert(mc.name.clone(), entry);
    }
    Ok(Loaded { served: Arc::new(served), guards, selftest_failures })
}
