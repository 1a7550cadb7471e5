//! TLS for the client commands (`predict`, `drift`, `versions`): the flags they share and the
//! channel they open.
//!
//! An `https://` address, or any `--tls-*` flag, makes the connection TLS. The server's
//! certificate is checked against `--tls-ca` (else the system's trust roots) for the address's
//! host (else `--tls-domain`); `--tls-cert` with `--tls-key` present a client certificate to a
//! server that requires one (mutual TLS).

use crate::service::error::error_chain;
use std::path::PathBuf;

use tonic::transport::{Certificate, Channel, ClientTlsConfig, Endpoint, Identity};

use super::CliError;
use crate::service::tls::{read_certificates, read_private_key};

/// TLS flags of every command that talks to a server.
#[derive(Clone, Debug, Default, clap::Args)]
pub struct TlsArgs {
    /// PEM certificate(s) to trust for the server's certificate (default: the system's).
    #[arg(long, env = "CONVOY_TLS_CA", value_name = "FILE", global = true)]
    pub tls_ca: Option<PathBuf>,
    /// PEM client certificate, for a server that requires one (with --tls-key).
    #[arg(long, env = "CONVOY_TLS_CERT", value_name = "FILE", global = true)]
    pub tls_cert: Option<PathBuf>,
    /// PEM private key of --tls-cert.
    #[arg(long, env = "CONVOY_TLS_KEY", value_name = "FILE", global = true)]
    pub tls_key: Option<PathBuf>,
    /// The name the server's certificate must carry (default: the address's host).
    #[arg(long, env = "CONVOY_TLS_DOMAIN", value_name = "NAME", global = true)]
    pub tls_domain: Option<String>,
}

impl TlsArgs {
    fn any(&self) -> bool {
        self.tls_ca.is_some()
            || self.tls_cert.is_some()
            || self.tls_key.is_some()
            || self.tls_domain.is_some()
    }

    /// The client's TLS settings, every file read and checked.
    ///
    /// # Errors
    /// An unreadable or invalid PEM file; a certificate without its key or a key without its
    /// certificate.
    pub fn client_config(&self) -> Result<ClientTlsConfig, CliError> {
        let mut config = ClientTlsConfig::new();
        config = match &self.tls_ca {
            Some(path) => config.ca_certificate(Certificate::from_pem(read_certificates(path)?)),
            None => config.with_native_roots(),
        };
        match (&self.tls_cert, &self.tls_key) {
            (Some(cert), Some(key)) => {
                config = config.identity(Identity::from_pem(
                    read_certificates(cert)?,
                    read_private_key(key)?,
                ));
            }
            (None, None) => {}
            _ => {
                return Err(CliError::Usage(
                    "--tls-cert and --tls-key go together".into(),
                ));
            }
        }
        if let Some(domain) = &self.tls_domain {
            config = config.domain_name(domain.clone());
        }
        Ok(config)
    }
}

/// A channel to a convoy server at `addr` (`host:port`, or a URL with its scheme).
///
/// # Errors
/// [`CliError::Connect`] when the address is not usable or nothing answers there (with the
/// TLS reason, when the handshake failed); [`CliError::Usage`] for TLS flags with an
/// `http://` address.
pub(crate) async fn connect(addr: &str, tls: &TlsArgs) -> Result<Channel, CliError> {
    let (url, client_tls) = url_and_tls(addr, tls)?;
    let failed = |reason: String| CliError::Connect {
        server: url.clone(),
        reason,
    };
    let mut endpoint = Endpoint::from_shared(url.clone()).map_err(|e| failed(error_chain(&e)))?;
    if let Some(config) = client_tls {
        endpoint = endpoint
            .tls_config(config)
            .map_err(|e| failed(error_chain(&e)))?;
    }
    endpoint
        .connect()
        .await
        .map_err(|e| failed(error_chain(&e)))
}

/// The URL to call for `addr` (a scheme added when it has none: `https://` when any TLS flag
/// is given), and the client's TLS settings when that URL is `https://`.
///
/// # Errors
/// [`CliError::Usage`] for TLS flags with an `http://` address; the errors of
/// [`TlsArgs::client_config`].
pub(crate) fn url_and_tls(
    addr: &str,
    tls: &TlsArgs,
) -> Result<(String, Option<ClientTlsConfig>), CliError> {
    let url = if addr.contains("://") {
        addr.to_string()
    } else if tls.any() {
        format!("https://{addr}")
    } else {
        format!("http://{addr}")
    };
    if url.starts_with("https://") {
        let config = tls.client_config()?;
        Ok((url, Some(config)))
    } else if tls.any() {
        Err(CliError::Usage(format!(
            "--tls-* flags need TLS, but {url} is plain text: use https:// or host:port"
        )))
    } else {
        Ok((url, None))
    }
}
