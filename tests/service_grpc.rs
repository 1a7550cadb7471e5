//! The real server on 127.0.0.1:0, called with a real tonic client: predictions (tensors,
//! images, several samples, streams), the catalog, health, reflection, and every error status.

#[path = "../benches/nets/mod.rs"]
mod nets;

use std::io::Cursor;
use std::path::Path;

use convoy::bundle::manifest::{ColorMode, FitRule, ImagePrep, ResizeFilter};
use convoy::bundle::{Bundle, BundleWriter};
use convoy::engine::{Engine, EngineConfig, RunOptions};
use convoy::service::api::{self, predictor_client::PredictorClient, sample::Data};
use convoy::service::{RunningServer, ServeConfig, start};
use tonic::Code;
use tonic::transport::Channel;

fn lenet_image_bundle() -> BundleWriter {
    nets::lenet28()
        .image_input(Some(ImagePrep {
            color: ColorMode::Gray,
            width: 28,
            height: 28,
            resize_filter: ResizeFilter::Bilinear,
            fit: FitRule::Stretch,
            scale: 1.0 / 255.0,
            mean: vec![0.5],
            std: vec![0.25],
        }))
        .labels((0..10).map(|i| format!("digit-{i}")).collect())
}

/// A folder with: an image model, a tensor-only model in two versions, one bundle whose check
/// samples do not replay (refused), and a file that is not a bundle at all.
fn models_dir(dir: &Path) {
    lenet_image_bundle().write(&dir.join("lenet.cvb")).unwrap();
    nets::resnet20().write(&dir.join("resnet-v1.cvb")).unwrap();
    // Same model, version 1.10: above 1.9 and 1 by the version rule.
    nets::resnet20()
        .version("1.10")
        .write(&dir.join("resnet-v110.cvb"))
        .unwrap();
    let mut bad = nets::lenet28().name("broken-model");
    bad.check_samples(1, vec![0.0; 784], vec![1e6; 10], &[10], "made up")
        .unwrap();
    bad.write(&dir.join("broken.cvb")).unwrap();
    std::fs::write(dir.join("garbage.cvb"), b"not a bundle").unwrap();
}

async fn server(dir: &Path) -> (RunningServer, PredictorClient<Channel>) {
    server_with(dir, |_| {}).await
}

async fn server_with(
    dir: &Path,
    adjust: impl FnOnce(&mut ServeConfig),
) -> (RunningServer, PredictorClient<Channel>) {
    let mut config = ServeConfig {
        listen: "127.0.0.1:0".parse().unwrap(),
        models: Some(dir.to_path_buf()),
        default_model: Some("lenet-28".into()),
        compute_threads: 2,
        max_samples_per_request: 8,
        max_message_bytes: 1 << 20,
        ..ServeConfig::default()
    };
    adjust(&mut config);
    let s = start(&config).await.unwrap();
    let client = PredictorClient::connect(format!("http://{}", s.local_addr))
        .await
        .unwrap();
    (s, client)
}

fn tensor(shape: &[u32], values: &[f32]) -> api::Sample {
    api::Sample {
        data: Some(Data::Tensor(api::Tensor {
            shape: shape.to_vec(),
            f32_le: values.iter().flat_map(|v| v.to_le_bytes()).collect(),
        })),
    }
}

fn image(bytes: Vec<u8>) -> api::Sample {
    api::Sample {
        data: Some(Data::EncodedImage(bytes)),
    }
}

fn png_gray(w: u32, h: u32, pixels: &[u8]) -> Vec<u8> {
    let img = image::GrayImage::from_raw(w, h, pixels.to_vec()).unwrap();
    let mut out = Cursor::new(Vec::new());
    img.write_to(&mut out, image::ImageFormat::Png).unwrap();
    out.into_inner()
}

fn request(model: &str, samples: Vec<api::Sample>) -> api::PredictRequest {
    api::PredictRequest {
        model: model.into(),
        samples,
        ..Default::default()
    }
}

