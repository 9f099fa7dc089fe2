//! Metrics: one Prometheus registry per server (no global state), the per-model handles the
//! batcher and handlers record into, and the middleware that counts every HTTP response.
//!
//! Names are `lineside_<what>_<unit>`: `_total` on counters, `_seconds` on duration
//! histograms. Route labels come from axum's `MatchedPath`, never the raw URI, so that a
//! client cannot create series by requesting random paths. Series a dashboard expects are
//! created up front, so that they read 0 instead of being absent.

use axum::extract::{MatchedPath, Request, State};
use axum::middleware::Next;
use axum::response::Response;
use prometheus::{
    Encoder, Histogram, HistogramOpts, HistogramVec, IntCounter, IntCounterVec, IntGauge, IntGaugeVec, Opts, Registry,
    TextEncoder,
};

/// Outcome label values of `lineside_request_duration_seconds` (the error kinds, and `ok`).
pub const OUTCOMES: &[&str] =
    &["ok", "bad_request", "bad_image", "too_large", "unsupported_format", "overloaded", "not_ready", "internal"];

/// Duration buckets in seconds: 0.25 ms to 10 s, dense where a line's cycle time sits.
const LATENCY_BUCKETS: &[f64] = &[
    0.000_25, 0.000_5, 0.001, 0.002, 0.003, 0.005, 0.007_5, 0.01, 0.015, 0.02, 0.03, 0.05, 0.075, 0.1, 0.15, 0.25, 0.5,
    1.0, 2.5, 5.0, 10.0,
];

/// All of the server's metrics.
#[derive(Clone)]
pub struct Metrics {
    registry: Registry,
    request_duration: HistogramVec,
    preprocess_duration: HistogramVec,
    inference_duration: HistogramVec,
    pass_size: HistogramVec,
    backlog_depth: IntGaugeVec,
    lanes: IntGaugeVec,
    lane_failures: IntCounterVec,
    abandoned: IntCounterVec,
    http_requests: IntCounterVec,
}

/// One model's handles, cloned into its lanes and handlers.
#[derive(Clone)]
pub struct ModelMetrics {
    /// Requests waiting in the backlog.
    pub backlog_depth: IntGauge,
    /// Lanes serving the model.
    pub lanes: IntGauge,
    /// Engine wall time per pass.
    pub inference_duration: Histogram,
    /// Jobs per pass.
    pub pass_size: Histogram,
    /// Engine errors and panics.
    pub lane_failures: IntCounter,
    /// Jobs dropped before inference because the client had gone.
    pub abandoned: IntCounter,
    /// Decode + preprocess time per image.
    pub preprocess_duration: Histogram,
    request_duration: HistogramVec,
    model: String,
}

impl ModelMetrics {
    /// Record one classify request's total duration under its outcome.
    pub fn observe_request(&self, outcome: &str, seconds: f64) {
        self.request_duration.with_label_values(&[self.model.as_str(), outcome]).observe(seconds);
    }
}

// Metric construction only fails for invalid names or label sets, which are constants here.
fn must<T>(r: prometheus::Result<T>) -> T {
    r.expect("metric definitions are constant and valid")
}

