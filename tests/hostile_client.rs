//! One live server (the real `convoy serve` binary with the built-in demo model, a child
//! process) against many hostile clients, while a well-behaved client keeps predicting the
//! demo sample on another task and must always get the same answer as before the attack.
//!
//! Every hostile call must end in a proper gRPC status with the code the case expects, the
//! process must still be alive afterwards, and its resident memory must not have grown by more
//! than a stated margin. Status codes are checked against the gRPC status code specification
//! (`doc/statuscodes.md` of grpc/grpc: the code definitions, and its table of codes the
//! library itself produces), cited beside each case; facts without a source there are marked
//! "common practice".

#[path = "support/serve_process.rs"]
mod serve_process;

use serve_process::ServeProcess;
use std::net::SocketAddr;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::time::Duration;

use convoy::service::api::{self, predictor_client::PredictorClient, sample::Data};
use prost::Message;
use tonic::Code;
use tonic::codec::{Codec, DecodeBuf, Decoder, EncodeBuf, Encoder};
use tonic::transport::Channel;

/// `max_message_bytes` of the server under test. 1 MiB rather than the default 32 MiB: the
/// oversize case then costs 2 MiB per call, and twenty of them (40 MiB in all) would show in
/// the memory check if the server kept what it refused.
const MAX_MESSAGE_BYTES: usize = 1 << 20;
/// `queue_limit`: large enough that the bursts below never shed the well-behaved client's
/// requests (load shedding is correct behaviour, but it is not what this test is about).
const QUEUE_LIMIT: usize = 4096;
/// How much resident memory may grow from after warm-up to after the attack and a settle.
/// glibc's malloc keeps freed memory in its arenas (one per thread that allocated, up to
/// 8 × cores) instead of returning it to the system, and the attack touches every tokio worker
/// and the blocking pool's image threads, each of which may keep a few MiB: a growth of that
/// order is the allocator, not a leak (common practice). The attack sends over 60 MiB of
/// request bodies in all (oversize messages, images, tensors); keeping even half of it would
/// exceed this margin.
const RSS_MARGIN_KIB: u64 = 32 * 1024;

/// Request and reply bodies as raw bytes, so a client can send what no protobuf encoder
/// would produce.
#[derive(Clone, Copy, Default)]
struct RawCodec;

impl Codec for RawCodec {
    type Encode = Vec<u8>;
    type Decode = Vec<u8>;
    type Encoder = RawCodec;
    type Decoder = RawCodec;
    fn encoder(&mut self) -> RawCodec {
        RawCodec
    }
    fn decoder(&mut self) -> RawCodec {
        RawCodec
    }
}

impl Encoder for RawCodec {
    type Item = Vec<u8>;
    type Error = tonic::Status;
    fn encode(&mut self, item: Vec<u8>, dst: &mut EncodeBuf<'_>) -> Result<(), tonic::Status> {
        use prost::bytes::BufMut;
        dst.put_slice(&item);
        Ok(())
    }
}

impl Decoder for RawCodec {
    type Item = Vec<u8>;
    type Error = tonic::Status;
    fn decode(&mut self, src: &mut DecodeBuf<'_>) -> Result<Option<Vec<u8>>, tonic::Status> {
        use prost::bytes::Buf;
        Ok(Some(src.copy_to_bytes(src.remaining()).to_vec()))
    }
}

/// A `Predict` call whose body is `body`, exactly.
async fn raw_predict(channel: &Channel, body: Vec<u8>) -> Result<Vec<u8>, tonic::Status> {
    let mut grpc = tonic::client::Grpc::new(channel.clone());
    grpc.ready()
        .await
        .map_err(|e| tonic::Status::unavailable(e.to_string()))?;
    let path = http::uri::PathAndQuery::from_static("/convoy.v1.Predictor/Predict");
    grpc.unary(tonic::Request::new(body), path, RawCodec)
        .await
        .map(tonic::Response::into_inner)
}

fn tensor(shape: &[u32], values: &[f32]) -> api::Sample {
    api::Sample {
        data: Some(Data::Tensor(api::Tensor {
            shape: shape.to_vec(),
            f32_le: values.iter().flat_map(|v| v.to_le_bytes()).collect(),
        })),
    }
}

