//! The real server (demo model) on 127.0.0.1:0 with its metrics endpoint on 127.0.0.1:0: a few
//! Predict calls with a tonic client, good and bad, then `GET /metrics` over plain HTTP/1.1,
//! checked against the Prometheus text format.
//!
//! Source of every format rule checked here: the Prometheus documentation, "Exposition
//! formats", section "Text-based format" (content type `text/plain; version=0.0.4`, line
//! format, `# HELP` / `# TYPE` lines before a metric's samples, one group per metric,
//! histograms as `_bucket{le=...}` with a final `le="+Inf"` equal to `_count`, plus `_sum`).
//! Names and labels are checked against the list convoy promises (src/telemetry/mod.rs).
//!
//! One test function: the recorder is process-wide, so counts are exact only while no other
//! test in this binary sends requests.

use std::collections::{BTreeMap, BTreeSet};
use std::net::SocketAddr;

use convoy::service::api::{self, predictor_client::PredictorClient, sample::Data};
use convoy::service::{ServeConfig, start};
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tonic::Code;

fn image(path: &str) -> api::Sample {
    let full = format!(
        "{}/models/stamped-parts/samples/{path}",
        env!("CARGO_MANIFEST_DIR")
    );
    api::Sample {
        data: Some(Data::EncodedImage(std::fs::read(&full).unwrap())),
    }
}

fn tensor(shape: &[u32], values: &[f32]) -> api::Sample {
    api::Sample {
        data: Some(Data::Tensor(api::Tensor {
            shape: shape.to_vec(),
            f32_le: values.iter().flat_map(|v| v.to_le_bytes()).collect(),
        })),
    }
}

fn request(model: &str, samples: Vec<api::Sample>) -> api::PredictRequest {
    api::PredictRequest {
        model: model.into(),
        samples,
        ..Default::default()
    }
}

struct HttpResponse {
    status: String,
    headers: BTreeMap<String, String>,
    body: String,
}

/// A minimal HTTP/1.1 GET (RFC 9112): request line, Host, Connection: close; the response is
/// read to the end, since the server closes after one response.
async fn http_get(addr: SocketAddr, path: &str) -> HttpResponse {
    let mut stream = tokio::net::TcpStream::connect(addr).await.unwrap();
    let req = format!("GET {path} HTTP/1.1\r\nHost: {addr}\r\nConnection: close\r\n\r\n");
    stream.write_all(req.as_bytes()).await.unwrap();
    let mut raw = Vec::new();
    stream.read_to_end(&mut raw).await.unwrap();
    let text = String::from_utf8(raw).expect("the text format is UTF-8");
    let (head, body) = text.split_once("\r\n\r\n").expect("a head and a body");
    let mut lines = head.split("\r\n");
    let status = lines.next().unwrap().to_string();
    let headers = lines
        .map(|l| {
            let (k, v) = l.split_once(':').expect("header line");
            (k.trim().to_ascii_lowercase(), v.trim().to_string())
        })
        .collect::<BTreeMap<_, _>>();
    if let Some(len) = headers.get("content-length") {
        assert_eq!(len.parse::<usize>().unwrap(), body.len(), "Content-Length");
    }
    HttpResponse {
        status,
        headers,
        body: body.to_string(),
    }
}

#[derive(Debug)]
struct Sample {
    name: String,
    labels: BTreeMap<String, String>,
    value: f64,
    line: usize,
}

#[derive(Debug, Default)]
struct Exposition {
    help: BTreeMap<String, (String, usize)>,
    types: BTreeMap<String, (String, usize)>,
    samples: Vec<Sample>,
}