fn softmax(x: &[f32]) -> Vec<f32> {
    let m = x.iter().copied().fold(f32::NEG_INFINITY, f32::max);
    let e: Vec<f32> = x.iter().map(|v| (v - m).exp()).collect();
    let s: f32 = e.iter().sum();
    e.iter().map(|v| v / s).collect()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn predictions_match_the_engine() {
    let dir = tempfile::tempdir().unwrap();
    models_dir(dir.path());
    let (s, mut client) = server(dir.path()).await;
    let engine = Engine::new(
        &Bundle::open(&dir.path().join("lenet.cvb")).unwrap(),
        &EngineConfig::default(),
    )
    .unwrap();
    let mut rng = nets::Rng::new(5);
    let xs: Vec<Vec<f32>> = (0..3).map(|_| rng.vec(784, -1.0, 1.0)).collect();
    let mut req = request("", xs.iter().map(|x| tensor(&[1, 28, 28], x)).collect());
    req.all_scores = true;
    req.tag = "t-1".into();
    let reply = client.predict(req).await.unwrap().into_inner();
    assert_eq!(
        (
            reply.model.as_str(),
            reply.version.as_str(),
            reply.tag.as_str()
        ),
        ("lenet-28", "1", "t-1")
    );
    assert_eq!(reply.outcomes.len(), 3);
    for (x, o) in xs.iter().zip(&reply.outcomes) {
        let want = softmax(&engine.run(x, 1, RunOptions::default()).unwrap());
        // Same f32 softmax on the same logits (batch invariance makes the logits identical).
        for (a, b) in o.scores.iter().zip(&want) {
            assert!((a - b).abs() <= 1e-6, "{a} vs {b}");
        }
        assert_eq!(o.top.len(), 5, "top_k 0 means 5");
        let best = (0..10)
            .max_by(|&a, &b| want[a].total_cmp(&want[b]))
            .unwrap();
        assert_eq!(o.top[0].class_index as usize, best);
        assert_eq!(o.top[0].label, format!("digit-{best}"));
        assert!(
            o.top
                .windows(2)
                .all(|w| w[0].probability >= w[1].probability)
        );
        assert!((o.scores.iter().sum::<f32>() - 1.0).abs() < 1e-5);
    }
    let t = reply.timing.unwrap();
    assert_eq!(t.batch_size, 3);
    assert!(t.total_us >= t.compute_us);

    // top_k above the class count is capped.
    let mut req = request("lenet-28", vec![tensor(&[1, 28, 28], &xs[0])]);
    req.top_k = 100;
    let reply = client.predict(req).await.unwrap().into_inner();
    assert_eq!(reply.outcomes[0].top.len(), 10);
    assert!(reply.outcomes[0].scores.is_empty());

    // An image gives the same answer as the tensor of its normalised pixels.
    let pixels: Vec<u8> = (0..784).map(|i| ((i * 37) % 256) as u8).collect();
    let as_tensor: Vec<f32> = pixels
        .iter()
        .map(|&p| (p as f32 / 255.0 - 0.5) / 0.25)
        .collect();
    let mut req = request(
        "",
        vec![
            image(png_gray(28, 28, &pixels)),
            tensor(&[1, 28, 28], &as_tensor),
        ],
    );
    req.all_scores = true;
    let reply = client.predict(req).await.unwrap().into_inner();
    for (a, b) in reply.outcomes[0]
        .scores
        .iter()
        .zip(&reply.outcomes[1].scores)
    {
        assert!((a - b).abs() <= 1e-6, "image {a} vs tensor {b}");
    }
    s.shutdown().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn versions_and_catalog() {
    let dir = tempfile::tempdir().unwrap();
    models_dir(dir.path());
    // The version before the highest stays loaded, so a request can name it (by default it
    // is released: tests/rollout.rs).
    let (s, mut client) = server_with(dir.path(), |c| c.keep_previous = true).await;
    let x = vec![0.1f32; 3 * 32 * 32];
    let reply = client
        .predict(request("resnet20-32", vec![tensor(&[3, 32, 32], &x)]))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(
        reply.version, "1.10",
        "the highest version answers by default"
    );
    let mut req = request("resnet20-32", vec![tensor(&[3, 32, 32], &x)]);
    req.version = "1".into();
    assert_eq!(client.predict(req).await.unwrap().into_inner().version, "1");

    let cat = client
        .catalog(api::CatalogRequest {})
        .await
        .unwrap()
        .into_inner();
    assert_eq!(cat.default_model, "lenet-28");
    let names: Vec<&str> = cat.models.iter().map(|m| m.name.as_str()).collect();
    assert_eq!(names, ["broken-model", "lenet-28", "resnet20-32"]);
    let resnet = &cat.models[2];
    assert_eq!(resnet.active_version, "1.10");
    let states: Vec<(&str, &str)> = resnet
        .versions
        .iter()
        .map(|v| (v.version.as_str(), v.state.as_str()))
        .collect();
    assert_eq!(states, [("1", "loaded"), ("1.10", "active")]);
    let v = &resnet.versions[1];
    assert_eq!(v.input_shape, [3, 32, 32]);
    assert_eq!(v.parameters, 272_474);
    assert_eq!(v.bundle_sha256.len(), 64);
    assert_eq!(v.output_kind, "logits");
    let lenet = &cat.models[1];
    let img = lenet.versions[0].image.as_ref().unwrap();
    assert_eq!(
        (img.color.as_str(), img.width, img.fit.as_str()),
        ("gray", 28, "stretch")
    );
    let broken = &cat.models[0];
    assert_eq!(broken.versions[0].state, "refused");
    assert!(
        broken.versions[0].reason.contains("check samples"),
        "{}",
        broken.versions[0].reason
    );
    assert!(
        s.loads
            .iter()
            .any(|l| l.origin.ends_with("garbage.cvb") && l.result.is_err())
    );
    s.shutdown().await.unwrap();
}

async fn code_of(
    client: &mut PredictorClient<Channel>,
    req: api::PredictRequest,
) -> (Code, String) {
    let st = client.predict(req).await.expect_err("should fail");
    (st.code(), st.message().to_string())
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_error_has_its_status() {
    let dir = tempfile::tempdir().unwrap();
    models_dir(dir.path());
    let (s, mut client) = server(dir.path()).await;
    let good = vec![0.0f32; 784];
    let cases: Vec<(api::PredictRequest, Code, &str)> = vec![
        (
            request("nope", vec![tensor(&[1, 28, 28], &good)]),
            Code::NotFound,
            "unknown model \"nope\"",
        ),
        (
            api::PredictRequest {
                model: "lenet-28".into(),
                version: "9".into(),
                samples: vec![tensor(&[1, 28, 28], &good)],
                ..Default::default()
            },
            Code::NotFound,
            "no loaded version \"9\"",
        ),
        (request("", vec![]), Code::InvalidArgument, "no samples"),
        (
            request(
                "",
                vec![tensor(&[1, 28, 28], &good), tensor(&[28, 28], &good)],
            ),
            Code::InvalidArgument,
            "sample 1: expected shape [1, 28, 28], got [28, 28]",
        ),
        (
            request("", vec![tensor(&[1, 28, 28], &good[..700])]),
            Code::InvalidArgument,
            "sample 0:",
        ),
        (
            request(
                "",
                vec![tensor(&[1, 28, 28], &{
                    let mut v = good.clone();
                    v[3] = f32::NAN;
                    v
                })],
            ),
            Code::InvalidArgument,
            "sample 0:",
        ),
        (
            request("", vec![image(b"GIF89a garbage".to_vec())]),
            Code::InvalidArgument,
            "sample 0:",
        ),
        (
            request("", vec![api::Sample { data: None }]),
            Code::InvalidArgument,
            "sample 0: empty sample",
        ),
        (
            request("resnet20-32", vec![image(png_gray(2, 2, &[0, 1, 2, 3]))]),
            Code::InvalidArgument,
            "sample 0:",
        ),
        (
            request("", (0..9).map(|_| tensor(&[1, 28, 28], &good)).collect()),
            Code::ResourceExhausted,
            "9 samples exceed the limit of 8",
        ),
        (
            request("", vec![image(png_bomb())]),
            Code::ResourceExhausted,
            "sample 0:",
        ),
        (
            request("broken-model", vec![tensor(&[1, 28, 28], &good)]),
            Code::Unavailable,
            "no version able to answer",
        ),
    ];
    for (req, code, words) in cases {
        let (got, message) = code_of(&mut client, req).await;
        assert_eq!(got, code, "{message}");
        assert!(message.contains(words), "{message:?} lacks {words:?}");
    }
    // A message over the size limit is refused by the transport.
    let big = vec![0.0f32; 300_000];
    let st = client
        .predict(request("", vec![tensor(&[1, 28, 28], &big)]))
        .await
        .unwrap_err();
    assert_eq!(st.code(), Code::ResourceExhausted, "{st:?}");
    assert!(st.message().contains("1048576"), "names the limit: {st:?}");
    // And the server still answers well-formed requests.
    let ok = client
        .predict(request("", vec![tensor(&[1, 28, 28], &good)]))
        .await
        .unwrap();
    assert_eq!(ok.into_inner().outcomes.len(), 1);
    s.shutdown().await.unwrap();
}

/// A PNG whose header claims 100000 × 100000 pixels (with a correct CRC), followed by nothing.
fn png_bomb() -> Vec<u8> {
    let mut ihdr = Vec::new();
    ihdr.extend_from_slice(b"IHDR");
    ihdr.extend_from_slice(&100_000u32.to_be_bytes());
    ihdr.extend_from_slice(&100_000u32.to_be_bytes());
    ihdr.extend_from_slice(&[8, 0, 0, 0, 0]);
    let crc = crc32(&ihdr);
    let mut out = b"\x89PNG\r\n\x1a\n".to_vec();
    out.extend_from_slice(&13u32.to_be_bytes());
    out.extend_from_slice(&ihdr);
    out.extend_from_slice(&crc.to_be_bytes());
    // A first IDAT chunk (a few zlib bytes) and IEND, so the header reads as a whole file.
    for (kind, data) in [
        (&b"IDAT"[..], &[0x78u8, 0x9c, 0x03, 0x00][..]),
        (&b"IEND"[..], &[][..]),
    ] {
        let mut chunk = kind.to_vec();
        chunk.extend_from_slice(data);
        out.extend_from_slice(&(data.len() as u32).to_be_bytes());
        out.extend_from_slice(&chunk);
        out.extend_from_slice(&crc32(&chunk).to_be_bytes());
    }
    out
}

/// CRC-32 as the PNG specification (ISO/IEC 15948, annex D) defines it.
fn crc32(data: &[u8]) -> u32 {
    let mut c = 0xFFFF_FFFFu32;
    for &b in data {
        c ^= b as u32;
        for _ in 0..8 {
            c = if c & 1 != 0 {
                0xEDB8_8320 ^ (c >> 1)
            } else {
                c >> 1
            };
        }
    }
    !c
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn streams_answer_every_request_by_tag() {
    let dir = tempfile::tempdir().unwrap();
    models_dir(dir.path());
    let (s, mut client) = server(dir.path()).await;
    let reqs: Vec<api::PredictRequest> = (0..20)
        .map(|i| {
            let shape: &[u32] = if i == 7 { &[28, 28] } else { &[1, 28, 28] };
            api::PredictRequest {
                samples: vec![tensor(shape, &vec![i as f32 / 20.0; 784])],
                tag: format!("req-{i}"),
                ..Default::default()
            }
        })
        .collect();
    let mut replies = client
        .predict_stream(tokio_stream::iter(reqs))
        .await
        .unwrap()
        .into_inner();
    let mut seen = std::collections::BTreeMap::new();
    while let Some(r) = replies.message().await.unwrap() {
        seen.insert(r.tag.clone(), r);
    }
    assert_eq!(seen.len(), 20);
    for i in 0..20 {
        let r = &seen[&format!("req-{i}")];
        if i == 7 {
            let p = r.problem.as_ref().expect("problem for the bad request");
            assert_eq!(p.code, Code::InvalidArgument as i32);
            assert!(p.message.contains("expected shape"), "{}", p.message);
        } else {
            assert!(r.problem.is_none());
            assert_eq!(r.outcomes.len(), 1);
        }
    }
    s.shutdown().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn health_and_reflection() {
    use tonic_health::pb::health_check_response::ServingStatus;
    use tonic_health::pb::{HealthCheckRequest, health_client::HealthClient};
    let dir = tempfile::tempdir().unwrap();
    models_dir(dir.path());
    let (s, _client) = server(dir.path()).await;
    let channel = Channel::from_shared(format!("http://{}", s.local_addr))
        .unwrap()
        .connect()
        .await
        .unwrap();
    let mut health = HealthClient::new(channel.clone());
    for (service, want) in [
        ("", ServingStatus::Serving),
        ("convoy.v1.Predictor", ServingStatus::Serving),
        ("lenet-28", ServingStatus::Serving),
        ("resnet20-32", ServingStatus::Serving),
        ("broken-model", ServingStatus::NotServing),
    ] {
        let r = health
            .check(HealthCheckRequest {
                service: service.into(),
            })
            .await
            .unwrap()
            .into_inner();
        assert_eq!(r.status, want as i32, "{service:?}");
    }
    let unknown = health
        .check(HealthCheckRequest {
            service: "no-such-model".into(),
        })
        .await
        .unwrap_err();
    assert_eq!(unknown.code(), Code::NotFound);

    use tonic_reflection::pb::v1::ServerReflectionRequest;
    use tonic_reflection::pb::v1::server_reflection_client::ServerReflectionClient;
    use tonic_reflection::pb::v1::server_reflection_request::MessageRequest;
    use tonic_reflection::pb::v1::server_reflection_response::MessageResponse;
    let mut refl = ServerReflectionClient::new(channel);
    let req = ServerReflectionRequest {
        host: String::new(),
        message_request: Some(MessageRequest::ListServices(String::new())),
    };
    let mut resp = refl
        .server_reflection_info(tokio_stream::iter(vec![req]))
        .await
        .unwrap()
        .into_inner();
    let first = resp.message().await.unwrap().unwrap();
    let Some(MessageResponse::ListServicesResponse(list)) = first.message_response else {
        panic!("unexpected reflection answer");
    };
    let names: Vec<String> = list.service.into_iter().map(|s| s.name).collect();
    assert!(
        names.iter().any(|n| n == "convoy.v1.Predictor"),
        "{names:?}"
    );
    assert!(
        names.iter().any(|n| n == "grpc.health.v1.Health"),
        "{names:?}"
    );
    s.shutdown().await.unwrap();
}

/// The digits CNN of the import tests (tests/onnx/digits; UCI data, CC BY 4.0) served over
/// gRPC classifies the held-out split exactly as `convoy run` (the engine) does.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn digits_over_grpc_match_the_engine() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/onnx/digits");
    let dir = tempfile::tempdir().unwrap();
    let bundle = dir.path().join("digits.cvb");
    convoy::import::import_onnx(
        &root.join("digits_cnn.onnx"),
        &bundle,
        &convoy::import::ImportOptions::default(),
        &mut |_| {},
    )
    .unwrap();
    let x = convoy::npy::read_npy_file(&root.join("test_x.npy")).unwrap();
    let y = convoy::npy::read_npy_file(&root.join("test_y.npy")).unwrap();
    let engine = Engine::new(&Bundle::open(&bundle).unwrap(), &EngineConfig::default()).unwrap();
    let n = x.shape[0];
    let local: Vec<usize> = engine
        .run(&x.data, n, RunOptions::default())
        .unwrap()
        .chunks(10)
        .map(|r| {
            (0..10)
                .max_by(|&a, &b| r[a].total_cmp(&r[b]).then(b.cmp(&a)))
                .unwrap()
        })
        .collect();
    let (s, mut client) = server(dir.path()).await;
    let mut remote = Vec::new();
    let per_sample: Vec<&[f32]> = x.data.chunks(64).collect();
    for group in per_sample.chunks(8) {
        let samples = group.iter().map(|c| tensor(&[1, 8, 8], c)).collect();
        let reply = client
            .predict(request("digits_cnn", samples))
            .await
            .unwrap()
            .into_inner();
        remote.extend(reply.outcomes.iter().map(|o| o.top[0].class_index as usize));
    }
    assert_eq!(remote, local);
    let correct = remote
        .iter()
        .zip(&y.data)
        .filter(|(p, l)| **p == **l as usize)
        .count();
    assert!(correct as f64 / n as f64 >= 0.97);
    s.shutdown().await.unwrap();
}

/// `convoy predict` as a user runs it, against the live server: an image and a .npy batch.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn predict_command_prints_ranked_classes() {
    let dir = tempfile::tempdir().unwrap();
    models_dir(dir.path());
    let (s, _client) = server(dir.path()).await;
    let pixels: Vec<u8> = (0..784).map(|i| (i % 251) as u8).collect();
    std::fs::write(dir.path().join("part.png"), png_gray(28, 28, &pixels)).unwrap();
    convoy::npy::write_npy_file(
        &dir.path().join("batch.npy"),
        &[2, 1, 28, 28],
        &vec![0.25; 2 * 784],
    )
    .unwrap();
    let addr = s.local_addr.to_string();
    let out = tokio::task::spawn_blocking(move || {
        std::process::Command::new(env!("CARGO_BIN_EXE_convoy"))
            .args(["predict", "--server", &addr, "--top", "2", "--json"])
            .arg(dir.path().join("part.png"))
            .arg(dir.path().join("batch.npy"))
            .output()
            .unwrap()
    })
    .await
    .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let j: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(j["model"], "lenet-28");
    let samples = j["samples"].as_array().unwrap();
    assert_eq!(samples.len(), 3);
    assert_eq!(samples[2]["index"], 1);
    assert_eq!(samples[0]["top"].as_array().unwrap().len(), 2);
    assert!(
        samples[0]["top"][0]["label"]
            .as_str()
            .unwrap()
            .starts_with("digit-")
    );
    s.shutdown().await.unwrap();
}
