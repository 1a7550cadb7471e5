//! The server over TLS and mutual TLS, with certificates made at test time (rcgen, no openssl
//! binary): predictions and the control service over TLS, plain-text and certificate-less
//! clients refused, settings that would expose the control token refused, bad PEM files named;
//! and the per-connection HTTP/2 stream limit.
//!
//! What a correct TLS server must do here is common practice of TLS deployments (RFC 8446: a
//! server that requests a client certificate and gets none aborts the handshake; a client
//! verifies the server's chain and name).

use std::path::{Path, PathBuf};
use std::time::Duration;

use convoy::service::api::control::{RescanRequest, control_client::ControlClient};
use convoy::service::api::{self, predictor_client::PredictorClient, sample::Data};
use convoy::service::{DEMO_BUNDLE, RunningServer, ServeConfig, StartError, start};
use rcgen::{
    BasicConstraints, CertificateParams, ExtendedKeyUsagePurpose, IsCa, Issuer, KeyPair,
    KeyUsagePurpose,
};
use tonic::Code;
use tonic::transport::{Certificate, Channel, ClientTlsConfig, Endpoint, Identity};

const TOKEN: &str = "a-test-token-of-32-characters-ok";

/// PEM files of a test PKI: a CA, a server certificate for `localhost` signed by it, a client
/// certificate signed by it, and a second CA that signed nothing the server trusts.
struct Pki {
    dir: tempfile::TempDir,
}

impl Pki {
    fn new() -> Pki {
        let dir = tempfile::tempdir().unwrap();
        let (ca_pem, issuer) = ca("convoy test CA");
        std::fs::write(dir.path().join("ca.pem"), ca_pem).unwrap();
        let leaf = |name: &str, usage: ExtendedKeyUsagePurpose| {
            let key = KeyPair::generate().unwrap();
            let mut params = CertificateParams::new(vec![name.to_string()]).unwrap();
            params.extended_key_usages = vec![usage];
            let cert = params.signed_by(&key, &issuer).unwrap();
            (cert.pem(), key.serialize_pem())
        };
        let (cert, key) = leaf("localhost", ExtendedKeyUsagePurpose::ServerAuth);
        std::fs::write(dir.path().join("server.pem"), cert).unwrap();
        std::fs::write(dir.path().join("server.key"), key).unwrap();
        let (cert, key) = leaf("line-7-camera", ExtendedKeyUsagePurpose::ClientAuth);
        std::fs::write(dir.path().join("client.pem"), cert).unwrap();
        std::fs::write(dir.path().join("client.key"), key).unwrap();
        // A client certificate from an authority the server does not trust.
        let (other_pem, other) = ca("someone else's CA");
        std::fs::write(dir.path().join("other-ca.pem"), other_pem).unwrap();
        let key = KeyPair::generate().unwrap();
        let mut params = CertificateParams::new(vec!["intruder".to_string()]).unwrap();
        params.extended_key_usages = vec![ExtendedKeyUsagePurpose::ClientAuth];
        let cert = params.signed_by(&key, &other).unwrap();
        std::fs::write(dir.path().join("intruder.pem"), cert.pem()).unwrap();
        std::fs::write(dir.path().join("intruder.key"), key.serialize_pem()).unwrap();
        Pki { dir }
    }

    fn path(&self, name: &str) -> PathBuf {
        self.dir.path().join(name)
    }

    fn read(&self, name: &str) -> Vec<u8> {
        std::fs::read(self.path(name)).unwrap()
    }

    /// Client TLS trusting our CA, checking the name `localhost`.
    fn client(&self) -> ClientTlsConfig {
        ClientTlsConfig::new()
            .ca_certificate(Certificate::from_pem(self.read("ca.pem")))
            .domain_name("localhost")
    }

    fn client_with(&self, who: &str) -> ClientTlsConfig {
        self.client().identity(Identity::from_pem(
            self.read(&format!("{who}.pem")),
            self.read(&format!("{who}.key")),
        ))
    }
}

fn ca(name: &str) -> (String, Issuer<'static, KeyPair>) {
    let key = KeyPair::generate().unwrap();
    let mut params = CertificateParams::new(Vec::<String>::new()).unwrap();
    params
        .distinguished_name
        .push(rcgen::DnType::CommonName, name);
    params.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
    params.key_usages = vec![KeyUsagePurpose::KeyCertSign, KeyUsagePurpose::CrlSign];
    let cert = params.self_signed(&key).unwrap();
    (cert.pem(), Issuer::new(params, key))
}

fn config(pki: &Pki, mutual: bool) -> ServeConfig {
    ServeConfig {
        listen: "127.0.0.1:0".parse().unwrap(),
        compute_threads: 1,
        tls_cert_file: Some(pki.path("server.pem")),
        tls_key_file: Some(pki.path("server.key")),
        tls_client_ca_file: mutual.then(|| pki.path("ca.pem")),
        ..ServeConfig::default()
    }
}

