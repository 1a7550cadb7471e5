//! The demo's own drift scenario, end to end through the gRPC server: the built-in
//! stamped-parts model (its bundle carries a reference made from its 8,000 training photos)
//! is sent held-out photos, then photos under a dimmer lamp, then photos out of focus
//! (`tests/data/drift/`, synthetic, see the README there).
//!
//! Checks, with the PSI bands of common practice (below 0.1 stable, above 0.25 significant):
//! nominal photos keep every statistic below 0.1 over 20 windows of 500 (at most one moderate
//! verdict); the dim set drives mean brightness above 0.25 within 500 photos; the defocus set
//! drives sharpness above 0.25 within 500 photos.

use std::io::Cursor;

use convoy::service::api::{self, predictor_client::PredictorClient, sample::Data};
use convoy::service::{RunningServer, ServeConfig, start};
use tonic::transport::Channel;

/// The tiles of a sheet (64×64, 20 per row, row-major), each encoded as a PNG of its own.
fn tiles(sheet: &str) -> Vec<Vec<u8>> {
    let path = format!(
        "{}/tests/data/drift/{sheet}.png",
        env!("CARGO_MANIFEST_DIR")
    );
    let img = image::open(&path).unwrap().into_luma8();
    let (cols, rows) = (img.width() / 64, img.height() / 64);
    assert_eq!(cols, 20);
    let mut out = Vec::new();
    for k in 0..cols * rows {
        let tile = image::imageops::crop_imm(&img, 64 * (k % 20), 64 * (k / 20), 64, 64).to_image();
        let mut png = Cursor::new(Vec::new());
        tile.write_to(&mut png, image::ImageFormat::Png).unwrap();
        out.push(png.into_inner());
    }
    out
}

async fn demo() -> (RunningServer, PredictorClient<Channel>) {
    let server = start(&ServeConfig {
        listen: "127.0.0.1:0".parse().unwrap(),
        compute_threads: 2,
        ..ServeConfig::default()
    })
    .await
    .unwrap();
    let client = PredictorClient::connect(format!("http://{}", server.local_addr))
        .await
        .unwrap();
    (server, client)
}

/// Sends the photos in order, up to 50 per request (the default limit is 64).
async fn send(client: &mut PredictorClient<Channel>, photos: &[Vec<u8>]) {
    for part in photos.chunks(50) {
        let samples = part
            .iter()
            .map(|p| api::Sample {
                data: Some(Data::EncodedImage(p.clone())),
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
    let r = client
        .drift(api::DriftRequest::default())
        .await
        .unwrap()
        .into_inner();
    assert!(r.monitored, "{}", r.note);
    r
}

fn psi(r: &api::DriftReply, name: &str) -> f64 {
    r.statistics
        .iter()
        .find(|s| s.name == name)
        .and_then(|s| s.psi)
        .unwrap_or_else(|| panic!("no {name} PSI"))
}

fn table(r: &api::DriftReply) -> String {
    r.statistics
        .iter()
        .map(|s| {
            format!(
                "{} {:.3} {}; ",
                s.name,
                s.psi.unwrap_or(f64::NAN),
                s.verdict
            )
        })
        .collect()
}

/// Sends `shifted` 10 photos at a time into a window full of nominal photos, until `name`'s
/// PSI passes 0.25; returns how many shifted photos that took.
async fn photos_until_significant(
    client: &mut PredictorClient<Channel>,
    shifted: &[Vec<u8>],
    name: &str,
) -> usize {
    for (k, chunk) in shifted.chunks(10).enumerate() {
        send(client, chunk).await;
        let r = report(client).await;
        if psi(&r, name) > 0.25 {
            let sent = (k + 1) * 10;
            eprintln!("{name} above 0.25 after {sent} photos: {}", table(&r));
            return sent;
        }
    }
    panic!("{name} never passed 0.25 in {} photos", shifted.len());
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn nominal_photos_stay_stable_over_twenty_windows() {
    let nominal = tiles("nominal");
    assert_eq!(nominal.len(), 1000);
    let (server, mut client) = demo().await;
    send(&mut client, &nominal[..500]).await;
    let mut moderate = Vec::new();
    let mut worst = 0.0f64;
    // Window k holds photos 25k+25 .. 25k+525: 20 windows sliding over the 1,000 photos.
    for k in 0..20 {
        let start = 500 + 25 * k;
        for chunk in nominal[start..start + 25].chunks(5) {
            send(&mut client, chunk).await;
        }
        let r = report(&mut client).await;
        assert_eq!(r.window_samples, 500);
        for s in &r.statistics {
            worst = worst.max(s.psi.unwrap());
            match s.verdict.as_str() {
                "stable" => {}
                "moderate" => moderate.push(format!("window {k}: {}", s.name)),
                other => panic!("window {k}: {} is {other}: {}", s.name, table(&r)),
            }
        }
        let class = r.predicted_class.as_ref().unwrap();
        assert!(
            matches!(class.verdict.as_str(), "stable" | "moderate"),
            "window {k}: predicted class {class:?}"
        );
        if class.verdict == "moderate" {
            moderate.push(format!("window {k}: predicted_class"));
        }
    }
    eprintln!("largest PSI over 20 windows: {worst:.3}; moderate: {moderate:?}");
    assert!(moderate.len() <= 1, "{moderate:?}");
    assert!(
        worst < 0.1 || moderate.len() == 1,
        "a PSI of {worst} is not stable"
    );
    server.shutdown().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_dimmer_lamp_moves_brightness_and_lost_focus_moves_sharpness() {
    let nominal = tiles("nominal");
    let (dim, defocus) = (tiles("dim"), tiles("defocus"));
    assert_eq!((dim.len(), defocus.len()), (500, 500));

    let (server, mut client) = demo().await;
    send(&mut client, &nominal[..500]).await;
    let r = report(&mut client).await;
    assert!(psi(&r, "mean_c0") < 0.1, "{}", table(&r));
    let n = photos_until_significant(&mut client, &dim, "mean_c0").await;
    assert!(n <= 500);
    server.shutdown().await.unwrap();

    let (server, mut client) = demo().await;
    send(&mut client, &nominal[500..]).await;
    let n = photos_until_significant(&mut client, &defocus, "sharpness").await;
    assert!(n <= 500);
    // Defocus leaves the mean level where it was: brightness alone would not have seen it.
    let r = report(&mut client).await;
    assert!(psi(&r, "mean_c0") < 0.1, "{}", table(&r));
    server.shutdown().await.unwrap();
}
