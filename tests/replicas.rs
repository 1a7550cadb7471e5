//! Scale-out on loopback: three `convoy serve` processes behind a client that balances each
//! call over them (round robin, as a headless Kubernetes Service's DNS answer lets a gRPC
//! client do), restarted one at a time under load the way a rolling update does it with
//! `maxSurge: 1, maxUnavailable: 0` (deploy/kubernetes/deployment.yaml): start the new
//! replica, add it once its standard health check says SERVING (what a readiness probe
//! does), take the old one out of the balancer and send it SIGTERM at the same moment (the
//! kubelet and the endpoints controller act concurrently). Every call must succeed, with the
//! right class, and no request is retried.
//!
//! Drift counters are plain counters, so summing them over replicas (what `sum()` does in a
//! Prometheus query) must give exactly what one replica counts for the same traffic.

#[path = "support/serve_process.rs"]
mod serve_process;

use serve_process::ServeProcess;
use std::collections::BTreeMap;
use std::ffi::OsStr;
use std::io::{Cursor, Read, Write};
use std::net::{SocketAddr, TcpStream};
use std::path::Path;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex, RwLock};
use std::time::Duration;

use convoy::service::api::{self, predictor_client::PredictorClient, sample::Data};
use tonic::transport::Channel;
use tonic_health::pb::health_check_response::ServingStatus;
use tonic_health::pb::{HealthCheckRequest, health_client::HealthClient};

/// One `convoy serve` process with the built-in demo model, and its metrics address.
struct Replica {
    process: ServeProcess,
    addr: SocketAddr,
    metrics: SocketAddr,
}

fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

fn spawn_replica(dir: &Path, name: &str) -> Replica {
    let metrics: SocketAddr = format!("127.0.0.1:{}", free_port()).parse().unwrap();
    let config = dir.join(format!("{name}.toml"));
    // The deploy/serve.toml settings that matter here, scaled to a test: notice long enough
    // for the balancer (which drops the replica before signalling it) and in-flight calls.
    std::fs::write(
        &config,
        format!(
            "listen = \"127.0.0.1:0\"\nmetrics_listen = \"{metrics}\"\ncompute_threads = 1\n\
             shutdown_notice_ms = 500\nshutdown_grace_ms = 10000\n"
        ),
    )
    .unwrap();
    let process = ServeProcess::start([OsStr::new("--config"), config.as_os_str()], "info");
    Replica {
        addr: process.addr,
        process,
        metrics,
    }
}

impl Replica {
    /// SIGTERM, then the process's own exit, which must be clean; returns its log.
    fn stop(self) -> Vec<String> {
        let (status, log) = self.process.terminate();
        assert!(status.success(), "exit {status:?}:\n{}", log.join("\n"));
        log
    }
}

async fn connect(addr: SocketAddr) -> Channel {
    Channel::from_shared(format!("http://{addr}"))
        .unwrap()
        .connect()
        .await
        .unwrap()
}