fn image(bytes: &[u8]) -> api::Sample {
    api::Sample {
        data: Some(Data::EncodedImage(bytes.to_vec())),
    }
}

fn request(samples: Vec<api::Sample>) -> api::PredictRequest {
    api::PredictRequest {
        samples,
        ..Default::default()
    }
}

/// CRC-32 of PNG chunks (PNG specification, Annex D: polynomial 0xEDB88320, reflected,
/// initial and final value 0xFFFFFFFF).
fn crc32(bytes: &[u8]) -> u32 {
    let mut crc = 0xFFFF_FFFFu32;
    for &b in bytes {
        crc ^= u32::from(b);
        for _ in 0..8 {
            crc = if crc & 1 == 1 {
                (crc >> 1) ^ 0xEDB8_8320
            } else {
                crc >> 1
            };
        }
    }
    !crc
}

fn png_chunk(kind: &[u8; 4], data: &[u8]) -> Vec<u8> {
    let mut out = (data.len() as u32).to_be_bytes().to_vec();
    let mut body = kind.to_vec();
    body.extend_from_slice(data);
    out.extend_from_slice(&body);
    out.extend_from_slice(&crc32(&body).to_be_bytes());
    out
}

/// A PNG whose header claims `width` × `height` gray pixels but which holds almost no data:
/// signature, a valid IHDR (PNG specification §11.2.2, CRC correct), a tiny IDAT, IEND.
fn png_bomb(width: u32, height: u32) -> Vec<u8> {
    let mut png = b"\x89PNG\r\n\x1a\n".to_vec();
    let mut ihdr = width.to_be_bytes().to_vec();
    ihdr.extend_from_slice(&height.to_be_bytes());
    // Bit depth 8, colour type 0 (gray), deflate, adaptive filtering, no interlace.
    ihdr.extend_from_slice(&[8, 0, 0, 0, 0]);
    png.extend(png_chunk(b"IHDR", &ihdr));
    // A zlib stream of one empty stored block: valid, and far too short for the image.
    png.extend(png_chunk(
        b"IDAT",
        &[0x78, 0x01, 0x01, 0x00, 0x00, 0xFF, 0xFF],
    ));
    png.extend(png_chunk(b"IEND", &[]));
    png
}

/// The well-behaved call: the demo sample as a PNG, top class and its probability.
async fn good_call(
    client: &mut PredictorClient<Channel>,
    sample: &[u8],
) -> Result<(u32, u32), tonic::Status> {
    let reply = client
        .predict(request(vec![image(sample)]))
        .await?
        .into_inner();
    let top = &reply.outcomes[0].top[0];
    Ok((top.class_index, top.probability.to_bits()))
}

/// How the cancelled and deadline calls ended, for the record.
#[derive(Default)]
struct Tally {
    dropped: usize,
    finished_first: usize,
    on_closed_connection: usize,
    deadline_exceeded: usize,
    client_gave_up: usize,
    deadline_on_closed_connection: usize,
    in_time: usize,
}

async fn connect(addr: SocketAddr) -> Channel {
    Channel::from_shared(format!("http://{addr}"))
        .unwrap()
        .connect()
        .await
        .unwrap()
}

/// An error of the client's own transport (the connection went away), as opposed to a status
/// the server sent.
/// A failure of the client's own HTTP/2 transport (a reset or refused stream, a closed
/// connection), not a status the server's handler chose.
fn is_transport(s: &tonic::Status) -> bool {
    // The code then depends on how the transport failed (UNKNOWN, UNAVAILABLE for a refused
    // stream, RESOURCE_EXHAUSTED for the server's ENHANCE_YOUR_CALM, CANCELLED for a closed
    // connection); what matters is that it came from the transport.
    std::error::Error::source(s)
        .is_some_and(|e| e.downcast_ref::<tonic::transport::Error>().is_some())
}

