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
use serde_json::{Value, json};

use super::error::{ApiError, ErrorKind};
use super::state::{AppState, Readiness};

/// 200 while the process and its lanes are alive; 503 `stalled` when a lane has run one pass
/// for longer than `server.stall_ms`. Answers while models load and while the cores are busy.
pub async fn healthz(State(state): State<AppState>) -> Result<Json<Value>, ApiError> {
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
        return Ok(Json(json!({ "live": true })));
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
pub async fn readyz(State(state): State<AppState>) -> Result<Json<Value>, ApiError> {
    let served = match &*state.readiness.borrow() {
        Readiness::Ready(served) => served.clone(),
        Readiness::Loading(what) => return Err(ApiError::new(ErrorKind::NotReady, format!("loading: {what}"))),
        Readiness::Failed(why) => return Err(ApiError::new(ErrorKind::NotReady, why.clone())),
        Readiness::Draining(_) => {
            return Err(ApiError::new(ErrorKind::Draining, "shutting down: answering the requests in flight"));
        }
    };
    let share = state.limits.ready_backlog;
    let models: Vec<Value> = served
        .values()
        .map(|m| {
            let (depth, size) = m.batcher.depth();
            let full = depth as f64 >= share * size as f64;
            let mut v = json!({ "name": m.model.name, "version": m.model.version, "ready": !full, "backlog": depth });
            if full {
                v["reason"] = json!(format!(
                    "backlog holds {depth} of {size} requests, at or above server.ready_backlog = {share}"
                ));
            }
            v
        })
        .collect();
    if models.iter().all(|m| m["ready"] == json!(true)) {
        return Ok(Json(json!({ "ready": true, "models": models })));
    }
    let names: Vec<&str> =
        models.iter().filter(|m| m["ready"] == json!(false)).filter_map(|m| m["name"].as_str()).collect();
    Err(ApiError::new(ErrorKind::NotReady, format!("model(s) {names:?} not ready: backlog nearly full"))
        .with_details(json!({ "models": models })))
}

/// The registry in the Prometheus text format (version 0.0.4).
pub async fn metrics(State(state): State<AppState>) -> impl IntoResponse {
    ([(header::CONTENT_TYPE, "text/plain; version=0.0.4; charset=utf-8")], state.metrics.render())
}