/// Parses the text format as the "Exposition formats" page describes it: `# HELP name text`,
/// `# TYPE name type`, other `#` lines are comments, samples are
/// `name{label="value",...} value [timestamp]` with `\\`, `\"` and `\n` escaped in label values.
fn parse(text: &str) -> Exposition {
    let mut e = Exposition::default();
    for (i, line) in text.lines().enumerate() {
        let line = line.trim();
        if line.is_empty() {
            continue;
        }
        if let Some(rest) = line.strip_prefix('#') {
            let mut t = rest.trim_start().splitn(3, ' ');
            match (t.next(), t.next(), t.next()) {
                (Some("HELP"), Some(name), doc) => {
                    let old = e.help.insert(name.into(), (doc.unwrap_or("").into(), i));
                    assert!(old.is_none(), "two HELP lines for {name}");
                }
                (Some("TYPE"), Some(name), Some(kind)) => {
                    let old = e.types.insert(name.into(), (kind.trim().into(), i));
                    assert!(old.is_none(), "two TYPE lines for {name}");
                }
                _ => {}
            }
            continue;
        }
        let name_end = line.find(['{', ' ']).expect("a value after the name");
        let name = &line[..name_end];
        let mut rest = &line[name_end..];
        let mut labels = BTreeMap::new();
        if let Some(mut l) = rest.strip_prefix('{') {
            loop {
                l = l.trim_start_matches(',');
                if let Some(after) = l.strip_prefix('}') {
                    rest = after;
                    break;
                }
                let (key, after) = l.split_once("=\"").expect("label=\"value\"");
                let mut value = String::new();
                let mut chars = after.char_indices();
                let end = loop {
                    match chars.next().expect("closed label value") {
                        (_, '\\') => match chars.next().unwrap().1 {
                            'n' => value.push('\n'),
                            c => value.push(c),
                        },
                        (j, '"') => break j,
                        (_, c) => value.push(c),
                    }
                };
                assert!(
                    labels.insert(key.trim().to_string(), value).is_none(),
                    "label {key} twice: {line}"
                );
                l = &after[end + 1..];
            }
        }
        let value_text = rest.split_whitespace().next().expect("a value");
        let value: f64 = value_text
            .parse()
            .unwrap_or_else(|_| panic!("value {value_text:?} on line {i}: {line}"));
        e.samples.push(Sample {
            name: name.into(),
            labels,
            value,
            line: i,
        });
    }
    e
}

impl Exposition {
    /// The family a sample belongs to: its own name, or the histogram it is a part of.
    fn family_of(&self, sample: &str) -> String {
        for suffix in ["_bucket", "_sum", "_count"] {
            if let Some(base) = sample.strip_suffix(suffix)
                && self.types.get(base).is_some_and(|(t, _)| t == "histogram")
            {
                return base.into();
            }
        }
        sample.into()
    }

    fn series(&self, name: &str) -> impl Iterator<Item = &Sample> {
        self.samples.iter().filter(move |s| s.name == name)
    }

    /// The value of the one sample named `name` whose labels include `want`.
    fn value(&self, name: &str, want: &[(&str, &str)]) -> f64 {
        let found: Vec<&Sample> = self
            .series(name)
            .filter(|s| {
                want.iter()
                    .all(|(k, v)| s.labels.get(*k).map(String::as_str) == Some(*v))
            })
            .collect();
        assert_eq!(found.len(), 1, "{name} {want:?}: {found:?}");
        found[0].value
    }

    /// The sum over every sample named `name` whose labels include `want`.
    fn total(&self, name: &str, want: &[(&str, &str)]) -> f64 {
        self.series(name)
            .filter(|s| {
                want.iter()
                    .all(|(k, v)| s.labels.get(*k).map(String::as_str) == Some(*v))
            })
            .map(|s| s.value)
            .sum()
    }
}

type LabelSet = Vec<(String, String)>;

