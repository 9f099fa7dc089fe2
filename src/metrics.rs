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
pub const OUTCOMES: &[&str] = &[
    "ok",
    "bad_request",
    "bad_image",
    "too_large",
    "too_small",
    "roi_outside",
    "unsupported_format",
    "overloaded",
    "not_ready",
    "draining",
    "deadline",
    "body_timeout",
    "inference_failed",
    "internal",
];

/// Duration buckets in seconds: 0.5 ms to 2 s (the default deadline), dense where
/// millisecond inference and a line's cycle time sit.
const LATENCY_BUCKETS: &[f64] = &[
    0.000_5, 0.001, 0.002, 0.003, 0.005, 0.007_5, 0.01, 0.015, 0.02, 0.03, 0.05, 0.075, 0.1, 0.15, 0.25, 0.5, 1.0, 2.0,
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
    lane_restarts: IntCounterVec,
    abandoned: IntCounterVec,
    background_frames: IntCounterVec,
    backlog_wait: HistogramVec,
    predictions: IntCounterVec,
    low_confidence: IntCounterVec,
    model_info: IntGaugeVec,
    http_requests: IntCounterVec,
    frames_decoded: IntCounterVec,
    verdicts: IntCounterVec,
    reloads: IntCounterVec,
    retained: IntCounterVec,
    retained_evicted: IntCounterVec,
    retained_frames: IntGaugeVec,
    retained_bytes: IntGaugeVec,
    in_flight: prometheus::IntGauge,
    connections_open: prometheus::IntGauge,
    connections_refused: prometheus::IntCounter,
}

/// One model's retained-frame counters (`lineside_retained_frames_total` by outcome) and the
/// folder's size.
#[derive(Clone)]
pub struct RetainMetrics {
    /// Frames written with their sidecar.
    pub written: IntCounter,
    /// Frames not kept: the writer's queue was full.
    pub queue_full: IntCounter,
    /// Frames not kept: writing failed (disk full, permissions, folder missing).
    pub write_failed: IntCounter,
    /// Frames not kept: the writer thread is gone (a fault; the log says why).
    pub writer_stopped: IntCounter,
    /// Old frames removed to keep `max_frames` and `max_bytes` (`lineside_retained_evicted_total`).
    pub evicted: IntCounter,
    /// Frames in the folder now.
    pub frames: IntGauge,
    /// Bytes in the folder now.
    pub bytes: IntGauge,
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
    /// Engine states replaced after a panic.
    pub lane_restarts: IntCounter,
    /// Time from joining the backlog to the start of the job's pass.
    pub backlog_wait: Histogram,
    /// Answers whose top score is below the model's `min_score`.
    pub low_confidence: IntCounter,
    predictions: IntCounterVec,
    /// Jobs dropped before inference because the client had gone.
    pub abandoned: IntCounter,
    /// Frames run as background work (not live requests).
    pub background_frames: IntCounter,
    /// Decode + preprocess time per image.
    pub preprocess_duration: Histogram,
    /// Frames decoded on the HTTP thread that received them (`server.decode_inline_pixels`).
    pub decoded_inline: IntCounter,
    /// Frames decoded on the decode pool.
    pub decoded_pool: IntCounter,
    request_duration: HistogramVec,
    verdicts: IntCounterVec,
    model: String,
}

impl ModelMetrics {
    /// Record one classify request's total duration under its outcome.
    pub fn observe_request(&self, outcome: &str, seconds: f64) {
        self.request_duration.with_label_values(&[self.model.as_str(), outcome]).observe(seconds);
    }

    /// Count one answer's top-1 label (the label set is the model's: bounded).
    pub fn observe_prediction(&self, label: &str) {
        self.predictions.with_label_values(&[self.model.as_str(), label]).inc();
    }

    /// Count one answer's verdict.
    pub fn observe_verdict(&self, verdict: crate::decision::Verdict) {
        self.verdicts.with_label_values(&[self.model.as_str(), verdict.as_str()]).inc();
    }
}

