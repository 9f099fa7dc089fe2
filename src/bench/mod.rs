//! `lineside bench`: whether this box keeps up with the line (its frames per second, each
//! answered within its budget), with what margin and with which settings.
//!
//! | file | part |
//! |---|---|
//! | [`load`] | the HTTP load generator: closed and open loop, every latency kept |
//! | [`child`] | a `lineside serve` child process on a free loopback port |
//! | [`engine`] | the engine alone, for the serving-overhead ratio |
//! | [`report`] | the steps, the settings tried, the verdict, the table and the JSON |
//! | [`chart`] | the share of frames slower than each latency, with the budget; SVG and HTML |
//! | [`abuse`] | the mixed-abuse clients of the soak test and benchmark, each with the answer it must get |
//!
//! The command itself (child server, steps, settings tried) is in `cli/bench.rs`.

pub mod abuse;
pub mod chart;
pub mod child;
pub mod drive;
pub mod engine;
pub mod load;
pub mod report;
pub mod verdict;

use hdrhistogram::Histogram;
use serde::Serialize;

/// Significant decimal digits the latency histograms keep: a recorded value is exact to
/// within 1 part in 10^3 (the precision the `hdrhistogram` crate documents for this setting).
pub const SIGNIFICANT_DIGITS: u8 = 3;

/// An HDR histogram of latencies in microseconds (1 us .. 1 h; 0 is recorded as 1).
fn histogram(samples_us: &[u64]) -> Histogram<u64> {
    let mut h =
        Histogram::<u64>::new_with_bounds(1, 3_600_000_000, SIGNIFICANT_DIGITS).expect("static bounds are valid");
    for &v in samples_us {
        h.saturating_record(v.max(1));
    }
    h
}

/// Latency percentiles of one step, in milliseconds.
#[derive(Debug, Clone, Copy, Serialize, PartialEq)]
pub struct Latency {
    /// Samples summarised.
    pub count: u64,
    /// Mean.
    pub mean_ms: f64,
    /// Median.
    pub p50_ms: f64,
    /// 90th percentile.
    pub p90_ms: f64,
    /// 99th percentile.
    pub p99_ms: f64,
    /// 99.9th percentile.
    pub p999_ms: f64,
    /// Largest.
    pub max_ms: f64,
}

/// The percentiles of `samples_us` (microseconds) from an HDR histogram. A percentile q is the
/// smallest recorded value with at least q of the samples at or below it (the inverted-CDF
/// definition), reported as the upper edge of its histogram bucket.
pub fn summarize(samples_us: &[u64]) -> Latency {
    let h = histogram(samples_us);
    let ms = |v: u64| v as f64 / 1e3;
    if h.is_empty() {
        return Latency { count: 0, mean_ms: 0.0, p50_ms: 0.0, p90_ms: 0.0, p99_ms: 0.0, p999_ms: 0.0, max_ms: 0.0 };
    }
    Latency {
        count: h.len(),
        mean_ms: h.mean() / 1e3,
        p50_ms: ms(h.value_at_quantile(0.5)),
        p90_ms: ms(h.value_at_quantile(0.9)),
        p99_ms: ms(h.value_at_quantile(0.99)),
        p999_ms: ms(h.value_at_quantile(0.999)),
        max_ms: ms(h.max()),
    }
}

/// CPU seconds (user + system) a process has used: fields 14 and 15 of /proc/PID/stat, in
/// clock ticks of 1/100 s (the Linux USER_HZ on x86-64 and arm64). `None` off Linux.
pub fn cpu_seconds(pid: &str) -> Option<f64> {
    let stat = std::fs::read_to_string(format!("/proc/{pid}/stat")).ok()?;
    // The command name (field 2) may contain spaces: count fields after its closing ')'.
    let rest = stat.rsplit_once(')')?.1;
    let f: Vec<f64> = rest.split_whitespace().map(|v| v.parse().unwrap_or(0.0)).collect();
    (f.len() >= 13).then(|| (f[11] + f[12]) / 100.0)
}

/// The machine a run was measured on.
#[derive(Debug, Clone, Serialize)]
pub struct Machine {
    /// CPU model name.
    pub cpu: String,
    /// Cores this process may use.
    pub cores: usize,
    /// SIMD extensions the CPU reports that matter to inference kernels.
    pub simd: Vec<String>,
    /// Operating system and architecture.
    pub os: String,
}

impl Machine {
    /// Read from /proc/cpuinfo (Linux) and the standard library.
    pub fn this() -> Machine {
        const SIMD: &[&str] = &[
            "sse4_2",
            "avx",
            "avx2",
            "fma",
            "f16c",
            "avx512f",
            "avx512bw",
            "avx512vl",
            "avx512_vnni",
            "avx512_bf16",
            "amx_tile",
            "neon",
            "asimd",
        ];
        let info = std::fs::read_to_string("/proc/cpuinfo").unwrap_or_default();
        let field = |key: &str| {
            info.lines()
                .find(|l| l.split(':').next().is_some_and(|k| k.trim() == key))
                .and_then(|l| l.split_once(':'))
                .map(|(_, v)| v.trim().to_string())
        };
        let flags = field("flags").or_else(|| field("Features")).unwrap_or_default();
        let simd = SIMD.iter().filter(|f| flags.split_whitespace().any(|x| x == **f)).map(|f| f.to_string()).collect();
        Machine {
            cpu: field("model name").unwrap_or_else(|| "unknown".into()),
            cores: std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1),
            simd,
            os: format!("{} {}", std::env::consts::OS, std::env::consts::ARCH),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn percentiles_follow_the_inverted_cdf_on_a_known_set() {
        // 1..=1000 ms: the inverted-CDF q-quantile of n sorted values is the ceil(q n)-th.
        let samples: Vec<u64> = (1..=1000).map(|ms| ms * 1000).collect();
        let l = summarize(&samples);
        assert_eq!(l.count, 1000);
        for (got, want) in
            [(l.p50_ms, 500.0), (l.p90_ms, 900.0), (l.p99_ms, 990.0), (l.p999_ms, 999.0), (l.max_ms, 1000.0)]
        {
            assert!((got - want).abs() <= want * 1e-3, "{got} vs {want}");
        }
        assert!((l.mean_ms - 500.5).abs() < 0.5);
        assert_eq!(summarize(&[]).count, 0);
    }

    #[test]
    fn cpu_seconds_reads_this_process() {
        if cfg!(target_os = "linux") {
            assert!(cpu_seconds("self").is_some());
        }
        assert_eq!(cpu_seconds("no-such-process"), None);
    }
}
