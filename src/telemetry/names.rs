//! Every metric convoy exports: its name, help text, labels and histogram buckets, in one place.
//!
//! Names follow the Prometheus naming conventions (prometheus.io, "Metric and label naming"):
//! one `convoy_` prefix, base units (`_seconds`), `_total` on counters. Labels are bounded:
//! `model` and `version` only take names of versions that loaded (anything else is recorded as
//! `unknown`, see [`super::record`]), `code` is one of the 17 canonical gRPC code names,
//! `outcome` and `reason` are short fixed lists.

use metrics::Unit;
use metrics_exporter_prometheus::{Matcher, PrometheusBuilder};

/// Finished gRPC predict requests. Labels: model, version, code.
pub const REQUESTS_TOTAL: &str = "convoy_requests_total";
/// Samples carried by finished requests. Labels: model, version, code.
pub const SAMPLES_TOTAL: &str = "convoy_samples_total";
/// End-to-end time of a request, from arrival to reply. Histogram; labels: model.
pub const REQUEST_DURATION_SECONDS: &str = "convoy_request_duration_seconds";
/// Time a request's samples waited before their batch began to compute. Histogram; labels:
/// model, version.
pub const QUEUE_WAIT_SECONDS: &str = "convoy_queue_wait_seconds";
/// Compute time of one batch. Histogram; labels: model, version.
pub const BATCH_COMPUTE_SECONDS: &str = "convoy_batch_compute_seconds";
/// Samples in one computed batch. Histogram; labels: model, version.
pub const BATCH_SIZE: &str = "convoy_batch_size";
/// Computed batches. Labels: model, version, outcome (`ok`, `failed`).
pub const BATCHES_TOTAL: &str = "convoy_batches_total";
/// Samples waiting for compute now. Gauge; labels: model, version.
pub const QUEUED_SAMPLES: &str = "convoy_queued_samples";
/// Requests being handled now. Gauge; no labels.
pub const REQUESTS_IN_FLIGHT: &str = "convoy_requests_in_flight";
/// Decoding and preparing one image. Histogram; labels: model.
pub const IMAGE_PREPARE_SECONDS: &str = "convoy_image_prepare_seconds";
/// Model version loads. Labels: model, outcome (`ok`, or the step that refused it: `read`,
/// `verify`, `plan`, `check_samples`, `warm_up`, `conflict`).
pub const MODEL_LOADS_TOTAL: &str = "convoy_model_loads_total";
/// 1 for the version of each model that answers requests naming no version, 0 for a version
/// that did before. Gauge; labels: model, version.
pub const MODEL_ACTIVE_VERSION: &str = "convoy_model_active_version";
/// Time from the start of a version change (a bundle file appearing, an operator's call) to
/// the new version answering: reading, verifying, planning, check samples, warm-up and the
/// swap. Histogram; labels: model.
pub const MODEL_SWAP_SECONDS: &str = "convoy_model_swap_seconds";
/// Requests refused before compute. Labels: model, version, reason.
pub const REQUESTS_SHED_TOTAL: &str = "convoy_requests_shed_total";

/// Samples recorded for drift monitoring. Counter; labels: model, version.
pub const DRIFT_SAMPLES_TOTAL: &str = "convoy_drift_samples_total";
/// Values of a statistic per reference bin (equal-mass bins of the bundle's reference, so each
/// bin's share should stay near 1/bins). Counter; labels: model, version, statistic, bin.
pub const DRIFT_VALUES_TOTAL: &str = "convoy_drift_values_total";
/// Values of a statistic outside the reference's [min, max]. Counter; labels: model, version,
/// statistic.
pub const DRIFT_OUT_OF_RANGE_TOTAL: &str = "convoy_drift_out_of_range_total";
/// Samples whose statistic was NaN or infinite (non-finite input values). Counter; labels:
/// model, version, statistic.
pub const DRIFT_NON_FINITE_TOTAL: &str = "convoy_drift_non_finite_total";
/// Predictions per class index. Counter; labels: model, version, class.
pub const DRIFT_PREDICTIONS_TOTAL: &str = "convoy_drift_predictions_total";
/// Population stability index of the window against the reference. Gauge; labels: model,
/// version, statistic (`predicted_class` for the class distribution).
pub const DRIFT_PSI: &str = "convoy_drift_psi";
/// p-value of the window's test: two-sample KS per statistic, chi-square for
/// `predicted_class`. Gauge; labels: model, version, statistic.
pub const DRIFT_KS_P_VALUE: &str = "convoy_drift_p_value";
/// Verdict of the window: -1 too few samples, 0 stable, 1 moderate, 2 drift. Gauge; labels:
/// model, version, statistic.
pub const DRIFT_VERDICT: &str = "convoy_drift_verdict";
/// Samples in the drift window now. Gauge; labels: model, version.
pub const DRIFT_WINDOW_SAMPLES: &str = "convoy_drift_window_samples";

