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
use std::net::SocketAddr;
use std::sync::Arc;

use anyhow::Context as _;
use hyper_util::rt::{TokioExecutor, TokioIo, TokioTimer};
use hyper_util::server::conn::auto::Builder;
use hyper_util::server::graceful::GracefulShutdown;
use hyper_util::service::TowerToHyperService;
use tokio::net::TcpListener;
use tokio::sync::{oneshot, watch};

use crate::access::{Access, Peer, tls};
use crate::batch::BatcherGuard;
use crate::config::Config;
use crate::http::access::Transport;
use crate::http::state::{AppState, InFlight, Readiness, RequestIds, RequestLimits, Served};
use crate::logging::LogControl;
use crate::metrics::Metrics;
use crate::model::StateWrap;
use crate::preprocess::pool::CpuPool;
use crate::reload::Reloader;
use crate::served::{LoadOptions, Loaded as LoadedModel};
use axum::http::Request;

/// Extra controls for tests.
#[derive(Default)]
pub struct RunOptions {
    /// Loading starts only when this resolves (tests hold it to observe `/readyz` = 503).
    pub load_gate: Option<oneshot::Receiver<()>>,
    /// Wraps every lane's engine state (tests put a fault-injecting engine around the real
    /// one to test lane recovery, deadlines and health).
    pub wrap_lanes: Option<StateWrap>,
    /// The running logger's filter, for `PUT /log-filter` (the CLI passes it).
    pub log: Option<Arc<LogControl>>,
    /// The command line's overrides, applied again when a reload reads the config file
    /// (`None`: the environment's defaults, as `lineside` without flags).
    pub overrides: Option<crate::config::Overrides>,
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
    // Listen for SIGHUP first: its default action ends the process, and a reload sent while
    // the models load must not.
    let hangup_signal = hangup_signal();
    let access = Arc::new(Access::load(config.server.access.clone()).map_err(anyhow::Error::msg)?);
    warn_about_access(&access, &listener);
    let metrics = Metrics::new();
    let (ready_tx, ready_rx) = watch::channel(Readiness::Loading("waiting to start".into()));
    let overrides = match options.overrides.clone() {
        Some(o) => o,
        None => crate::cli::base_overrides()?,
    };
    let reloader =
        Arc::new(Reloader::new(ready_tx.clone(), &config, overrides, metrics.clone(), options.wrap_lanes.clone()));
    let mut state = app_state(&config, ready_rx, metrics.clone(), Arc::clone(&access), options.log.clone())?;
    state.reloader = Some(Arc::clone(&reloader));
    let in_flight = Arc::clone(&state.in_flight);
    let app = crate::http::router(state);
    let connections = Connections::new(config.server.max_connections, metrics.clone());
    let mut loaded_rx = spawn_loader(config.clone(), ready_tx.clone(), metrics, options);
    let hangups = spawn_hangup_handler(hangup_signal, Arc::clone(&access), Arc::clone(&reloader));
    let watcher = reloader.spawn_watcher();

    let mut builder = Builder::new(TokioExecutor::new());
    builder
        .http1()
        .timer(TokioTimer::new())
        .header_read_timeout(config.server.header_timeout)
        // The parser's buffer: a request line and headers beyond it get hyper's own 431 (no
        // body) and a close; up to it, the router answers 431 in the API's error shape.
        .max_buf_size(header_buffer(config.server.max_header_bytes));
    builder.http2().max_header_list_size(u32::try_from(config.server.max_header_bytes).unwrap_or(u32::MAX));
    let graceful = GracefulShutdown::new();
    let handshake_timeout = config.server.header_timeout;
    let accept = |stream: tokio::net::TcpStream, peer: SocketAddr| {
        let _ = stream.set_nodelay(true);
        let tls = access.tls().map(|t| t.acceptor());
        let Some(slot) = connections.open() else {
            tokio::spawn(refuse_connection(stream, tls.is_some(), handshake_timeout));
            return;
        };
        let svc = connection_service(app.clone(), peer, tls.is_some());
        let (builder, watcher) = (builder.clone(), graceful.watcher());
        tokio::spawn(async move {
            let _slot = slot;
            let ended = match tls {
                None => {
                    watcher.watch(builder.serve_connection_with_upgrades(TokioIo::new(stream), svc).into_owned()).await
                }
                Some(acceptor) => match handshake(stream, acceptor, handshake_timeout, peer).await {
                    Some(stream) => {
                        watcher
                            .watch(builder.serve_connection_with_upgrades(TokioIo::new(stream), svc).into_owned())
                            .await
                    }
                    None => return,
                },
            };
            if let Err(e) = ended {
                tracing::debug!(cause = %e, "connection ended with an error");
            }
        });
    };
    let s = &config.server;
    tracing::info!(
        addr = %listener.local_addr()?,
        scheme = if access.tls().is_some() { "https" } else { "http" },
        http_threads = s.http_threads,
        decode_threads = s.decode_threads,
        decode_inline_pixels = s.decode_inline_pixels,
        "listening"
    );

