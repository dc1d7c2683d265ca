//! TLS for the gRPC port, with rustls (the `ring` provider): the server configuration built from the PEM files, and
//! the accept loop that hands tonic finished TLS connections.
//!
//! The accept loop takes the *current* configuration for each new connection, so a reload (a new certificate, key
//! or client CA) applies to the next handshake without a restart, while open connections keep the one they began
//! with. Handshakes run in their own tasks, at most [`MAX_HANDSHAKES`] at once and each within
//! [`HANDSHAKE_TIMEOUT`], so a slow or silent client cannot hold up the others; failures are counted in
//! `probity_tls_handshake_failures_total{reason}` and logged at debug level (a port scanner would flood the log).

use std::io;
use std::net::SocketAddr;
use std::path::Path;
use std::pin::Pin;
use std::sync::Arc;
use std::task::{Context, Poll};
use std::time::Duration;

use arc_swap::ArcSwap;
use rustls::pki_types::pem::PemObject;
use rustls::pki_types::{CertificateDer, PrivateKeyDer};
use rustls::server::WebPkiClientVerifier;
use rustls::{RootCertStore, ServerConfig};
use sha2::Digest as _;
use tokio::io::{AsyncRead, AsyncWrite, ReadBuf};
use tokio::net::{TcpListener, TcpStream};
use tokio::sync::{mpsc, watch, Semaphore};
use tokio_stream::wrappers::ReceiverStream;

use crate::serve::connections::{accept, Admitted, Gate};
use crate::serve::metrics;
use crate::serve::security::access::PeerInfo;
use crate::serve::security::config::{ClientCertificates, TlsFiles};
use crate::serve::security::SecurityError;

/// Most TLS handshakes in progress at once; a connection beyond that is closed at once and counted (`busy`).
pub const MAX_HANDSHAKES: usize = 256;
/// Longest a TLS handshake may take.
pub const HANDSHAKE_TIMEOUT: Duration = Duration::from_secs(10);

/// A loaded server configuration and what the log and metrics say about it.
pub struct LoadedTls {
    /// The rustls configuration new connections use.
    pub config: Arc<ServerConfig>,
    /// SHA-256 of the files' bytes, to tell a reload that changed nothing.
    pub inputs: [u8; 32],
    /// SHA-256 of the server certificate (DER), hex, as `openssl x509 -fingerprint -sha256` prints it without
    /// colons.
    pub fingerprint: String,
    /// The server certificate's end of validity, seconds since the Unix epoch.
    pub not_after: i64,
}

fn read(key: &str, path: &Path) -> Result<Vec<u8>, SecurityError> {
    std::fs::read(path)
        .map_err(|e| SecurityError::new(key, format!("cannot read `{}`: {e}", path.display())))
}

fn certificates(
    key: &str,
    path: &Path,
    bytes: &[u8],
) -> Result<Vec<CertificateDer<'static>>, SecurityError> {
    let certs = CertificateDer::pem_slice_iter(bytes)
        .collect::<Result<Vec<_>, _>>()
        .map_err(|e| SecurityError::new(key, format!("`{}` is not PEM: {e}", path.display())))?;
    if certs.is_empty() {
        return Err(SecurityError::new(
            key,
            format!("`{}` holds no CERTIFICATE block", path.display()),
        ));
    }
    Ok(certs)
}

fn provider() -> Arc<rustls::crypto::CryptoProvider> {
    Arc::new(rustls::crypto::ring::default_provider())
}

/// Reads the files and builds the server configuration (TLS 1.2 and 1.3, ALPN `h2`). Errors name the key and the
/// file, never the key material.
pub fn load(files: &TlsFiles) -> Result<LoadedTls, SecurityError> {
    let TlsFiles {
        certificate_file,
        key_file,
        client_ca_file,
        client_certificates: wanted,
    } = files;
    let cert_bytes = read("server.tls.certificate_file", certificate_file)?;
    let key_bytes = read("server.tls.key_file", key_file)?;
    let ca_bytes = client_ca_file
        .as_deref()
        .map(|p| read("server.tls.client_ca_file", p))
        .transpose()?;
    let mut hasher = sha2::Sha256::new();
    for part in [Some(&cert_bytes), Some(&key_bytes), ca_bytes.as_ref()]
        .into_iter()
        .flatten()
    {
        hasher.update((part.len() as u64).to_le_bytes());
        hasher.update(part);
    }
    let inputs: [u8; 32] = hasher.finalize().into();

    let chain = certificates("server.tls.certificate_file", certificate_file, &cert_bytes)?;
    let key = PrivateKeyDer::from_pem_slice(&key_bytes).map_err(|e| {
        SecurityError::new(
            "server.tls.key_file",
            format!(
                "`{}` holds no usable PEM private key: {e}",
                key_file.display()
            ),
        )
    })?;
    let (fingerprint, not_after) = summary(&chain[0]).ok_or_else(|| {
        SecurityError::new(
            "server.tls.certificate_file",
            format!(
                "`{}`: the first certificate cannot be read",
                certificate_file.display()
            ),
        )
    })?;

    let builder = ServerConfig::builder_with_provider(provider())
        .with_safe_default_protocol_versions()
        .map_err(|e| SecurityError::new("server.tls", e.to_string()))?;
    let builder = match (client_ca_file, ca_bytes) {
        (Some(path), Some(bytes)) => {
            let mut roots = RootCertStore::empty();
            for cert in certificates("server.tls.client_ca_file", path, &bytes)? {
                roots.add(cert).map_err(|e| {
                    SecurityError::new(
                        "server.tls.client_ca_file",
                        format!("`{}`: {e}", path.display()),
                    )
                })?;
            }
            let verifier = WebPkiClientVerifier::builder_with_provider(Arc::new(roots), provider());
            let verifier = match wanted {
                ClientCertificates::Optional => verifier.allow_unauthenticated(),
                ClientCertificates::Required | ClientCertificates::Off => verifier,
            };
            let verifier = verifier.build().map_err(|e| {
                SecurityError::new(
                    "server.tls.client_ca_file",
                    format!("`{}`: {e}", path.display()),
                )
            })?;
            builder.with_client_cert_verifier(verifier)
        }
        _ => builder.with_no_client_auth(),
    };
    let mut config = builder.with_single_cert(chain, key).map_err(|e| {
        SecurityError::new(
            "server.tls.key_file",
            format!(
                "`{}` does not fit `{}` or cannot sign: {e}",
                key_file.display(),
                certificate_file.display()
            ),
        )
    })?;
    config.alpn_protocols = vec![b"h2".to_vec()];
    Ok(LoadedTls {
        config: Arc::new(config),
        inputs,
        fingerprint,
        not_after,
    })
}