/// Shed reason: the model version's queue had no room for the request's samples.
pub const SHED_QUEUE_FULL: &str = "queue_full";
/// Shed reason: the request's deadline passed before its samples were computed.
pub const SHED_DEADLINE: &str = "deadline";
/// Shed reason: the client went away before its samples were computed.
pub const SHED_CANCELLED: &str = "cancelled";
/// Every shed reason, so each can be exported at zero as soon as a version loads.
pub const SHED_REASONS: [&str; 3] = [SHED_QUEUE_FULL, SHED_DEADLINE, SHED_CANCELLED];

/// Buckets (upper bounds, seconds) of every duration histogram.
///
/// Why these: a sample of the small networks convoy serves computes in 0.1 ms (LeNet-sized) to
/// about 10 ms (MobileNetV2 at 224×224), and a batch of 32 of the largest takes a few hundred
/// milliseconds (DEVELOPERS.md, "Latest side-by-side run"); decoding a small PNG takes tens of
/// microseconds; a request that waits behind full queues can take seconds. So the buckets run
/// from 50 µs to 10 s, in steps of 1–2.5–5 per decade (the progression of the Prometheus
/// client libraries' default buckets, extended down by two decades: common practice). One set
/// for every duration keeps queue wait, compute and end-to-end time comparable bucket by
/// bucket. 18 buckets with `+Inf`: per label set that is 20 series (buckets, `_sum`,
/// `_count`), a bounded cost.
pub const DURATION_BUCKETS: [f64; 17] = [
    0.000_05, 0.000_1, 0.000_25, 0.000_5, 0.001, 0.002_5, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5,
    1.0, 2.5, 5.0, 10.0,
];

/// Buckets (upper bounds, samples) of the batch size histogram.
///
/// Why these: powers of two from 1 to 256. `le="1"` counts batches that found no company (the
/// scheduler's idle case), and a batching scheduler fills batches up to its limit (32 by
/// default), so doublings put each typical limit on a bucket boundary and show how often
/// batches fill. Larger batches (a limit above 256) fall in `+Inf`; `_sum / _count` still
/// gives their mean.
pub const BATCH_SIZE_BUCKETS: [f64; 9] = [1.0, 2.0, 4.0, 8.0, 16.0, 32.0, 64.0, 128.0, 256.0];

/// The histograms and their buckets. Each histogram is given buckets explicitly: without them
/// the exporter renders a summary instead.
const HISTOGRAMS: [(&str, &[f64]); 6] = [
    (REQUEST_DURATION_SECONDS, &DURATION_BUCKETS),
    (QUEUE_WAIT_SECONDS, &DURATION_BUCKETS),
    (BATCH_COMPUTE_SECONDS, &DURATION_BUCKETS),
    (IMAGE_PREPARE_SECONDS, &DURATION_BUCKETS),
    (BATCH_SIZE, &BATCH_SIZE_BUCKETS),
    (MODEL_SWAP_SECONDS, &DURATION_BUCKETS),
];

/// The exporter's recorder settings: histogram buckets per metric, nothing else (names are
/// written here in full, so no suffixes are added, and no series expires).
pub(crate) fn builder() -> PrometheusBuilder {
    HISTOGRAMS
        .iter()
        .fold(PrometheusBuilder::new(), |b, (name, buckets)| {
            // The only failure of `set_buckets_for_metric` is an empty bucket list, and every
            // list in HISTOGRAMS is a non-empty constant (checked by a unit test below).
            b.set_buckets_for_metric(Matcher::Full((*name).to_string()), buckets)
                .expect("bucket lists are non-empty constants")
        })
}

