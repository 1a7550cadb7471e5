//! Input-drift monitoring on a live server: a bundle carrying a reference made from "nominal"
//! images is served nominal, dimmed and blurred images; the `Drift` report, the metrics page
//! and `convoy drift` must see nothing in the first case and the right statistic move in the
//! others.
//!
//! The images are drawn here (seeded): a gray field of random level with a brighter disc and
//! pixel noise. "Dim" multiplies every pixel by 0.55 (a weaker lamp); "blurred" applies a
//! Gaussian blur of σ = 1.5 px (a lens out of focus), which keeps the mean level and lowers
//! the variance of the Laplacian (Pech-Pacheco et al., ICPR 2000, for that focus measure). The
//! thresholds are the PSI bands of common practice (0.1, 0.25).

#[path = "../benches/nets/mod.rs"]
mod nets;

use std::io::{Cursor, Read, Write};
use std::path::Path;

use convoy::bundle::manifest::{ColorMode, FitRule, ImagePrep, ResizeFilter};
use convoy::bundle::{Bundle, BundleWriter};
use convoy::drift::reference::{ReferenceSet, baseline_json, build_baseline};
use convoy::engine::{Engine, EngineConfig};
use convoy::graph::build::SplitMix64;
use convoy::service::api::{self, predictor_client::PredictorClient, sample::Data};
use convoy::service::{RunningServer, ServeConfig, start};
use tonic::transport::Channel;

fn image_model() -> BundleWriter {
    nets::lenet28().image_input(Some(ImagePrep {
        color: ColorMode::Gray,
        width: 28,
        height: 28,
        resize_filter: ResizeFilter::Bilinear,
        fit: FitRule::Stretch,
        scale: 1.0 / 255.0,
        mean: vec![0.5],
        std: vec![0.25],
    }))
}

#[derive(Clone, Copy)]
enum Look {
    Nominal,
    Dim,
    Blurred,
}

/// Image `index` of a seeded stream, 28×28 gray PNG.
fn picture(seed: u64, index: u64, look: Look) -> Vec<u8> {
    let mut rng = SplitMix64::new(seed.wrapping_mul(1_000_003).wrapping_add(index));
    let mut uniform =
        |lo: f32, hi: f32| lo + (hi - lo) * (rng.next_u64() >> 40) as f32 / (1u64 << 24) as f32;
    let level = uniform(90.0, 170.0);
    let (cx, cy, r) = (uniform(7.0, 21.0), uniform(7.0, 21.0), uniform(4.0, 7.0));
    let mut pixels = vec![0f32; 28 * 28];
    for (i, p) in pixels.iter_mut().enumerate() {
        let (x, y) = ((i % 28) as f32, (i / 28) as f32);
        let disc = if (x - cx).powi(2) + (y - cy).powi(2) <= r * r {
            60.0
        } else {
            0.0
        };
        *p = level + disc + uniform(-8.0, 8.0);
    }
    let mut img = image::GrayImage::from_fn(28, 28, |x, y| {
        image::Luma([pixels[(y * 28 + x) as usize].clamp(0.0, 255.0) as u8])
    });
    match look {
        Look::Nominal => {}
        Look::Dim => img
            .pixels_mut()
            .for_each(|p| p.0[0] = (f32::from(p.0[0]) * 0.55) as u8),
        Look::Blurred => img = image::imageops::blur(&img, 1.5),
    }
    let mut out = Cursor::new(Vec::new());
    img.write_to(&mut out, image::ImageFormat::Png).unwrap();
    out.into_inner()
}

/// The model with a reference made from 600 nominal pictures (seed 1), written to `dir`.
fn monitored_bundle(dir: &Path) {
    let refs = dir.join("reference");
    std::fs::create_dir_all(&refs).unwrap();
    for i in 0..600 {
        std::fs::write(
            refs.join(format!("{i:04}.png")),
            picture(1, i, Look::Nominal),
        )
        .unwrap();
    }
    let writer = image_model();
    let bundle = Bundle::from_bytes(writer.to_bytes().unwrap()).unwrap();
    let engine = Engine::new(&bundle, &EngineConfig::default()).unwrap();
    let set = ReferenceSet::open(&refs).unwrap();
    let baseline = build_baseline(&set, &bundle, &engine, &mut |_, _| {}).unwrap();
    assert_eq!(baseline.samples, 600);
    writer
        .drift_baseline(baseline_json(&baseline))
        .write(&dir.join("models").join("lenet.cvb"))
        .unwrap();
}