/// Waits until the replica's standard health check says SERVING (a readiness probe).
async fn ready(ch: &Channel) {
    for _ in 0..500 {
        let r = HealthClient::new(ch.clone())
            .check(HealthCheckRequest {
                service: String::new(),
            })
            .await;
        if r.is_ok_and(|r| r.into_inner().status == ServingStatus::Serving as i32) {
            return;
        }
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    panic!("the replica never became ready");
}

/// The balancer: the replicas currently in rotation, picked round robin per call.
#[derive(Default)]
struct Rotation {
    members: RwLock<Vec<(usize, Channel)>>,
    next: AtomicUsize,
}

impl Rotation {
    fn pick(&self) -> (usize, Channel) {
        let m = self.members.read().unwrap();
        m[self.next.fetch_add(1, Ordering::Relaxed) % m.len()].clone()
    }
    fn add(&self, id: usize, ch: Channel) {
        self.members.write().unwrap().push((id, ch));
    }
    fn remove(&self, id: usize) {
        self.members.write().unwrap().retain(|(i, _)| *i != id);
    }
}

/// The demo's held-out photos (tests/data/drift/nominal.png, 64×64 tiles, 20 per row), each
/// as a PNG of its own.
fn photos() -> Vec<Vec<u8>> {
    let path = format!(
        "{}/tests/data/drift/nominal.png",
        env!("CARGO_MANIFEST_DIR")
    );
    let img = image::open(&path).unwrap().into_luma8();
    let n = (img.width() / 64) * (img.height() / 64);
    (0..n)
        .map(|k| {
            let tile =
                image::imageops::crop_imm(&img, 64 * (k % 20), 64 * (k / 20), 64, 64).to_image();
            let mut png = Cursor::new(Vec::new());
            tile.write_to(&mut png, image::ImageFormat::Png).unwrap();
            png.into_inner()
        })
        .collect()
}

fn image_request(png: &[u8]) -> api::PredictRequest {
    api::PredictRequest {
        samples: vec![api::Sample {
            data: Some(Data::EncodedImage(png.to_vec())),
        }],
        ..Default::default()
    }
}

fn top_class(r: &api::PredictReply) -> u32 {
    r.outcomes[0].top[0].class_index
}

/// Every `convoy_drift_*_total` series of a `GET /metrics` page: series → value.
fn drift_counters(metrics: SocketAddr) -> BTreeMap<String, f64> {
    let mut s = TcpStream::connect(metrics).unwrap();
    s.write_all(b"GET /metrics HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n")
        .unwrap();
    let mut page = String::new();
    s.read_to_string(&mut page).unwrap();
    page.lines()
        .filter(|l| l.starts_with("convoy_drift_") && !l.starts_with('#'))
        .filter_map(|l| {
            let (series, value) = l.rsplit_once(' ')?;
            let name = series.split('{').next()?;
            name.ends_with("_total")
                .then(|| (series.to_string(), value.parse().unwrap()))
        })
        .collect()
}

#[test]
fn rolling_restart_of_three_replicas_under_load_fails_no_request() {
    let dir = tempfile::tempdir().unwrap();
    let photos = Arc::new(photos());
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    let mut replicas: Vec<(usize, Replica)> = (0..3)
        .map(|i| (i, spawn_replica(dir.path(), &format!("r{i}"))))
        .collect();
    let single = spawn_replica(dir.path(), "single");
    let rotation = Arc::new(Rotation::default());

    rt.block_on(async {
        for (id, r) in &replicas {
            let ch = connect(r.addr).await;
            ready(&ch).await;
            rotation.add(*id, ch);
        }
        // The class of every photo, from the replica that sees all traffic alone.
        let mut alone = PredictorClient::new(connect(single.addr).await);
        let mut expected = Vec::new();
        for p in photos.iter() {
            expected.push(top_class(
                &alone.predict(image_request(p)).await.unwrap().into_inner(),
            ));
        }

        // Phase 1, drift: the same photos, balanced over the three replicas.
        for (k, p) in photos.iter().enumerate() {
            let (_, ch) = rotation.pick();
            let r = PredictorClient::new(ch)
                .predict(image_request(p))
                .await
                .unwrap()
                .into_inner();
            assert_eq!(top_class(&r), expected[k], "photo {k}");
        }
        let one = drift_counters(single.metrics);
        let mut summed: BTreeMap<String, f64> = BTreeMap::new();
        let mut per_replica_samples = Vec::new();
        for (_, r) in &replicas {
            let c = drift_counters(r.metrics);
            per_replica_samples.push(
                c.iter()
                    .filter(|(k, _)| k.starts_with("convoy_drift_samples_total"))
                    .map(|(_, v)| v)
                    .sum::<f64>(),
            );
            for (k, v) in c {
                *summed.entry(k).or_default() += v;
            }
        }
        let nonzero = one.values().filter(|v| **v > 0.0).count();
        assert!(nonzero > 20, "only {nonzero} drift counters counted anything");
        // Series a replica never touched may be absent there; compare every series of both.
        for k in one.keys().chain(summed.keys()) {
            assert_eq!(
                summed.get(k).copied().unwrap_or(0.0),
                one.get(k).copied().unwrap_or(0.0),
                "{k}: sum over replicas vs one replica"
            );
        }
        eprintln!(
            "drift: {} counter series, {nonzero} non-zero, equal; samples per replica {per_replica_samples:?}, one replica {}",
            one.len(),
            one.iter()
                .filter(|(k, _)| k.starts_with("convoy_drift_samples_total"))
                .map(|(_, v)| v)
                .sum::<f64>()
        );

        // Phase 2, rolling restart under load: 8 callers, no retries.
        let stop = Arc::new(AtomicBool::new(false));
        let ok = Arc::new(AtomicUsize::new(0));
        let failed = Arc::new(Mutex::new(Vec::<String>::new()));
        let served: Arc<Mutex<BTreeMap<usize, usize>>> = Arc::default();
        let expected = Arc::new(expected);
        let mut callers = Vec::new();
        for c in 0..8 {
            let (rotation, stop, ok, failed, served, photos, expected) = (
                Arc::clone(&rotation),
                Arc::clone(&stop),
                Arc::clone(&ok),
                Arc::clone(&failed),
                Arc::clone(&served),
                Arc::clone(&photos),
                Arc::clone(&expected),
            );
            callers.push(tokio::spawn(async move {
                let mut k = c;
                while !stop.load(Ordering::Relaxed) {
                    let (id, ch) = rotation.pick();
                    let i = k % photos.len();
                    k += 8;
                    match PredictorClient::new(ch).predict(image_request(&photos[i])).await {
                        Ok(r) if top_class(r.get_ref()) == expected[i] => {
                            ok.fetch_add(1, Ordering::Relaxed);
                            *served.lock().unwrap().entry(id).or_default() += 1;
                        }
                        Ok(r) => failed.lock().unwrap().push(format!(
                            "photo {i}: class {} instead of {}",
                            top_class(r.get_ref()),
                            expected[i]
                        )),
                        Err(s) => failed.lock().unwrap().push(format!("replica {id}: {s:?}")),
                    }
                }
            }));
        }
        tokio::time::sleep(Duration::from_millis(300)).await;
        for round in 0..3 {
            let new_id = 3 + round;
            let fresh = spawn_replica(dir.path(), &format!("r{new_id}"));
            let ch = connect(fresh.addr).await;
            ready(&ch).await;
            rotation.add(new_id, ch);
            let (old_id, old) = replicas.remove(0);
            rotation.remove(old_id);
            let log = tokio::task::spawn_blocking(move || old.stop()).await.unwrap();
            let log = log.join("\n");
            assert!(log.contains("unanswered=0"), "replica {old_id}:\n{log}");
            replicas.push((new_id, fresh));
            tokio::time::sleep(Duration::from_millis(300)).await;
        }
        stop.store(true, Ordering::Relaxed);
        for c in callers {
            c.await.unwrap();
        }
        let failed = failed.lock().unwrap().clone();
        let served = served.lock().unwrap().clone();
        let ok = ok.load(Ordering::Relaxed);
        eprintln!("rolling restart: {ok} calls succeeded, {} failed; per replica {served:?}", failed.len());
        assert!(failed.is_empty(), "{} failed calls: {:?}", failed.len(), &failed[..failed.len().min(5)]);
        assert!(ok > 100, "only {ok} calls in the whole restart");
        for id in 3..6 {
            assert!(served.get(&id).copied().unwrap_or(0) > 0, "new replica {id} served nothing: {served:?}");
        }
    });
    for (_, r) in replicas {
        r.stop();
    }
    single.stop();
}
