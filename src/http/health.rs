//! Probes and metrics: `GET /healthz` (alive), `GET /readyz` (ready for traffic),
//! `GET /metrics` (Prometheus text format).
//!
//! Liveness is about the process: it fails only when a lane has been stuck in one pass longer
//! than `server.stall_ms` (an orchestrator should restart it). Readiness is about traffic:
//! every model loaded, warmed and self-tested, not draining, and each backlog below
//! `server.ready_backlog` of its size; the body says which model is not ready and why.

use std::time::Instant;

use axum::Json;
use axum::extract::State;
use axum::http::header;
use axum::response::IntoResponse;
use serde::Serialize;
use serde_json::{Value, json};

use super::error::{ApiError, ErrorKind};
use super::state::{AppState, Readiness};

/// The body of a 200 from `/healthz`.
#[derive(Debug, Serialize)]
pub struct Alive {
    /// Always true (a process that is not alive does not answer).
    pub alive: bool,
    /// Inference lanes running, over every model (0 while the models load).
    pub lanes: usize,
}

/// The body of a 200 from `/readyz`, and one model's entry in it (or in a 503's details).
#[derive(Debug, Serialize)]
pub struct Accepting {
    /// Whether frames are accepted.
    pub accepting: bool,
    /// Each model's state.
    pub models: Vec<ModelAccepting>,
}

/// One model's readiness.
#[derive(Debug, Serialize)]
pub struct ModelAccepting {
    /// The model's name.
    pub name: String,
    /// The model file's version (SHA-256 prefix).
    pub version: String,
    /// Whether this model takes frames now.
    pub accepting: bool,
    /// Requests waiting for a lane.
    pub backlog: usize,
    /// Why not, when it does not.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub reason: Option<String>,
}

/// 200 while the process and its lanes are alive; 503 `stalled` when a lane has run one pass
/// for longer than `server.stall_ms`. Answers while models load and while the cores are busy.
pub async fn healthz(State(state): State<AppState>) -> Result<Json<Alive>, ApiError> {
    let served = match &*state.readiness.borrow() {
        Readiness::Ready(s) | Readiness::Draining(s) => Some(s.clone()),
        Readiness::Loading(_) | Readiness::Failed(_) => None,
    };
    let now = Instant::now();
    let stalled: Vec<Value> = served
        .iter()
        .flat_map(|s| s.values())
        .filter_map(|m| {
            let busy = m.batcher.longest_pass(now)?;
            (busy > state.limits.stall).then(|| json!({ "model": m.model.name, "pass_ms": busy.as_millis() as u64 }))
        })
        .collect();
    if stalled.is_empty() {
        let lanes = served.iter().flat_map(|s| s.values()).map(|m| m.batcher.lanes()).sum();
        return Ok(Json(Alive { alive: true, lanes }));
    }
    Err(ApiError::new(
        ErrorKind::Stalled,
        format!(
            "an inference lane has been in one pass longer than server.stall_ms = {}; restart the process",
            state.limits.stall.as_millis()
        ),
    )
    .with_details(json!({ "stalled": stalled })))
}

/// 200 with every model when ready; 503 `not_ready` (loading, failed, backlog nearly full) or
/// `draining`, with the reason per model in `error.details.models`.
pub async fn readyz(State(state): State<AppState>) -> Result<Json<Accepting>, ApiError> {
    let served = match &*state.readiness.borrow() {
        Readiness::Ready(served) => served.clone(),
        Readiness::Loading(what) => return Err(ApiError::new(ErrorKind::NotReady, format!("loading: {what}"))),
        Readiness::Failed(why) => return Err(ApiError::new(ErrorKind::NotReady, why.clone())),
        Readiness::Draining(_) => {
            return Err(ApiError::new(ErrorKind::Draining, "shutting down: answering the requests in flight"));
        }
    };
    let share = state.limits.ready_backlog;
    let models: Vec<ModelAccepting> = served
        .values()
        .map(|m| {
            let (depth, size) = m.batcher.depth();
            let full = depth as f64 >= share * size as f64;
            ModelAccepting {
                name: m.model.name.clone(),
                version: m.model.version.clone(),
                accepting: !full,
                backlog: depth,
                reason: full.then(|| {
                    format!("backlog holds {depth} of {size} requests, at or above server.ready_backlog = {share}")
                }),
            }
        })
        .collect();
    if models.iter().all(|m| m.accepting) {
        return Ok(Json(Accepting { accepting: true, models }));
    }
    let names: Vec<&str> = models.iter().filter(|m| !m.accepting).map(|m| m.name.as_str()).collect();
    let message = format!("model(s) {names:?} not accepting frames: backlog nearly full");
    Err(ApiError::new(ErrorKind::NotReady, message).with_details(json!({ "models": models })))
}

/// The registry in the Prometheus text format (version 0.0.4).
pub async fn metrics(State(state): State<AppState>) -> impl IntoResponse {
    // The backlog gauges are read from the backlogs at scrape time: set by the senders and
    // the lanes, they raced (a sender's late write could leave a drained backlog at 1).
    state.metrics.set_in_flight(state.in_flight.count());
    if let Ok(served) = state.readiness.borrow().served(true) {
        for m in served.values() {
            m.metrics.backlog_depth.set(m.batcher.depth().0 as i64);
        }
    }
    ([(header::CONTENT_TYPE, "text/plain; version=0.0.4; charset=utf-8")], state.metrics.render())
}