async fn serve(models: &Path, adjust: impl FnOnce(&mut ServeConfig)) -> RunningServer {
    let mut config = ServeConfig {
        listen: "127.0.0.1:0".parse().unwrap(),
        metrics_listen: Some("127.0.0.1:0".parse().unwrap()),
        models: Some(models.to_path_buf()),
        compute_threads: 2,
        drift_window: 300,
        ..ServeConfig::default()
    };
    adjust(&mut config);
    start(&config).await.unwrap()
}

/// Sends `count` pictures of one look (seed 2: not the reference's), 10 per request.
async fn send(client: &mut PredictorClient<Channel>, look: Look, count: u64) {
    for start in (0..count).step_by(10) {
        let samples = (start..start + 10)
            .map(|i| api::Sample {
                data: Some(Data::EncodedImage(picture(2, i, look))),
            })
            .collect();
        client
            .predict(api::PredictRequest {
                samples,
                ..Default::default()
            })
            .await
            .unwrap();
    }
}

async fn report(client: &mut PredictorClient<Channel>) -> api::DriftReply {
    client
        .drift(api::DriftRequest::default())
        .await
        .unwrap()
        .into_inner()
}

fn stat<'a>(r: &'a api::DriftReply, name: &str) -> &'a api::StatisticDrift {
    r.statistics
        .iter()
        .find(|s| s.name == name)
        .unwrap_or_else(|| panic!("no {name} in {r:?}"))
}

fn table(r: &api::DriftReply) -> String {
    r.statistics
        .iter()
        .map(|s| {
            format!(
                "{} psi {:.3} {}; ",
                s.name,
                s.psi.unwrap_or(f64::NAN),
                s.verdict
            )
        })
        .collect()
}

/// GET /metrics over a plain TCP connection.
fn scrape(addr: std::net::SocketAddr) -> String {
    let mut s = std::net::TcpStream::connect(addr).unwrap();
    s.write_all(b"GET /metrics HTTP/1.1\r\nHost: x\r\n\r\n")
        .unwrap();
    let mut text = String::new();
    s.read_to_string(&mut text).unwrap();
    text
}

