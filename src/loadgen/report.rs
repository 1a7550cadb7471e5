//! The result of a run against a server: counts, errors by status, throughput, latency
//! percentiles and the server's own timing; printed as text for people or as one JSON object.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::time::Duration;

use serde::Serialize;

use super::drive::Tally;
use super::histogram::{Histogram, RELATIVE_ERROR};
use super::{LoadConfig, Pace};
use crate::cli::with_commas;

/// Latency percentiles in milliseconds; `None` (JSON `null`) when no request succeeded.
#[derive(Clone, Debug, Serialize)]
pub struct Latency {
    pub p50: Option<f64>,
    pub p90: Option<f64>,
    pub p99: Option<f64>,
    pub p999: Option<f64>,
    pub max: Option<f64>,
}

/// Means of the `Timing` the server put in its ok replies.
#[derive(Clone, Debug, Serialize)]
pub struct ServerTiming {
    /// Replies that carried a timing.
    pub replies: u64,
    pub mean_queued_us: f64,
    pub mean_compute_us: f64,
    pub mean_total_us: f64,
    /// Samples in the batch that computed a request, averaged over requests.
    pub mean_batch_size: f64,
}

/// Open loop: how late requests left after their due time (the generator's own delay, already
/// included in the latencies).
#[derive(Clone, Debug, Serialize)]
pub struct Lag {
    pub p50: Option<f64>,
    pub p99: Option<f64>,
    pub max: Option<f64>,
}

/// A run's result. Field names are the JSON keys.
#[derive(Clone, Debug, Serialize)]
pub struct LoadReport {
    /// "closed" or "open".
    pub mode: &'static str,
    pub server: String,
    /// As the server named them in its first ok reply; empty when none succeeded.
    pub model: String,
    pub version: String,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub concurrency: Option<usize>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub rate_per_s: Option<f64>,
    /// The measured window (shorter than asked when the run was stopped).
    pub duration_s: f64,
    pub warmup_s: f64,
    /// Stopped before the end (Ctrl-C).
    pub interrupted: bool,
    pub samples_per_request: usize,
    /// What the requests carried.
    pub inputs: String,
    /// Requests due (open loop) or sent (closed loop) in the measured window.
    pub requests: u64,
    pub ok: u64,
    /// Ok replies by the version that computed them.
    pub ok_by_version: BTreeMap<String, u64>,
    /// Status code (as the gRPC specification spells it) or client-side cause → count.
    pub errors: BTreeMap<&'static str, u64>,
    /// Ok requests per second.
    pub throughput_per_s: f64,
    /// Ok samples per second.
    pub samples_per_s: f64,
    /// Of ok requests.
    pub latency_ms: Latency,
    pub latency_mean_ms: Option<f64>,
    /// Largest relative error of the percentiles (not of `max` or the mean, which are exact).
    pub latency_relative_error: f64,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub server_timing: Option<ServerTiming>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub send_lag_ms: Option<Lag>,
    /// Latencies of ok requests in nanoseconds, for the plot.
    #[serde(skip)]
    pub histogram: Histogram,
}

fn ms(h: &Histogram, ppm: u32) -> Option<f64> {
    h.quantile_ppm(ppm).map(|ns| ns as f64 / 1e6)
}