fn expect_code<T: std::fmt::Debug>(case: &str, r: Result<T, tonic::Status>, want: Code) {
    match r {
        Ok(v) => panic!("{case}: expected {want:?}, got a reply {v:?}"),
        Err(s) => assert_eq!(s.code(), want, "{case}: {}", s.message()),
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn hostile_clients_get_proper_statuses_and_do_no_harm() {
    let dir = tempfile::tempdir().unwrap();
    let config = dir.path().join("serve.toml");
    std::fs::write(
        &config,
        format!(
            "max_message_bytes = {MAX_MESSAGE_BYTES}\nqueue_limit = {QUEUE_LIMIT}\n\
             compute_threads = 1\nwatch_models = false\nrescan_interval_ms = 0\n"
        ),
    )
    .unwrap();
    let mut server = ServeProcess::start(
        [
            std::ffi::OsStr::new("--listen"),
            "127.0.0.1:0".as_ref(),
            "--config".as_ref(),
            config.as_os_str(),
        ],
        "warn",
    );
    let url = format!("http://{}", server.addr);
    let channel = Channel::from_shared(url).unwrap().connect().await.unwrap();
    let mut client = PredictorClient::new(channel.clone());

    let root = env!("CARGO_MANIFEST_DIR");
    let sound = std::fs::read(format!("{root}/models/stamped-parts/samples/sound-1.png")).unwrap();
    let jpeg = std::fs::read(format!("{root}/tests/data/prepare/rgb8.jpg")).unwrap();

    // The answer before the attack; a sample's output does not depend on its batch (README,
    // "Batch invariance"), so every later answer must be bitwise the same.
    let before = good_call(&mut client, &sound).await.unwrap();
    assert_eq!(
        before.0, 0,
        "the demo's sound-1.png is class 0, `sound` (README)"
    );
    for _ in 0..50 {
        assert_eq!(good_call(&mut client, &sound).await.unwrap(), before);
    }
    tokio::time::sleep(Duration::from_millis(500)).await;
    let rss_baseline = server.rss_kib();

    // The well-behaved client, on its own task and its own connection.
    let stop = Arc::new(AtomicBool::new(false));
    let good_calls = Arc::new(AtomicUsize::new(0));
    let good = {
        let (stop, count, sound) = (Arc::clone(&stop), Arc::clone(&good_calls), sound.clone());
        let mut client = PredictorClient::connect(format!("http://{}", server.addr))
            .await
            .unwrap();
        tokio::spawn(async move {
            while !stop.load(Ordering::Relaxed) {
                let got = good_call(&mut client, &sound).await;
                assert_eq!(
                    got.as_ref().ok(),
                    Some(&before),
                    "well-behaved call: {got:?}"
                );
                count.fetch_add(1, Ordering::Relaxed);
            }
        })
    };

    let mut tally = Tally::default();
    let demo_len = 64 * 64;
    for round in 0..3 {
        // Malformed protobuf. statuscodes.md, "codes generated by the library": error parsing
        // the request proto → INTERNAL (server).
        for (case, body) in [
            ("an unterminated varint", vec![0xFF; 11]),
            ("a field of wire type 7", vec![0x0F]),
            ("a length beyond the body", vec![0x1A, 0x64, 0x0A, 0x01]),
            ("field number 0", vec![0x02, 0x00]),
            // `model` (field 1) holding bytes that are not UTF-8: proto3 `string` fields must
            // be valid UTF-8 (protobuf language guide, scalar value types).
            ("a string that is not UTF-8", vec![0x0A, 0x02, 0xC3, 0x28]),
            ("a tag not UTF-8", vec![0x32, 0x03, 0xFF, 0xFE, 0xFD]),
        ] {
            expect_code(
                &format!("round {round}: {case}"),
                raw_predict(&channel, body).await,
                Code::Internal,
            );
        }
        // A well-formed raw body still works through the same path.
        let ok = raw_predict(&channel, request(vec![image(&sound)]).encode_to_vec())
            .await
            .unwrap();
        let reply = api::PredictReply::decode(ok.as_slice()).unwrap();
        assert_eq!(reply.outcomes[0].top[0].class_index, before.0);

        // Bad samples. statuscodes.md: INVALID_ARGUMENT "indicates arguments that are
        // problematic regardless of the state of the system".
        let mut nan = vec![0.0f32; demo_len];
        nan[17] = f32::NAN;
        let mut inf = vec![0.0f32; demo_len];
        inf[demo_len - 1] = f32::INFINITY;
        let mut neg_inf = vec![0.0f32; demo_len];
        neg_inf[0] = f32::NEG_INFINITY;
        let half = &sound[..sound.len() / 2];
        let cut_jpeg = &jpeg[..jpeg.len() - 20];
        let invalid: Vec<(&str, api::PredictRequest)> = vec![
            ("no samples", request(vec![])),
            ("an empty sample", request(vec![api::Sample { data: None }])),
            (
                "shape [64, 64]",
                request(vec![tensor(&[64, 64], &nan[..4096])]),
            ),
            (
                "shape [1, 64, 63]",
                request(vec![tensor(&[1, 64, 63], &[0.0; 64 * 63])]),
            ),
            (
                "shape [u32::MAX, 1, 1]",
                request(vec![tensor(&[u32::MAX, 1, 1], &[0.0])]),
            ),
            (
                "bytes short",
                request(vec![tensor(&[1, 64, 64], &[0.0; 10])]),
            ),
            ("NaN", request(vec![tensor(&[1, 64, 64], &nan)])),
            ("+infinity", request(vec![tensor(&[1, 64, 64], &inf)])),
            ("-infinity", request(vec![tensor(&[1, 64, 64], &neg_inf)])),
            ("a truncated PNG", request(vec![image(half)])),
            ("a truncated JPEG", request(vec![image(cut_jpeg)])),
            ("not an image", request(vec![image(b"GIF89a\x00\x00")])),
            ("an empty image", request(vec![image(&[])])),
            (
                "a good sample then NaN",
                request(vec![image(&sound), tensor(&[1, 64, 64], &nan)]),
            ),
        ];
        for (case, req) in invalid {
            expect_code(
                &format!("round {round}: {case}"),
                client.predict(req).await,
                Code::InvalidArgument,
            );
        }

        // Limits. statuscodes.md: RESOURCE_EXHAUSTED "some resource has been exhausted"; its
        // table: a message larger than the configured limit → RESOURCE_EXHAUSTED.
        let too_many = (0..65).map(|_| image(&sound)).collect();
        let exhausted: Vec<(&str, api::PredictRequest)> = vec![
            ("65 samples over a limit of 64", request(too_many)),
            (
                "a PNG claiming 100000 × 100000 pixels",
                request(vec![image(&png_bomb(100_000, 100_000))]),
            ),
            (
                "a PNG claiming 65536 × 65536 pixels",
                request(vec![image(&png_bomb(65_536, 65_536))]),
            ),
        ];
        for (case, req) in exhausted {
            expect_code(
                &format!("round {round}: {case}"),
                client.predict(req).await,
                Code::ResourceExhausted,
            );
        }
        for i in 0..7 {
            let body = request(vec![image(&vec![0x89; 2 * MAX_MESSAGE_BYTES + i])]);
            expect_code(
                &format!("round {round}: a message over max_message_bytes"),
                client.predict(body).await,
                Code::ResourceExhausted,
            );
        }

        // Unknown model: statuscodes.md, NOT_FOUND "some requested entity was not found".
        let mut unknown = request(vec![image(&sound)]);
        unknown.model = "no-such-model".into();
        expect_code(
            &format!("round {round}: unknown model"),
            client.predict(unknown).await,
            Code::NotFound,
        );

        // A burst of 300 calls dropped by their caller at once (futures aborted), on a
        // connection of its own: each drop resets its HTTP/2 stream, and a server may close a
        // connection that resets many streams before it accepted them (the "rapid reset"
        // defence against CVE-2023-44487; hyper's h2 allows 20 such pending resets). The
        // calls that finished before the abort must carry the right answer; those that met
        // the closed connection fail in the client's transport.
        let burst_channel = connect(server.addr).await;
        let mut burst = Vec::new();
        for _ in 0..300 {
            let mut c = PredictorClient::new(burst_channel.clone());
            let s = sound.clone();
            burst.push(tokio::spawn(async move { good_call(&mut c, &s).await }));
        }
        tokio::time::sleep(Duration::from_millis(2)).await;
        for task in &burst {
            task.abort();
        }
        for task in burst {
            match task.await {
                Err(aborted) => {
                    assert!(aborted.is_cancelled());
                    tally.dropped += 1;
                }
                Ok(Ok(answer)) => {
                    assert_eq!(answer, before);
                    tally.finished_first += 1;
                }
                Ok(Err(s)) => {
                    assert!(is_transport(&s), "a dropped call: {s:?}");
                    tally.on_closed_connection += 1;
                }
            }
        }

        // 300 calls with a deadline too short to meet (grpc-timeout of 1 ms). statuscodes.md
        // table: "deadline expires before server returns status" → DEADLINE_EXCEEDED, which the
        // server answers (the scheduler for a deadline passed in the queue; convoy rewrites
        // tonic's server-side CANCELLED "Timeout expired" to it). But the tonic client also
        // enforces the deadline itself and usually gives up first, reporting a local CANCELLED
        // "Timeout expired" (its source is tonic's TimeoutExpired): on 2026-12-02 every call
        // ended that way. Both are accepted; a call computed in time must carry the right
        // answer.
        let short_channel = connect(server.addr).await;
        let mut short = Vec::new();
        for _ in 0..300 {
            let mut c = PredictorClient::new(short_channel.clone());
            let s = sound.clone();
            short.push(tokio::spawn(async move {
                let mut req = tonic::Request::new(request(vec![image(&s)]));
                req.set_timeout(Duration::from_millis(1));
                c.predict(req).await.map(|r| {
                    let top = &r.into_inner().outcomes[0].top[0];
                    (top.class_index, top.probability.to_bits())
                })
            }));
        }
        for task in short {
            match task.await.unwrap() {
                Ok(answer) => {
                    assert_eq!(answer, before);
                    tally.in_time += 1;
                }
                Err(s) if s.code() == Code::DeadlineExceeded => tally.deadline_exceeded += 1,
                Err(s) if s.code() == Code::Cancelled && s.message() == "Timeout expired" => {
                    tally.client_gave_up += 1
                }
                // Each client-side expiry resets its stream: the same rapid-reset defence as
                // in the burst above may refuse or close the connection.
                Err(s) if is_transport(&s) => tally.deadline_on_closed_connection += 1,
                Err(s) => panic!("a 1 ms deadline: {s:?}"),
            }
        }
    }

    stop.store(true, Ordering::Relaxed);
    good.await
        .expect("the well-behaved client never saw a wrong answer");
    let served = good_calls.load(Ordering::Relaxed);
    assert!(
        served > 0,
        "the well-behaved client got answers during the attack"
    );

    tokio::time::sleep(Duration::from_secs(2)).await;
    assert!(server.alive(), "the server survived");
    assert_eq!(good_call(&mut client, &sound).await.unwrap(), before);
    let rss_after = server.rss_kib();
    println!(
        "hostile_client: VmRSS after warm-up {rss_baseline} KiB, after the attack and a 2 s \
         settle {rss_after} KiB (margin {RSS_MARGIN_KIB} KiB); {served} well-behaved calls \
         answered correctly during the attack"
    );
    println!(
        "hostile_client: dropped calls: {} aborted, {} answered first, {} on a connection the \
         server closed; 1 ms deadlines: {} DEADLINE_EXCEEDED from the server, {} given up by the client's own \
         timer, {} refused or closed by the server's reset defence, {} answered in time",
        tally.dropped,
        tally.finished_first,
        tally.on_closed_connection,
        tally.deadline_exceeded,
        tally.client_gave_up,
        tally.deadline_on_closed_connection,
        tally.in_time
    );
    assert!(
        rss_after < rss_baseline + RSS_MARGIN_KIB,
        "resident memory grew from {rss_baseline} KiB to {rss_after} KiB"
    );
}