/// The families convoy promises: name, type, label names (besides `le`).
const FAMILIES: [(&str, &str, &[&str]); 23] = [
    (
        "convoy_requests_total",
        "counter",
        &["model", "version", "code"],
    ),
    (
        "convoy_samples_total",
        "counter",
        &["model", "version", "code"],
    ),
    ("convoy_request_duration_seconds", "histogram", &["model"]),
    (
        "convoy_queue_wait_seconds",
        "histogram",
        &["model", "version"],
    ),
    (
        "convoy_batch_compute_seconds",
        "histogram",
        &["model", "version"],
    ),
    ("convoy_batch_size", "histogram", &["model", "version"]),
    (
        "convoy_batches_total",
        "counter",
        &["model", "version", "outcome"],
    ),
    ("convoy_queued_samples", "gauge", &["model", "version"]),
    ("convoy_requests_in_flight", "gauge", &[]),
    ("convoy_image_prepare_seconds", "histogram", &["model"]),
    ("convoy_model_loads_total", "counter", &["model", "outcome"]),
    (
        "convoy_model_active_version",
        "gauge",
        &["model", "version"],
    ),
    ("convoy_model_swap_seconds", "histogram", &["model"]),
    // The demo's bundle carries a drift reference, so its drift series are on the page.
    (
        "convoy_drift_samples_total",
        "counter",
        &["model", "version"],
    ),
    (
        "convoy_drift_values_total",
        "counter",
        &["model", "version", "statistic", "bin"],
    ),
    (
        "convoy_drift_out_of_range_total",
        "counter",
        &["model", "version", "statistic"],
    ),
    (
        "convoy_drift_non_finite_total",
        "counter",
        &["model", "version", "statistic"],
    ),
    (
        "convoy_drift_predictions_total",
        "counter",
        &["model", "version", "class"],
    ),
    (
        "convoy_drift_psi",
        "gauge",
        &["model", "version", "statistic"],
    ),
    (
        "convoy_drift_p_value",
        "gauge",
        &["model", "version", "statistic"],
    ),
    (
        "convoy_drift_verdict",
        "gauge",
        &["model", "version", "statistic"],
    ),
    (
        "convoy_drift_window_samples",
        "gauge",
        &["model", "version"],
    ),
    (
        "convoy_requests_shed_total",
        "counter",
        &["model", "version", "reason"],
    ),
];

