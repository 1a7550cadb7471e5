//! Hot-swapping model versions on a live server under load: versions rolled in and out through
//! the models folder and the control service while 16 callers keep asking, with no failed
//! request; damaged bundles refused with their reason while the old version keeps answering;
//! pinning, per-request versions, retiring, rollback and the control token.
//!
//! The model ("dial") is a single dense layer whose bias makes each version answer a fixed
//! input with its own class: version 1 says class 0, version 2 class 1, version 3 class 2. So
//! every reply shows which version computed it, and a reply whose `version` field disagrees
//! with its class would be a reply computed by one version and labelled with another.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use convoy::bundle::BundleWriter;
use convoy::bundle::manifest::{InputSpec, OutputKind, OutputSpec};
use convoy::graph::Op;
use convoy::graph::build::GraphBuilder;
use convoy::service::api::control::{self as pb, control_client::ControlClient};
use convoy::service::api::{self, predictor_client::PredictorClient, sample::Data};
use convoy::service::{RunningServer, ServeConfig, start};
use tonic::Code;
use tonic::transport::Channel;

const TOKEN: &str = "rollout-test-token-0123456789";
/// The input every caller sends.
const X: [f32; 3] = [1.0, 1.0, 1.0];

/// Version `v` (1, 2 or 3) of "dial": y = I·x + b with b[v-1] = 5, so the fixed input's top
/// class is v-1. Its check samples hold y for two inputs, worked out by hand (identity weights:
/// y = x + b); `check_ok = false` stores outputs off by 1, which the load must refuse.
fn dial(v: usize, check_ok: bool) -> BundleWriter {
    let mut b = GraphBuilder::new("x", &[3]);
    let w = b.tensor("w", &[3, 3], vec![1., 0., 0., 0., 1., 0., 0., 0., 1.]);
    let mut bias = vec![0.0; 3];
    bias[v - 1] = 5.0;
    let bias_t = b.tensor("b", &[3], bias.clone());
    let y = b.node(
        "dense",
        Op::Dense {
            weight: w,
            bias: Some(bias_t),
            weight_layout: Default::default(),
        },
        &["x"],
    );
    let (graph, tensors) = b.finish(&y);
    let mut writer = BundleWriter::new(
        "dial",
        v.to_string(),
        graph,
        InputSpec {
            shape: vec![3],
            image: None,
        },
        OutputSpec {
            labels: vec!["low".into(), "middle".into(), "high".into()],
            kind: OutputKind::Logits,
        },
    );
    for (n, s, d) in tensors {
        writer.add_tensor(n, &s, d).unwrap();
    }
    let inputs = vec![1.0, 1.0, 1.0, 0.0, 2.0, -1.0];
    let mut outputs: Vec<f32> = inputs
        .chunks(3)
        .flat_map(|x| x.iter().zip(&bias).map(|(a, b)| a + b).collect::<Vec<_>>())
        .collect();
    if !check_ok {
        outputs[0] += 1.0;
    }
    writer
        .check_samples(2, inputs, outputs, &[3], "worked by hand: y = x + b")
        .unwrap();
    writer
}

/// Publishes a bundle the documented way: write under a name the server ignores, then rename.
fn publish(bytes: &[u8], dir: &Path, name: &str) -> PathBuf {
    let part = dir.join(format!(".{name}.part"));
    std::fs::write(&part, bytes).unwrap();
    let path = dir.join(name);
    std::fs::rename(&part, &path).unwrap();
    path
}

async fn serve(dir: &Path, adjust: impl FnOnce(&mut ServeConfig)) -> RunningServer {
    let mut config = ServeConfig {
        listen: "127.0.0.1:0".parse().unwrap(),
        models: Some(dir.to_path_buf()),
        compute_threads: 2,
        control: true,
        control_listen: "127.0.0.1:0".parse().unwrap(),
        control_token: Some(TOKEN.into()),
        ..ServeConfig::default()
    };
    adjust(&mut config);
    start(&config).await.unwrap()
}

async fn predictor(s: &RunningServer) -> PredictorClient<Channel> {
    PredictorClient::connect(format!("http://{}", s.local_addr))
        .await
        .unwrap()
}