/// The SHA-256 fingerprint (hex) and the end of validity of a certificate.
fn summary(cert: &CertificateDer<'_>) -> Option<(String, i64)> {
    use std::fmt::Write as _;
    let (_, parsed) = x509_parser::parse_x509_certificate(cert.as_ref()).ok()?;
    let digest = crate::serve::security::access::digest(cert.as_ref());
    let hex = digest.iter().fold(String::with_capacity(64), |mut s, b| {
        let _ = write!(s, "{b:02X}");
        s
    });
    Some((hex, parsed.validity().not_after.timestamp()))
}

/// The subject common name of a client certificate (the first CN), if it has one in UTF-8.
pub fn common_name(cert: &CertificateDer<'_>) -> Option<Arc<str>> {
    let (_, parsed) = x509_parser::parse_x509_certificate(cert.as_ref()).ok()?;
    let name = parsed.subject().iter_common_name().next()?.as_str().ok()?;
    Some(Arc::from(name))
}

/// A TLS connection with its [`PeerInfo`], which tonic puts in every request's extensions.
pub struct TlsConnection {
    stream: tokio_rustls::server::TlsStream<TcpStream>,
    info: PeerInfo,
}

impl tonic::transport::server::Connected for TlsConnection {
    type ConnectInfo = PeerInfo;

    fn connect_info(&self) -> PeerInfo {
        self.info.clone()
    }
}

impl AsyncRead for TlsConnection {
    fn poll_read(
        self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        buf: &mut ReadBuf<'_>,
    ) -> Poll<io::Result<()>> {
        Pin::new(&mut self.get_mut().stream).poll_read(cx, buf)
    }
}

impl AsyncWrite for TlsConnection {
    fn poll_write(
        self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        buf: &[u8],
    ) -> Poll<io::Result<usize>> {
        Pin::new(&mut self.get_mut().stream).poll_write(cx, buf)
    }

    fn poll_write_vectored(
        self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        bufs: &[io::IoSlice<'_>],
    ) -> Poll<io::Result<usize>> {
        Pin::new(&mut self.get_mut().stream).poll_write_vectored(cx, bufs)
    }

    fn is_write_vectored(&self) -> bool {
        self.stream.is_write_vectored()
    }

    fn poll_flush(self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.get_mut().stream).poll_flush(cx)
    }

    fn poll_shutdown(self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.get_mut().stream).poll_shutdown(cx)
    }
}

/// Accepts TCP connections on `listener` until `shutdown`, completes their TLS handshakes with the configuration
/// current at that moment, and yields the finished connections.
pub fn incoming(
    listener: TcpListener,
    current: Arc<ArcSwap<LoadedTls>>,
    gate: Arc<Gate>,
    mut shutdown: watch::Receiver<bool>,
) -> ReceiverStream<io::Result<Admitted<TlsConnection>>> {
    let (tx, rx) = mpsc::channel(64);
    tokio::spawn(async move {
        let slots = Arc::new(Semaphore::new(MAX_HANDSHAKES));
        while let Some((tcp, remote, connection)) = accept(&listener, &gate, &mut shutdown).await {
            let Ok(slot) = Arc::clone(&slots).try_acquire_owned() else {
                metrics::tls_handshake_failed("busy");
                continue;
            };
            let acceptor = tokio_rustls::TlsAcceptor::from(Arc::clone(&current.load().config));
            let tx = tx.clone();
            tokio::spawn(async move {
                let _slot = slot;
                match tokio::time::timeout(HANDSHAKE_TIMEOUT, acceptor.accept(tcp)).await {
                    Ok(Ok(stream)) => {
                        let certificate_name = stream
                            .get_ref()
                            .1
                            .peer_certificates()
                            .and_then(|c| c.first())
                            .and_then(common_name);
                        let info = PeerInfo {
                            remote_addr: Some(remote),
                            certificate_name,
                        };
                        let _ = tx
                            .send(Ok(Admitted::new(
                                TlsConnection { stream, info },
                                connection,
                            )))
                            .await;
                    }
                    Ok(Err(error)) => {
                        metrics::tls_handshake_failed("handshake");
                        tracing::debug!(%remote, %error, "TLS handshake failed");
                    }
                    Err(_) => {
                        metrics::tls_handshake_failed("timeout");
                        tracing::debug!(%remote, "TLS handshake timed out");
                    }
                }
            });
        }
    });
    ReceiverStream::new(rx)
}

/// The client's address of a request: from [`PeerInfo`] on TLS connections, from tonic's TCP info on plain ones.
pub fn remote_addr<T>(request: &tonic::Request<T>) -> Option<SocketAddr> {
    request
        .extensions()
        .get::<PeerInfo>()
        .and_then(|p| p.remote_addr)
        .or_else(|| request.remote_addr())
}
