//! lineside: a CPU inference server for small ONNX image classifiers beside a production line.
//!
//! `check` loads a model and verifies its input/output contract, `serve` answers images over
//! HTTP (decode, preprocess, batch, infer) with health probes and Prometheus metrics,
//! `preprocess` writes the exact tensor a model gets for one image, `bench` says
//! whether this box keeps up with the line's frame rate within its budget per frame, and
//! `evaluate` qualifies a model on labelled line frames through the same serving path.
//!
//! # Layout
//!
//! One module per stage of an image's path:
//!
//! | module | stage |
//! |---|---|
//! | [`config`] | TOML + flags, validated once into each stage's settings (no stage imports it) |
//! | [`source`] | a file the config names, on disk or embedded |
//! | [`model`] | load the ONNX file, check its contract, plan and run it on its engine (engine types stay here) |
//! | [`preprocess`] | decode, ROI, convert, resize (Pillow's arithmetic), normalise; the bounded decode pool |
//! | [`batch`] | per-model backlog, inference lanes, pass formation, deadlines at the lane |
//! | [`decision`] | a label and score become the line's verdict: accept, reject, review, no_part |
//! | [`retain`] | the frames a person must see, kept off the request path within bounds; their export |
//! | [`reload`] | a model's new version loaded, checked and self-tested beside the serving one, swapped in; file watching |
//! | [`background`] | work off the lanes (a reload's load and self-test) on a thread at low CPU priority |
//! | [`selftest`] | sample images through the serving path at load, against expectations |
//! | [`served`] | the one loading path every command uses; a served model's lanes |
//! | [`evaluate`] | labelled frames scored through the serving path; the figures, reports and baseline |
//! | [`verify`] | what `check` finds out about a model, as JSON or text |
//! | [`access`] | who may do what: admin and client tokens, page sessions, TLS |
//! | [`http`] | router, handlers, request ids, multipart, the OpenAPI document, the one error type |
//! | [`logging`] | the log filter, changeable while serving and put back after a set time |
//! | [`metrics`] | the registry and the response-counting middleware |
//! | [`server`] | bind, load, serve, drain |
//! | [`bench`] | load generator, engine-alone runs, bench reports and charts |
//! | [`cli`] | the subcommands, as library calls |
//!
//! lineside assists visual inspection; it does not replace the plant's safety systems or
//! qualified sign-off of accept/reject decisions.

pub mod access;
pub mod background;
pub mod batch;
pub mod bench;
pub mod cli;
pub mod config;
pub mod decision;
pub mod evaluate;
pub mod http;
pub mod logging;
pub mod metrics;
pub mod model;
pub mod preprocess;
pub mod reload;
pub mod retain;
pub mod selftest;
pub mod served;
pub mod server;
pub mod shutdown;
pub mod source;
pub mod verify;

/// Whether this CPU has the instruction-set extensions the binary was compiled for (a build
/// with `-C target-cpu=x86-64-v3` or higher would otherwise die of an illegal instruction on
/// an older box). `Err` names the first one missing.
///
/// # Errors
/// The name of an extension the build assumes and this CPU lacks.
pub fn build_cpu_fits() -> Result<(), &'static str> {
    #[cfg(target_arch = "x86_64")]
    {
        macro_rules! need {
            ($($feature:tt),*) => {$(
                if cfg!(target_feature = $feature) && !std::arch::is_x86_feature_detected!($feature) {
                    return Err($feature);
                }
            )*};
        }
        need!("avx2", "fma", "bmi2", "avx512f", "avx512bw", "avx512vl");
    }
    Ok(())
}

/// A duration in milliseconds, rounded to the microsecond: the one way lineside reports a
/// time (answers' `timing_ms`, `/models`, access logs, `check`).
pub fn millis(d: std::time::Duration) -> f64 {
    (d.as_secs_f64() * 1e6).round() / 1e3
}

#[cfg(test)]
mod tests {
    #[test]
    fn millis_rounds_to_the_microsecond() {
        use std::time::Duration;
        assert_eq!(super::millis(Duration::from_nanos(1_426_499)), 1.426);
        assert_eq!(super::millis(Duration::from_nanos(1_426_500)), 1.427);
        assert_eq!(super::millis(Duration::from_secs(2)), 2000.0);
    }

    #[test]
    fn the_build_fits_the_cpu_that_runs_the_tests() {
        // A build made with a target-cpu this CPU cannot run would fail here (or earlier, with
        // an illegal instruction); the default build assumes nothing beyond x86-64.
        assert_eq!(super::build_cpu_fits(), Ok(()));
    }
}