// Metric construction only fails for invalid names or label sets, which are constants here.
const REQUEST_HELP: &str = "Time from a classify request's arrival to its answer, by model and outcome.";
const BACKGROUND_HELP: &str =
    "Frames run as background work in the lanes' spare time (evaluation, maps, trials, warm-ups).";
const MODEL_INFO_HELP: &str = "Always 1: the served model's version and engine.";
const HTTP_HELP: &str = "HTTP responses, by matched route and status.";
const DECODED_HELP: &str = "Frames decoded and preprocessed, by thread: \"http\" (small frames, on the thread that \
     received them) or \"pool\" (the decode pool).";
const VERDICTS_HELP: &str = "Answers by model and verdict (models with a [models.decision] table).";
const RETAINED_HELP: &str = "Frames eligible for the retain folder, by outcome: written, or not kept (the answer is \
     unaffected): queue_full, write_failed, writer_stopped.";
const IN_FLIGHT_HELP: &str =
    "Classify requests accepted and not yet answered (read when scraped); shutdown drains them.";

/// A histogram family, registered.
fn hist(r: &Registry, name: &str, help: &str, labels: &[&str], buckets: Vec<f64>) -> HistogramVec {
    let h = must(HistogramVec::new(HistogramOpts::new(name, help).buckets(buckets), labels));
    must(r.register(Box::new(h.clone())));
    h
}

/// A gauge family, registered.
fn gauge(r: &Registry, name: &str, help: &str, labels: &[&str]) -> IntGaugeVec {
    let g = must(IntGaugeVec::new(Opts::new(name, help), labels));
    must(r.register(Box::new(g.clone())));
    g
}

/// A counter family, registered.
fn counter(r: &Registry, name: &str, help: &str, labels: &[&str]) -> IntCounterVec {
    let c = must(IntCounterVec::new(Opts::new(name, help), labels));
    must(r.register(Box::new(c.clone())));
    c
}

fn must<T>(r: prometheus::Result<T>) -> T {
    r.expect("metric definitions are constant and valid")
}

