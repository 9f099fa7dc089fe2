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

use std::time::{Duration, Instant};

use axum::Json;
use axum::body::{Body, Bytes};
use axum::extract::rejection::QueryRejection;
use axum::extract::{Path, Query, State};
use axum::http::HeaderMap;
use axum::response::{IntoResponse, Response};
use http_body_util::{BodyExt as _, LengthLimitError, Limited};
use serde::{Deserialize, Serialize};

use super::error::{ApiError, ErrorKind};
use super::multipart;
use super::state::{AppState, ServedModel, find};
use crate::decision::Verdict;
use crate::model::top_k;
use crate::preprocess::pool::CpuPool;
use crate::retain::{MultipartRef, Reason, Sidecar, TopScore, rfc3339};

/// The request header that may shorten the server's deadline, in milliseconds.
pub const DEADLINE_HEADER: &str = "x-deadline-ms";
/// The request header naming the physical part (echoed, and stored with a retained frame).
pub const PART_ID_HEADER: &str = "x-part-id";
/// The request header naming the camera that took the frame.
pub const CAMERA_ID_HEADER: &str = "x-camera-id";
/// Longest part or camera id.
pub const MAX_ID_LEN: usize = 64;

/// The part and camera ids a request carries.
#[derive(Debug, Clone, Default)]
pub struct Ids {
    /// `X-Part-Id`.
    pub part: Option<String>,
    /// `X-Camera-Id`.
    pub camera: Option<String>,
}

/// Read `X-Part-Id` and `X-Camera-Id`: 1 to 64 characters of letters, digits and `-_.:/#`.
///
/// # Errors
/// 400 `bad_request` naming the header and what it may hold.
pub fn ids(headers: &HeaderMap) -> Result<Ids, ApiError> {
    let one = |name: &str, shown: &str| -> Result<Option<String>, ApiError> {
        let Some(v) = headers.get(name) else { return Ok(None) };
        let ok = v.to_str().ok().filter(|t| {
            (1..=MAX_ID_LEN).contains(&t.len())
                && t.bytes().all(|b| b.is_ascii_alphanumeric() || b"-_.:/#".contains(&b))
        });
        ok.map(|t| Some(t.to_owned())).ok_or_else(|| {
            ApiError::new(
                ErrorKind::BadRequest,
                format!("{shown}: expected 1 to {MAX_ID_LEN} characters of letters, digits and - _ . : / #"),
            )
        })
    };
    Ok(Ids { part: one(PART_ID_HEADER, "X-Part-Id")?, camera: one(CAMERA_ID_HEADER, "X-Camera-Id")? })
}

/// What a frame's retained copy needs to know about its request.
struct Origin<'a> {
    request_id: &'a str,
    ids: &'a Ids,
    received: std::time::SystemTime,
    part: Option<(usize, &'a str)>,
}

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

/// The request's deadline: the server's `deadline_ms`, shortened by `X-Deadline-Ms`.
pub fn deadline(headers: &HeaderMap, server: Duration, arrived: Instant) -> Result<Instant, ApiError> {
    let Some(v) = headers.get(DEADLINE_HEADER) else {
        return Ok(arrived + server);
    };
    let ms = v.to_str().ok().and_then(|s| s.trim().parse::<u64>().ok()).filter(|&ms| ms > 0).ok_or_else(|| {
        ApiError::new(
            ErrorKind::BadRequest,
            format!("X-Deadline-Ms = {v:?}: expected a positive number of milliseconds"),
        )
    })?;
    Ok(arrived + server.min(Duration::from_millis(ms)))
}

/// The handler.
pub async fn classify(
    State(state): State<AppState>,
    Path(name): Path<String>,
    headers: HeaderMap,
    request_id: Option<axum::Extension<super::RequestId>>,
    params: Result<Query<Params>, QueryRejection>,
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
    let result = match deadline(&headers, state.limits.deadline, arrived) {
        Err(e) => Err(refuse(&state, body, e).await),
        Ok(until) => tokio::time::timeout_at(
            until.into(),
            answer(&state, m, &headers, params, body, (arrived, until), (&request_id, received)),
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
    result
}

/// Answer `e` after reading the body (bounded as always), so that the connection stays
/// usable for the client's next request instead of being closed under a body in flight.
async fn refuse(state: &AppState, body: Body, e: ApiError) -> ApiError {
    let _ = read_body(state, body).await;
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
    params: Result<Query<Params>, QueryRejection>,
    body: Body,
    (arrived, until): (Instant, Instant),
    (request_id, received): (&str, std::time::SystemTime),
) -> Result<Response, ApiError> {
    // The body first, whatever else is wrong, so that the connection stays usable.
    let body = read_body(state, body).await?;
    let Query(params) = params.map_err(|e| ApiError::new(ErrorKind::BadRequest, e.body_text()))?;
    let top = parse_top(params.top.as_deref(), m.model.labels.len())?;
    let ids = ids(headers)?;
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
    let parts = multipart::parse(&body, &boundary, backlog).map_err(|e| ApiError::new(ErrorKind::BadRequest, e))?;
    // Every part goes through the pool, however small (a burst's parts decode in parallel
    // there instead of one after another on the HTTP thread), and joins the backlog at once;
    // answers keep part order.
    let jobs = parts.into_iter().enumerate().map(|(index, part)| async move {
        let origin = Origin { request_id, ids, received, part: Some((index, part.name.as_str())) };
        let outcome = classify_one(state, m, part.data.clone(), top, (arrived, until), false, &origin).await;
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
    let order = top_k(&scored.scores, top);
    // top >= 1 and labels >= 1 (checked at load), so the order has a first entry.
    let best = order[0];
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

#[cfg(test)]
mod tests {
    use super::*;

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

    #[test]
    fn deadline_header_may_only_shorten() {
        let t0 = Instant::now();
        let server = Duration::from_millis(2000);
        let mut h = HeaderMap::new();
        assert_eq!(deadline(&h, server, t0).unwrap(), t0 + server);
        h.insert(DEADLINE_HEADER, "150".parse().unwrap());
        assert_eq!(deadline(&h, server, t0).unwrap(), t0 + Duration::from_millis(150));
        h.insert(DEADLINE_HEADER, "60000".parse().unwrap());
        assert_eq!(deadline(&h, server, t0).unwrap(), t0 + server);
        for bad in ["0", "-5", "soon", ""] {
            h.insert(DEADLINE_HEADER, bad.parse().unwrap());
            assert_eq!(deadline(&h, server, t0).unwrap_err().kind, ErrorKind::BadRequest, "{bad}");
        }
    }
}