async fn channel(addr: std::net::SocketAddr, tls: ClientTlsConfig) -> Result<Channel, String> {
    Endpoint::from_shared(format!("https://{addr}"))
        .unwrap()
        .tls_config(tls)
        .map_err(|e| format!("{e:?}"))?
        .connect_timeout(Duration::from_secs(10))
        .connect()
        .await
        .map_err(|e| format!("{e:?}"))
}

/// A prediction of the demo model (a zero image as a tensor).
async fn predict(channel: Channel) -> Result<String, tonic::Status> {
    let reply = PredictorClient::new(channel)
        .predict(api::PredictRequest {
            samples: vec![api::Sample {
                data: Some(Data::Tensor(api::Tensor {
                    shape: vec![1, 64, 64],
                    f32_le: vec![0; 64 * 64 * 4],
                })),
            }],
            ..Default::default()
        })
        .await?
        .into_inner();
    Ok(reply.model)
}

/// Connecting and calling, as one result: with TLS 1.3 a refused client certificate may
/// surface at the handshake or at the first call.
async fn try_predict(addr: std::net::SocketAddr, tls: ClientTlsConfig) -> Result<String, String> {
    let ch = channel(addr, tls).await?;
    predict(ch).await.map_err(|s| format!("{s:?}"))
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn predictions_over_tls_and_plain_text_refused() {
    let pki = Pki::new();
    let server = start(&config(&pki, false)).await.unwrap();
    let addr = server.local_addr;
    assert_eq!(
        try_predict(addr, pki.client()).await.unwrap(),
        "stamped-parts"
    );
    // A plain-text client gets no answer from a TLS port.
    let plain = async {
        let ch = Endpoint::from_shared(format!("http://{addr}"))
            .unwrap()
            .connect_timeout(Duration::from_secs(10))
            .connect()
            .await
            .map_err(|e| e.to_string())?;
        predict(ch).await.map_err(|s| s.to_string())
    };
    assert!(
        tokio::time::timeout(Duration::from_secs(30), plain)
            .await
            .map_or(true, |r| r.is_err())
    );
    // A client that trusts another authority refuses the server's certificate.
    let wrong_ca = ClientTlsConfig::new()
        .ca_certificate(Certificate::from_pem(pki.read("other-ca.pem")))
        .domain_name("localhost");
    assert!(try_predict(addr, wrong_ca).await.is_err());
    // A name the certificate does not carry.
    let wrong_name = pki.client().domain_name("elsewhere.example");
    assert!(try_predict(addr, wrong_name).await.is_err());
    server.shutdown().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn mutual_tls_requires_a_certificate_from_the_client_ca() {
    let pki = Pki::new();
    let server = start(&config(&pki, true)).await.unwrap();
    let addr = server.local_addr;
    assert!(
        try_predict(addr, pki.client()).await.is_err(),
        "no client certificate"
    );
    assert!(
        try_predict(addr, pki.client_with("intruder"))
            .await
            .is_err(),
        "a certificate from another authority"
    );
    assert_eq!(
        try_predict(addr, pki.client_with("client")).await.unwrap(),
        "stamped-parts"
    );
    server.shutdown().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_control_service_over_tls_with_its_token() {
    let pki = Pki::new();
    let models = tempfile::tempdir().unwrap();
    std::fs::write(models.path().join("demo.cvb"), DEMO_BUNDLE).unwrap();
    let server = start(&ServeConfig {
        models: Some(models.path().to_path_buf()),
        control: true,
        control_listen: "127.0.0.1:0".parse().unwrap(),
        control_token: Some(TOKEN.into()),
        ..config(&pki, true)
    })
    .await
    .unwrap();
    let control_addr = server.control_addr.unwrap();
    let call = |token: &'static str, tls: ClientTlsConfig| async move {
        let ch = channel(control_addr, tls)
            .await
            .map_err(tonic::Status::unavailable)?;
        let bearer: tonic::metadata::MetadataValue<_> = format!("Bearer {token}").parse().unwrap();
        let mut client = ControlClient::with_interceptor(ch, move |mut r: tonic::Request<()>| {
            r.metadata_mut().insert("authorization", bearer.clone());
            Ok(r)
        });
        client.rescan(RescanRequest {}).await.map(|_| ())
    };
    call(TOKEN, pki.client_with("client")).await.unwrap();
    let wrong = call("not-the-token-at-all-but-long", pki.client_with("client"))
        .await
        .unwrap_err();
    assert_eq!(wrong.code(), Code::Unauthenticated);
    // The control port demands the client certificate too, token or not.
    let no_cert = call(TOKEN, pki.client()).await.unwrap_err();
    assert_ne!(no_cert.code(), Code::Ok);
    server.shutdown().await.unwrap();
}

fn start_error(config: ServeConfig) -> StartError {
    tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap()
        .block_on(start(&config))
        .err()
        .expect("the server must refuse to start")
}

#[test]
fn a_control_token_never_crosses_the_network_in_clear() {
    let beyond_loopback = ServeConfig {
        listen: "127.0.0.1:0".parse().unwrap(),
        compute_threads: 1,
        control: true,
        control_listen: "0.0.0.0:0".parse().unwrap(),
        control_token: Some(TOKEN.into()),
        ..ServeConfig::default()
    };
    let e = start_error(beyond_loopback.clone());
    assert!(matches!(e, StartError::ControlInClear { .. }), "{e}");
    assert!(e.to_string().contains("in clear"), "{e}");
    // With TLS the same address is allowed.
    let pki = Pki::new();
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    rt.block_on(async {
        let server = start(&ServeConfig {
            tls_cert_file: Some(pki.path("server.pem")),
            tls_key_file: Some(pki.path("server.key")),
            ..beyond_loopback
        })
        .await
        .unwrap();
        server.shutdown().await.unwrap();
    });
}

#[test]
fn bad_tls_files_are_named() {
    let pki = Pki::new();
    let junk = pki.path("junk.pem");
    std::fs::write(&junk, "this is not PEM\n").unwrap();
    let missing = pki.path("missing.pem");
    type SetFile = fn(&mut ServeConfig, &Path);
    let cases: [(SetFile, &str); 3] = [
        (|c, p| c.tls_cert_file = Some(p.into()), "certificate"),
        (|c, p| c.tls_key_file = Some(p.into()), "private key"),
        (|c, p| c.tls_client_ca_file = Some(p.into()), "certificate"),
    ];
    for (set, what) in cases {
        for path in [&junk, &missing] {
            let mut c = config(&pki, false);
            set(&mut c, path);
            let e = start_error(c);
            assert!(matches!(e, StartError::TlsFile { .. }), "{e}");
            let text = e.to_string();
            assert!(text.contains(&path.display().to_string()), "{text}");
            if path == &junk {
                assert!(text.contains(what), "{text}");
            }
        }
    }
    // A key that belongs to another certificate.
    let mut c = config(&pki, false);
    c.tls_key_file = Some(pki.path("client.key"));
    let e = start_error(c);
    assert!(matches!(e, StartError::TlsSetup { .. }), "{e}");
    // Half a TLS configuration.
    let mut c = config(&pki, false);
    c.tls_key_file = None;
    assert!(c.validate().is_err());
}

/// SETTINGS_MAX_CONCURRENT_STREAMS (RFC 9113 §6.5.2): with a limit of 2, two open streams
/// make a third call on the same connection wait until one of them ends.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn max_streams_per_connection_holds_further_calls() {
    let server: RunningServer = start(&ServeConfig {
        listen: "127.0.0.1:0".parse().unwrap(),
        compute_threads: 1,
        max_streams_per_connection: 2,
        ..ServeConfig::default()
    })
    .await
    .unwrap();
    let ch = Endpoint::from_shared(format!("http://{}", server.local_addr))
        .unwrap()
        .connect()
        .await
        .unwrap();
    let mut open = Vec::new();
    for _ in 0..2 {
        let (tx, rx) = tokio::sync::mpsc::channel::<api::PredictRequest>(1);
        let replies = PredictorClient::new(ch.clone())
            .predict_stream(tokio_stream::wrappers::ReceiverStream::new(rx))
            .await
            .unwrap()
            .into_inner();
        open.push((tx, replies));
    }
    let mut third = tokio::spawn({
        let ch = ch.clone();
        async move {
            PredictorClient::new(ch)
                .catalog(api::CatalogRequest {})
                .await
                .map(|_| ())
        }
    });
    // Not a timing measurement: the call must still be waiting, however long we look.
    assert!(
        tokio::time::timeout(Duration::from_millis(500), &mut third)
            .await
            .is_err(),
        "a third stream opened beyond the limit"
    );
    drop(open.pop());
    tokio::time::timeout(Duration::from_secs(30), third)
        .await
        .expect("the call goes through once a stream ends")
        .unwrap()
        .unwrap();
    drop(open);
    server.shutdown().await.unwrap();
}

/// Every limit a request can exceed answers RESOURCE_EXHAUSTED naming the setting and its value.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn limits_name_their_setting() {
    let server = start(&ServeConfig {
        listen: "127.0.0.1:0".parse().unwrap(),
        compute_threads: 1,
        max_message_bytes: 64 << 10,
        max_samples_per_request: 2,
        max_image_bytes: 4000,
        max_image_pixels: 1000,
        ..ServeConfig::default()
    })
    .await
    .unwrap();
    let client = PredictorClient::connect(format!("http://{}", server.local_addr))
        .await
        .unwrap();
    let zero = || api::Sample {
        data: Some(Data::Tensor(api::Tensor {
            shape: vec![1, 64, 64],
            f32_le: vec![0; 64 * 64 * 4],
        })),
    };
    let image = |bytes: Vec<u8>| api::Sample {
        data: Some(Data::EncodedImage(bytes)),
    };
    // A 64x64 gray PNG (4096 pixels), small when encoded.
    let png = {
        let img = image::GrayImage::new(64, 64);
        let mut out = std::io::Cursor::new(Vec::new());
        img.write_to(&mut out, image::ImageFormat::Png).unwrap();
        out.into_inner()
    };
    assert!(png.len() < 4000);
    let cases = [
        (vec![zero(); 3], "max_samples_per_request", "2"),
        (vec![zero(); 5], "max_message_bytes", "65536"),
        (vec![image(vec![0; 5000])], "max_image_bytes", "4000"),
        (vec![image(png)], "max_image_pixels", "1000"),
    ];
    for (samples, setting, value) in cases {
        let st = client
            .clone()
            .predict(api::PredictRequest {
                samples,
                ..Default::default()
            })
            .await
            .unwrap_err();
        assert_eq!(st.code(), Code::ResourceExhausted, "{st:?}");
        assert!(
            st.message().contains(setting) && st.message().contains(value),
            "{setting}: {st:?}"
        );
    }
    server.shutdown().await.unwrap();
}