/// The HELP text of every metric, given to the recorder once.
pub(crate) fn describe_all() {
    use metrics::{describe_counter, describe_gauge, describe_histogram};
    describe_counter!(
        REQUESTS_TOTAL,
        "Finished predict requests, by model, version and gRPC status code."
    );
    describe_counter!(
        SAMPLES_TOTAL,
        "Samples carried by finished predict requests, by model, version and gRPC status code."
    );
    describe_histogram!(
        REQUEST_DURATION_SECONDS,
        Unit::Seconds,
        "Time from a predict request's arrival to its reply, by model."
    );
    describe_histogram!(
        QUEUE_WAIT_SECONDS,
        Unit::Seconds,
        "Time a request's samples waited before their batch began to compute."
    );
    describe_histogram!(
        BATCH_COMPUTE_SECONDS,
        Unit::Seconds,
        "Time one batch took to compute on a compute thread."
    );
    describe_histogram!(BATCH_SIZE, Unit::Count, "Samples in each computed batch.");
    describe_counter!(BATCHES_TOTAL, "Computed batches, by outcome (ok, failed).");
    describe_gauge!(
        QUEUED_SAMPLES,
        Unit::Count,
        "Samples waiting for a compute thread now."
    );
    describe_gauge!(
        REQUESTS_IN_FLIGHT,
        Unit::Count,
        "Predict requests being handled now."
    );
    describe_histogram!(
        IMAGE_PREPARE_SECONDS,
        Unit::Seconds,
        "Time to decode one encoded image and prepare it as the model's input."
    );
    describe_counter!(
        MODEL_LOADS_TOTAL,
        "Model version loads, by outcome (ok, or the step that refused the bundle: read, verify, plan, check_samples, warm_up, conflict)."
    );
    describe_counter!(
        DRIFT_SAMPLES_TOTAL,
        "Samples recorded for drift monitoring, by model and version."
    );
    describe_counter!(
        DRIFT_VALUES_TOTAL,
        "Values of each drift statistic per bin of the bundle's reference (equal-mass bins: each bin's share should stay near 1/bins)."
    );
    describe_counter!(
        DRIFT_OUT_OF_RANGE_TOTAL,
        "Values of each drift statistic outside the reference's observed range."
    );
    describe_counter!(
        DRIFT_NON_FINITE_TOTAL,
        "Samples whose drift statistic was NaN or infinite."
    );
    describe_counter!(DRIFT_PREDICTIONS_TOTAL, "Predictions per class index.");
    describe_gauge!(
        DRIFT_PSI,
        "Population stability index of the drift window against the reference, per statistic (predicted_class: the class distribution)."
    );
    describe_gauge!(
        DRIFT_KS_P_VALUE,
        "p-value of the drift window's test: two-sample KS per statistic, chi-square for predicted_class."
    );
    describe_gauge!(
        DRIFT_VERDICT,
        "Drift verdict of the window: -1 too few samples, 0 stable, 1 moderate, 2 drift."
    );
    describe_gauge!(
        DRIFT_WINDOW_SAMPLES,
        Unit::Count,
        "Samples in the drift window now."
    );
    describe_histogram!(
        MODEL_SWAP_SECONDS,
        Unit::Seconds,
        "Time from the start of a version change to the new version answering (load, checks, warm-up, swap)."
    );
    describe_gauge!(
        MODEL_ACTIVE_VERSION,
        "1 for the version of each model that answers requests naming no version; 0 for one that did before."
    );
    describe_counter!(
        REQUESTS_SHED_TOTAL,
        "Requests refused before compute, by reason (queue_full, deadline, cancelled)."
    );
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn buckets_are_strictly_increasing_and_non_empty() {
        // The exposition format requires `le` bounds to increase (Prometheus "Exposition
        // formats", histograms); an empty list would make `builder` fail.
        for (name, buckets) in HISTOGRAMS {
            assert!(!buckets.is_empty(), "{name}");
            assert!(buckets.windows(2).all(|w| w[0] < w[1]), "{name}");
        }
        let _ = builder();
    }

    #[test]
    fn names_follow_the_conventions() {
        // Prometheus "Metric and label naming": [a-zA-Z_:][a-zA-Z0-9_:]*, counters end in
        // `_total`, durations in `_seconds`.
        let all = [
            REQUESTS_TOTAL,
            SAMPLES_TOTAL,
            REQUEST_DURATION_SECONDS,
            QUEUE_WAIT_SECONDS,
            BATCH_COMPUTE_SECONDS,
            BATCH_SIZE,
            BATCHES_TOTAL,
            QUEUED_SAMPLES,
            REQUESTS_IN_FLIGHT,
            IMAGE_PREPARE_SECONDS,
            MODEL_LOADS_TOTAL,
            MODEL_ACTIVE_VERSION,
            MODEL_SWAP_SECONDS,
            REQUESTS_SHED_TOTAL,
            DRIFT_SAMPLES_TOTAL,
            DRIFT_VALUES_TOTAL,
            DRIFT_OUT_OF_RANGE_TOTAL,
            DRIFT_NON_FINITE_TOTAL,
            DRIFT_PREDICTIONS_TOTAL,
            DRIFT_PSI,
            DRIFT_KS_P_VALUE,
            DRIFT_VERDICT,
            DRIFT_WINDOW_SAMPLES,
        ];
        for name in all {
            assert!(name.starts_with("convoy_"), "{name}");
            assert!(
                name.bytes().all(|b| b.is_ascii_lowercase() || b == b'_'),
                "{name}"
            );
        }
        for (name, _) in HISTOGRAMS {
            assert!(!name.ends_with("_total"), "{name}");
        }
    }
}
