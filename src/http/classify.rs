//! `POST /classify/{model}`: the body is one image, or `multipart/form-data` with one image
//! per part; the answer is the top classes of each.
//!
//! The handler only strings stages together: check readiness and the model, fix the
//! request's deadline, read the body (bounded in size and time), decode and preprocess (here
//! for a frame of at most `server.decode_inline_pixels`, else on the decode pool), queue on
//! the model's batcher, shape the answer. Each failure maps to an
//! [`ApiError`] through `From`, so every request gets a precise status. The whole request
//! runs under its deadline: past it the answer is 504 `deadline`, and a job still queued is
//! never run.

use std::time::Instant;

use axum::Json;
use axum::body::{Body, Bytes};
use axum::extract::{Path, RawQuery, State};
use axum::http::HeaderMap;
use axum::response::{IntoResponse, Response};
use http_body_util::{BodyExt as _, LengthLimitError, Limited};
use serde::Serialize;

use super::error::{ApiError, ErrorKind};
use super::multipart;
use super::request::{self, Ids};
use super::state::{AppState, ServedModel, find};
use crate::decision::Verdict;
use crate::model::top_k;
use crate::preprocess::pool::CpuPool;
use crate::retain::{MultipartRef, Reason, Sidecar, TopScore, rfc3339};

/// What a frame's retained copy needs to know about its request.
struct Origin<'a> {
    request_id: &'a str,
    ids: &'a Ids,
    received: std::time::SystemTime,
    part: Option<(usize, &'a str)>,
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
    /// From the request's arrival to this image's answer.
    pub total: f64,
}

/// One image's classification.
#[derive(Debug, Serialize)]
pub struct Classified {
    /// Top-1 class.
    pub label: String,
    /// Its probability.
    pub score: f32,
    /// Whether `score >= min_score` (always true without a `min_score`).
    pub confident: bool,
    /// What the line should do with the part (models with a `[models.decision]` table).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub verdict: Option<Verdict>,
    /// The top K classes, best first.
    pub top: Vec<Ranked>,
    /// Timings.
    pub timing_ms: Timing,
}

/// The answer for a single-image request.
#[derive(Debug, Serialize)]
pub struct Answer {
    /// Model name.
    pub model: String,
    /// Model version (SHA-256 prefix of the ONNX file).
    pub version: String,
    /// `X-Part-Id`, echoed.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub part_id: Option<String>,
    /// `X-Camera-Id`, echoed.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub camera_id: Option<String>,
    /// The classification.
    #[serde(flatten)]
    pub result: Classified,
}

/// One part's entry in a multipart answer: its classification or its error.
#[derive(Debug, Serialize)]
pub struct PartResult {
    /// Position of the part in the request, from 0.
    pub index: usize,
    /// The part's file name, else its field name.
    pub part: String,
    /// The classification, when the part could be classified.
    #[serde(flatten, skip_serializing_if = "Option::is_none")]
    pub result: Option<Classified>,
    /// Why not, otherwise.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub error: Option<PartError>,
}

/// A part's error: the same kinds as whole-request errors.
#[derive(Debug, Serialize)]
pub struct PartError {
    /// The error kind.
    pub kind: &'static str,
    /// What was wrong.
    pub message: String,
}

/// The answer for a multipart request: one entry per part, in order.
#[derive(Debug, Serialize)]
pub struct MultiAnswer {
    /// Model name.
    pub model: String,
    /// Model version.
    pub version: String,
    /// `X-Part-Id`, echoed (it applies to every part).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub part_id: Option<String>,
    /// `X-Camera-Id`, echoed.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub camera_id: Option<String>,
    /// One entry per part.
    pub results: Vec<PartResult>,
}

use crate::millis as ms;

fn bad_request(message: String) -> ApiError {
    ApiError::new(ErrorKind::BadRequest, message)
}

/// The handler.
pub async fn classify(
    State(state): State<AppState>,
    Path(name): Path<String>,
    headers: HeaderMap,
    request_id: Option<axum::Extension<super::RequestId>>,
    RawQuery(query): RawQuery,
    body: Body,
) -> Result<Response, ApiError> {
    let arrived = Instant::now();
    let received = std::time::SystemTime::now();
    let request_id = request_id.map(|axum::Extension(id)| id.0).unwrap_or_default();
    let served = state.readiness.borrow().served(false);
    let served = match served {
        Ok(s) => s,
        Err(e) => return Err(refuse(&state, body, e).await),
    };
    let m = match find(&served, &name) {
        Ok(m) => m,
        Err(e) => return Err(refuse(&state, body, e).await),
    };
    // Counted from here until the answer leaves (or the client goes): the drain waits for it.
    let _in_flight = state.in_flight.enter();
    let body_read = std::sync::atomic::AtomicBool::new(false);
    let result = match request::deadline(&headers, state.limits.deadline, arrived) {
        Err(e) => Err(refuse(&state, body, bad_request(e)).await),
        Ok(until) => tokio::time::timeout_at(
            until.into(),
            answer(
                &state,
                m,
                &headers,
                query.as_deref(),
                (body, &body_read),
                (arrived, until),
                (&request_id, received),
            ),
        )
        .await
        .unwrap_or_else(|_| {
            Err(ApiError::new(
                ErrorKind::Deadline,
                format!("the request's deadline of {} ms passed before it was answered", ms(until - arrived)),
            ))
        }),
    };
    let outcome = match &result {
        Ok(_) => "ok",
        Err(e) => e.kind.as_str(),
    };
    m.metrics.observe_request(outcome, arrived.elapsed().as_secs_f64());
    match result {
        // The deadline passed while the body was still arriving, or the body broke its size or
        // time limit: the rest of it is unread, so the connection cannot carry another request. Say so (RFC 9112 section 9.6), so that
        // the client opens a new one instead of sending its next frame into a closing socket.
        Err(e)
            if !body_read.load(std::sync::atomic::Ordering::Relaxed)
                && matches!(e.kind, ErrorKind::Deadline | ErrorKind::TooLarge | ErrorKind::BodyTimeout) =>
        {
            let mut resp = e.into_response();
            resp.headers_mut().insert(axum::http::header::CONNECTION, axum::http::HeaderValue::from_static("close"));
            Ok(resp)
        }
        other => other,
    }
}

