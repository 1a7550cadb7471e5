//! Graceful shutdown and contained faults: a draining server turns its health NOT_SERVING at
//! once, answers every request it accepted, refuses new ones with UNAVAILABLE, and ends within
//! its grace period even with streams that never end on their own; `convoy serve` does the same
//! on SIGTERM. A batch that panics fails with INTERNAL and the server carries on.
//!
//! Expected codes follow the gRPC status code specification (doc/statuscodes.md of the gRPC
//! project): UNAVAILABLE for "the service is currently unavailable ... can be corrected by
//! retrying", INTERNAL for a broken invariant of the server.

#[path = "../benches/nets/mod.rs"]
mod nets;
#[path = "support/serve_process.rs"]
mod serve_process;

use std::path::Path;
use std::sync::Arc;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::time::Duration;

use convoy::service::api::{self, predictor_client::PredictorClient, sample::Data};
use convoy::service::{DrainSettings, RunningServer, ServeConfig, start};
use serve_process::ServeProcess;
use tonic::Code;
use tonic::transport::Channel;
use tonic_health::pb::health_check_response::ServingStatus;
use tonic_health::pb::{HealthCheckRequest, health_client::HealthClient};

/// A folder with ResNet-20 (slow enough per batch that requests queue behind each other).
fn resnet_dir(dir: &Path) {
    nets::resnet20().write(&dir.join("resnet.cvb")).unwrap();
}

async fn server(dir: &Path, adjust: impl FnOnce(&mut ServeConfig)) -> RunningServer {
    let mut config = ServeConfig {
        listen: "127.0.0.1:0".parse().unwrap(),
        models: Some(dir.to_path_buf()),
        compute_threads: 1,
        batch_limit: 4,
        watch_models: false,
        rescan_interval_ms: 0,
        ..ServeConfig::default()
    };
    adjust(&mut config);
    start(&config).await.unwrap()
}

fn request(samples: usize, seed: usize) -> api::PredictRequest {
    let values: Vec<f32> = (0..3 * 32 * 32)
        .map(|i| ((i * 7 + seed * 13) % 17) as f32 / 17.0 - 0.5)
        .collect();
    let sample = api::Sample {
        data: Some(Data::Tensor(api::Tensor {
            shape: vec![3, 32, 32],
            f32_le: values.iter().flat_map(|v| v.to_le_bytes()).collect(),
        })),
    };
    api::PredictRequest {
        samples: vec![sample; samples],
        ..Default::default()
    }
}

async fn health_status(channel: &Channel) -> Result<i32, tonic::Status> {
    HealthClient::new(channel.clone())
        .check(HealthCheckRequest {
            service: String::new(),
        })
        .await
        .map(|r| r.into_inner().status)
}

async fn channel(server: &RunningServer) -> Channel {
    Channel::from_shared(format!("http://{}", server.local_addr))
        .unwrap()
        .connect()
        .await
        .unwrap()
}

/// After a drain the port is closed: a new connection is refused.
async fn assert_nothing_listens(addr: std::net::SocketAddr) {
    let again = Channel::from_shared(format!("http://{addr}"))
        .unwrap()
        .connect()
        .await;
    assert!(again.is_err(), "the port still accepts connections");
}

/// A call the server did not take: UNAVAILABLE from the draining server ("shutting down"), or
/// a failure of the client's own transport when the call met the connection's GOAWAY and close
/// (the server never saw it; the code then depends on how the transport failed, and gRPC
/// clients retry such streams transparently, gRFC A6). That no accepted call was lost is
/// checked on the server's side (`DrainReport::unanswered`, replies after the drain began).
fn not_taken(s: &tonic::Status) -> bool {
    s.code() == Code::Unavailable
        || std::error::Error::source(s)
            .is_some_and(|e| e.downcast_ref::<tonic::transport::Error>().is_some())
}