type AddToken =
    Box<dyn FnMut(tonic::Request<()>) -> Result<tonic::Request<()>, tonic::Status> + Send>;
type Control = ControlClient<tonic::service::interceptor::InterceptedService<Channel, AddToken>>;

/// A control client presenting `token` (none: no header at all).
async fn control(s: &RunningServer, token: Option<&str>) -> Control {
    let channel = Channel::from_shared(format!("http://{}", s.control_addr.unwrap()))
        .unwrap()
        .connect()
        .await
        .unwrap();
    let header: Option<tonic::metadata::MetadataValue<tonic::metadata::Ascii>> =
        token.map(|t| format!("Bearer {t}").parse().unwrap());
    let add: AddToken = Box::new(move |mut req: tonic::Request<()>| {
        if let Some(h) = &header {
            req.metadata_mut().insert("authorization", h.clone());
        }
        Ok(req)
    });
    ControlClient::with_interceptor(channel, add)
}

fn request(version: &str) -> api::PredictRequest {
    api::PredictRequest {
        model: "dial".into(),
        version: version.into(),
        samples: vec![api::Sample {
            data: Some(Data::Tensor(api::Tensor {
                shape: vec![3],
                f32_le: X.iter().flat_map(|v| v.to_le_bytes()).collect(),
            })),
        }],
        top_k: 1,
        ..Default::default()
    }
}

/// The version a reply's class says computed it.
fn computed_by(reply: &api::PredictReply) -> String {
    (reply.outcomes[0].top[0].class_index + 1).to_string()
}

async fn catalog(client: &mut PredictorClient<Channel>) -> api::ModelEntry {
    let cat = client
        .catalog(api::CatalogRequest {})
        .await
        .unwrap()
        .into_inner();
    cat.models
        .into_iter()
        .find(|m| m.name == "dial")
        .unwrap_or_default()
}

async fn wait_for(
    client: &mut PredictorClient<Channel>,
    what: &str,
    ok: impl Fn(&api::ModelEntry) -> bool,
) -> api::ModelEntry {
    let deadline = Instant::now() + Duration::from_secs(20);
    loop {
        let entry = catalog(client).await;
        if ok(&entry) {
            return entry;
        }
        assert!(
            Instant::now() < deadline,
            "timed out waiting for {what}: {entry:?}"
        );
        tokio::time::sleep(Duration::from_millis(2)).await;
    }
}

/// One reply seen by a caller.
struct Seen {
    sent: Instant,
    received: Instant,
    version: String,
}

/// 16 callers in a closed loop until `stop`; every reply is checked for the version that
/// computed it, every failure is kept.
struct Load {
    stop: Arc<AtomicBool>,
    seen: Arc<Mutex<Vec<Seen>>>,
    failures: Arc<Mutex<Vec<String>>>,
    tasks: Vec<tokio::task::JoinHandle<()>>,
}

impl Load {
    fn start(client: &PredictorClient<Channel>) -> Load {
        let stop = Arc::new(AtomicBool::new(false));
        let seen = Arc::new(Mutex::new(Vec::new()));
        let failures = Arc::new(Mutex::new(Vec::new()));
        let tasks = (0..16)
            .map(|_| {
                let (mut client, stop) = (client.clone(), Arc::clone(&stop));
                let (seen, failures) = (Arc::clone(&seen), Arc::clone(&failures));
                tokio::spawn(async move {
                    while !stop.load(Ordering::Relaxed) {
                        let sent = Instant::now();
                        match client.predict(request("")).await {
                            Ok(r) => {
                                let r = r.into_inner();
                                if computed_by(&r) != r.version {
                                    failures.lock().unwrap().push(format!(
                                        "reply labelled {} was computed by {}",
                                        r.version,
                                        computed_by(&r)
                                    ));
                                }
                                seen.lock().unwrap().push(Seen {
                                    sent,
                                    received: Instant::now(),
                                    version: r.version,
                                });
                            }
                            Err(s) => failures.lock().unwrap().push(format!(
                                "{:?}: {}",
                                s.code(),
                                s.message()
                            )),
                        }
                    }
                })
            })
            .collect();
        Load {
            stop,
            seen,
            failures,
            tasks,
        }
    }

