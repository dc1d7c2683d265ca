//! Dialling a probity server from the command-line tools: plain text (`http://`, for a loopback server with
//! `server.plaintext = "loopback"`) or TLS (`https://`, verified against `--ca-file`), with an optional client
//! certificate for mutual TLS and an optional bearer token sent with every call.
//!
//! The token is read from a file (never from the command line, where `ps` would show it), sent as
//! `authorization: Bearer <token>` marked sensitive, and never printed: errors name the file, not its contents.

use std::path::{Path, PathBuf};

use anyhow::Context as _;
use tonic::metadata::{Ascii, MetadataValue};
use tonic::service::interceptor::InterceptedService;
use tonic::transport::{Certificate, Channel, ClientTlsConfig, Endpoint, Identity};

/// How to reach and authenticate to a server.
#[derive(Debug, Clone, clap::Args)]
pub struct ConnectArgs {
    /// The server: http://HOST:PORT (plain text, loopback only) or https://HOST:PORT (TLS).
    #[arg(long, value_name = "URL", default_value = "http://127.0.0.1:50051")]
    pub server: String,
    /// PEM certificate(s) of the authority that signed the server's certificate (needed with https://).
    #[arg(long, value_name = "FILE")]
    pub ca_file: Option<PathBuf>,
    /// PEM client certificate for mutual TLS (with --client-key).
    #[arg(long, value_name = "FILE", requires = "client_key")]
    pub client_cert: Option<PathBuf>,
    /// PEM private key of --client-cert.
    #[arg(long, value_name = "FILE", requires = "client_cert")]
    pub client_key: Option<PathBuf>,
    /// A file holding a bearer token of a configured caller (`[[access.callers]]`), sent with every call.
    #[arg(long, value_name = "FILE")]
    pub token_file: Option<PathBuf>,
    /// The name to verify the server's certificate against, when it is not the host in --server.
    #[arg(long, value_name = "NAME")]
    pub tls_server_name: Option<String>,
}

impl Default for ConnectArgs {
    fn default() -> Self {
        ConnectArgs {
            server: "http://127.0.0.1:50051".into(),
            ca_file: None,
            client_cert: None,
            client_key: None,
            token_file: None,
            tls_server_name: None,
        }
    }
}

/// Adds the bearer token, when there is one, to every call.
#[derive(Clone, Default)]
pub struct BearerToken(Option<MetadataValue<Ascii>>);

impl std::fmt::Debug for BearerToken {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(if self.0.is_some() {
            "BearerToken(hidden)"
        } else {
            "BearerToken(none)"
        })
    }
}

impl BearerToken {
    /// The token of a file: its text with surrounding whitespace removed.
    pub fn from_file(path: &Path) -> anyhow::Result<BearerToken> {
        let text = std::fs::read_to_string(path)
            .with_context(|| format!("--token-file: cannot read {}", path.display()))?;
        let token = text.trim();
        if token.is_empty() || !token.bytes().all(|b| b.is_ascii_graphic()) {
            anyhow::bail!(
                "--token-file: {} must hold one token of visible ASCII characters",
                path.display()
            );
        }
        let mut value: MetadataValue<Ascii> = format!("Bearer {token}")
            .parse()
            .map_err(|_| anyhow::anyhow!("--token-file: {} is not header text", path.display()))?;
        value.set_sensitive(true);
        Ok(BearerToken(Some(value)))
    }
}

impl tonic::service::Interceptor for BearerToken {
    fn call(
        &mut self,
        mut request: tonic::Request<()>,
    ) -> Result<tonic::Request<()>, tonic::Status> {
        if let Some(value) = &self.0 {
            request
                .metadata_mut()
                .insert("authorization", value.clone());
        }
        Ok(request)
    }
}

/// A channel that sends the token with every call; the generated clients take it with `::new`.
pub type Connection = InterceptedService<Channel, BearerToken>;