impl LoadReport {
    pub(crate) fn new(
        config: &LoadConfig,
        inputs: &str,
        measured: Duration,
        interrupted: bool,
        t: Tally,
    ) -> LoadReport {
        let secs = measured.as_secs_f64().max(1e-9);
        let (mode, concurrency, rate_per_s) = match config.pace {
            Pace::Closed { concurrency } => ("closed", Some(concurrency), None),
            Pace::Open { rate_per_s } => ("open", None, Some(rate_per_s)),
        };
        let (model, version) = t.model.unwrap_or_default();
        let per = |sum: u64| sum as f64 / t.timed.max(1) as f64;
        LoadReport {
            mode,
            server: config.server.clone(),
            model,
            version,
            concurrency,
            rate_per_s,
            duration_s: measured.as_secs_f64(),
            warmup_s: config.warmup.as_secs_f64(),
            interrupted,
            samples_per_request: config.samples_per_request,
            inputs: inputs.to_string(),
            requests: t.requests,
            ok: t.ok,
            ok_by_version: t.ok_by_version,
            errors: t.errors,
            throughput_per_s: t.ok as f64 / secs,
            samples_per_s: t.ok_samples as f64 / secs,
            latency_ms: Latency {
                p50: ms(&t.latency, 500_000),
                p90: ms(&t.latency, 900_000),
                p99: ms(&t.latency, 990_000),
                p999: ms(&t.latency, 999_000),
                max: t.latency.max().map(|ns| ns as f64 / 1e6),
            },
            latency_mean_ms: t.latency.mean().map(|ns| ns / 1e6),
            latency_relative_error: RELATIVE_ERROR,
            server_timing: (t.timed > 0).then(|| ServerTiming {
                replies: t.timed,
                mean_queued_us: per(t.queued_us),
                mean_compute_us: per(t.compute_us),
                mean_total_us: per(t.total_us),
                mean_batch_size: per(t.batch_size),
            }),
            send_lag_ms: rate_per_s.and(if t.lag.is_empty() {
                None
            } else {
                Some(Lag {
                    p50: ms(&t.lag, 500_000),
                    p99: ms(&t.lag, 990_000),
                    max: t.lag.max().map(|ns| ns as f64 / 1e6),
                })
            }),
            histogram: t.latency,
        }
    }

    /// "closed loop, 16 callers" / "open loop, 200 requests/s scheduled".
    pub fn pace_text(&self) -> String {
        match (self.concurrency, self.rate_per_s) {
            (Some(1), _) => "closed loop, 1 caller".into(),
            (Some(n), _) => format!("closed loop, {n} callers"),
            (_, Some(r)) => format!("open loop, {} requests/s scheduled", number(r)),
            _ => self.mode.to_string(),
        }
    }

    /// The report for people.
    pub fn to_text(&self) -> String {
        let mut s = String::new();
        let plural = if self.samples_per_request == 1 {
            ""
        } else {
            "s"
        };
        // Writing to a String cannot fail.
        let _ = writeln!(
            s,
            "{}, {} s measured after {} s warm-up{}, {} sample{plural} per request",
            self.pace_text(),
            number(self.duration_s),
            number(self.warmup_s),
            if self.interrupted {
                " (stopped early)"
            } else {
                ""
            },
            self.samples_per_request,
        );
        let model = if self.model.is_empty() {
            String::new()
        } else {
            format!(", model {} {}", self.model, self.version)
        };
        let _ = writeln!(s, "server {}{model}, {}", self.server, self.inputs);
        let _ = writeln!(s);
        let _ = writeln!(s, "requests        {:>12}", with_commas(self.requests));
        let _ = writeln!(s, "ok              {:>12}", with_commas(self.ok));
        if self.ok_by_version.len() > 1 {
            let by: Vec<String> = self
                .ok_by_version
                .iter()
                .map(|(v, n)| format!("{v}: {}", with_commas(*n)))
                .collect();
            let _ = writeln!(s, "  by version    {}", by.join(", "));
        }
        if self.errors.is_empty() {
            let _ = writeln!(s, "errors          {:>12}", 0);
        } else {
            let total: u64 = self.errors.values().sum();
            let _ = writeln!(s, "errors          {:>12}", with_commas(total));
            for (code, n) in &self.errors {
                // Right-aligned with the counts above (a 28-character column), however long
                // the code's name.
                let label = format!("  {code}");
                let pad = 28usize.saturating_sub(label.len() + 1).max(1);
                let _ = writeln!(s, "{label} {:>pad$}", with_commas(*n));
            }
        }
        let _ = writeln!(
            s,
            "throughput      {:>12} requests/s, {} samples/s",
            number(self.throughput_per_s),
            number(self.samples_per_s)
        );
        let l = &self.latency_ms;
        let f = |v: Option<f64>| v.map_or_else(|| "-".to_string(), number);
        let _ = writeln!(
            s,
            "latency (ms)    p50 {}   p90 {}   p99 {}   p99.9 {}   max {}",
            f(l.p50),
            f(l.p90),
            f(l.p99),
            f(l.p999),
            f(l.max)
        );
        let _ = writeln!(
            s,
            "                mean {}; percentiles within {:.1} %{}",
            f(self.latency_mean_ms),
            self.latency_relative_error * 100.0,
            if self.rate_per_s.is_some() {
                ", measured from each request's due time"
            } else {
                ""
            }
        );
        if let Some(t) = &self.server_timing {
            let _ = writeln!(
                s,
                "server (mean)   queued {} ms, compute {} ms, total {} ms, batch size {}",
                number(t.mean_queued_us / 1e3),
                number(t.mean_compute_us / 1e3),
                number(t.mean_total_us / 1e3),
                number(t.mean_batch_size)
            );
        }
        if let Some(lag) = &self.send_lag_ms {
            let _ = writeln!(
                s,
                "sent late (ms)  p50 {}   p99 {}   max {}  (the generator's delay, counted in latency)",
                f(lag.p50),
                f(lag.p99),
                f(lag.max)
            );
        }
        s
    }
}

