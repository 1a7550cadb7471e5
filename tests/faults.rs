//! A batch that panics on its compute thread (forced through the debug-build switch
//! `CONVOY_TEST_PANIC_ON_INPUT`) fails only its own requests, with INTERNAL (gRPC status code
//! specification, doc/statuscodes.md: "some invariants expected by the underlying system have
//! been broken"), is counted as `outcome="panicked"` in `convoy_batches_total`, and the same
//! compute thread goes on answering.

use convoy::service::api::{self, predictor_client::PredictorClient, sample::Data};
use convoy::service::{ServeConfig, start};
use tonic::Code;

/// The input value that makes a batch panic; the demo model's inputs never hold it.
const TRIGGER: f32 = 4242.5;

fn request(value: f32) -> api::PredictRequest {
    api::PredictRequest {
        samples: vec![api::Sample {
            data: Some(Data::Tensor(api::Tensor {
                shape: vec![1, 64, 64],
                f32_le: std::iter::repeat_n(value.to_le_bytes(), 64 * 64)
                    .flatten()
                    .collect(),
            })),
        }],
        ..Default::default()
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_panicking_batch_fails_with_internal_and_the_thread_carries_on() {
    // SAFETY: set before the server (and any other thread of this test binary, which holds
    // only this test) reads the environment.
    unsafe { std::env::set_var("CONVOY_TEST_PANIC_ON_INPUT", TRIGGER.to_string()) };
    let server = start(&ServeConfig {
        listen: "127.0.0.1:0".parse().unwrap(),
        metrics_listen: Some("127.0.0.1:0".parse().unwrap()),
        // One compute thread: the request after the panic runs on the same thread.
        compute_threads: 1,
        ..ServeConfig::default()
    })
    .await
    .unwrap();
    let mut client = PredictorClient::connect(format!("http://{}", server.local_addr))
        .await
        .unwrap();
    let before = client.predict(request(0.25)).await.unwrap().into_inner();

    let err = client.predict(request(TRIGGER)).await.unwrap_err();
    assert_eq!(err.code(), Code::Internal, "{err:?}");
    assert!(err.message().contains("panicked"), "{err:?}");

    for _ in 0..3 {
        let after = client.predict(request(0.25)).await.unwrap().into_inner();
        assert_eq!(
            after.outcomes, before.outcomes,
            "same answer after the panic"
        );
    }

    let metrics_addr = server.telemetry.metrics_addr.expect("metrics served");
    let text = tokio::task::spawn_blocking(move || {
        use std::io::{Read, Write};
        let mut s = std::net::TcpStream::connect(metrics_addr).unwrap();
        s.write_all(b"GET /metrics HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n")
            .unwrap();
        let mut out = String::new();
        s.read_to_string(&mut out).unwrap();
        out
    })
    .await
    .unwrap();
    let panicked = text
        .lines()
        .find(|l| l.starts_with("convoy_batches_total{") && l.contains("outcome=\"panicked\""))
        .unwrap_or_else(|| panic!("no panicked series in\n{text}"));
    assert!(panicked.ends_with(" 1"), "{panicked}");
    server.shutdown().await.unwrap();
}
