//! The `[server.tls]` and `[access]` configuration: raw serde forms and their validation. Only the paths and names
//! are checked here; the files themselves are read when the server starts and on every reload
//! ([`crate::serve::security::Security`]), so a rotated certificate or token is picked up without a restart.

use std::collections::{BTreeMap, BTreeSet};
use std::path::PathBuf;

use serde::Deserialize;

use crate::serve::security::access::Role;

/// `[server.tls]` as written.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct RawTls {
    certificate_file: Option<PathBuf>,
    key_file: Option<PathBuf>,
    client_ca_file: Option<PathBuf>,
    client_certificates: Option<String>,
}

/// `[access]` as written.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct RawAccess {
    callers: Vec<RawCaller>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields, default)]
struct RawCaller {
    name: Option<String>,
    token_file: Option<PathBuf>,
    certificate_name: Option<String>,
    roles: Vec<String>,
}

/// The TLS files of the gRPC port.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TlsFiles {
    /// PEM certificate chain, the server's own certificate first (`server.tls.certificate_file`).
    pub certificate_file: PathBuf,
    /// PEM private key of that certificate (`server.tls.key_file`).
    pub key_file: PathBuf,
    /// PEM certificates of the authorities that sign client certificates (`server.tls.client_ca_file`); mutual TLS
    /// is on when set.
    pub client_ca_file: Option<PathBuf>,
    /// Whether a client certificate is required or only checked when one is presented.
    pub client_certificates: ClientCertificates,
}

/// What the server asks of client certificates.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ClientCertificates {
    /// Not asked for (no `client_ca_file`).
    Off,
    /// Verified against the client CA when presented; a client without one must send a bearer token.
    Optional,
    /// Every connection must present a certificate signed by the client CA, or the handshake fails.
    Required,
}

/// One configured caller: a name for logs, one credential and the roles it grants.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct CallerConfig {
    /// The caller's name, as logged with its calls and refusals (never the secret).
    pub name: String,
    /// How the caller proves who it is.
    pub credential: Credential,
    /// What it may do.
    pub roles: BTreeSet<Role>,
}

/// A caller's credential.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Credential {
    /// A bearer token, read from this file (one line; the text is never logged).
    TokenFile(PathBuf),
    /// A client certificate, signed by `server.tls.client_ca_file`, whose subject common name (CN) is this.
    CertificateName(String),
}

/// The validated `[access]` section.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct AccessConfig {
    /// The callers, in file order.
    pub callers: Vec<CallerConfig>,
}

/// `(key, message)` for [`crate::serve::config::ConfigError::Invalid`].
pub type Invalid = (String, String);

fn invalid(key: impl Into<String>, message: impl Into<String>) -> Invalid {
    (key.into(), message.into())
}

/// Validates `[server.tls]`; `None` when the table is absent.
pub fn tls(raw: Option<RawTls>) -> Result<Option<TlsFiles>, Invalid> {
    let Some(raw) = raw else {
        return Ok(None);
    };
    let RawTls {
        certificate_file,
        key_file,
        client_ca_file,
        client_certificates,
    } = raw;
    let path = |key: &str, value: Option<PathBuf>| match value {
        Some(p) if !p.as_os_str().is_empty() => Ok(p),
        _ => Err(invalid(
            format!("server.tls.{key}"),
            "is required with [server.tls] (a PEM file)",
        )),
    };
    let certificate_file = path("certificate_file", certificate_file)?;
    let key_file = path("key_file", key_file)?;
    let client_ca_file = client_ca_file.filter(|p| !p.as_os_str().is_empty());
    let client_certificates =
        match (client_ca_file.is_some(), client_certificates.as_deref()) {
            (false, None) => ClientCertificates::Off,
            (false, Some(_)) => return Err(invalid(
                "server.tls.client_certificates",
                "needs server.tls.client_ca_file (the authority that signs client certificates)",
            )),
            (true, None | Some("required")) => ClientCertificates::Required,
            (true, Some("optional")) => ClientCertificates::Optional,
            (true, Some(other)) => {
                return Err(invalid(
                    "server.tls.client_certificates",
                    format!("must be \"required\" or \"optional\", got `{other}`"),
                ))
            }
        };
    Ok(Some(TlsFiles {
        certificate_file,
        key_file,
        client_ca_file,
        client_certificates,
    }))
}

/// Validates `[access]` against the transport: certificate names need mutual TLS, and a TLS server needs at least
/// one caller (a plain-text loopback server without callers runs with access control off).
pub fn access(
    raw: RawAccess,
    tls: Option<&TlsFiles>,
    valid_name: fn(&str) -> bool,
) -> Result<AccessConfig, Invalid> {
    let mut names = BTreeSet::new();
    let mut certificate_names = BTreeMap::new();
    let mut token_files = BTreeMap::new();
    let mut callers = Vec::with_capacity(raw.callers.len());
    for (i, raw) in raw.callers.into_iter().enumerate() {
        let key = |k: &str| format!("access.callers[{i}].{k}");
        let RawCaller {
            name,
            token_file,
            certificate_name,
            roles,
        } = raw;
        let name = name
            .ok_or_else(|| invalid(key("name"), "is required (how the caller is named in logs)"))?;
        if !valid_name(&name) {
            return Err(invalid(
                key("name"),
                format!("1 to 128 characters of A-Za-z0-9._-, got `{name}`"),
            ));
        }
        if !names.insert(name.clone()) {
            return Err(invalid(
                key("name"),
                format!("`{name}` is used by another caller"),
            ));
        }
        let credential = match (token_file, certificate_name) {
            (Some(file), None) if !file.as_os_str().is_empty() => {
                if let Some(other) = token_files.insert(file.clone(), name.clone()) {
                    return Err(invalid(
                        key("token_file"),
                        format!("`{}` is also the token file of `{other}`", file.display()),
                    ));
                }
                Credential::TokenFile(file)
            }
            (None, Some(cn)) if !cn.trim().is_empty() => {
                if tls.is_none_or(|t| t.client_ca_file.is_none()) {
                    return Err(invalid(
                        key("certificate_name"),
                        "needs mutual TLS: set server.tls.client_ca_file",
                    ));
                }
                if let Some(other) = certificate_names.insert(cn.clone(), name.clone()) {
                    return Err(invalid(
                        key("certificate_name"),
                        format!("`{cn}` is also the certificate name of `{other}`"),
                    ));
                }
                Credential::CertificateName(cn)
            }
            _ => {
                return Err(invalid(
                    format!("access.callers[{i}]"),
                    "give exactly one of token_file (a file holding a bearer token) and certificate_name \
                     (the subject CN of a client certificate)",
                ))
            }
        };
        if roles.is_empty() {
            return Err(invalid(
                key("roles"),
                format!("at least one of {} is needed", Role::names()),
            ));
        }
        let roles = roles
            .iter()
            .map(|r| {
                Role::parse(r).ok_or_else(|| {
                    invalid(
                        key("roles"),
                        format!("unknown role `{r}` (roles: {})", Role::names()),
                    )
                })
            })
            .collect::<Result<BTreeSet<_>, _>>()?;
        callers.push(CallerConfig {
            name,
            credential,
            roles,
        });
    }
    if tls.is_some() && callers.is_empty() {
        return Err(invalid(
            "access.callers",
            "a TLS server needs at least one caller ([[access.callers]] with name, token_file or \
             certificate_name, and roles)",
        ));
    }
    Ok(AccessConfig { callers })
}