/// A number with about three significant digits and thousands separators: `0.0123`, `1.23`,
/// `12.3`, `1,234`.
pub fn number(v: f64) -> String {
    if !v.is_finite() {
        return v.to_string();
    }
    let a = v.abs();
    if a >= 1000.0 {
        let rounded = v.round();
        let sign = if rounded < 0.0 { "-" } else { "" };
        return format!("{sign}{}", with_commas(rounded.abs() as u64));
    }
    let decimals = if a >= 100.0 {
        0
    } else if a >= 10.0 {
        1
    } else if a >= 1.0 || a == 0.0 {
        2
    } else if a >= 0.1 {
        3
    } else {
        4
    };
    let s = format!("{v:.decimals$}");
    if s.contains('.') {
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        s
    }
}

/// Canonical gRPC code names, shared with the metrics labels.
pub use crate::telemetry::code_name;

#[cfg(test)]
mod tests {
    use super::*;

    /// The JSON keys promised to users (`convoy bench --json`): `requests`, `ok`, `errors`,
    /// `throughput_per_s` and `latency_ms` with `p50`, `p90`, `p99`, `p999`, `max`.
    #[test]
    fn json_has_the_documented_keys() {
        let mut t = Tally::default();
        for ms in 1..=10u64 {
            t.latency.record(ms * 1_000_000);
        }
        t.requests = 12;
        t.ok = 10;
        t.ok_samples = 20;
        t.errors
            .insert(code_name(tonic::Code::ResourceExhausted), 2);
        t.timed = 10;
        t.compute_us = 15_000;
        t.batch_size = 30;
        let config = LoadConfig {
            samples_per_request: 2,
            ..LoadConfig::default()
        };
        let r = LoadReport::new(&config, "x", Duration::from_secs(2), false, t);
        let v = serde_json::to_value(&r).unwrap();
        for key in ["requests", "ok", "errors", "throughput_per_s", "latency_ms"] {
            assert!(v.get(key).is_some(), "missing {key}");
        }
        let lat = v["latency_ms"].as_object().unwrap();
        let keys: Vec<&str> = lat.keys().map(String::as_str).collect();
        assert_eq!(keys, ["max", "p50", "p90", "p99", "p999"]);
        // Nearest rank of 1..=10 ms: p50 is rank 5 (5 ms), p90 rank 9, p99 rank 10; max is
        // exact, percentiles within the histogram's bound.
        let near = |key: &str, want: f64| {
            let got = v["latency_ms"][key].as_f64().unwrap();
            assert!(
                (got - want).abs() <= want * RELATIVE_ERROR,
                "{key}: {got} vs {want}"
            );
        };
        near("p50", 5.0);
        near("p90", 9.0);
        near("p99", 10.0);
        assert_eq!(v["latency_ms"]["max"], 10.0);
        assert_eq!(v["errors"]["RESOURCE_EXHAUSTED"], 2);
        assert_eq!(v["throughput_per_s"], 5.0);
        assert_eq!(v["samples_per_s"], 10.0);
        assert_eq!(v["server_timing"]["mean_batch_size"], 3.0);
        assert_eq!(v["server_timing"]["mean_compute_us"], 1500.0);
        assert!(r.to_text().contains("RESOURCE_EXHAUSTED"));
    }

    #[test]
    fn numbers_read_well() {
        assert_eq!(number(0.0), "0");
        assert_eq!(number(0.01234), "0.0123");
        assert_eq!(number(1.5), "1.5");
        assert_eq!(number(12.34), "12.3");
        assert_eq!(number(123.4), "123");
        assert_eq!(number(2469.4), "2,469");
    }
}
