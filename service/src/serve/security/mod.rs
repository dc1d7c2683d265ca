//! Transport security and access control of the gRPC port.
//!
//! - [`config`]: `[server.tls]` and `[access]`, validated;
//! - [`tls`]: the rustls server configuration from PEM files and the accept loop (new connections take the
//!   current configuration, so certificates are replaced without a restart);
//! - [`access`]: roles, the method table, the callers' credentials and the check;
//! - [`layer`]: the tower layer that runs the check before every call, the one place calls are admitted.
//!
//! [`Security`] holds what the files said, swapped atomically on reload (SIGHUP or the Reload call). A file that
//! cannot be read or parsed on reload leaves the previous certificate or tokens serving, and is logged and counted
//! (`probity_security_reloads_total{what, result="failed"}`), as a bad model file is.

pub mod access;
pub mod config;
pub mod layer;
pub mod tls;

use std::collections::HashMap;
use std::path::Path;
use std::sync::Arc;

use arc_swap::ArcSwap;

use crate::serve::config::Transport;
use crate::serve::metrics;
use crate::serve::security::access::{digest, Caller, Grants};
use crate::serve::security::config::{AccessConfig, Credential};
use crate::serve::security::tls::LoadedTls;

/// A security file that could not be used; the key names the configuration entry, the message the file and the
/// problem, never its contents.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{key}: {message}")]
pub struct SecurityError {
    /// The configuration key, e.g. `server.tls.key_file` or `access.callers[2].token_file`.
    pub key: String,
    /// What is wrong.
    pub message: String,
}

impl SecurityError {
    /// An error for `key`.
    pub fn new(key: impl Into<String>, message: impl Into<String>) -> SecurityError {
        SecurityError {
            key: key.into(),
            message: message.into(),
        }
    }
}

/// What a reload did to one part.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum ReloadOutcome {
    /// Not configured (no TLS).
    Off,
    /// The files are as they were.
    Unchanged,
    /// New contents are in use.
    Loaded,
    /// The new contents were refused; the previous ones stay in use.
    Failed(SecurityError),
}

/// The TLS and token state of a running server.
pub struct Security {
    tls: Option<(
        crate::serve::security::config::TlsFiles,
        Arc<ArcSwap<LoadedTls>>,
    )>,
    access: AccessConfig,
    grants: ArcSwap<Grants>,
    token_inputs: ArcSwap<[u8; 32]>,
}

impl Security {
    /// Reads every file; any problem stops the start.
    pub fn load(transport: &Transport, access: &AccessConfig) -> Result<Security, SecurityError> {
        let tls = match transport {
            Transport::PlaintextLoopback => None,
            Transport::Tls(files) => {
                let loaded = tls::load(files)?;
                warn_if_readable("server.tls.key_file", &files.key_file);
                metrics::tls_certificate(&loaded.fingerprint, loaded.not_after);
                tracing::info!(
                    fingerprint_sha256 = %loaded.fingerprint,
                    not_after_unix = loaded.not_after,
                    client_certificates = ?files.client_certificates,
                    "TLS certificate loaded"
                );
                Some((files.clone(), Arc::new(ArcSwap::from_pointee(loaded))))
            }
        };
        let (grants, inputs) = grants(access)?;
        for (i, caller) in access.callers.iter().enumerate() {
            if let Credential::TokenFile(path) = &caller.credential {
                warn_if_readable(&format!("access.callers[{i}].token_file"), path);
            }
        }
        if !grants.enforced() {
            tracing::warn!(
                "access control is off: plain text on loopback without [[access.callers]], so every local \
                 process may make every call, Promote and Reload included"
            );
        }
        Ok(Security {
            tls,
            access: access.clone(),
            grants: ArcSwap::from_pointee(grants),
            token_inputs: ArcSwap::from_pointee(inputs),
        })
    }

    /// The current grants.
    pub fn grants(&self) -> arc_swap::Guard<Arc<Grants>> {
        self.grants.load()
    }

    /// The TLS configuration new connections take, when TLS is on.
    pub fn tls(&self) -> Option<Arc<ArcSwap<LoadedTls>>> {
        self.tls.as_ref().map(|(_, current)| Arc::clone(current))
    }