/// Sum of the samples of `family` whose labels include every `(key, value)` of `with`.
fn sum(page: &str, family: &str, with: &[(&str, &str)]) -> f64 {
    page.lines()
        .filter(|l| l.starts_with(&format!("{family}{{")))
        .filter(|l| {
            with.iter()
                .all(|(k, v)| l.contains(&format!("{k}=\"{v}\"")))
        })
        .filter_map(|l| l.rsplit(' ').next()?.parse::<f64>().ok())
        .sum()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn reports_see_a_dim_lamp_and_a_lost_focus() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::create_dir(dir.path().join("models")).unwrap();
    monitored_bundle(dir.path());
    let server = serve(&dir.path().join("models"), |_| {}).await;
    let mut client = PredictorClient::connect(format!("http://{}", server.local_addr))
        .await
        .unwrap();

    let empty = report(&mut client).await;
    assert!(empty.monitored, "{}", empty.note);
    assert_eq!((empty.window_capacity, empty.window_samples), (300, 0));
    assert_eq!(empty.reference_samples, 600);
    assert!(!empty.drift);

    // Nominal pictures: nothing moves. The window is exactly these 300 samples.
    send(&mut client, Look::Nominal, 300).await;
    let r = report(&mut client).await;
    eprintln!("nominal: {}", table(&r));
    assert_eq!(r.window_samples, 300);
    for s in &r.statistics {
        assert!(s.psi.unwrap() < 0.1, "{}: {}", s.name, table(&r));
        assert_eq!(s.window_counts.iter().sum::<u64>(), 300, "{}", s.name);
        assert_eq!(s.reference_counts.iter().sum::<u64>(), 600, "{}", s.name);
        assert_eq!(s.window_counts.len(), s.bin_edges.len() + 1);
    }
    assert!(!r.drift, "{}", table(&r));
    let names: Vec<&str> = r.statistics.iter().map(|s| s.name.as_str()).collect();
    assert_eq!(
        names,
        [
            "mean_c0",
            "contrast_c0",
            "sharpness",
            "image_width",
            "image_height",
            "aspect",
            "top1_probability",
            "entropy"
        ]
    );

    // A dimmer lamp: the mean level falls below anything in the reference.
    send(&mut client, Look::Dim, 300).await;
    let r = report(&mut client).await;
    eprintln!("dim: {}", table(&r));
    let mean = stat(&r, "mean_c0");
    assert!(mean.psi.unwrap() > 0.25, "{}", table(&r));
    assert_eq!(mean.verdict, "drift");
    assert!(mean.ks_significant && mean.ks_p_value.unwrap() < r.ks_level);
    assert!(mean.out_of_range > 0);
    assert!(r.drift);
    // The picture size did not change: its statistics stay where they were.
    assert_eq!(stat(&r, "image_width").verdict, "stable", "{}", table(&r));

    // Out of focus: the mean level is as before, sharpness falls.
    send(&mut client, Look::Blurred, 300).await;
    let r = report(&mut client).await;
    eprintln!("blurred: {}", table(&r));
    assert!(stat(&r, "mean_c0").psi.unwrap() < 0.1, "{}", table(&r));
    let sharp = stat(&r, "sharpness");
    assert!(sharp.psi.unwrap() > 0.25, "{}", table(&r));
    assert_eq!(sharp.verdict, "drift");
    assert_eq!(r.samples_seen, 900);

    // The metrics page: counters over all 900 samples, gauges of the current window.
    let page = scrape(server.telemetry.metrics_addr.unwrap());
    let lenet = [("model", "lenet-28"), ("version", "1")];
    let mean_bins = [lenet[0], lenet[1], ("statistic", "mean_c0")];
    assert_eq!(sum(&page, "convoy_drift_values_total", &mean_bins), 900.0);
    assert_eq!(sum(&page, "convoy_drift_samples_total", &lenet), 900.0);
    assert_eq!(sum(&page, "convoy_drift_predictions_total", &lenet), 900.0);
    let sharp_labels = [lenet[0], lenet[1], ("statistic", "sharpness")];
    assert_eq!(sum(&page, "convoy_drift_verdict", &sharp_labels), 2.0);
    assert!(sum(&page, "convoy_drift_psi", &sharp_labels) > 0.25);
    assert_eq!(sum(&page, "convoy_drift_window_samples", &lenet), 300.0);

    // `convoy drift` as an operator runs it: the table, JSON and the plot.
    let addr = server.local_addr.to_string();
    let plot = dir.path().join("drift.svg");
    let run = |args: Vec<String>| {
        let out = std::process::Command::new(env!("CARGO_BIN_EXE_convoy"))
            .args(args)
            .output()
            .unwrap();
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        String::from_utf8(out.stdout).unwrap()
    };
    let addr_for_cli = addr.clone();
    let plot_for_cli = plot.clone();
    let (text, json) = tokio::task::spawn_blocking(move || {
        let text = run(vec![
            "drift".into(),
            "--server".into(),
            addr_for_cli.clone(),
            "--plot".into(),
            plot_for_cli.display().to_string(),
        ]);
        let json = run(vec![
            "drift".into(),
            "--server".into(),
            addr_for_cli,
            "--json".into(),
        ]);
        (text, json)
    })
    .await
    .unwrap();
    let sharp_row = text
        .lines()
        .find(|l| l.trim_start().starts_with("sharpness"))
        .unwrap_or_else(|| panic!("{text}"));
    assert!(sharp_row.contains("drift"), "{text}");
    let json: serde_json::Value = serde_json::from_str(&json).unwrap();
    assert_eq!(json["drift"], true);
    assert_eq!(json["window_samples"], 300);
    let svg = std::fs::read_to_string(&plot).unwrap();
    assert!(
        svg.starts_with("<svg") && svg.contains("sharpness"),
        "{svg:.200}"
    );
    server.shutdown().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_bundle_without_reference_or_a_server_with_monitoring_off_says_so() {
    let dir = tempfile::tempdir().unwrap();
    image_model().write(&dir.path().join("plain.cvb")).unwrap();
    let server = serve(dir.path(), |_| {}).await;
    let mut client = PredictorClient::connect(format!("http://{}", server.local_addr))
        .await
        .unwrap();
    send(&mut client, Look::Nominal, 10).await;
    let r = report(&mut client).await;
    assert!(!r.monitored);
    assert!(r.note.contains("--reference"), "{}", r.note);
    assert!(r.statistics.is_empty());
    server.shutdown().await.unwrap();

    let dir = tempfile::tempdir().unwrap();
    std::fs::create_dir(dir.path().join("models")).unwrap();
    monitored_bundle(dir.path());
    let server = serve(&dir.path().join("models"), |c| c.drift_monitoring = false).await;
    let mut client = PredictorClient::connect(format!("http://{}", server.local_addr))
        .await
        .unwrap();
    let r = report(&mut client).await;
    assert!(!r.monitored);
    assert!(r.note.contains("drift_monitoring"), "{}", r.note);
    server.shutdown().await.unwrap();
}