    async fn finish(self) -> (Vec<Seen>, Vec<String>) {
        self.stop.store(true, Ordering::Relaxed);
        for t in self.tasks {
            t.await.unwrap();
        }
        let seen = std::mem::take(&mut *self.seen.lock().unwrap());
        let failures = std::mem::take(&mut *self.failures.lock().unwrap());
        (seen, failures)
    }
}

fn median(mut v: Vec<Duration>) -> Duration {
    v.sort();
    v[v.len() / 2]
}

/// Twenty swaps under load: version 2 renamed into the folder (it is higher, so it takes
/// over), then its file removed (version 1 takes over again, loaded again from its file, since
/// by default a replaced version is released). No request fails; each request sent after a
/// swap was seen complete is answered by the new version.
async fn swaps_under_load(notifications: bool) {
    let dir = tempfile::tempdir().unwrap();
    publish(&dial(1, true).to_bytes().unwrap(), dir.path(), "dial-1.cvb");
    let v2 = dial(2, true).to_bytes().unwrap();
    let server = serve(dir.path(), |c| {
        c.watch_models = notifications;
        if !notifications {
            // The polling fallback alone.
            c.rescan_interval_ms = 50;
        }
    })
    .await;
    let mut client = predictor(&server).await;
    let load = Load::start(&client);
    tokio::time::sleep(Duration::from_millis(200)).await;

    // (time the swap started, time it was seen complete in Catalog, version it brought)
    let mut swaps: Vec<(Instant, Instant, String)> = Vec::new();
    for i in 0..20 {
        let (to, started) = if i % 2 == 0 {
            let t = Instant::now();
            publish(&v2, dir.path(), "dial-2.cvb");
            ("2", t)
        } else {
            let t = Instant::now();
            std::fs::remove_file(dir.path().join("dial-2.cvb")).unwrap();
            ("1", t)
        };
        let entry = wait_for(&mut client, &format!("swap {i} to {to}"), |e| {
            e.active_version == to
        })
        .await;
        swaps.push((started, Instant::now(), to.to_string()));
        if to == "1" {
            let states: Vec<(&str, &str)> = entry
                .versions
                .iter()
                .map(|v| (v.version.as_str(), v.state.as_str()))
                .collect();
            assert_eq!(states[0], ("1", "active"), "{states:?}");
        }
        tokio::time::sleep(Duration::from_millis(150)).await;
    }
    let (seen, failures) = load.finish().await;
    assert!(failures.is_empty(), "failed requests: {failures:?}");
    assert!(seen.len() > 1000, "only {} replies", seen.len());

    // New requests go to the new version: a request sent after a swap was seen complete, and
    // answered before the next swap started, is answered by that swap's version.
    let mut first_reply = Vec::new();
    for (k, (started, complete, version)) in swaps.iter().enumerate() {
        let next = swaps.get(k + 1).map(|s| s.0);
        let in_epoch: Vec<&Seen> = seen
            .iter()
            .filter(|s| s.sent >= *complete && next.is_none_or(|n| s.received < n))
            .collect();
        assert!(!in_epoch.is_empty(), "no request in epoch {k}");
        for s in &in_epoch {
            if &s.version != version {
                let t0 = swaps[0].0;
                for (a, b, v) in &swaps {
                    eprintln!("swap to {v}: started {:?} complete {:?}", *a - t0, *b - t0);
                }
                eprintln!(
                    "reply {} sent {:?} received {:?}",
                    s.version,
                    s.sent.saturating_duration_since(t0),
                    s.received.saturating_duration_since(t0)
                );
            }
            assert_eq!(&s.version, version, "epoch {k}");
        }
        let first = seen
            .iter()
            .filter(|s| s.received >= *started && &s.version == version)
            .map(|s| s.received)
            .min()
            .unwrap();
        first_reply.push(first - *started);
    }
    let adds: Vec<Duration> = first_reply.iter().step_by(2).copied().collect();
    let removals: Vec<Duration> = first_reply.iter().skip(1).step_by(2).copied().collect();
    eprintln!(
        "{} replies over 20 swaps ({}); file change to first reply from the new version: \
         rename in median {:?} (max {:?}), removal median {:?} (max {:?})",
        seen.len(),
        if notifications {
            "notifications"
        } else {
            "polling every 50 ms"
        },
        median(adds.clone()),
        adds.iter().max().unwrap(),
        median(removals.clone()),
        removals.iter().max().unwrap(),
    );
    server.shutdown().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn twenty_swaps_under_load_fail_nothing() {
    swaps_under_load(true).await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn polling_alone_also_swaps() {
    swaps_under_load(false).await;
}

/// `bytes` with its manifest edited (and the header's length and checksum made to match), as a
/// tool that does not know an op would see it.
fn with_manifest_edit(bytes: &[u8], edit: impl FnOnce(&mut serde_json::Value)) -> Vec<u8> {
    use sha2::{Digest, Sha256};
    let u64_at = |o: usize| u64::from_le_bytes(bytes[o..o + 8].try_into().unwrap());
    let (manifest_len, data_len) = (u64_at(16) as usize, u64_at(24) as usize);
    let mut manifest: serde_json::Value =
        serde_json::from_slice(&bytes[64..64 + manifest_len]).unwrap();
    let data = &bytes[bytes.len() - data_len..];
    edit(&mut manifest);
    let text = serde_json::to_vec(&manifest).unwrap();
    let mut out = bytes[..64].to_vec();
    out[16..24].copy_from_slice(&(text.len() as u64).to_le_bytes());
    out[32..64].copy_from_slice(&Sha256::digest(&text));
    out.extend_from_slice(&text);
    out.resize(out.len().div_ceil(64) * 64, 0);
    out.extend_from_slice(data);
    out
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn damaged_bundles_are_refused_under_load() {
    let dir = tempfile::tempdir().unwrap();
    publish(&dial(1, true).to_bytes().unwrap(), dir.path(), "dial-1.cvb");
    let server = serve(dir.path(), |_| {}).await;
    let mut client = predictor(&server).await;
    let load = Load::start(&client);

    let good3 = dial(3, true).to_bytes().unwrap();
    let truncated = good3[..good3.len() - 10].to_vec();
    let mut flipped = good3.clone();
    let last = flipped.len() - 1;
    flipped[last] ^= 0x01;
    let disagreeing = dial(3, false).to_bytes().unwrap();
    let unknown_op = with_manifest_edit(&good3, |m| {
        m["graph"]["nodes"][0]["op"] = serde_json::Value::String("fold_space".into());
    });
    let cases = [
        ("truncated.cvb", truncated, "verify: truncated bundle"),
        ("flipped.cvb", flipped, "verify: data checksum mismatch"),
        ("disagreeing.cvb", disagreeing, "check_samples: "),
        (
            "unknown-op.cvb",
            unknown_op,
            "uses unknown op \"fold_space\"",
        ),
    ];
    for (name, bytes, words) in cases {
        publish(&bytes, dir.path(), name);
        let entry = wait_for(&mut client, name, |e| {
            e.versions
                .iter()
                .any(|v| v.version == "3" && v.origin.ends_with(name) && v.state == "refused")
        })
        .await;
        let v3 = entry.versions.iter().find(|v| v.version == "3").unwrap();
        assert!(v3.reason.contains(words), "{name}: {:?}", v3.reason);
        assert_eq!(entry.active_version, "1", "{name}");
        std::fs::remove_file(dir.path().join(name)).unwrap();
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    // A file that is not a bundle at all belongs to no model: listed on its own.
    publish(&[b'#'; 100], dir.path(), "junk.cvb");
    let deadline = Instant::now() + Duration::from_secs(20);
    loop {
        let cat = client
            .catalog(api::CatalogRequest {})
            .await
            .unwrap()
            .into_inner();
        if let Some(f) = cat
            .unreadable_files
            .iter()
            .find(|f| f.file.ends_with("junk.cvb"))
        {
            assert!(f.reason.starts_with("verify: not a convoy bundle"), "{f:?}");
            break;
        }
        assert!(Instant::now() < deadline, "junk.cvb never listed");
        tokio::time::sleep(Duration::from_millis(5)).await;
    }
    let (seen, failures) = load.finish().await;
    assert!(failures.is_empty(), "failed requests: {failures:?}");
    assert!(seen.iter().all(|s| s.version == "1"));
    assert!(seen.len() > 100);
    server.shutdown().await.unwrap();
}

async fn expect_code<T: std::fmt::Debug>(
    r: Result<tonic::Response<T>, tonic::Status>,
    code: Code,
) -> String {
    let st = r.expect_err("should fail");
    assert_eq!(st.code(), code, "{}", st.message());
    st.message().to_string()
}

fn states(e: &api::ModelEntry) -> Vec<(String, String)> {
    e.versions
        .iter()
        .map(|v| (v.version.clone(), v.state.clone()))
        .collect()
}

fn pairs(p: &[(&str, &str)]) -> Vec<(String, String)> {
    p.iter()
        .map(|(a, b)| (a.to_string(), b.to_string()))
        .collect()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn pinning_versions_retiring_rollback_and_the_token() {
    let dir = tempfile::tempdir().unwrap();
    publish(&dial(1, true).to_bytes().unwrap(), dir.path(), "dial-1.cvb");
    publish(&dial(2, true).to_bytes().unwrap(), dir.path(), "dial-2.cvb");
    // Pinned to 1 by configuration, although 2 is higher.
    let server = serve(dir.path(), |c| {
        c.pinned_versions = BTreeMap::from([("dial".to_string(), "1".to_string())]);
    })
    .await;
    let mut client = predictor(&server).await;
    let entry = catalog(&mut client).await;
    assert_eq!(entry.active_version, "1");
    assert_eq!(entry.pinned_version, "1");
    assert_eq!(states(&entry), pairs(&[("1", "active"), ("2", "retired")]));
    assert_eq!(entry.versions[1].reason, "superseded by 1");
    let r = client.predict(request("")).await.unwrap().into_inner();
    assert_eq!((r.version.as_str(), computed_by(&r).as_str()), ("1", "1"));
    // A released version cannot be named by a request.
    let msg = expect_code(client.predict(request("2")).await, Code::NotFound).await;
    assert!(msg.contains("no loaded version \"2\""), "{msg}");

    // The token: missing or wrong is UNAUTHENTICATED and changes nothing.
    let before = catalog(&mut client).await;
    for token in [None, Some("rollout-test-token-012345678"), Some("")] {
        let mut c = control(&server, token).await;
        let st = c
            .activate(pb::ActivateRequest {
                model: "dial".into(),
                version: "2".into(),
            })
            .await
            .unwrap_err();
        assert_eq!(st.code(), Code::Unauthenticated, "{token:?}");
        let st = c.rescan(pb::RescanRequest {}).await.unwrap_err();
        assert_eq!(st.code(), Code::Unauthenticated, "{token:?}");
    }
    let after = catalog(&mut client).await;
    assert_eq!(states(&before), states(&after));
    assert_eq!(after.pinned_version, "1");

    let mut ctl = control(&server, Some(TOKEN)).await;
    // Follow the highest again: 2 is loaded from its file and takes over.
    let report = ctl
        .follow_highest(pb::FollowHighestRequest {
            model: "dial".into(),
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(report.loads.len(), 1);
    assert!(report.loads[0].ok && report.loads[0].version == "2");
    assert_eq!(
        (
            report.switches[0].from_version.as_str(),
            report.switches[0].to_version.as_str()
        ),
        ("1", "2")
    );
    assert_eq!(report.releases[0].version, "1");
    let r = client.predict(request("")).await.unwrap().into_inner();
    assert_eq!((r.version.as_str(), computed_by(&r).as_str()), ("2", "2"));

    // Roll back: activate 1, which is loaded again and held.
    let report = ctl
        .activate(pb::ActivateRequest {
            model: "dial".into(),
            version: "1".into(),
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(report.switches[0].to_version, "1");
    let entry = catalog(&mut client).await;
    assert_eq!(
        (entry.active_version.as_str(), entry.pinned_version.as_str()),
        ("1", "1")
    );
    // A higher version arriving does not move a pinned model.
    publish(&dial(3, true).to_bytes().unwrap(), dir.path(), "dial-3.cvb");
    let report = ctl.rescan(pb::RescanRequest {}).await.unwrap().into_inner();
    // (The watcher may have loaded it first; either way 1 stays active.)
    assert!(report.switches.is_empty(), "{report:?}");
    let entry = wait_for(&mut client, "version 3 seen", |e| {
        e.versions.iter().any(|v| v.version == "3")
    })
    .await;
    assert_eq!(entry.active_version, "1");

    // Retire the active version: the highest other one takes over, and 1 is not chosen
    // again on its own.
    let report = ctl
        .retire(pb::RetireRequest {
            model: "dial".into(),
            version: "1".into(),
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(report.switches[0].to_version, "3");
    let entry = catalog(&mut client).await;
    assert_eq!(entry.active_version, "3");
    assert_eq!(entry.pinned_version, "");
    let v1 = entry.versions.iter().find(|v| v.version == "1").unwrap();
    assert_eq!(
        (v1.state.as_str(), v1.reason.as_str()),
        ("retired", "retired by an operator")
    );
    ctl.rescan(pb::RescanRequest {}).await.unwrap();
    assert_eq!(catalog(&mut client).await.active_version, "3");

    // The last version able to answer cannot be retired (2 and 1 are gone from the candidates
    // once their files are removed).
    std::fs::remove_file(dir.path().join("dial-2.cvb")).unwrap();
    std::fs::remove_file(dir.path().join("dial-1.cvb")).unwrap();
    ctl.rescan(pb::RescanRequest {}).await.unwrap();
    let msg = expect_code(
        ctl.retire(pb::RetireRequest {
            model: "dial".into(),
            version: "3".into(),
        })
        .await,
        Code::FailedPrecondition,
    )
    .await;
    assert!(msg.contains("last version"), "{msg}");
    assert_eq!(catalog(&mut client).await.active_version, "3");
    // Removing its file does not stop it either (setting retire_last).
    std::fs::remove_file(dir.path().join("dial-3.cvb")).unwrap();
    ctl.rescan(pb::RescanRequest {}).await.unwrap();
    let entry = catalog(&mut client).await;
    assert_eq!(entry.active_version, "3");
    let v3 = entry.versions.iter().find(|v| v.version == "3").unwrap();
    assert!(v3.note.contains("file was removed"), "{v3:?}");
    let r = client.predict(request("")).await.unwrap().into_inner();
    assert_eq!(r.version, "3");

    // Bad calls: unknown names and versions, file names outside the folder.
    let msg = expect_code(
        ctl.activate(pb::ActivateRequest {
            model: "dial".into(),
            version: "9".into(),
        })
        .await,
        Code::NotFound,
    )
    .await;
    assert!(msg.contains("\"9\""), "{msg}");
    expect_code(
        ctl.load_file(pb::LoadFileRequest {
            file_name: "../dial-1.cvb".into(),
        })
        .await,
        Code::InvalidArgument,
    )
    .await;
    expect_code(
        ctl.load_file(pb::LoadFileRequest {
            file_name: "absent.cvb".into(),
        })
        .await,
        Code::NotFound,
    )
    .await;
    server.shutdown().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn keep_previous_serves_the_rollback_target_by_name() {
    let dir = tempfile::tempdir().unwrap();
    publish(&dial(1, true).to_bytes().unwrap(), dir.path(), "dial-1.cvb");
    let server = serve(dir.path(), |c| {
        c.keep_previous = true;
        c.control = false;
    })
    .await;
    assert!(server.control_addr.is_none(), "the control service is off");
    let mut client = predictor(&server).await;
    publish(&dial(2, true).to_bytes().unwrap(), dir.path(), "dial-2.cvb");
    let entry = wait_for(&mut client, "2 active", |e| e.active_version == "2").await;
    assert_eq!(states(&entry), pairs(&[("1", "loaded"), ("2", "active")]));
    let r = client.predict(request("1")).await.unwrap().into_inner();
    assert_eq!((r.version.as_str(), computed_by(&r).as_str()), ("1", "1"));
    let r = client.predict(request("")).await.unwrap().into_inner();
    assert_eq!((r.version.as_str(), computed_by(&r).as_str()), ("2", "2"));
    server.shutdown().await.unwrap();
}

#[tokio::test]
async fn the_control_service_needs_a_token() {
    let config = ServeConfig {
        listen: "127.0.0.1:0".parse().unwrap(),
        control: true,
        ..ServeConfig::default()
    };
    let err = start(&config).await.err().expect("refused").to_string();
    assert!(err.contains("bearer token"), "{err}");
    let short = ServeConfig {
        control_token: Some("short".into()),
        ..config
    };
    assert!(start(&short).await.is_err());
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_vanished_models_folder_keeps_the_loaded_versions() {
    let dir = tempfile::tempdir().unwrap();
    let models = dir.path().join("models");
    std::fs::create_dir(&models).unwrap();
    publish(&dial(1, true).to_bytes().unwrap(), &models, "dial-1.cvb");
    let server = serve(&models, |_| {}).await;
    let mut client = predictor(&server).await;
    std::fs::remove_dir_all(&models).unwrap();
    let mut ctl = control(&server, Some(TOKEN)).await;
    let msg = expect_code(ctl.rescan(pb::RescanRequest {}).await, Code::Unavailable).await;
    assert!(msg.contains("keep serving"), "{msg}");
    let r = client.predict(request("")).await.unwrap().into_inner();
    assert_eq!(r.version, "1");
    server.shutdown().await.unwrap();
}

/// `convoy versions` as an operator runs it: list, roll back, a wrong token.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_versions_command_rolls_back() {
    let dir = tempfile::tempdir().unwrap();
    publish(&dial(1, true).to_bytes().unwrap(), dir.path(), "dial-1.cvb");
    publish(&dial(2, true).to_bytes().unwrap(), dir.path(), "dial-2.cvb");
    let server = serve(dir.path(), |_| {}).await;
    let (server_addr, control_addr) = (server.local_addr, server.control_addr.unwrap());
    let run = move |args: Vec<String>, token: &'static str| {
        tokio::task::spawn_blocking(move || {
            let out = std::process::Command::new(env!("CARGO_BIN_EXE_convoy"))
                .args(&args)
                .env("CONVOY_CONTROL_TOKEN", token)
                .env_remove("CONVOY_CONTROL_TOKEN_FILE")
                .output()
                .unwrap();
            (
                out.status.success(),
                String::from_utf8_lossy(&out.stdout).into_owned(),
                String::from_utf8_lossy(&out.stderr).into_owned(),
            )
        })
    };
    let list = vec![
        "versions".to_string(),
        "list".into(),
        "--server".into(),
        server_addr.to_string(),
    ];
    let (ok, out, _) = run(list.clone(), TOKEN).await.unwrap();
    assert!(ok);
    let rows: Vec<Vec<&str>> = out
        .lines()
        .skip(1)
        .map(|l| l.split_whitespace().take(3).collect())
        .collect();
    assert_eq!(
        rows,
        [vec!["dial", "1", "retired"], vec!["dial", "2", "active"]]
    );
    let activate = |version: &str| {
        vec![
            "versions".to_string(),
            "activate".into(),
            "dial".into(),
            version.into(),
            "--control".into(),
            control_addr.to_string(),
        ]
    };
    let (ok, _, err) = run(activate("1"), "not-the-right-token-at-all")
        .await
        .unwrap();
    assert!(!ok);
    assert!(err.contains("UNAUTHENTICATED"), "{err}");
    let (ok, out, err) = run(activate("1"), TOKEN).await.unwrap();
    assert!(ok, "{err}");
    assert!(out.contains("active   dial 2 -> 1"), "{out}");
    assert!(out.contains("retired  dial 2: superseded by 1"), "{out}");
    let (_, out, _) = run(list, TOKEN).await.unwrap();
    assert!(
        out.lines().any(|l| l.contains("dial")
            && l.contains(" 1 ")
            && l.contains("active")
            && l.ends_with("pinned")),
        "{out}"
    );
    server.shutdown().await.unwrap();
}
