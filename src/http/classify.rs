//! `POST /classify/{model}`: the body is one image; the answer is its top classes.
//!
//! The handler only strings stages together: look the model up, decode and preprocess on
//! the decode pool, queue on the model's batcher, shape the answer. Each failure maps to an
//! [`ApiError`] through `From`, so every request gets a precise status.

use std::time::{Duration, Instant};

use axum::Json;
use axum::body::Bytes;
use axum::extract::rejection::{BytesRejection, QueryRejection};
use axum::extract::{Path, Query, State};
use serde::{Deserialize, Serialize};

use super::error::{ApiError, ErrorKind};
use super::state::{AppState, Readiness, ServedModel};
use crate::model::top_k;

/// Query parameters.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Params {
    /// `?top=K` (1 ..; clamped to the number of labels) or `?top=all`. Default 3.
    top: Option<String>,
}

/// One ranked class.
#[derive(Debug, Serialize)]
pub struct Ranked {
    /// Class name.
    pub label: String,
    /// Probability.
    pub score: f32,
}

/// Where the time went, in milliseconds.
#[derive(Debug, Serialize)]
pub struct Timing {
    /// Decoding the image.
    pub decode: f64,
    /// Converting, resizing, normalising.
    pub preprocess: f64,
    /// Waiting in the backlog for a lane.
    pub wait: f64,
    /// The engine's run for this image.
    pub infer: f64,
    /// From arrival to answer (includes waiting for a decode thread).
    pub total: f64,
}

/// A classification answer.
#[derive(Debug, Serialize)]
pub struct Answer {
    /// Model name.
    pub model: String,
    /// Model version (SHA-256 prefix of the ONNX file).
    pub version: String,
    /// Top-1 class.
    pub label: String,
    /// Its probability.
    pub score: f32,
    /// The top K classes, best first.
    pub top: Vec<Ranked>,
    /// Timings.
    pub timing_ms: Timing,
}

fn ms(d: Duration) -> f64 {
    (d.as_secs_f64() * 1e6).round() / 1e3
}

/// Parse `?top=`: default 3, `all`, or a positive integer clamped to `labels`.
pub fn parse_top(raw: Option<&str>, labels: usize) -> Result<usize, ApiError> {
    let k = match raw {
        None => 3,
        Some("all") => labels,
        Some(s) => match s.parse::<usize>() {
            Ok(0) | Err(_) => {
                return Err(ApiError::new(
                    ErrorKind::BadRequest,
                    format!("top = {s:?}: expected a positive integer or \"all\""),
                ));
            }
            Ok(k) => k,
        },
    };
    Ok(k.min(labels))
}

/// The handler.
pub async fn classify(
    State(state): State<AppState>,
    Path(name): Path<String>,
    params: Result<Query<Params>, QueryRejection>,
    body: Result<Bytes, BytesRejection>,
) -> Result<Json<Answer>, ApiError> {
    let arrived = Instant::now();
    let served = match &*state.readiness.borrow() {
        Readiness::Ready(s) | Readiness::Draining(s) => s.clone(),
        Readiness::Loading(what) => {
            return Err(ApiError::new(ErrorKind::NotReady, format!("not ready yet: {what}")));
        }
        Readiness::Failed(why) => {
            return Err(ApiError::new(ErrorKind::NotReady, format!("model loading failed: {why}")));
        }
    };
    let Some(m) = served.get(&name) else {
        let known: Vec<&str> = served.keys().map(String::as_str).collect();
        return Err(ApiError::new(
            ErrorKind::UnknownModel,
            format!("no model named {name:?}; this server has {known:?}"),
        ));
    };
    let result = answer(&state, m, params, body, arrived).await;
    let outcome = match &result {
        Ok(_) => "ok",
        Err(e) => e.kind.as_str(),
    };
    m.metrics.observe_request(outcome, arrived.elapsed().as_secs_f64());
    result.map(Json)
}

async fn answer(
    state: &AppState,
    m: &ServedModel,
    params: Result<Query<Params>, QueryRejection>,
    body: Result<Bytes, BytesRejection>,
    arrived: Instant,
) -> Result<Answer, ApiError> {
    let Query(params) = params.map_err(|e| ApiError::new(ErrorKind::BadRequest, e.body_text()))?;
    let top = parse_top(params.top.as_deref(), m.model.labels.len())?;
    let body = body.map_err(|e| {
        if e.status() == axum::http::StatusCode::PAYLOAD_TOO_LARGE {
            ApiError::new(
                ErrorKind::TooLarge,
                format!("the body is larger than server.body_limit_bytes = {}", state.body_limit),
            )
        } else {
            ApiError::new(ErrorKind::BadRequest, format!("cannot read the body: {}", e.body_text()))
        }
    })?;

    let pipeline = m.pipeline.clone();
    let prepared = state.pool.run(move || pipeline.run(&body)).await??;
    m.metrics.preprocess_duration.observe((prepared.decode + prepared.preprocess).as_secs_f64());
    let (decode, preprocess) = (prepared.decode, prepared.preprocess);
    let scored = m.batcher.infer(prepared.tensor).await?;

    let labels = &m.model.labels;
    let order = top_k(&scored.scores, top);
    // top >= 1 and labels >= 1 (checked at load), so the order has a first entry.
    let best = order[0];
    let ranked: Vec<Ranked> =
        order.into_iter().map(|i| Ranked { label: labels[i].clone(), score: scored.scores[i] }).collect();
    Ok(Answer {
        model: m.model.name.clone(),
        version: m.model.version.clone(),
        label: labels[best].clone(),
        score: scored.scores[best],
        top: ranked,
        timing_ms: Timing {
            decode: ms(decode),
            preprocess: ms(preprocess),
            wait: ms(scored.wait),
            infer: ms(scored.infer),
            total: ms(arrived.elapsed()),
        },
    })
}

#[cfg(test)]
mod tests {
    use super::parse_top;

    #[test]
    fn top_defaults_clamps_and_refuses_zero() {
        assert_eq!(parse_top(None, 5).unwrap(), 3);
        assert_eq!(parse_top(None, 2).unwrap(), 2);
        assert_eq!(parse_top(Some("all"), 5).unwrap(), 5);
        assert_eq!(parse_top(Some("9"), 5).unwrap(), 5);
        assert_eq!(parse_top(Some("1"), 5).unwrap(), 1);
        for bad in ["0", "-1", "two", ""] {
            let e = parse_top(Some(bad), 5).unwrap_err();
            assert_eq!(e.kind.as_str(), "bad_request", "{bad}");
        }
    }
}
