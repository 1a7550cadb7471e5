//! The transport's security settings, read once at start: TLS (and mutual TLS) of both gRPC
//! ports, the per-connection stream limit, the rule that keeps the control token off the
//! network in clear, and the keys bundles must be signed by.
//!
//! Every file is read and parsed here, before anything binds, so a bad path or PEM stops the
//! server with an error naming that file instead of failing the first handshake.

use std::net::SocketAddr;
use std::path::Path;

use rustls_pki_types::pem::PemObject;
use rustls_pki_types::{CertificateDer, PrivateKeyDer};
use tonic::transport::{Certificate, Identity, Server, ServerTlsConfig};

use super::error::error_chain;
use super::{ServeConfig, StartError};
use crate::bundle::signature::PublicKey;

/// The transport builder both servers start from: TLS when configured, and the HTTP/2
/// stream limit.
///
/// # Errors
/// An unreadable or invalid certificate, key or CA file; a key that does not fit the
/// certificate.
pub(super) fn server_builder(config: &ServeConfig) -> Result<Server, StartError> {
    let builder = Server::builder().max_concurrent_streams(Some(config.max_streams_per_connection));
    match server_tls(config)? {
        None => Ok(builder),
        Some(tls) => builder.tls_config(tls).map_err(|e| StartError::TlsSetup {
            cert: config.tls_cert_file.clone().unwrap_or_default(),
            key: config.tls_key_file.clone().unwrap_or_default(),
            reason: error_chain(&e),
        }),
    }
}

/// The TLS settings, or `None` when TLS is off.
fn server_tls(config: &ServeConfig) -> Result<Option<ServerTlsConfig>, StartError> {
    let (Some(cert_path), Some(key_path)) = (&config.tls_cert_file, &config.tls_key_file) else {
        return Ok(None);
    };
    let cert = read_certificates(cert_path)?;
    let key = read_private_key(key_path)?;
    let mut tls = ServerTlsConfig::new().identity(Identity::from_pem(cert, key));
    if let Some(ca_path) = &config.tls_client_ca_file {
        // client_auth_optional stays false: with a CA set, a client without a certificate
        // signed by it does not complete the handshake.
        tls = tls.client_ca_root(Certificate::from_pem(read_certificates(ca_path)?));
    }
    Ok(Some(tls))
}

/// The control service takes a bearer token; beyond loopback, without TLS, that token would
/// cross the network readable by anyone on the path.
///
/// # Errors
/// [`StartError::ControlInClear`].
pub(super) fn check_control_exposure(config: &ServeConfig) -> Result<(), StartError> {
    let addr: SocketAddr = config.control_listen;
    if config.control && !addr.ip().is_loopback() && !config.tls_enabled() {
        return Err(StartError::ControlInClear { addr });
    }
    Ok(())
}

/// The keys of `trusted_keys`, read.
///
/// # Errors
/// An unreadable or malformed key file, named.
pub(super) fn trusted_keys(config: &ServeConfig) -> Result<Vec<PublicKey>, StartError> {
    config
        .trusted_keys
        .iter()
        .map(|p| PublicKey::read(p).map_err(StartError::from))
        .collect()
}

/// A PEM file's bytes, checked to hold at least one certificate and nothing malformed.
pub fn read_certificates(path: &Path) -> Result<Vec<u8>, StartError> {
    let bytes = read(path)?;
    let mut count = 0;
    for item in CertificateDer::pem_slice_iter(&bytes) {
        item.map_err(|e| tls_file(path, format!("not valid PEM: {e}")))?;
        count += 1;
    }
    if count == 0 {
        return Err(tls_file(path, "holds no PEM certificate".into()));
    }
    Ok(bytes)
}

/// A PEM file's bytes, checked to hold a private key (PKCS#8, PKCS#1 or SEC1).
pub fn read_private_key(path: &Path) -> Result<Vec<u8>, StartError> {
    let bytes = read(path)?;
    PrivateKeyDer::from_pem_slice(&bytes)
        .map_err(|e| tls_file(path, format!("holds no usable PEM private key: {e}")))?;
    Ok(bytes)
}

fn read(path: &Path) -> Result<Vec<u8>, StartError> {
    std::fs::read(path).map_err(|e| tls_file(path, e.to_string()))
}

fn tls_file(path: &Path, problem: String) -> StartError {
    StartError::TlsFile {
        path: path.to_path_buf(),
        problem,
    }
}
