//! HTTP: the router (built without a socket, so tests call it directly), its handlers, and
//! the error type they share.
//!
//! Routes sit here next to their handlers' modules. Two layers wrap everything: the body
//! limit (axum's own, which answers 413 through our error shape) and the middleware that
//! counts responses and logs internal faults.

pub mod classify;
pub mod error;
pub mod health;
pub mod state;

use axum::Router;
use axum::extract::{DefaultBodyLimit, Request};
use axum::middleware::{self, Next};
use axum::response::Response;
use axum::routing::{get, post};

use error::{ApiError, ErrorKind, InternalDetail};
use state::AppState;

/// The application, ready to serve on any listener.
pub fn router(state: AppState) -> Router {
    let metrics = state.metrics.clone();
    Router::new()
        .route("/classify/{model}", post(classify::classify))
        .route("/healthz", get(health::healthz))
        .route("/readyz", get(health::readyz))
        .route("/metrics", get(health::metrics))
        .fallback(not_found)
        .method_not_allowed_fallback(method_not_allowed)
        .layer(DefaultBodyLimit::max(state.body_limit))
        .with_state(state)
        .layer(middleware::from_fn(log_internal))
        .layer(middleware::from_fn_with_state(metrics, crate::metrics::track_http))
}

async fn not_found(req: Request) -> ApiError {
    ApiError::new(
        ErrorKind::NotFound,
        format!("no route {} {}; see the README for the endpoints", req.method(), req.uri().path()),
    )
}

async fn method_not_allowed(req: Request) -> ApiError {
    ApiError::new(ErrorKind::MethodNotAllowed, format!("{} is not allowed on {}", req.method(), req.uri().path()))
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