impl ConnectArgs {
    /// The endpoint (with TLS set up for https://) and the token, without connecting.
    pub fn endpoint(&self) -> anyhow::Result<(Endpoint, BearerToken)> {
        let endpoint = Endpoint::from_shared(self.server.clone())
            .with_context(|| format!("--server: `{}` is not a URL", self.server))?;
        let tls =
            self.ca_file.is_some() || self.client_cert.is_some() || self.tls_server_name.is_some();
        let endpoint = match endpoint.uri().scheme_str() {
            Some("https") => {
                let ca = self.ca_file.as_deref().ok_or_else(|| {
                    anyhow::anyhow!(
                        "--ca-file is needed with an https:// server: the authority that signed its certificate"
                    )
                })?;
                let mut config =
                    ClientTlsConfig::new()
                        .ca_certificate(Certificate::from_pem(std::fs::read(ca).with_context(
                            || format!("--ca-file: cannot read {}", ca.display()),
                        )?));
                if let (Some(cert), Some(key)) = (&self.client_cert, &self.client_key) {
                    config = config.identity(Identity::from_pem(
                        std::fs::read(cert).with_context(|| {
                            format!("--client-cert: cannot read {}", cert.display())
                        })?,
                        std::fs::read(key).with_context(|| {
                            format!("--client-key: cannot read {}", key.display())
                        })?,
                    ));
                }
                if let Some(name) = &self.tls_server_name {
                    config = config.domain_name(name.clone());
                }
                endpoint
                    .tls_config(config)
                    .context("--ca-file, --client-cert, --client-key: not usable for TLS")?
            }
            Some("http") if tls => anyhow::bail!(
                "--ca-file, --client-cert and --tls-server-name need an https:// --server"
            ),
            Some("http") => endpoint,
            _ => anyhow::bail!(
                "--server: `{}` must start with http:// or https://",
                self.server
            ),
        };
        let token = match &self.token_file {
            Some(path) => BearerToken::from_file(path)?,
            None => BearerToken::default(),
        };
        Ok((endpoint, token))
    }

    /// Connects.
    pub async fn connect(&self) -> anyhow::Result<Connection> {
        let (endpoint, token) = self.endpoint()?;
        let channel = endpoint
            .connect()
            .await
            .with_context(|| format!("--server: cannot connect to {}", self.server))?;
        Ok(InterceptedService::new(channel, token))
    }
}

/// A gRPC status as a command prints it: the server's message and the status's standard name
/// (`NOT_FOUND`), without the code's generic sentence.
pub fn status_text(status: &tonic::Status) -> String {
    use tonic::Code;
    let name = match status.code() {
        Code::Ok => "OK",
        Code::Cancelled => "CANCELLED",
        Code::Unknown => "UNKNOWN",
        Code::InvalidArgument => "INVALID_ARGUMENT",
        Code::DeadlineExceeded => "DEADLINE_EXCEEDED",
        Code::NotFound => "NOT_FOUND",
        Code::AlreadyExists => "ALREADY_EXISTS",
        Code::PermissionDenied => "PERMISSION_DENIED",
        Code::ResourceExhausted => "RESOURCE_EXHAUSTED",
        Code::FailedPrecondition => "FAILED_PRECONDITION",
        Code::Aborted => "ABORTED",
        Code::OutOfRange => "OUT_OF_RANGE",
        Code::Unimplemented => "UNIMPLEMENTED",
        Code::Internal => "INTERNAL",
        Code::Unavailable => "UNAVAILABLE",
        Code::DataLoss => "DATA_LOSS",
        Code::Unauthenticated => "UNAUTHENTICATED",
    };
    if status.message().is_empty() {
        name.to_string()
    } else {
        format!("{} ({name})", status.message())
    }
}

/// An error chain on one line, outermost first, joined by `: `; a cause whose text the line already ends with
/// (an error that prints its own source) is said once.
pub fn error_line(err: &anyhow::Error) -> String {
    let mut line = String::new();
    for cause in err.chain() {
        let text = cause.to_string();
        if text.is_empty() || line.ends_with(&text) {
            continue;
        }
        if !line.is_empty() {
            line.push_str(": ");
        }
        line.push_str(&text);
    }
    line
}

#[cfg(test)]
mod line_tests {
    use super::{error_line, status_text};

    #[test]
    fn a_cause_repeated_by_its_parent_is_said_once() {
        #[derive(Debug, thiserror::Error)]
        #[error("tcp connect error")]
        struct Inner;
        #[derive(Debug, thiserror::Error)]
        #[error("tcp connect error")]
        struct Outer(#[source] Inner);
        let e = anyhow::Error::new(Outer(Inner)).context("--server: cannot connect to http://x");
        assert_eq!(
            error_line(&e),
            "--server: cannot connect to http://x: tcp connect error"
        );
        let io = std::io::Error::other("disk full");
        let e = anyhow::Error::new(io).context("writing out.csv");
        assert_eq!(error_line(&e), "writing out.csv: disk full");
    }

    #[test]
    fn statuses_print_the_message_and_the_standard_name() {
        let s = tonic::Status::not_found("route `fraud` is not configured");
        assert_eq!(
            status_text(&s),
            "route `fraud` is not configured (NOT_FOUND)"
        );
        assert_eq!(status_text(&tonic::Status::unavailable("")), "UNAVAILABLE");
    }
}