    /// Reads the TLS files and the token files again; each part that reads cleanly and changed replaces the old one,
    /// a part that fails keeps the old one (logged with the key, counted).
    pub fn reload(&self, trigger: &'static str) -> (ReloadOutcome, ReloadOutcome) {
        let tls = match &self.tls {
            None => ReloadOutcome::Off,
            Some((files, current)) => match tls::load(files) {
                Ok(loaded) if loaded.inputs == current.load().inputs => ReloadOutcome::Unchanged,
                Ok(loaded) => {
                    metrics::tls_certificate(&loaded.fingerprint, loaded.not_after);
                    tracing::info!(
                        trigger,
                        fingerprint_sha256 = %loaded.fingerprint,
                        not_after_unix = loaded.not_after,
                        "TLS certificate reloaded; new connections use it"
                    );
                    current.store(Arc::new(loaded));
                    ReloadOutcome::Loaded
                }
                Err(error) => ReloadOutcome::Failed(error),
            },
        };
        let tokens = match grants(&self.access) {
            Ok((_, inputs)) if inputs == **self.token_inputs.load() => ReloadOutcome::Unchanged,
            Ok((grants, inputs)) => {
                tracing::info!(
                    trigger,
                    callers = self.access.callers.len(),
                    "caller tokens reloaded"
                );
                self.grants.store(Arc::new(grants));
                self.token_inputs.store(Arc::new(inputs));
                ReloadOutcome::Loaded
            }
            Err(error) => ReloadOutcome::Failed(error),
        };
        for (what, outcome) in [("tls", &tls), ("tokens", &tokens)] {
            match outcome {
                ReloadOutcome::Off | ReloadOutcome::Unchanged => {}
                ReloadOutcome::Loaded => metrics::security_reload(what, "loaded"),
                ReloadOutcome::Failed(error) => {
                    metrics::security_reload(what, "failed");
                    tracing::error!(trigger, %error, "{what} reload refused; the previous one stays in use");
                }
            }
        }
        (tls, tokens)
    }
}

/// The grants from the callers' token files, and a digest of everything read (to tell an unchanged reload).
fn grants(access: &AccessConfig) -> Result<(Grants, [u8; 32]), SecurityError> {
    if access.callers.is_empty() {
        return Ok((Grants::open(), [0; 32]));
    }
    let mut tokens: Vec<([u8; 32], Arc<Caller>)> = Vec::new();
    let mut certificates = HashMap::new();
    let mut all = Vec::new();
    for (i, c) in access.callers.iter().enumerate() {
        let caller = Arc::new(Caller {
            name: Arc::from(c.name.as_str()),
            roles: c.roles.clone(),
        });
        match &c.credential {
            Credential::TokenFile(path) => {
                let key = format!("access.callers[{i}].token_file");
                let d = digest(&token(&key, path)?);
                if let Some((_, other)) = tokens.iter().find(|(t, _)| *t == d) {
                    return Err(SecurityError::new(
                        key,
                        format!(
                            "`{}` holds the same token as the file of `{}`",
                            path.display(),
                            other.name
                        ),
                    ));
                }
                all.extend_from_slice(&d);
                tokens.push((d, caller));
            }
            Credential::CertificateName(name) => {
                certificates.insert(name.clone(), caller);
            }
        }
    }
    Ok((Grants::new(tokens, certificates), digest(&all)))
}

/// A token from its file: one line of at least 16 visible ASCII characters (surrounding whitespace ignored).
/// Nothing of the file's contents goes into an error.
fn token(key: &str, path: &Path) -> Result<Vec<u8>, SecurityError> {
    let text = std::fs::read(path)
        .map_err(|e| SecurityError::new(key, format!("cannot read `{}`: {e}", path.display())))?;
    let token = text.trim_ascii();
    if token.len() < 16 || !token.iter().all(|b| b.is_ascii_graphic()) {
        return Err(SecurityError::new(
            key,
            format!(
                "`{}` must hold one token of at least 16 visible ASCII characters without spaces",
                path.display()
            ),
        ));
    }
    Ok(token.to_vec())
}

/// Warns when a secret file can be read by its group or by others.
fn warn_if_readable(key: &str, path: &Path) {
    use std::os::unix::fs::PermissionsExt as _;
    if let Ok(meta) = std::fs::metadata(path) {
        if meta.permissions().mode() & 0o077 != 0 {
            tracing::warn!(
                key,
                file = %path.display(),
                mode = format!("{:o}", meta.permissions().mode() & 0o777),
                "secret file is readable by its group or others; chmod 600 it"
            );
        }
    }
}