    let Ended { loaded, failure } =
        serve_until(&listener, &accept, &mut loaded_rx, &ready_tx, &reloader, shutdown).await;

    // Drain: not ready at once, new classify requests refused with `draining`, the listener
    // still open, until every accepted request is answered or drain_ms passes. The map
    // drained is the one serving now (reloads may have replaced the one loaded at start).
    if loaded {
        let now = match &*ready_tx.borrow() {
            Readiness::Ready(s) => Arc::clone(s),
            _ => Arc::new(Served::new()),
        };
        let _ = ready_tx.send(Readiness::Draining(now));
        drain(&listener, &accept, &in_flight, config.server.drain).await;
    }
    // Stops the lanes; anything still queued is answered `draining`. Give those answers a
    // moment to be written before the connections close.
    reloader.stop_all();
    let tail = tokio::time::Instant::now() + ANSWER_TAIL;
    while in_flight.count() > 0 && tokio::time::Instant::now() < tail {
        tokio::time::sleep(POLL).await;
    }
    drop(listener);
    hangups.abort();
    watcher.abort();
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

/// The connections open now, bounded by `max_connections`.
struct Connections {
    open: Arc<std::sync::atomic::AtomicUsize>,
    max: usize,
    metrics: Metrics,
}

/// One open connection's place; given back when dropped (the connection's task ends).
struct Slot {
    open: Arc<std::sync::atomic::AtomicUsize>,
    metrics: Metrics,
}

impl Connections {
    fn new(max: usize, metrics: Metrics) -> Connections {
        Connections { open: Arc::new(std::sync::atomic::AtomicUsize::new(0)), max, metrics }
    }

