//! `convoy bench` as a user runs it: the built binary against a real server on 127.0.0.1:0
//! (the built-in demo model) in a closed and an open loop, and `--local` on the demo bundle.
//!
//! Only the shape of the reports and the counts are checked, never speed: the machine is
//! shared, and numbers for speed belong in benchmarks.

use std::path::Path;
use std::process::Command;

use convoy::service::{RunningServer, ServeConfig, start};
use serde_json::Value;

/// Runs `convoy bench ARGS`, expects success and returns stdout.
fn bench_text(args: &[&str]) -> String {
    let out = Command::new(env!("CARGO_BIN_EXE_convoy"))
        .arg("bench")
        .args(args)
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(out.status.success(), "bench {args:?} failed: {stderr}");
    String::from_utf8(out.stdout).unwrap()
}

/// Runs `convoy bench ARGS`, expects success and one JSON object on stdout.
fn bench(args: &[&str]) -> Value {
    let text = bench_text(args);
    serde_json::from_str(&text)
        .unwrap_or_else(|e| panic!("stdout is not one JSON object ({e}): {text}"))
}

/// The demo server (no models folder: the bundle built into the binary).
async fn demo_server() -> RunningServer {
    start(&ServeConfig {
        listen: "127.0.0.1:0".parse().unwrap(),
        ..ServeConfig::default()
    })
    .await
    .unwrap()
}