/// The client commands with the shared TLS flags, against a server that requires client
/// certificates.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn client_commands_speak_tls() {
    let pki = Pki::new();
    let server = start(&config(&pki, true)).await.unwrap();
    let addr = server.local_addr.to_string();
    let image =
        Path::new(env!("CARGO_MANIFEST_DIR")).join("models/stamped-parts/samples/sound-1.png");
    let run = |args: Vec<String>| {
        tokio::task::spawn_blocking(move || {
            std::process::Command::new(env!("CARGO_BIN_EXE_convoy"))
                .args(args)
                .output()
                .unwrap()
        })
    };
    let s = |p: PathBuf| p.display().to_string();
    let tls = vec![
        "--tls-ca".to_string(),
        s(pki.path("ca.pem")),
        "--tls-cert".into(),
        s(pki.path("client.pem")),
        "--tls-key".into(),
        s(pki.path("client.key")),
        "--tls-domain".into(),
        "localhost".into(),
    ];
    let mut args = vec!["predict".to_string(), "--server".into(), addr.clone()];
    args.extend(tls.clone());
    args.push(s(image.clone()));
    let out = run(args).await.unwrap();
    assert!(out.status.success(), "{out:?}");
    assert!(String::from_utf8_lossy(&out.stdout).contains("stamped-parts"));
    // The flags also work after a subcommand, and with an https:// address.
    let mut args = vec![
        "versions".to_string(),
        "list".into(),
        "--server".into(),
        format!("https://{addr}"),
    ];
    args.extend(tls.clone());
    let out = run(args).await.unwrap();
    assert!(out.status.success(), "{out:?}");
    // The load generator too: every request of a short run answered over mutual TLS.
    let mut args = vec![
        "bench".to_string(),
        "--server".into(),
        addr.clone(),
        "--duration".into(),
        "0.5".into(),
        "--concurrency".into(),
        "2".into(),
        "--json".into(),
    ];
    args.extend(tls.clone());
    let out = run(args).await.unwrap();
    assert!(out.status.success(), "{out:?}");
    let report: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert!(report["ok"].as_u64().unwrap() > 0, "{report}");
    assert_eq!(report["ok"], report["requests"], "{report}");
    // Without the client certificate the server refuses; the reason reaches the user.
    let args = vec![
        "predict".to_string(),
        "--server".into(),
        addr.clone(),
        "--tls-ca".into(),
        s(pki.path("ca.pem")),
        "--tls-domain".into(),
        "localhost".into(),
        s(image.clone()),
    ];
    let out = run(args).await.unwrap();
    assert!(!out.status.success());
    // TLS flags with a plain-text address are a usage error.
    let args = vec![
        "predict".to_string(),
        "--server".into(),
        format!("http://{addr}"),
        "--tls-ca".into(),
        s(pki.path("ca.pem")),
        s(image),
    ];
    let out = run(args).await.unwrap();
    assert!(!out.status.success());
    assert!(
        String::from_utf8_lossy(&out.stderr).contains("plain text"),
        "{out:?}"
    );
    server.shutdown().await.unwrap();
}