/// Every rule of the format and of convoy's metric list that holds whatever was recorded.
fn check_format(e: &Exposition) {
    for (name, kind, labels) in FAMILIES {
        let (t, type_line) = e
            .types
            .get(name)
            .unwrap_or_else(|| panic!("no TYPE for {name}"));
        assert_eq!(t, kind, "{name}");
        let (help, _) = e
            .help
            .get(name)
            .unwrap_or_else(|| panic!("no HELP for {name}"));
        assert!(!help.trim().is_empty(), "{name} has an empty HELP");
        let want: BTreeSet<&str> = labels.iter().copied().collect();
        let mut lines = Vec::new();
        for s in e.samples.iter().filter(|s| e.family_of(&s.name) == name) {
            let mut got: BTreeSet<&str> = s.labels.keys().map(String::as_str).collect();
            if s.name.ends_with("_bucket") {
                assert!(got.remove("le"), "{} without le", s.name);
            }
            assert_eq!(got, want, "labels of {} on line {}", s.name, s.line);
            assert!(s.line > *type_line, "{} before its TYPE line", s.name);
            lines.push(s.line);
        }
        assert!(!lines.is_empty(), "no samples of {name}");
        // One group per metric: nothing of another family between its first and last sample.
        let (first, last) = (lines[0], *lines.last().unwrap());
        assert!(
            e.samples
                .iter()
                .filter(|s| (first..=last).contains(&s.line))
                .all(|s| e.family_of(&s.name) == name),
            "{name} is not one group"
        );
    }
    for s in &e.samples {
        assert!(!s.value.is_nan(), "NaN: {} {:?}", s.name, s.labels);
        assert!(s.name.starts_with("convoy_"), "{}", s.name);
        if let Some(code) = s.labels.get("code") {
            // The canonical gRPC code names (grpc/grpc, doc/statuscodes.md).
            assert!(
                code.bytes().all(|b| b.is_ascii_uppercase() || b == b'_'),
                "{code}"
            );
        }
    }
    // Histograms: per label set, increasing `le` ending in +Inf, cumulative counts, +Inf equal
    // to _count, a finite non-negative _sum.
    for (name, kind, _) in FAMILIES {
        if kind != "histogram" {
            continue;
        }
        // Label set without `le` → (le, cumulative count) in page order.
        let mut buckets: BTreeMap<LabelSet, Vec<(f64, f64)>> = BTreeMap::new();
        for s in e.series(&format!("{name}_bucket")) {
            let le: f64 = s.labels["le"].parse().unwrap();
            let key = s
                .labels
                .iter()
                .filter(|(k, _)| *k != "le")
                .map(|(k, v)| (k.clone(), v.clone()))
                .collect();
            buckets.entry(key).or_default().push((le, s.value));
        }
        assert!(!buckets.is_empty(), "{name} has no buckets");
        for (key, bs) in &buckets {
            let want: Vec<(&str, &str)> =
                key.iter().map(|(k, v)| (k.as_str(), v.as_str())).collect();
            assert!(
                bs.windows(2).all(|w| w[0].0 < w[1].0),
                "{name} {key:?} le order"
            );
            assert!(
                bs.windows(2).all(|w| w[0].1 <= w[1].1),
                "{name} {key:?} not cumulative"
            );
            let (last_le, last_count) = *bs.last().unwrap();
            assert_eq!(last_le, f64::INFINITY, "{name} {key:?} ends without +Inf");
            assert_eq!(
                last_count,
                e.value(&format!("{name}_count"), &want),
                "{name} {key:?}"
            );
            let sum = e.value(&format!("{name}_sum"), &want);
            assert!(sum.is_finite() && sum >= 0.0, "{name} {key:?} sum {sum}");
        }
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn metrics_endpoint_reports_served_requests() {
    let config = ServeConfig {
        listen: "127.0.0.1:0".parse().unwrap(),
        metrics_listen: Some("127.0.0.1:0".parse().unwrap()),
        compute_threads: 1,
        ..ServeConfig::default()
    };
    let server = start(&config).await.unwrap();
    let metrics_addr = server
        .telemetry
        .metrics_addr
        .expect("an address was configured");
    let mut client = PredictorClient::connect(format!("http://{}", server.local_addr))
        .await
        .unwrap();

    // Three good requests carrying 1 + 2 + 3 images.
    let files = [
        "sound-1.png",
        "cracked-1.png",
        "burred-1.png",
        "off-centre-hole-1.png",
        "sound-2.png",
        "cracked-2.png",
    ];
    let mut served = None;
    for range in [0..1, 1..3, 3..6] {
        let samples = files[range].iter().map(|f| image(f)).collect();
        let reply = client
            .predict(request("", samples))
            .await
            .unwrap()
            .into_inner();
        served = Some((reply.model, reply.version));
    }
    let (model, version) = served.unwrap();
    let (m, v) = (model.as_str(), version.as_str());
    // A bad sample for a loaded model: a tensor of the wrong shape.
    let st = client
        .predict(request("", vec![tensor(&[1, 2, 2], &[0.0; 4])]))
        .await
        .expect_err("wrong shape");
    assert_eq!(st.code(), Code::InvalidArgument, "{st:?}");
    // A model no one loaded: its name must not become a label value.
    let st = client
        .predict(request("no-such-model", vec![image(files[0])]))
        .await
        .expect_err("unknown model");
    assert_eq!(st.code(), Code::NotFound, "{st:?}");

    let r = http_get(metrics_addr, "/metrics").await;
    assert_eq!(r.status, "HTTP/1.1 200 OK");
    let content_type = &r.headers["content-type"];
    assert!(
        content_type.starts_with("text/plain; version=0.0.4"),
        "{content_type}"
    );
    assert!(
        r.body.ends_with('\n'),
        "the last line must end with a line feed"
    );
    let e = parse(&r.body);
    check_format(&e);
    assert!(
        !r.body.contains("no-such-model"),
        "a client's model name became a label"
    );

    // What the calls above must have recorded.
    let ok = [("model", m), ("version", v), ("code", "OK")];
    assert_eq!(
        e.value("convoy_requests_total", &ok),
        3.0,
        "convoy_requests_total{{code=\"OK\"}}: is telemetry::request_finished called for every Predict?"
    );
    assert_eq!(e.value("convoy_samples_total", &ok), 6.0);
    assert_eq!(
        e.total("convoy_requests_total", &[("code", "INVALID_ARGUMENT")]),
        1.0
    );
    assert_eq!(
        e.value(
            "convoy_requests_total",
            &[("model", "unknown"), ("code", "NOT_FOUND")]
        ),
        1.0
    );
    // Every finished request is timed, under its model's label.
    for model_label in [m, "unknown"] {
        assert_eq!(
            e.value(
                "convoy_request_duration_seconds_count",
                &[("model", model_label)]
            ),
            e.total("convoy_requests_total", &[("model", model_label)]),
            "{model_label}"
        );
    }
    // Each good sample was prepared once and computed once; the bad ones never were.
    let mv = [("model", m), ("version", v)];
    assert_eq!(
        e.value("convoy_image_prepare_seconds_count", &[("model", m)]),
        6.0
    );
    assert_eq!(e.value("convoy_batch_size_sum", &mv), 6.0);
    let batches = e.value("convoy_batch_size_count", &mv);
    assert!(
        (1.0..=6.0).contains(&batches),
        "{batches} batches for 6 samples"
    );
    assert_eq!(e.value("convoy_batch_compute_seconds_count", &mv), batches);
    assert_eq!(
        e.value(
            "convoy_batches_total",
            &[("model", m), ("version", v), ("outcome", "ok")]
        ),
        batches
    );
    assert_eq!(
        e.value(
            "convoy_batches_total",
            &[("model", m), ("version", v), ("outcome", "failed")]
        ),
        0.0
    );
    assert_eq!(e.value("convoy_queue_wait_seconds_count", &mv), 3.0);
    // Nothing is waiting or running once every reply is in.
    assert_eq!(e.value("convoy_queued_samples", &mv), 0.0);
    assert_eq!(e.value("convoy_requests_in_flight", &[]), 0.0);
    for reason in ["queue_full", "deadline", "cancelled"] {
        let shed = [("model", m), ("version", v), ("reason", reason)];
        assert_eq!(
            e.value("convoy_requests_shed_total", &shed),
            0.0,
            "{reason}"
        );
    }
    assert_eq!(
        e.value(
            "convoy_model_loads_total",
            &[("model", m), ("outcome", "ok")]
        ),
        1.0
    );
    assert_eq!(e.value("convoy_model_active_version", &mv), 1.0);

    // Anything but GET /metrics is refused.
    assert_eq!(
        http_get(metrics_addr, "/").await.status,
        "HTTP/1.1 404 Not Found"
    );

    // A second server in the same process shares the recorder and serves it on its own port;
    // one without an address serves nothing and fails nothing.
    let second = start(&config).await.unwrap();
    let second_addr = second.telemetry.metrics_addr.unwrap();
    assert_ne!(second_addr, metrics_addr);
    let e2 = parse(&http_get(second_addr, "/metrics").await.body);
    check_format(&e2);
    assert_eq!(e2.value("convoy_requests_total", &ok), 3.0);
    assert_eq!(
        e2.value(
            "convoy_model_loads_total",
            &[("model", m), ("outcome", "ok")]
        ),
        2.0
    );
    let quiet = start(&ServeConfig {
        metrics_listen: None,
        ..config.clone()
    })
    .await
    .unwrap();
    assert!(quiet.telemetry.metrics_addr.is_none());

    quiet.shutdown().await.unwrap();
    second.shutdown().await.unwrap();
    server.shutdown().await.unwrap();
    // The endpoint stops with its server (its thread closes the listener a moment later).
    let mut closed = false;
    for _ in 0..100 {
        if tokio::net::TcpStream::connect(metrics_addr).await.is_err() {
            closed = true;
            break;
        }
        tokio::time::sleep(std::time::Duration::from_millis(50)).await;
    }
    assert!(closed, "{metrics_addr} still accepts after shutdown");
}
