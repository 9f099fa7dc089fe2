//! HTTP: the router (built without a socket, so tests call it directly), its handlers, and
//! the error type they share.
//!
//! Routes sit here next to their handlers' modules. Layers wrap everything: the body limit
//! (axum's own, which answers 413 through our error shape), the request id and access log,
//! and the middleware that counts responses and logs internal faults.

pub mod access;
pub mod classify;
pub mod error;
pub mod health;
pub mod models;
pub mod multipart;
pub mod request;
pub mod state;

use axum::Router;
use axum::extract::{DefaultBodyLimit, Request};
use axum::middleware::{self, Next};
use axum::response::{IntoResponse as _, Response};
use axum::routing::{get, post, put};

use error::{ApiError, ErrorKind, InternalDetail};
use state::AppState;

/// The application, ready to serve on any listener.
pub fn router(state: AppState) -> Router {
    let metrics = state.metrics.clone();
    let admin = || middleware::from_fn_with_state(state.clone(), access::require_admin);
    let client = middleware::from_fn_with_state(state.clone(), access::require_client);
    Router::new()
        .route("/classify/{model}", post(classify::classify).route_layer(client))
        .route("/login", get(access::login_page))
        .route("/session", get(access::current).delete(access::logout).route_layer(admin()).post(access::login))
        .route("/log-filter", put(access::put_log_filter).route_layer(admin()).get(access::get_log_filter))
        .route("/healthz", get(health::healthz))
        .route("/readyz", get(health::readyz))
        .route("/metrics", get(health::metrics))
        .route("/models", get(models::list))
        .route("/models/{model}", get(models::one))
        .route("/models/{model}/reload", post(models::reload).route_layer(admin()))
        .route("/openapi.json", get(openapi))
        .fallback(not_found)
        .method_not_allowed_fallback(method_not_allowed)
        .layer(DefaultBodyLimit::max(state.limits.body_limit))
        .layer(middleware::from_fn_with_state(state.limits.max_header_bytes, limit_headers))
        .layer(middleware::from_fn(catch_panic))
        .layer(middleware::from_fn_with_state(state.request_ids.clone(), request_id))
        .with_state(state)
        .layer(middleware::from_fn(log_internal))
        .layer(middleware::from_fn_with_state(metrics, crate::metrics::track_http))
}

/// The OpenAPI 3 document of this HTTP API (hand-written beside the handlers; a test checks
/// it against the routes and error kinds, another drives the server from it).
pub const OPENAPI: &str = include_str!("openapi.json");

async fn openapi() -> Response {
    ([(axum::http::header::CONTENT_TYPE, "application/json")], OPENAPI).into_response()
}

async fn not_found(req: Request) -> ApiError {
    ApiError::new(
        ErrorKind::NotFound,
        format!("no route {} {}; GET /openapi.json lists the endpoints", req.method(), req.uri().path()),
    )
}

async fn method_not_allowed(req: Request) -> ApiError {
    ApiError::new(ErrorKind::MethodNotAllowed, format!("{} is not allowed on {}", req.method(), req.uri().path()))
}

/// Read a refused request's body to its end and drop it chunk by chunk, within the body
/// limit and timeout (nothing is kept: a refused 16 MiB upload costs no memory), so that the
/// client reads the answer instead of a connection closed under its upload.
pub(crate) async fn discard_body(limits: &state::RequestLimits, body: axum::body::Body) {
    use http_body_util::BodyExt as _;
    let mut body = http_body_util::Limited::new(body, limits.body_limit);
    let drain = async { while let Some(Ok(_)) = body.frame().await {} };
    let _ = tokio::time::timeout(limits.body_timeout, drain).await;
}

/// A backstop: a handler that panics answers 500 `internal` (logged with the request's id)
/// instead of cutting the connection without an answer. Request data should never get here:
/// decodes and inference run under their own guards, and the request path has no `unwrap`
/// on client data; this catches a bug, not an input.
async fn catch_panic(req: Request, next: Next) -> Response {
    match futures_util::FutureExt::catch_unwind(std::panic::AssertUnwindSafe(next.run(req))).await {
        Ok(resp) => resp,
        Err(panic) => {
            let what = panic
                .downcast_ref::<&str>()
                .map(|s| (*s).to_owned())
                .or_else(|| panic.downcast_ref::<String>().cloned())
                .unwrap_or_else(|| "a panic without a message".into());
            ApiError::internal(format!("the handler panicked: {what}")).into_response()
        }
    }
}

/// The request id header, taken from the client or generated, and echoed in the answer.
pub const REQUEST_ID: &str = "x-request-id";

/// A request's id, for handlers that want it in their logs.
#[derive(Debug, Clone)]
pub struct RequestId(pub String);