/// Answer `e` after reading the body (bounded as always), so that the connection stays
/// usable for the client's next request instead of being closed under a body in flight.
async fn refuse(state: &AppState, body: Body, e: ApiError) -> ApiError {
    super::discard_body(&state.limits, body).await;
    e
}

/// Read the body within `body_timeout_ms` and `body_limit_bytes`.
async fn read_body(state: &AppState, body: Body) -> Result<Bytes, ApiError> {
    let limits = state.limits;
    let collect = Limited::new(body, limits.body_limit).collect();
    match tokio::time::timeout(limits.body_timeout, collect).await {
        Err(_) => Err(ApiError::new(
            ErrorKind::BodyTimeout,
            format!("the body did not arrive within server.body_timeout_ms = {}", limits.body_timeout.as_millis()),
        )),
        Ok(Ok(collected)) => Ok(collected.to_bytes()),
        Ok(Err(e)) if e.downcast_ref::<LengthLimitError>().is_some() => Err(ApiError::new(
            ErrorKind::TooLarge,
            format!("the body is larger than server.body_limit_bytes = {}", limits.body_limit),
        )),
        Ok(Err(e)) => Err(ApiError::new(ErrorKind::BadRequest, format!("cannot read the body: {e}"))),
    }
}

async fn answer(
    state: &AppState,
    m: &ServedModel,
    headers: &HeaderMap,
    query: Option<&str>,
    (body, body_read): (Body, &std::sync::atomic::AtomicBool),
    (arrived, until): (Instant, Instant),
    (request_id, received): (&str, std::time::SystemTime),
) -> Result<Response, ApiError> {
    // The body first, whatever else is wrong, so that the connection stays usable.
    let body = read_body(state, body).await;
    // Read to its end (or refused by its limits, which end the connection anyway).
    body_read.store(body.is_ok(), std::sync::atomic::Ordering::Relaxed);
    let body = body?;
    let top = request::top(query, m.model.labels.len()).map_err(bad_request)?;
    let ids = request::ids(headers).map_err(bad_request)?;
    let ids = &ids;
    let content_type = headers.get(axum::http::header::CONTENT_TYPE).and_then(|v| v.to_str().ok()).unwrap_or("");
    let multipart = multipart::boundary(content_type);
    let Some(boundary) = multipart else {
        let result = classify_one(
            state,
            m,
            body,
            top,
            (arrived, until),
            true,
            &Origin { request_id, ids, received, part: None },
        )
        .await?;
        let answer = Answer {
            model: m.model.name.clone(),
            version: m.model.version.clone(),
            part_id: ids.part.clone(),
            camera_id: ids.camera.clone(),
            result,
        };
        return Ok(Json(answer).into_response());
    };
    let boundary = boundary.map_err(|e| ApiError::new(ErrorKind::BadRequest, e))?;
    let (_, backlog) = m.batcher.depth();
    let max_parts = state.limits.max_parts.min(backlog);
    let parts = multipart::parse(&body, &boundary, max_parts).map_err(bad_request)?;
    // Every part goes through the pool, however small (a burst's parts decode in parallel
    // there instead of one after another on the HTTP thread), and joins the backlog at once;
    // answers keep part order.
    let jobs = parts.into_iter().enumerate().map(|(index, part)| async move {
        let origin = Origin { request_id, ids, received, part: Some((index, part.name.as_str())) };
        let max = state.limits.max_part_bytes;
        let outcome = if part.data.len() > max {
            Err(ApiError::new(
                ErrorKind::TooLarge,
                format!("part {index} is {} bytes, more than server.max_part_bytes = {max}", part.data.len()),
            ))
        } else {
            classify_one(state, m, part.data.clone(), top, (arrived, until), false, &origin).await
        };
        let (result, error) = match outcome {
            Ok(c) => (Some(c), None),
            Err(e) => (None, Some(PartError { kind: e.kind.as_str(), message: e.message })),
        };
        PartResult { index, part: part.name, result, error }
    });
    let results = futures_util::future::join_all(jobs).await;
    let answer = MultiAnswer {
        model: m.model.name.clone(),
        version: m.model.version.clone(),
        part_id: ids.part.clone(),
        camera_id: ids.camera.clone(),
        results,
    };
    Ok(Json(answer).into_response())
}