/// What the callers saw.
#[derive(Default)]
struct Tally {
    ok: AtomicUsize,
    ok_after_drain_began: AtomicUsize,
    refused: AtomicUsize,
    other: std::sync::Mutex<Vec<String>>,
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_drain_answers_every_accepted_request_and_refuses_new_ones() {
    let dir = tempfile::tempdir().unwrap();
    resnet_dir(dir.path());
    let server = server(dir.path(), |_| {}).await;
    let addr = server.local_addr;
    let ch = channel(&server).await;
    // The answer every caller must get (same input every time).
    let expected = PredictorClient::new(ch.clone())
        .predict(request(2, 1))
        .await
        .unwrap()
        .into_inner();
    let expected_top: Vec<u32> = expected
        .outcomes
        .iter()
        .map(|o| o.top[0].class_index)
        .collect();

    let tally = Arc::new(Tally::default());
    let draining = Arc::new(std::sync::atomic::AtomicBool::new(false));
    let mut callers = Vec::new();
    for _ in 0..16 {
        let (ch, tally, draining, expected_top) = (
            ch.clone(),
            Arc::clone(&tally),
            Arc::clone(&draining),
            expected_top.clone(),
        );
        callers.push(tokio::spawn(async move {
            let mut client = PredictorClient::new(ch);
            loop {
                match client.predict(request(2, 1)).await {
                    Ok(r) => {
                        let top: Vec<u32> = r
                            .into_inner()
                            .outcomes
                            .iter()
                            .map(|o| o.top[0].class_index)
                            .collect();
                        assert_eq!(top, expected_top, "a reply with the wrong classes");
                        tally.ok.fetch_add(1, Ordering::SeqCst);
                        if draining.load(Ordering::SeqCst) {
                            tally.ok_after_drain_began.fetch_add(1, Ordering::SeqCst);
                        }
                    }
                    // Refused by the draining server, or by HTTP/2 when the call met the
                    // connection's GOAWAY and close (see `not_taken`).
                    Err(s) if not_taken(&s) => {
                        tally.refused.fetch_add(1, Ordering::SeqCst);
                        return;
                    }
                    Err(s) => {
                        tally.other.lock().unwrap().push(format!("{s:?}"));
                        return;
                    }
                }
            }
        }));
    }
    // Let the queue fill: 16 callers against one compute thread.
    while server.in_flight() < 8 {
        tokio::time::sleep(Duration::from_millis(5)).await;
    }
    let accepted_at_start = server.in_flight();
    let health_ch = ch.clone();
    draining.store(true, Ordering::SeqCst);
    let drain = tokio::spawn(server.drain(DrainSettings {
        grace: Duration::from_secs(60),
        notice: Duration::ZERO,
    }));
    // Health says NOT_SERVING while accepted requests are still being answered (or the
    // transport has already closed, if they were all answered first).
    match health_status(&health_ch).await {
        Ok(status) => assert_eq!(status, ServingStatus::NotServing as i32),
        Err(s) => assert!(not_taken(&s), "{s:?}"),
    }
    let report = drain.await.unwrap();
    for c in callers {
        c.await.unwrap();
    }
    assert_eq!(report.unanswered, 0, "every accepted request was answered");
    let other = tally.other.lock().unwrap().clone();
    assert!(
        other.is_empty(),
        "statuses other than OK/UNAVAILABLE: {other:?}"
    );
    assert_eq!(
        tally.refused.load(Ordering::SeqCst),
        16,
        "each caller ends refused"
    );
    assert!(
        tally.ok_after_drain_began.load(Ordering::SeqCst) >= accepted_at_start,
        "{} replies after the drain began, {} requests were in flight when it did",
        tally.ok_after_drain_began.load(Ordering::SeqCst),
        accepted_at_start
    );
    // Nothing listens any more.
    assert_nothing_listens(addr).await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn during_the_notice_health_is_not_serving_but_requests_are_answered() {
    let dir = tempfile::tempdir().unwrap();
    resnet_dir(dir.path());
    let server = server(dir.path(), |_| {}).await;
    let addr = server.local_addr;
    let ch = channel(&server).await;
    assert_eq!(
        health_status(&ch).await.unwrap(),
        ServingStatus::Serving as i32
    );
    let drain = tokio::spawn(server.drain(DrainSettings {
        grace: Duration::from_secs(30),
        notice: Duration::from_millis(1500),
    }));
    // Within the notice: NOT_SERVING, yet a request is answered.
    tokio::time::sleep(Duration::from_millis(100)).await;
    assert_eq!(
        health_status(&ch).await.unwrap(),
        ServingStatus::NotServing as i32
    );
    let mut client = PredictorClient::new(ch.clone());
    client
        .predict(request(1, 2))
        .await
        .expect("answered during the notice");
    // After the notice: refused, and the refusal says why.
    let report = drain.await.unwrap();
    assert_eq!(report.unanswered, 0);
    assert!(report.took >= Duration::from_millis(1500));
    // The server is gone: a new connection is refused.
    assert_nothing_listens(addr).await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn requests_after_the_notice_are_refused_with_unavailable() {
    let dir = tempfile::tempdir().unwrap();
    resnet_dir(dir.path());
    let server = server(dir.path(), |_| {}).await;
    let ch = channel(&server).await;
    // Keep one accepted request computing for a while so the transport stays up: a batch of
    // many samples on one compute thread.
    let mut slow = PredictorClient::new(ch.clone());
    let long = tokio::spawn(async move { slow.predict(request(64, 3)).await });
    while server.in_flight() == 0 {
        tokio::time::sleep(Duration::from_millis(2)).await;
    }
    let drain = tokio::spawn(server.drain(DrainSettings {
        grace: Duration::from_secs(60),
        notice: Duration::ZERO,
    }));
    tokio::time::sleep(Duration::from_millis(20)).await;
    let refused = PredictorClient::new(ch.clone())
        .predict(request(1, 4))
        .await
        .expect_err("a new request during the drain");
    assert_eq!(refused.code(), Code::Unavailable, "{refused:?}");
    assert!(
        refused.message().contains("shutting down") || refused.message().is_empty(),
        "{refused:?}"
    );
    let long = long
        .await
        .unwrap()
        .expect("the accepted request is answered");
    assert_eq!(long.into_inner().outcomes.len(), 64);
    assert_eq!(drain.await.unwrap().unanswered, 0);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn streams_that_never_end_do_not_hold_the_drain_past_its_grace() {
    let dir = tempfile::tempdir().unwrap();
    resnet_dir(dir.path());
    let server = server(dir.path(), |_| {}).await;
    let ch = channel(&server).await;
    // A health watch and an idle prediction stream: neither ends on its own.
    let mut watch = HealthClient::new(ch.clone())
        .watch(HealthCheckRequest {
            service: String::new(),
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(
        watch.message().await.unwrap().unwrap().status,
        ServingStatus::Serving as i32
    );
    let (_keep_open, rx) = tokio::sync::mpsc::channel::<api::PredictRequest>(1);
    let _stream = PredictorClient::new(ch.clone())
        .predict_stream(tokio_stream::wrappers::ReceiverStream::new(rx))
        .await
        .unwrap();
    let grace = Duration::from_secs(2);
    let report = tokio::time::timeout(
        Duration::from_secs(20),
        server.drain(DrainSettings {
            grace,
            notice: Duration::ZERO,
        }),
    )
    .await
    .expect("the drain ends");
    assert_eq!(report.unanswered, 0);
    assert!(
        report.took < grace + Duration::from_secs(5),
        "the drain took {:?} with a grace of {grace:?}",
        report.took
    );
    // The watcher heard NOT_SERVING (the connection itself may outlive the server task in
    // this process; a real process exits after the drain).
    let heard = tokio::time::timeout(Duration::from_secs(5), async {
        while let Ok(Some(m)) = watch.message().await {
            if m.status == ServingStatus::NotServing as i32 {
                return true;
            }
        }
        false
    })
    .await;
    assert_eq!(heard, Ok(true), "the health watch heard NOT_SERVING");
}

/// `convoy serve` on SIGTERM: requests in flight are answered, the process exits by itself
/// with status 0 and logs the drain.
#[test]
fn convoy_serve_drains_on_sigterm() {
    let server = ServeProcess::start(["--listen", "127.0.0.1:0"], "info");
    let addr = server.addr;
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    let server_ref = &server;
    let (ok, refused) = rt.block_on(async move {
        let ch = Channel::from_shared(format!("http://{addr}"))
            .unwrap()
            .connect()
            .await
            .unwrap();
        let sample = api::Sample {
            data: Some(Data::Tensor(api::Tensor {
                shape: vec![1, 64, 64],
                f32_le: vec![0; 64 * 64 * 4],
            })),
        };
        let mut calls = Vec::new();
        for _ in 0..8 {
            let mut client = PredictorClient::new(ch.clone());
            let sample = sample.clone();
            calls.push(tokio::spawn(async move {
                let (mut ok, mut refused) = (0, 0);
                loop {
                    let r = client
                        .predict(api::PredictRequest {
                            samples: vec![sample.clone(); 8],
                            ..Default::default()
                        })
                        .await;
                    match r {
                        Ok(_) => ok += 1,
                        Err(s) if not_taken(&s) => {
                            refused += 1;
                            return (ok, refused);
                        }
                        Err(s) => panic!("unexpected status {s:?}"),
                    }
                }
            }));
        }
        tokio::time::sleep(Duration::from_millis(300)).await;
        server_ref.signal_terminate();
        let (mut ok, mut refused) = (0, 0);
        for c in calls {
            let (o, r) = c.await.unwrap();
            ok += o;
            refused += r;
        }
        (ok, refused)
    });
    let (status, log) = server.wait();
    let log = log.join("\n");
    assert!(status.success(), "exit status {status:?}; log:\n{log}");
    assert!(ok > 0 && refused == 8, "ok {ok}, refused {refused}");
    assert!(log.contains("draining"), "{log}");
    assert!(log.contains("unanswered=0"), "{log}");
}
