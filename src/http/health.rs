//! Probes and metrics: `GET /healthz` (alive), `GET /readyz` (models loaded and warmed),
//! `GET /metrics` (Prometheus text format).

use axum::Json;
use axum::extract::State;
use axum::http::header;
use axum::response::IntoResponse;
use serde_json::{Value, json};

use super::error::{ApiError, ErrorKind};
use super::state::{AppState, Readiness};

/// 200 while the process serves HTTP. Answers even while models load or the cores are busy.
pub async fn healthz() -> Json<Value> {
    Json(json!({ "live": true }))
}

/// 200 once every model is loaded and warmed; 503 `not_ready` with the reason otherwise.
pub async fn readyz(State(state): State<AppState>) -> Result<Json<Value>, ApiError> {
    match &*state.readiness.borrow() {
        Readiness::Ready(served) => {
            let models: Vec<Value> =
                served.values().map(|m| json!({ "name": m.model.name, "version": m.model.version })).collect();
            Ok(Json(json!({ "ready": true, "models": models })))
        }
        Readiness::Loading(what) => Err(ApiError::new(ErrorKind::NotReady, format!("loading: {what}"))),
        Readiness::Failed(why) => Err(ApiError::new(ErrorKind::NotReady, why.clone())),
        Readiness::Draining(_) => Err(ApiError::new(ErrorKind::NotReady, "shutting down: draining requests in flight")),
    }
}

/// The registry in the Prometheus text format (version 0.0.4).
pub async fn metrics(State(state): State<AppState>) -> impl IntoResponse {
    ([(header::CONTENT_TYPE, "text/plain; version=0.0.4; charset=utf-8")], state.metrics.render())
}