/// Give every request an id (the client's `X-Request-Id` when it is 1 to 128 visible ASCII
/// characters, else a generated one), echo it, and write one access log line per request
/// (probes and metrics scrapes at debug level, so that they do not drown the log).
async fn request_id(
    axum::extract::State(ids): axum::extract::State<std::sync::Arc<state::RequestIds>>,
    mut req: Request,
    next: Next,
) -> Response {
    let started = std::time::Instant::now();
    let given = req
        .headers()
        .get(REQUEST_ID)
        .and_then(|v| v.to_str().ok())
        .filter(|v| (1..=128).contains(&v.len()) && v.bytes().all(|b| b.is_ascii_graphic()))
        .map(str::to_owned);
    let id = given.unwrap_or_else(|| ids.next());
    let (method, path) = (req.method().clone(), req.uri().path().to_owned());
    req.extensions_mut().insert(RequestId(id.clone()));
    let mut resp = next.run(req).await;
    if let Ok(v) = axum::http::HeaderValue::from_str(&id) {
        resp.headers_mut().insert(REQUEST_ID, v);
    }
    let status = resp.status().as_u16();
    let ms = crate::millis(started.elapsed());
    if matches!(path.as_str(), "/healthz" | "/readyz" | "/metrics") {
        tracing::debug!(request_id = %id, %method, %path, status, ms, "request");
    } else {
        tracing::info!(request_id = %id, %method, %path, status, ms, "request");
    }
    resp
}

/// 431 `headers_too_large` for a request whose line and headers, as sent over HTTP/1.1,
/// exceed `server.max_header_bytes` (heads beyond the parser's buffer never get here: hyper
/// answers those 431 itself and closes).
async fn limit_headers(axum::extract::State(max): axum::extract::State<usize>, req: Request, next: Next) -> Response {
    let size = head_size(&req);
    if size > max {
        return ApiError::new(
            ErrorKind::HeadersTooLarge,
            format!("the request line and headers take {size} bytes; server.max_header_bytes allows {max}"),
        )
        .into_response();
    }
    next.run(req).await
}

/// The bytes of a request's line and headers as HTTP/1.1 writes them.
fn head_size(req: &Request) -> usize {
    // Without formatting the URI (this runs on every request): its parts' lengths.
    let uri = req.uri();
    let target = uri.path_and_query().map_or(1, |pq| pq.as_str().len())
        + uri.authority().map_or(0, |a| a.as_str().len() + uri.scheme_str().map_or(0, |s| s.len() + 3));
    let line = req.method().as_str().len() + 1 + target + " HTTP/1.1\r\n".len();
    let headers: usize = req.headers().iter().map(|(n, v)| n.as_str().len() + 2 + v.len() + 2).sum();
    line + headers + 2
}

/// Log the details of internal faults, which the client does not see.
async fn log_internal(req: Request, next: Next) -> Response {
    let path = req.uri().path().to_owned();
    let resp = next.run(req).await;
    if let Some(InternalDetail(d)) = resp.extensions().get::<InternalDetail>() {
        tracing::error!(%path, cause = %d, "internal error");
    }
    resp
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn openapi_document_lists_every_route_and_error_kind() {
        let doc: serde_json::Value = serde_json::from_str(OPENAPI).expect("openapi.json is JSON");
        assert!(doc["openapi"].as_str().unwrap().starts_with("3."));
        let paths: Vec<&str> = doc["paths"].as_object().unwrap().keys().map(String::as_str).collect();
        for route in [
            "/classify/{model}",
            "/models",
            "/models/{model}",
            "/healthz",
            "/readyz",
            "/metrics",
            "/openapi.json",
            "/login",
            "/session",
            "/log-filter",
            "/models/{model}/reload",
        ] {
            assert!(paths.contains(&route), "{route} missing from openapi.json");
        }
        let kinds: Vec<&str> =
            doc["components"]["schemas"]["Error"]["properties"]["error"]["properties"]["kind"]["enum"]
                .as_array()
                .unwrap()
                .iter()
                .map(|v| v.as_str().unwrap())
                .collect();
        let mut ours: Vec<&str> = ErrorKind::ALL.iter().map(|k| k.as_str()).collect();
        let mut theirs = kinds.clone();
        ours.sort_unstable();
        theirs.sort_unstable();
        assert_eq!(ours, theirs, "error kinds in openapi.json");
        // Every status an error kind can have is documented on the classify route.
        let responses = doc["paths"]["/classify/{model}"]["post"]["responses"].as_object().unwrap();
        for k in ErrorKind::ALL {
            if matches!(k, ErrorKind::Stalled | ErrorKind::Busy | ErrorKind::ReloadFailed) {
                continue; // only /healthz, or only the reload route, answers these
            }
            assert!(responses.contains_key(k.status().as_str()), "{} ({}) undocumented", k.as_str(), k.status());
        }
    }
}