impl Metrics {
    /// A fresh registry with every lineside metric registered.
    pub fn new() -> Metrics {
        let r = must(Registry::new_custom(Some("lineside".into()), None));
        let model = &["model"];
        // Most families are per model: latency histograms, gauges and counters.
        let h = |name: &str, help: &str| hist(&r, name, help, model, LATENCY_BUCKETS.to_vec());
        let g = |name: &str, help: &str| gauge(&r, name, help, model);
        let c = |name: &str, help: &str| counter(&r, name, help, model);
        let outcome = &["model", "outcome"];
        let passes = vec![1.0, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 16.0, 32.0, 64.0];
        let m = Metrics {
            request_duration: hist(&r, "request_duration_seconds", REQUEST_HELP, outcome, LATENCY_BUCKETS.to_vec()),
            preprocess_duration: h("preprocess_duration_seconds", "Time to decode and preprocess one image."),
            inference_duration: h("inference_duration_seconds", "Engine wall time of one inference pass."),
            pass_size: hist(&r, "pass_size_requests", "Requests in one inference pass.", model, passes),
            backlog_depth: g("backlog_depth", "Requests waiting in the model's backlog."),
            lanes: g("lanes", "Inference lanes serving the model."),
            lane_failures: c("lane_failures_total", "Inference errors and panics inside a lane."),
            lane_restarts: c("lane_restarts_total", "Lane engine states replaced after a panic."),
            abandoned: c("abandoned_total", "Requests dropped before inference because the client disconnected."),
            background_frames: c("background_frames_total", BACKGROUND_HELP),
            backlog_wait: h("backlog_wait_seconds", "Time a request waited in the backlog for an inference lane."),
            predictions: counter(&r, "predictions_total", "Answers by model and top-1 label.", &["model", "label"]),
            low_confidence: c("low_confidence_total", "Answers whose top score is below the model's min_score."),
            model_info: gauge(&r, "model_info", MODEL_INFO_HELP, &["model", "version", "engine"]),
            http_requests: counter(&r, "http_requests_total", HTTP_HELP, &["route", "status"]),
            frames_decoded: counter(&r, "frames_decoded_total", DECODED_HELP, &["model", "thread"]),
            verdicts: counter(&r, "verdicts_total", VERDICTS_HELP, &["model", "verdict"]),
            reloads: counter(
                &r,
                "reloads_total",
                "Model reloads, by model and outcome (ok, failed).",
                &["model", "outcome"],
            ),
            retained: counter(&r, "retained_frames_total", RETAINED_HELP, &["model", "outcome"]),
            retained_evicted: c(
                "retained_evicted_total",
                "Old retained frames removed to keep max_frames and max_bytes.",
            ),
            retained_frames: g("retained_stored_frames", "Frames in the model's retain folder now."),
            retained_bytes: g("retained_stored_bytes", "Bytes (frames and sidecars) in the model's retain folder now."),
            in_flight: {
                let gauge = must(prometheus::IntGauge::new("requests_in_flight", IN_FLIGHT_HELP));
                must(r.register(Box::new(gauge.clone())));
                gauge
            },
            connections_open: {
                let gauge = must(prometheus::IntGauge::new("connections_open", "TCP connections open now."));
                must(r.register(Box::new(gauge.clone())));
                gauge
            },
            connections_refused: {
                let counter = must(prometheus::IntCounter::new(
                    "connections_refused_total",
                    "Connections answered 503 and closed because max_connections were open.",
                ));
                must(r.register(Box::new(counter.clone())));
                counter
            },
            registry: r.clone(),
        };
        let build = gauge(&r, "build_info", "Always 1: lineside's version.", &["version"]);
        build.with_label_values(&[env!("CARGO_PKG_VERSION")]).set(1);
        m
    }

    /// Connections open now (the accept loop's count).
    pub fn set_connections_open(&self, n: usize) {
        self.connections_open.set(n as i64);
    }

    /// One connection refused for `max_connections`.
    pub fn count_connection_refused(&self) {
        self.connections_refused.inc();
    }

    /// Set the in-flight gauge (the HTTP side reads its count when scraped).
    pub fn set_in_flight(&self, n: usize) {
        self.in_flight.set(n as i64);
    }

    /// Handles for one model, with its expected series created at zero (one prediction
    /// series per label).
    pub fn for_model(&self, model: &str, version: &str, engine: &str, labels: &[String]) -> ModelMetrics {
        for outcome in OUTCOMES {
            let _ = self.request_duration.with_label_values(&[model, outcome]);
        }
        for label in labels {
            let _ = self.predictions.with_label_values(&[model, label.as_str()]);
        }
        // One version a model: a reloaded model's previous version series goes.
        // The exposition sorts labels by name: read them by name, in the family's order.
        let stale: Vec<Vec<String>> = prometheus::core::Collector::collect(&self.model_info)
            .iter()
            .flat_map(|f| f.get_metric())
            .map(|m| {
                let value = |name: &str| {
                    m.get_label().iter().find(|l| l.name() == name).map(|l| l.value().to_owned()).unwrap_or_default()
                };
                ["model", "version", "engine"].map(value).to_vec()
            })
            .filter(|labels| labels[0] == model)
            .collect();
        for labels in stale {
            let refs: Vec<&str> = labels.iter().map(String::as_str).collect();
            let _ = self.model_info.remove_label_values(&refs);
        }
        for outcome in ["ok", "failed"] {
            let _ = self.reloads.with_label_values(&[model, outcome]);
        }
        self.model_info.with_label_values(&[model, version, engine]).set(1);
        ModelMetrics {
            backlog_depth: self.backlog_depth.with_label_values(&[model]),
            lanes: self.lanes.with_label_values(&[model]),
            inference_duration: self.inference_duration.with_label_values(&[model]),
            pass_size: self.pass_size.with_label_values(&[model]),
            lane_failures: self.lane_failures.with_label_values(&[model]),
            lane_restarts: self.lane_restarts.with_label_values(&[model]),
            backlog_wait: self.backlog_wait.with_label_values(&[model]),
            low_confidence: self.low_confidence.with_label_values(&[model]),
            predictions: self.predictions.clone(),
            abandoned: self.abandoned.with_label_values(&[model]),
            background_frames: self.background_frames.with_label_values(&[model]),
            preprocess_duration: self.preprocess_duration.with_label_values(&[model]),
            decoded_inline: self.frames_decoded.with_label_values(&[model, "http"]),
            decoded_pool: self.frames_decoded.with_label_values(&[model, "pool"]),
            request_duration: self.request_duration.clone(),
            verdicts: self.verdicts.clone(),
            model: model.to_string(),
        }
    }