async fn classify_one(
    state: &AppState,
    m: &ServedModel,
    image: Bytes,
    top: usize,
    (arrived, until): (Instant, Instant),
    may_decode_here: bool,
    origin: &Origin<'_>,
) -> Result<Classified, ApiError> {
    // The bytes as received, for the retain folder: a reference count, not a copy, for a
    // single frame; a multipart part is copied when kept, so that a queued frame does not hold
    // the whole request body.
    let original = m.retain.as_ref().map(|_| image.clone());
    // A single frame's header is read here, once (under the same panic guard as a decode): a
    // frame the limits refuse never takes a decode thread, and its size decides where it is
    // decoded. A small one is decoded here: handing it to a pool thread and back would cost
    // more CPU (two thread wake-ups) than the decode itself. Larger ones go to the pool, so
    // that a big JPEG never holds an HTTP thread. A burst's parts all go to the pool as they are.
    let probe = if may_decode_here { Some(CpuPool::run_here(|| m.pipeline.probe(image.clone()))??) } else { None };
    let prepared = match probe {
        Some(p) if p.pixels() <= state.limits.decode_inline_pixels => {
            m.metrics.decoded_inline.inc();
            CpuPool::run_here(|| m.pipeline.run_probed(p))??
        }
        probe => {
            m.metrics.decoded_pool.inc();
            let pipeline = m.pipeline.clone();
            let prepare = move || match probe {
                Some(p) => pipeline.run_probed(p),
                None => pipeline.run(&image),
            };
            state.pool.run(prepare).await??
        }
    };
    m.metrics.preprocess_duration.observe((prepared.decode + prepared.preprocess).as_secs_f64());
    let (decode, preprocess) = (prepared.decode, prepared.preprocess);
    let scored = m.batcher.infer(prepared.tensor, until).await?;

    let labels = &m.model.labels;
    // The load checked that the model gives one score per label; checked again here, so that
    // the indexing below (indices from top_k, below scores.len()) cannot go out of bounds.
    if scored.scores.len() != labels.len() {
        return Err(ApiError::internal(format!(
            "model {} gave {} scores for {} labels",
            m.model.name,
            scored.scores.len(),
            labels.len()
        )));
    }
    let order = top_k(&scored.scores, top);
    let Some(&best) = order.first() else {
        return Err(ApiError::internal(format!("no class ranked: top = {top}, {} labels", labels.len())));
    };
    let score = scored.scores[best];
    let confident = m.min_score.is_none_or(|min| score >= min);
    m.metrics.observe_prediction(&labels[best]);
    if !confident {
        m.metrics.low_confidence.inc();
    }
    let verdict = m.decision.as_ref().map(|d| d.verdict(best, score, m.min_score));
    if let Some(v) = verdict {
        m.metrics.observe_verdict(v);
    }
    let classified = Classified {
        label: labels[best].clone(),
        score,
        confident,
        verdict,
        top: order.into_iter().map(|i| Ranked { label: labels[i].clone(), score: scored.scores[i] }).collect(),
        timing_ms: Timing {
            decode: ms(decode),
            preprocess: ms(preprocess),
            wait: ms(scored.wait),
            infer: ms(scored.infer),
            total: ms(arrived.elapsed()),
        },
    };
    if let (Some(retainer), Some(frame)) = (&m.retain, original)
        && let Some(reason) = retainer.wants(verdict, &classified.label)
    {
        let frame = if origin.part.is_some() { Bytes::copy_from_slice(&frame) } else { frame };
        retainer.offer(frame, sidecar(m, &classified, &scored.scores, reason, origin));
    }
    Ok(classified)
}

/// The sidecar of a frame about to be retained.
fn sidecar(m: &ServedModel, c: &Classified, scores: &[f32], reason: Reason, origin: &Origin<'_>) -> Sidecar {
    let labels = &m.model.labels;
    Sidecar {
        format: crate::retain::FORMAT.into(),
        format_version: 1,
        frame: String::new(),
        bytes: 0,
        request_id: origin.request_id.to_owned(),
        part_id: origin.ids.part.clone(),
        camera_id: origin.ids.camera.clone(),
        multipart: origin.part.map(|(index, name)| MultipartRef { index, name: name.to_owned() }),
        received_at: rfc3339(origin.received.duration_since(std::time::UNIX_EPOCH).unwrap_or_default()),
        model: m.model.name.clone(),
        version: m.model.version.clone(),
        label: c.label.clone(),
        score: c.score,
        top: top_k(scores, 5).into_iter().map(|i| TopScore { label: labels[i].clone(), score: scores[i] }).collect(),
        verdict: c.verdict,
        kept_because: reason,
        timing_ms: serde_json::to_value(&c.timing_ms).unwrap_or_default(),
        confirmed: None,
    }
}