/// The keys promised in `convoy bench --help` and the README, a clean run (no errors), and
/// percentiles in order.
fn check_report(v: &Value) {
    for key in ["requests", "ok", "errors", "throughput_per_s", "latency_ms"] {
        assert!(v.get(key).is_some(), "no {key:?} in {v}");
    }
    let ok = v["ok"].as_u64().unwrap();
    assert!(ok > 0, "{v}");
    assert_eq!(v["requests"].as_u64().unwrap(), ok, "{v}");
    assert_eq!(v["errors"], serde_json::json!({}), "{v}");
    assert!(v["throughput_per_s"].as_f64().unwrap() > 0.0);
    let l = &v["latency_ms"];
    let p = |k: &str| {
        l[k].as_f64()
            .unwrap_or_else(|| panic!("latency_ms.{k} in {v}"))
    };
    assert!(0.0 < p("p50"), "{v}");
    // Nearest-rank percentiles cannot decrease; each is within 0.79 % of a recorded value and
    // clamped to the exact maximum.
    assert!(p("p50") <= p("p90") && p("p90") <= p("p99") && p("p99") <= p("p999"));
    assert!(p("p999") <= p("max"), "{v}");
    assert_eq!(v["model"], "stamped-parts", "{v}");
    // The demo server answers one sample per request with its timing.
    assert_eq!(v["samples_per_request"], 1);
    assert!(v["server_timing"]["mean_batch_size"].as_f64().unwrap() >= 1.0);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn closed_loop_against_the_demo_server() {
    let server = demo_server().await;
    let addr = server.local_addr.to_string();
    let v = tokio::task::spawn_blocking(move || {
        bench(&[
            "--server",
            &addr,
            "--concurrency",
            "4",
            "--duration",
            "1",
            "--json",
        ])
    })
    .await
    .unwrap();
    check_report(&v);
    assert_eq!(v["mode"], "closed");
    assert_eq!(v["concurrency"], 4);
    server.shutdown().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn open_loop_against_the_demo_server_with_a_plot() {
    let server = demo_server().await;
    let addr = server.local_addr.to_string();
    let dir = tempfile::tempdir().unwrap();
    let svg = dir.path().join("latency.svg");
    let svg_arg = svg.to_str().unwrap().to_string();
    let v = tokio::task::spawn_blocking(move || {
        bench(&[
            "--server",
            &addr,
            "--rate",
            "50",
            "--duration",
            "1",
            "--json",
            "--plot",
            &svg_arg,
        ])
    })
    .await
    .unwrap();
    check_report(&v);
    assert_eq!(v["mode"], "open");
    // The schedule, not the clock, decides what is counted: requests due in the measured
    // second are 50/s × 1 s = 50 (hand count: due times i/50 s for i = 10..=59, after the
    // default 0.2 s warm-up of a 1 s run).
    assert_eq!(v["requests"], 50, "{v}");
    let drawing = std::fs::read_to_string(&svg).unwrap();
    assert!(drawing.starts_with("<svg") && drawing.contains("p99.9"));
    server.shutdown().await.unwrap();
}

#[test]
fn local_engine_per_batch_size() {
    let bundle = Path::new(env!("CARGO_MANIFEST_DIR")).join("models/stamped-parts.cvb");
    let v = bench(&[
        "--local",
        bundle.to_str().unwrap(),
        "--batches",
        "1,4",
        "--duration",
        "0.3",
        "--steps",
        "--json",
    ]);
    assert_eq!(v["local"], true);
    assert!(v["bundle"].as_str().unwrap().ends_with("stamped-parts.cvb"));
    let results = v["results"].as_array().unwrap();
    let batches: Vec<u64> = results
        .iter()
        .map(|r| r["batch"].as_u64().unwrap())
        .collect();
    assert_eq!(batches, [1, 4]);
    for r in results {
        assert!(r["images_per_s"].as_f64().unwrap() > 0.0, "{r}");
        assert!(r["ms_per_batch_p50"].as_f64().unwrap() > 0.0, "{r}");
    }
    let best = v["best_images_per_s"].as_f64().unwrap();
    assert!(results.iter().any(|r| r["images_per_s"] == best), "{v}");
    // The step profile: every step named and described, time spent, and the per-step
    // multiply-adds add up to the bundle's own count of the network (`convoy inspect`'s).
    assert!(v["step_passes"].as_u64().unwrap() >= 1, "{v}");
    let steps = v["steps"].as_array().unwrap();
    assert!(!steps.is_empty());
    for s in steps {
        assert!(!s["name"].as_str().unwrap().is_empty(), "{s}");
        assert!(!s["what"].as_str().unwrap().is_empty(), "{s}");
    }
    assert!(
        steps
            .iter()
            .any(|s| s["what"].as_str().unwrap().starts_with("conv "))
    );
    let seconds: f64 = steps.iter().map(|s| s["seconds"].as_f64().unwrap()).sum();
    assert!(seconds > 0.0);
    let work: u64 = steps
        .iter()
        .map(|s| s["multiply_adds"].as_u64().unwrap())
        .sum();
    assert_eq!(work, v["multiply_adds_per_image"].as_u64().unwrap(), "{v}");
}

#[test]
fn local_step_profile_in_text() {
    let bundle = Path::new(env!("CARGO_MANIFEST_DIR")).join("models/stamped-parts.cvb");
    let text = bench_text(&[
        "--local",
        bundle.to_str().unwrap(),
        "--batches",
        "2",
        "--duration",
        "0.2",
        "--steps",
    ]);
    assert!(text.contains("time by step at batch 2"), "{text}");
    assert!(text.contains("conv 3x3/1"), "{text}");
    // --steps belongs to --local.
    let refused = Command::new(env!("CARGO_BIN_EXE_convoy"))
        .args(["bench", "--steps"])
        .output()
        .unwrap();
    assert!(!refused.status.success());
}

#[test]
fn bad_settings_are_refused_before_any_load() {
    for args in [
        &["--duration", "4000"][..],
        &["--concurrency", "0"],
        &["--rate=-5"],
        &["--local", "x.cvb", "--rate", "5"],
    ] {
        let out = Command::new(env!("CARGO_BIN_EXE_convoy"))
            .arg("bench")
            .args(args)
            .output()
            .unwrap();
        assert!(!out.status.success(), "{args:?} was accepted");
        assert!(!out.stderr.is_empty());
    }
}