    /// Count one reload of `model` that ended `outcome` (`ok` or `failed`).
    pub fn count_reload(&self, model: &str, outcome: &str) {
        self.reloads.with_label_values(&[model, outcome]).inc();
    }

    /// Create a decision-table model's verdict series at zero.
    pub fn expect_verdicts(&self, model: &str) {
        for v in crate::decision::Verdict::ALL {
            let _ = self.verdicts.with_label_values(&[model, v.as_str()]);
        }
    }

    /// Handles for one model's retained frames, created at zero.
    pub fn for_retain(&self, model: &str) -> RetainMetrics {
        let c = |outcome: &str| self.retained.with_label_values(&[model, outcome]);
        RetainMetrics {
            written: c("written"),
            queue_full: c("queue_full"),
            write_failed: c("write_failed"),
            writer_stopped: c("writer_stopped"),
            evicted: self.retained_evicted.with_label_values(&[model]),
            frames: self.retained_frames.with_label_values(&[model]),
            bytes: self.retained_bytes.with_label_values(&[model]),
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
        let mm = m.for_model("washers", "f90bf350ed0f", "tract", &["good".into(), "burr".into()]);
        mm.observe_request("ok", 0.004);
        mm.observe_prediction("burr");
        mm.pass_size.observe(3.0);
        let text = m.render();
        assert!(text.contains("lineside_request_duration_seconds_count{model=\"washers\",outcome=\"ok\"} 1"), "{text}");
        assert!(
            text.contains("lineside_request_duration_seconds_count{model=\"washers\",outcome=\"bad_image\"} 0"),
            "{text}"
        );
        assert!(text.contains("lineside_pass_size_requests_bucket{model=\"washers\",le=\"4\"} 1"), "{text}");
        assert!(text.contains("lineside_backlog_depth{model=\"washers\"} 0"), "{text}");
        assert!(text.contains("lineside_frames_decoded_total{model=\"washers\",thread=\"http\"} 0"), "{text}");
        assert!(text.contains("lineside_frames_decoded_total{model=\"washers\",thread=\"pool\"} 0"), "{text}");
        assert!(text.contains("lineside_predictions_total{label=\"burr\",model=\"washers\"} 1"), "{text}");
        assert!(text.contains("lineside_predictions_total{label=\"good\",model=\"washers\"} 0"), "{text}");
        assert!(
            text.contains("lineside_model_info{engine=\"tract\",model=\"washers\",version=\"f90bf350ed0f\"} 1"),
            "{text}"
        );
        assert!(
            text.contains(&format!("lineside_build_info{{version=\"{}\"}} 1", env!("CARGO_PKG_VERSION"))),
            "{text}"
        );
        // Buckets from 0.5 ms to 2 s, then +Inf.
        assert!(text.contains("lineside_backlog_wait_seconds_bucket{model=\"washers\",le=\"0.0005\"} 0"), "{text}");
        assert!(text.contains("lineside_backlog_wait_seconds_bucket{model=\"washers\",le=\"2\"} 0"), "{text}");
    }
}