impl Metrics {
    /// A fresh registry with every lineside metric registered.
    pub fn new() -> Metrics {
        let registry = must(Registry::new_custom(Some("lineside".into()), None));
        let hist = |name: &str, help: &str, labels: &[&str], buckets: Vec<f64>| {
            let h = must(HistogramVec::new(HistogramOpts::new(name, help).buckets(buckets), labels));
            must(registry.register(Box::new(h.clone())));
            h
        };
        let request_duration = hist(
            "request_duration_seconds",
            "Time from a classify request's arrival to its answer, by model and outcome.",
            &["model", "outcome"],
            LATENCY_BUCKETS.to_vec(),
        );
        let preprocess_duration = hist(
            "preprocess_duration_seconds",
            "Time to decode and preprocess one image.",
            &["model"],
            LATENCY_BUCKETS.to_vec(),
        );
        let inference_duration = hist(
            "inference_duration_seconds",
            "Engine wall time of one inference pass.",
            &["model"],
            LATENCY_BUCKETS.to_vec(),
        );
        let pass_size = hist(
            "pass_size_requests",
            "Requests in one inference pass.",
            &["model"],
            vec![1.0, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 16.0, 32.0, 64.0],
        );
        let gauge = |name: &str, help: &str| {
            let g = must(IntGaugeVec::new(Opts::new(name, help), &["model"]));
            must(registry.register(Box::new(g.clone())));
            g
        };
        let backlog_depth = gauge("backlog_depth", "Requests waiting in the model's backlog.");
        let lanes = gauge("lanes", "Inference lanes serving the model.");
        let counter = |name: &str, help: &str, labels: &[&str]| {
            let c = must(IntCounterVec::new(Opts::new(name, help), labels));
            must(registry.register(Box::new(c.clone())));
            c
        };
        let lane_failures = counter("lane_failures_total", "Inference errors and panics inside a lane.", &["model"]);
        let abandoned = counter(
            "abandoned_total",
            "Requests dropped before inference because the client disconnected.",
            &["model"],
        );
        let http_requests =
            counter("http_requests_total", "HTTP responses, by matched route and status.", &["route", "status"]);
        Metrics {
            registry,
            request_duration,
            preprocess_duration,
            inference_duration,
            pass_size,
            backlog_depth,
            lanes,
            lane_failures,
            abandoned,
            http_requests,
        }
    }

    /// Handles for one model, with its expected series created at zero.
    pub fn for_model(&self, model: &str) -> ModelMetrics {
        for outcome in OUTCOMES {
            let _ = self.request_duration.with_label_values(&[model, outcome]);
        }
        ModelMetrics {
            backlog_depth: self.backlog_depth.with_label_values(&[model]),
            lanes: self.lanes.with_label_values(&[model]),
            inference_duration: self.inference_duration.with_label_values(&[model]),
            pass_size: self.pass_size.with_label_values(&[model]),
            lane_failures: self.lane_failures.with_label_values(&[model]),
            abandoned: self.abandoned.with_label_values(&[model]),
            preprocess_duration: self.preprocess_duration.with_label_values(&[model]),
            request_duration: self.request_duration.clone(),
            model: model.to_string(),
        }
    }

    /// The registry in the Prometheus text exposition format.
    pub fn render(&self) -> String {
        let mut out = Vec::new();
        // Encoding into a Vec cannot fail for well-formed families.
        if let Err(e) = TextEncoder::new().encode(&self.registry.gather(), &mut out) {
            tracing::error!(cause = %e, "cannot encode metrics");
        }
        String::from_utf8(out).unwrap_or_default()
    }
}

impl Default for Metrics {
    fn default() -> Self {
        Metrics::new()
    }
}

/// Middleware: count every response by matched route and status.
pub async fn track_http(State(metrics): State<Metrics>, req: Request, next: Next) -> Response {
    let route =
        req.extensions().get::<MatchedPath>().map(|p| p.as_str().to_owned()).unwrap_or_else(|| "unmatched".to_owned());
    let resp = next.run(req).await;
    metrics.http_requests.with_label_values(&[route.as_str(), resp.status().as_str()]).inc();
    resp
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn renders_prefixed_names_and_precreated_series() {
        let m = Metrics::new();
        let mm = m.for_model("washers");
        mm.observe_request("ok", 0.004);
        mm.pass_size.observe(3.0);
        let text = m.render();
        assert!(text.contains("lineside_request_duration_seconds_count{model=\"washers\",outcome=\"ok\"} 1"), "{text}");
        assert!(
            text.contains("lineside_request_duration_seconds_count{model=\"washers\",outcome=\"bad_image\"} 0"),
            "{text}"
        );
        assert!(text.contains("lineside_pass_size_requests_bucket{model=\"washers\",le=\"4\"} 1"), "{text}");
        assert!(text.contains("lineside_backlog_depth{model=\"washers\"} 0"), "{text}");
    }
}
