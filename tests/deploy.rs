//! The files in deploy/ agree with convoy and with each other: the settings file is valid for
//! `convoy serve`, the Kubernetes probes and the Service point at the gRPC port it listens on,
//! the scrape annotations at its metrics port, and every supervisor (kubelet, systemd) waits
//! longer than convoy's own drain before killing it.
//!
//! Field names and meanings follow the Kubernetes API reference for apps/v1 Deployment,
//! v1 Service and autoscaling/v2 HorizontalPodAutoscaler (gRPC probes: `grpc.port`, stable
//! since Kubernetes 1.27, from memory), and systemd.service(5)/systemd.kill(5) for the unit.
//! The `prometheus.io/*` annotations are a common convention, not a standard.

use std::path::{Path, PathBuf};

use convoy::service::ServeConfig;
use yaml_serde::Value;

fn deploy(file: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("deploy")
        .join(file)
}

fn yaml(file: &str) -> Value {
    let text = std::fs::read_to_string(deploy(file)).unwrap();
    yaml_serde::from_str(&text).unwrap_or_else(|e| panic!("{file}: {e}"))
}

/// `v[a][b]...`, with a readable failure.
fn at<'a>(v: &'a Value, path: &[&str]) -> &'a Value {
    path.iter().fold(v, |v, k| {
        let next = match k.parse::<usize>() {
            Ok(i) => v.get(i),
            Err(_) => v.get(*k),
        };
        next.unwrap_or_else(|| panic!("no {k} in path {path:?}"))
    })
}

fn settings() -> ServeConfig {
    let c = ServeConfig::from_file(&deploy("serve.toml")).unwrap();
    c.validate().unwrap();
    c
}

#[test]
fn the_settings_file_is_valid_and_listens_beyond_loopback() {
    let c = settings();
    assert!(c.listen.ip().is_unspecified(), "{}", c.listen);
    assert!(c.metrics_listen.is_some_and(|m| m.ip().is_unspecified()));
    assert!(
        c.shutdown_notice_ms > 0,
        "balancers get notice before refusals"
    );
}

#[test]
fn the_deployment_probes_and_scrapes_the_ports_convoy_listens_on() {
    let c = settings();
    let d = yaml("kubernetes/deployment.yaml");
    assert_eq!(at(&d, &["kind"]).as_str(), Some("Deployment"));
    let pod = at(&d, &["spec", "template"]);
    let container = at(pod, &["spec", "containers", "0"]);
    let grpc_port = u64::from(c.listen.port());
    let metrics_port = u64::from(c.metrics_listen.unwrap().port());
    for probe in ["readinessProbe", "livenessProbe"] {
        assert_eq!(
            at(container, &[probe, "grpc", "port"]).as_u64(),
            Some(grpc_port),
            "{probe}"
        );
    }
    let ports: Vec<u64> = at(container, &["ports"])
        .as_sequence()
        .unwrap()
        .iter()
        .map(|p| at(p, &["containerPort"]).as_u64().unwrap())
        .collect();
    assert_eq!(ports, [grpc_port, metrics_port]);
    let annotations = at(pod, &["metadata", "annotations"]);
    assert_eq!(
        at(annotations, &["prometheus.io/port"]).as_str(),
        Some(metrics_port.to_string().as_str())
    );
    assert_eq!(
        at(annotations, &["prometheus.io/path"]).as_str(),
        Some("/metrics")
    );
    // The kubelet sends SIGTERM, waits terminationGracePeriodSeconds, then kills.
    let grace_s = at(pod, &["spec", "terminationGracePeriodSeconds"])
        .as_u64()
        .unwrap();
    assert!(
        grace_s * 1000 > c.shutdown_grace_ms,
        "the pod is killed ({grace_s} s) before convoy's drain may end ({} ms)",
        c.shutdown_grace_ms
    );
    // A readiness probe must see NOT_SERVING within the notice, or callers still arrive
    // when requests start to be refused.
    let period_s = at(container, &["readinessProbe", "periodSeconds"])
        .as_u64()
        .unwrap();
    assert!(
        period_s * 1000 < c.shutdown_notice_ms,
        "probe every {period_s} s"
    );
    let strategy = at(&d, &["spec", "strategy", "rollingUpdate"]);
    assert_eq!(at(strategy, &["maxUnavailable"]).as_u64(), Some(0));
    // The image runs as the user the pod's securityContext demands.
    let containerfile = std::fs::read_to_string(deploy("Containerfile")).unwrap();
    let user = at(pod, &["spec", "securityContext", "runAsUser"])
        .as_u64()
        .unwrap();
    assert!(
        containerfile.contains(&format!("USER {user}:")),
        "USER {user}"
    );
    assert!(containerfile.contains(&format!("EXPOSE {grpc_port} {metrics_port}")));
}

#[test]
fn the_service_and_the_autoscaler_select_the_deployment() {
    let c = settings();
    let d = yaml("kubernetes/deployment.yaml");
    let s = yaml("kubernetes/service.yaml");
    let h = yaml("kubernetes/autoscaler.yaml");
    let labels = at(&d, &["spec", "template", "metadata", "labels"]);
    let selector = at(&s, &["spec", "selector"]);
    for (k, v) in selector.as_mapping().unwrap() {
        assert_eq!(labels.get(k.as_str().unwrap()), Some(v), "selector {k:?}");
    }
    assert_eq!(at(&s, &["spec", "clusterIP"]).as_str(), Some("None"));
    assert_eq!(
        at(&s, &["spec", "ports", "0", "port"]).as_u64(),
        Some(u64::from(c.listen.port()))
    );
    assert_eq!(
        at(&h, &["spec", "scaleTargetRef", "name"]),
        at(&d, &["metadata", "name"])
    );
    assert!(
        at(&h, &["spec", "minReplicas"]).as_u64().unwrap()
            <= at(&h, &["spec", "maxReplicas"]).as_u64().unwrap()
    );
}

#[test]
fn systemd_waits_longer_than_the_drain() {
    let c = settings();
    let unit = std::fs::read_to_string(deploy("systemd/convoy.service")).unwrap();
    let value = |key: &str| {
        unit.lines()
            .find_map(|l| l.strip_prefix(&format!("{key}=")))
            .unwrap_or_else(|| panic!("no {key}="))
            .trim()
            .to_string()
    };
    assert_eq!(value("KillSignal"), "SIGTERM");
    let stop_s: u64 = value("TimeoutStopSec").parse().unwrap();
    assert!(stop_s * 1000 > c.shutdown_grace_ms);
    assert!(value("ExecStart").contains("serve --config"));
    // SIGHUP makes convoy look at its models folder again (src/rollout/watch.rs).
    assert!(value("ExecReload").contains("-HUP"));
}