    /// A place for one more connection, or `None` when `max` are open (counted as refused).
    fn open(&self) -> Option<Slot> {
        use std::sync::atomic::Ordering;
        // Only the accept loop takes places, so a load and an add cannot overshoot.
        let now = self.open.load(Ordering::SeqCst);
        if now >= self.max {
            self.metrics.count_connection_refused();
            return None;
        }
        self.open.fetch_add(1, Ordering::SeqCst);
        self.metrics.set_connections_open(now + 1);
        Some(Slot { open: Arc::clone(&self.open), metrics: self.metrics.clone() })
    }
}

impl Drop for Slot {
    fn drop(&mut self) {
        let now = self.open.fetch_sub(1, std::sync::atomic::Ordering::SeqCst) - 1;
        self.metrics.set_connections_open(now);
    }
}

/// The parser buffer for requests whose line and headers may take `max_header_bytes`: room
/// for them and some of the body (hyper's own minimum is 8 KiB).
fn header_buffer(max_header_bytes: usize) -> usize {
    (max_header_bytes + 64 * 1024).max(8192)
}

/// A connection beyond `max_connections`: plain HTTP gets a 503 in the API's error shape
/// with `Retry-After` and a close; on the HTTPS port the connection is closed (answering
/// would take a handshake, the work the limit is there to bound).
async fn refuse_connection(mut stream: tokio::net::TcpStream, tls: bool, timeout: std::time::Duration) {
    use axum::response::IntoResponse as _;
    use tokio::io::AsyncWriteExt as _;
    if !tls {
        // The API's own answer for the kind (status, Retry-After, error body), written by hand:
        // no HTTP connection is set up for it.
        let (parts, body) = crate::http::error::ApiError::new(
            crate::http::error::ErrorKind::TooManyConnections,
            "server.max_connections connections are open; retry shortly, or close idle connections",
        )
        .into_response()
        .into_parts();
        let body = axum::body::to_bytes(body, usize::MAX).await.unwrap_or_default();
        let mut answer = format!("HTTP/1.1 {}\r\n", parts.status);
        for (name, value) in &parts.headers {
            answer.push_str(&format!("{name}: {}\r\n", value.to_str().unwrap_or_default()));
        }
        answer.push_str(&format!("connection: close\r\ncontent-length: {}\r\n\r\n", body.len()));
        let mut bytes = answer.into_bytes();
        bytes.extend_from_slice(&body);
        let _ = tokio::time::timeout(timeout, stream.write_all(&bytes)).await;
    }
    let _ = stream.shutdown().await;
    // Read what the client already sent (a bounded amount, briefly): closing with unread bytes
    // resets the connection, and a reset can discard the answer before the client reads it.
    // A small buffer: a flood of refused connections must stay cheap.
    let mut sink = [0u8; 1024];
    let until = tokio::time::Instant::now() + timeout.min(std::time::Duration::from_secs(1));
    let mut read = 0;
    while read < 64 * 1024 {
        match tokio::time::timeout_at(until, tokio::io::AsyncReadExt::read(&mut stream, &mut sink)).await {
            Ok(Ok(n)) if n > 0 => read += n,
            _ => break,
        }
    }
}

/// How the serving loop ended.
struct Ended {
    /// Whether the models loaded (the map itself is not kept here: holding it would keep
    /// every model's first version in memory after a reload replaced it).
    loaded: bool,
    /// A failed load ends serving at once.
    failure: Option<anyhow::Error>,
}

/// Accept connections until `shutdown` (or a failed load); the models arrive meanwhile.
async fn serve_until(
    listener: &TcpListener,
    accept: &impl Fn(tokio::net::TcpStream, SocketAddr),
    loaded_rx: &mut oneshot::Receiver<anyhow::Result<Loaded>>,
    ready_tx: &watch::Sender<Readiness>,
    reloader: &Reloader,
    shutdown: impl Future<Output = ()>,
) -> Ended {
    let mut ended = Ended { loaded: false, failure: None };
    let mut load_pending = true;
    tokio::pin!(shutdown);
    loop {
        tokio::select! {
            conn = listener.accept() => match conn {
                Ok((stream, peer)) => accept(stream, peer),
                Err(e) => backoff(e).await,
            },
            loaded = &mut *loaded_rx, if load_pending => {
                load_pending = false;
                match loaded.unwrap_or_else(|_| Err(anyhow::anyhow!("model loader vanished"))) {
                    Ok(loaded) => {
                        ended.loaded = true;
                        reloader.adopt(loaded.guards);
                        announce(ready_tx, loaded.served, &loaded.selftest_failures);
                    }
                    Err(e) => {
                        tracing::error!(cause = %format!("{e:#}"), "model loading failed");
                        let _ = ready_tx.send(Readiness::Failed(format!("model loading failed: {e:#}")));
                        ended.failure = Some(e);
                        return ended;
                    }
                }
            }
            () = &mut shutdown => return ended,
        }
    }
}

/// Keep accepting (answers say `draining`) until nothing is in flight or `drain` passes.
async fn drain(
    listener: &TcpListener,
    accept: &impl Fn(tokio::net::TcpStream, SocketAddr),
    in_flight: &InFlight,
    drain: std::time::Duration,
) {
    tracing::info!(in_flight = in_flight.count(), drain_ms = drain.as_millis() as u64, "draining");
    let until = tokio::time::Instant::now() + drain;
    while in_flight.count() > 0 {
        tokio::select! {
            conn = listener.accept() => match conn {
                Ok((stream, peer)) => accept(stream, peer),
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

/// The handlers' shared state, before any model is loaded.
fn app_state(
    config: &Config,
    readiness: watch::Receiver<Readiness>,
    metrics: Metrics,
    access: Arc<Access>,
    log: Option<Arc<LogControl>>,
) -> anyhow::Result<AppState> {
    let s = &config.server;
    let pool = CpuPool::new("decode", s.decode_threads, s.decode_backlog).context("cannot start the decode threads")?;
    let limits = RequestLimits {
        body_limit: s.body_limit_bytes,
        body_timeout: s.body_timeout,
        deadline: s.deadline,
        stall: s.stall,
        ready_backlog: s.ready_backlog,
        decode_inline_pixels: s.decode_inline_pixels,
        max_header_bytes: s.max_header_bytes,
        max_parts: s.max_parts,
        max_part_bytes: s.max_part_bytes,
    };
    Ok(AppState {
        readiness,
        metrics,
        pool,
        limits,
        in_flight: Arc::new(InFlight::default()),
        request_ids: Arc::new(RequestIds::new()),
        access,
        log,
        reloader: None,
    })
}

/// The app for one connection: each request learns its peer and whether it came over TLS.
fn connection_service(
    app: axum::Router,
    peer: SocketAddr,
    tls: bool,
) -> TowerToHyperService<
    impl tower::Service<
        Request<hyper::body::Incoming>,
        Response = axum::response::Response,
        Error = std::convert::Infallible,
        Future: Send,
    > + Clone,
> {
    TowerToHyperService::new(tower::ServiceExt::map_request(app, move |mut req: Request<hyper::body::Incoming>| {
        req.extensions_mut().insert(Peer(peer));
        req.extensions_mut().insert(Transport { tls });
        req
    }))
}

/// The TLS handshake of one connection, within `timeout`. A client that speaks plain HTTP
/// gets a 400 naming the scheme instead of a hang; failed handshakes (no client certificate
/// where one is required, an unknown CA) are logged and closed.
async fn handshake(
    stream: tokio::net::TcpStream,
    acceptor: tokio_rustls::TlsAcceptor,
    timeout: std::time::Duration,
    peer: SocketAddr,
) -> Option<tokio_rustls::server::TlsStream<tokio::net::TcpStream>> {
    use tokio::io::AsyncWriteExt as _;
    let deadline = tokio::time::Instant::now() + timeout;
    let mut first = [0u8; 1];
    let mut stream = stream;
    match tokio::time::timeout_at(deadline, stream.peek(&mut first)).await {
        Ok(Ok(1)) if first[0] != tls::HANDSHAKE_RECORD => {
            tracing::info!(%peer, "plain HTTP on the HTTPS port; answered 400");
            let _ = tokio::time::timeout(timeout, stream.write_all(&tls::plain_http_refusal())).await;
            let _ = stream.shutdown().await;
            return None;
        }
        Ok(Ok(1)) => {}
        _ => return None,
    }
    match tokio::time::timeout_at(deadline, acceptor.accept(stream)).await {
        Ok(Ok(s)) => Some(s),
        Ok(Err(e)) => {
            tracing::info!(%peer, cause = %e, "TLS handshake failed");
            None
        }
        Err(_) => {
            tracing::info!(%peer, "TLS handshake timed out");
            None
        }
    }
}

/// The SIGHUP stream (on Unix), registered at once.
#[cfg(unix)]
fn hangup_signal() -> Option<tokio::signal::unix::Signal> {
    use tokio::signal::unix::{SignalKind, signal};
    signal(SignalKind::hangup())
        .inspect_err(|e| tracing::warn!(cause = %e, "cannot listen for SIGHUP; token and certificate files are read at start only"))
        .ok()
}

#[cfg(not(unix))]
fn hangup_signal() -> Option<()> {
    None
}

/// SIGHUP re-reads the token files and certificates, then the config for the models
/// ([`Reloader::on_hangup`]). A part that fails keeps its previous value and the log says why.
#[cfg(unix)]
fn spawn_hangup_handler(
    signal: Option<tokio::signal::unix::Signal>,
    access: Arc<Access>,
    reloader: Arc<Reloader>,
) -> tokio::task::JoinHandle<()> {
    tokio::spawn(async move {
        let Some(mut hangups) = signal else { return };
        while hangups.recv().await.is_some() {
            match access.reload() {
                Ok(()) => tracing::info!("SIGHUP: token and certificate files read again"),
                Err(e) => tracing::error!(cause = %e, "SIGHUP: reading the access files again failed"),
            }
            reloader.on_hangup().await;
        }
    })
}

#[cfg(not(unix))]
fn spawn_hangup_handler(
    _signal: Option<()>,
    _access: Arc<Access>,
    _reloader: Arc<Reloader>,
) -> tokio::task::JoinHandle<()> {
    tokio::spawn(async {})
}

/// Say at start what a reader of the log needs to know about access.
fn warn_about_access(access: &Access, listener: &TcpListener) {
    let local = listener.local_addr().is_ok_and(|a| a.ip().is_loopback());
    if access.tls().is_none() && !local && (access.has_admin_token() || access.has_client_token()) {
        tracing::warn!(
            "tokens are configured but not TLS: they cross the network readable; set tls_cert and tls_key, or put a \
             TLS proxy in front (docs/security.md)"
        );
    }
    if !access.has_admin_token() {
        tracing::info!("no admin_token_file: admin actions are accepted from 127.0.0.1 and ::1 only");
    }
}

/// Load the models on a blocking thread (after the test's gate, if any); the result comes
/// back once on the returned channel. The loader owns nothing the server needs.
fn spawn_loader(
    config: Config,
    ready_tx: watch::Sender<Readiness>,
    metrics: Metrics,
    options: RunOptions,
) -> oneshot::Receiver<anyhow::Result<Loaded>> {
    let (loaded_tx, loaded_rx) = oneshot::channel();
    tokio::spawn(async move {
        if let Some(gate) = options.load_gate {
            let _ = gate.await;
        }
        let _ = ready_tx.send(Readiness::Loading(format!("loading {} model(s)", config.models.len())));
        let wrap = options.wrap_lanes;
        let result = tokio::task::spawn_blocking(move || load_all(&config, &metrics, wrap.as_ref()))
            .await
            .unwrap_or_else(|e| Err(anyhow::anyhow!("model loader panicked: {e}")));
        let _ = loaded_tx.send(result);
    });
    loaded_rx
}

/// Ready, or up but never ready when a self-test failed: the orchestrator keeps traffic
/// away and the reason is on `/readyz` and in the log.
fn announce(ready_tx: &watch::Sender<Readiness>, served: Arc<Served>, selftest_failures: &[String]) {
    if selftest_failures.is_empty() {
        tracing::info!(models = served.len(), "models loaded, accepting frames");
        let _ = ready_tx.send(Readiness::Ready(served));
    } else {
        let reason = format!("self-test failed: {}", selftest_failures.join("; "));
        tracing::error!(%reason, "not ready");
        let _ = ready_tx.send(Readiness::Failed(reason));
    }
}

/// The app with every model loaded, self-tested and ready, without a socket or an accept
/// loop: tests drive it with `tower::ServiceExt::oneshot` where a socket adds nothing.
/// Dropping the guards stops the lanes.
///
/// # Errors
/// A model that fails to load or its self-test; the decode pool cannot start.
pub fn ready_app(config: &Config, wrap: Option<&StateWrap>) -> anyhow::Result<(axum::Router, Vec<BatcherGuard>)> {
    let metrics = Metrics::new();
    let loaded = load_all(config, &metrics, wrap)?;
    anyhow::ensure!(loaded.selftest_failures.is_empty(), "self-test failed: {}", loaded.selftest_failures.join("; "));
    // The sender may go: the receiver keeps the last value, and nothing changes it again.
    let (_ready_tx, ready_rx) = watch::channel(Readiness::Ready(loaded.served));
    let state = app_state(
        config,
        ready_rx,
        metrics,
        Arc::new(Access::load(config.server.access.clone()).map_err(anyhow::Error::msg)?),
        None,
    )?;
    Ok((crate::http::router(state), loaded.guards.into_iter().map(|(_, g)| g).collect()))
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
    guards: Vec<(String, BatcherGuard)>,
    selftest_failures: Vec<String>,
}

/// Load every model through the one loading path, run its self-test and start its lanes.
fn load_all(config: &Config, metrics: &Metrics, wrap: Option<&StateWrap>) -> anyhow::Result<Loaded> {
    let mut served = Served::new();
    let mut guards = Vec::new();
    let mut selftest_failures = Vec::new();
    let opts = LoadOptions {
        limits: config.server.decode_limits(),
        models: config.models.len(),
        report: false,
        kept_stacking: None,
    };
    for mc in &config.models {
        let loaded = LoadedModel::load(mc, &opts)?;
        let model = &loaded.model;
        tracing::info!(
            model = %model.name,
            version = %model.version,
            load_ms = model.load_time.as_millis() as u64,
            lanes = loaded.lanes,
            "model loaded"
        );
        let selftest = loaded.selftest()?;
        if let Some(outcome) = &selftest {
            tracing::info!(model = %mc.name, samples = outcome.samples, failures = outcome.failures.len(), "self-test");
            selftest_failures.extend(outcome.failures.iter().map(|f| format!("model {:?}: {f}", mc.name)));
        }
        let (entry, guard) = loaded.start(metrics, wrap, selftest)?;
        guards.push((mc.name.clone(), guard));
        served.insert(mc.name.clone(), Arc::new(entry));
    }
    Ok(Loaded { served: Arc::new(served), guards, selftest_failures })
}
