//! `GET /models` and `GET /models/{model}`: each served model's contract, as an operator or
//! a client library needs it: input shape, layout and type, preprocessing, labels, batching,
//! engine, version, load time and self-test result.

use axum::Json;
use axum::extract::{Path, State};
use serde_json::{Value, json};

use super::error::ApiError;
use super::state::{AppState, ServedModel, find};

fn describe(m: &ServedModel) -> Value {
    let c = &m.model.contract;
    let b = &m.batching;
    json!({
        "name": m.model.name,
        "version": m.model.version,
        "engine": m.model.engine().name(),
        "stacked_passes": m.model.stacks(),
        "stacking": m.model.stacking,
        "file": m.model.file,
        "load_ms": (m.model.load_time.as_secs_f64() * 1e3 * 1e3).round() / 1e3,
        "input": {
            "name": c.input_name,
            "shape": c.input_shape,
            "served_shape": c.input_shape(1),
            "layout": c.layout,
            "type": c.input_type,
            "channels": c.channels,
            "width": c.width,
            "height": c.height,
        },
        "output": { "name": c.output_name, "shape": c.output_shape, "scores": c.scores },
        "labels": m.model.labels,
        "min_score": m.min_score,
        "preprocess": m.pipeline.config(),
        "batching": {
            "batch_cap": b.batch_cap,
            "gather_us": b.gather.as_micros() as u64,
            "backlog": b.backlog,
            "lanes": m.lanes,
            "lane_threads": b.lane_threads,
        },
        "selftest": m.selftest,
    })
}

/// Every served model.
pub async fn list(State(state): State<AppState>) -> Result<Json<Value>, ApiError> {
    let s = state.readiness.borrow().served(true)?;
    Ok(Json(json!({ "models": s.values().map(describe).collect::<Vec<_>>() })))
}

/// One model.
pub async fn one(State(state): State<AppState>, Path(name): Path<String>) -> Result<Json<Value>, ApiError> {
    let s = state.readiness.borrow().served(true)?;
    Ok(Json(describe(find(&s, &name)?)))
}
