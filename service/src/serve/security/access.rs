//! Who may call what: the roles, the table from gRPC method path to what it needs, the callers' credentials, and
//! the one check every call passes ([`Grants::check`], called by [`crate::serve::security::layer`]).
//!
//! A call names its caller with the `authorization: Bearer <token>` metadata or, on a mutual-TLS connection, with
//! its client certificate's subject common name. A token, when sent, decides: a wrong token is refused even on a
//! connection with a good certificate. Tokens are kept only as SHA-256 digests and compared in constant time
//! (`subtle`), so neither the time a comparison takes nor a memory dump gives the token away.

use std::collections::{BTreeSet, HashMap};
use std::fmt;
use std::net::SocketAddr;
use std::sync::Arc;

use sha2::{Digest, Sha256};
use subtle::ConstantTimeEq;
use tonic::codegen::http::HeaderMap;

use crate::serve::error::ServeError;

/// A permission. Each gRPC method needs one role, or any configured caller, or nothing (health).
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum Role {
    /// `Scoring`: Score, ScoreBatch, ScoreStream.
    Score,
    /// `Outcomes`: RecordOutcomes, RecordOutcomeStream.
    OutcomeWrite,
    /// Reading what the log shows: `Outcomes.Report`, `Challengers.Compare`, `Challengers.RouteHistory`.
    ReportRead,
    /// Changing the server: `Models.Reload`, `Challengers.Promote`, `Challengers.Restore`.
    Admin,
}

impl Role {
    /// Every role.
    pub const ALL: [Role; 4] = [
        Role::Score,
        Role::OutcomeWrite,
        Role::ReportRead,
        Role::Admin,
    ];

    /// The configuration word.
    pub fn as_str(self) -> &'static str {
        match self {
            Role::Score => "score",
            Role::OutcomeWrite => "outcome-write",
            Role::ReportRead => "report-read",
            Role::Admin => "admin",
        }
    }

    /// The role of a configuration word.
    pub fn parse(text: &str) -> Option<Role> {
        Role::ALL.into_iter().find(|r| r.as_str() == text)
    }

    /// The configuration words, for error messages.
    pub fn names() -> String {
        Role::ALL
            .iter()
            .map(|r| format!("`{}`", r.as_str()))
            .collect::<Vec<_>>()
            .join(", ")
    }
}

impl fmt::Display for Role {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// What a method needs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Need {
    /// Nothing: load balancers and orchestrators probe health without credentials.
    Open,
    /// A configured caller, with any role.
    AnyCaller,
    /// A configured caller with this role.
    Role(Role),
}

/// Every gRPC method the server serves and what it needs. A method that is not here is refused (UNIMPLEMENTED,
/// after the caller is authenticated) before it reaches a service; `tests/access_control.rs` checks the table
/// against the compiled descriptors of every registered service, so a new RPC fails the tests until it is listed.
///
/// - Health stays open for probes.
/// - Reflection and the Models listing (routes, a model's features) need a configured caller but no particular
///   role: every client needs the feature order, and the schema is no secret but is not given to strangers.
pub const METHODS: &[(&str, Need)] = &[
    ("/grpc.health.v1.Health/Check", Need::Open),
    ("/grpc.health.v1.Health/Watch", Need::Open),
    (
        "/grpc.reflection.v1.ServerReflection/ServerReflectionInfo",
        Need::AnyCaller,
    ),
    (
        "/grpc.reflection.v1alpha.ServerReflection/ServerReflectionInfo",
        Need::AnyCaller,
    ),
    ("/probity.v1.Scoring/Score", Need::Role(Role::Score)),
    ("/probity.v1.Scoring/ScoreBatch", Need::Role(Role::Score)),
    ("/probity.v1.Scoring/ScoreStream", Need::Role(Role::Score)),
    ("/probity.v1.Models/ListRoutes", Need::AnyCaller),
    ("/probity.v1.Models/ModelFacts", Need::AnyCaller),
    ("/probity.v1.Models/Reload", Need::Role(Role::Admin)),
    (
        "/probity.v1.Outcomes/RecordOutcomes",
        Need::Role(Role::OutcomeWrite),
    ),
    (
        "/probity.v1.Outcomes/RecordOutcomeStream",
        Need::Role(Role::OutcomeWrite),
    ),
    ("/probity.v1.Outcomes/Report", Need::Role(Role::ReportRead)),
    (
        "/probity.v1.Challengers/Compare",
        Need::Role(Role::ReportRead),
    ),
    ("/probity.v1.Challengers/Promote", Need::Role(Role::Admin)),
    ("/probity.v1.Challengers/Restore", Need::Role(Role::Admin)),
    (
        "/probity.v1.Challengers/RouteHistory",
        Need::Role(Role::ReportRead),
    ),
];

/// Methods of earlier releases and their new paths. A call to one is answered UNIMPLEMENTED with the new path named
/// (the gRPC layer alone would answer UNIMPLEMENTED with no message).
pub const RENAMED_METHODS: &[(&str, &str)] = &[(
    "/probity.v1.Models/DescribeModel",
    "/probity.v1.Models/ModelFacts",
)];

/// The table entry of a method path: the path as a `'static` label (metrics never carry a caller-chosen string)
/// and what it needs.
pub fn need_of(path: &str) -> Option<(&'static str, Need)> {
    METHODS.iter().find(|(p, _)| *p == path).copied()
}

/// The connection facts the check uses, from the TLS acceptor ([`crate::serve::security::tls`]); absent on
/// plain-text connections.
#[derive(Debug, Clone)]
pub struct PeerInfo {
    /// The client's address.
    pub remote_addr: Option<SocketAddr>,
    /// The subject common name of the client certificate the handshake verified, if one was presented.
    pub certificate_name: Option<Arc<str>>,
}

/// The caller a call was admitted for; handlers find it in the request's extensions.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Caller {
    /// The configured name.
    pub name: Arc<str>,
    /// Its roles.
    pub roles: BTreeSet<Role>,
}

/// How the caller was identified, for refusals.
enum Identity<'a> {
    Known(&'a Arc<Caller>),
    /// A certificate the client CA signed whose name is not configured: authenticated, but without roles.
    UnknownCertificate(&'a str),
}

/// Why a call was refused; `reason()` is the metric label.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Refusal {
    /// No token and no client certificate.
    MissingCredentials,
    /// The `authorization` metadata is not one `Bearer <token>`.
    MalformedCredentials,
    /// A token no caller has.
    InvalidToken,
    /// A known identity without the role.
    RoleMissing {
        /// Who called (the configured name, or the certificate name of an unconfigured certificate).
        caller: String,
        /// What the method needs.
        needs: String,
    },
    /// The method is not in [`METHODS`].
    UnknownMethod,
}

impl Refusal {
    /// The metric label.
    pub fn reason(&self) -> &'static str {
        match self {
            Refusal::MissingCredentials => "missing_credentials",
            Refusal::MalformedCredentials => "malformed_credentials",
            Refusal::InvalidToken => "invalid_token",
            Refusal::RoleMissing { .. } => "role_missing",
            Refusal::UnknownMethod => "unknown_method",
        }
    }

    /// The caller's name for the log, when one is known.
    pub fn caller(&self) -> Option<&str> {
        match self {
            Refusal::RoleMissing { caller, .. } => Some(caller),
            _ => None,
        }
    }
}

impl From<Refusal> for ServeError {
    fn from(r: Refusal) -> ServeError {
        match r {
            Refusal::MissingCredentials => ServeError::Unauthenticated {
                reason: "this call needs credentials: the metadata `authorization: Bearer <token>` or a client \
                         certificate"
                    .into(),
            },
            Refusal::MalformedCredentials => ServeError::Unauthenticated {
                reason: "the `authorization` metadata must be one `Bearer <token>`".into(),
            },
            Refusal::InvalidToken => ServeError::Unauthenticated {
                reason: "the bearer token is not valid".into(),
            },
            Refusal::RoleMissing { caller, needs } => ServeError::PermissionDenied { caller, needs },
            Refusal::UnknownMethod => ServeError::UnknownMethod,
        }
    }
}

/// The callers' credentials as loaded from their files.
#[derive(Debug, Default)]
pub struct Grants {
    /// SHA-256 of each token, with its caller.
    tokens: Vec<([u8; 32], Arc<Caller>)>,
    /// Callers by client-certificate name.
    certificates: HashMap<String, Arc<Caller>>,
    /// Whether calls are checked at all (off only for plain text on loopback without callers).
    enforce: bool,
}

/// The SHA-256 digest of a token.
pub fn digest(token: &[u8]) -> [u8; 32] {
    Sha256::digest(token).into()
}

impl Grants {
    /// No checks: every call is admitted (plain text on loopback without configured callers).
    pub fn open() -> Grants {
        Grants::default()
    }

    /// Checked grants from token digests and certificate names.
    pub fn new(
        tokens: Vec<([u8; 32], Arc<Caller>)>,
        certificates: HashMap<String, Arc<Caller>>,
    ) -> Grants {
        Grants {
            tokens,
            certificates,
            enforce: true,
        }
    }

    /// Whether calls are checked.
    pub fn enforced(&self) -> bool {
        self.enforce
    }

    /// The caller holding this token. Every digest is compared, in constant time, whatever matches.
    fn by_token(&self, token: &[u8]) -> Option<&Arc<Caller>> {
        let given = digest(token);
        let mut found = None;
        for (d, caller) in &self.tokens {
            if bool::from(d.ct_eq(&given)) {
                found = Some(caller);
            }
        }
        found
    }

    /// Admits or refuses a call to `path`. `Ok(None)` for open methods and when checks are off; otherwise the caller.
    pub fn check(
        &self,
        path: &str,
        headers: &HeaderMap,
        peer: Option<&PeerInfo>,
    ) -> Result<Option<Arc<Caller>>, Refusal> {
        let need = need_of(path).map(|(_, n)| n);
        if need == Some(Need::Open) || !self.enforce {
            return Ok(None);
        }
        let identity = self.identify(headers, peer)?;
        let Some(need) = need else {
            return Err(Refusal::UnknownMethod);
        };
        match (identity, need) {
            (_, Need::Open) => Ok(None),
            (Identity::Known(caller), Need::AnyCaller) => Ok(Some(Arc::clone(caller))),
            (Identity::Known(caller), Need::Role(role)) if caller.roles.contains(&role) => {
                Ok(Some(Arc::clone(caller)))
            }
            (identity, need) => Err(Refusal::RoleMissing {
                caller: match identity {
                    Identity::Known(c) => c.name.to_string(),
                    Identity::UnknownCertificate(name) => format!("certificate `{name}`"),
                },
                needs: match need {
                    Need::Role(role) => format!("the role `{role}`"),
                    Need::AnyCaller | Need::Open => "a configured caller".into(),
                },
            }),
        }
    }

    fn identify<'a>(
        &'a self,
        headers: &HeaderMap,
        peer: Option<&'a PeerInfo>,
    ) -> Result<Identity<'a>, Refusal> {
        let mut values = headers.get_all("authorization").iter();
        match (values.next(), values.next()) {
            (Some(_), Some(_)) => Err(Refusal::MalformedCredentials),
            (Some(value), None) => {
                let token = value
                    .as_bytes()
                    .strip_prefix(b"Bearer ")
                    .filter(|t| !t.is_empty())
                    .ok_or(Refusal::MalformedCredentials)?;
                self.by_token(token)
                    .map(Identity::Known)
                    .ok_or(Refusal::InvalidToken)
            }
            (None, _) => match peer.and_then(|p| p.certificate_name.as_deref()) {
                Some(name) => Ok(match self.certificates.get(name) {
                    Some(caller) => Identity::Known(caller),
                    None => Identity::UnknownCertificate(name),
                }),
                None => Err(Refusal::MissingCredentials),
            },
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn caller(name: &str, roles: &[Role]) -> Arc<Caller> {
        Arc::new(Caller {
            name: name.into(),
            roles: roles.iter().copied().collect(),
        })
    }

    fn grants() -> Grants {
        Grants::new(
            vec![
                (
                    digest(b"scoring-token-0123456789"),
                    caller("gateway", &[Role::Score]),
                ),
                (
                    digest(b"admin-token-0123456789ab"),
                    caller("ops", &[Role::Admin, Role::ReportRead]),
                ),
            ],
            [(
                "feeder.test".to_string(),
                caller("feeder", &[Role::OutcomeWrite]),
            )]
            .into_iter()
            .collect(),
        )
    }

    fn bearer(token: &str) -> HeaderMap {
        let mut h = HeaderMap::new();
        h.insert("authorization", format!("Bearer {token}").parse().unwrap());
        h
    }

    fn peer(name: Option<&str>) -> PeerInfo {
        PeerInfo {
            remote_addr: None,
            certificate_name: name.map(Arc::from),
        }
    }

    #[test]
    fn tokens_certificates_and_roles() {
        let g = grants();
        let score = "/probity.v1.Scoring/Score";
        let ok = g
            .check(score, &bearer("scoring-token-0123456789"), None)
            .unwrap();
        assert_eq!(ok.unwrap().name.as_ref(), "gateway");
        assert_eq!(
            g.check(score, &HeaderMap::new(), None),
            Err(Refusal::MissingCredentials)
        );
        assert_eq!(
            g.check(score, &bearer("scoring-token-012345678"), None),
            Err(Refusal::InvalidToken),
            "a prefix of a token is not the token"
        );
        let denied = g
            .check(score, &bearer("admin-token-0123456789ab"), None)
            .unwrap_err();
        assert_eq!(denied.reason(), "role_missing");
        assert_eq!(denied.caller(), Some("ops"));
        let mut basic = HeaderMap::new();
        basic.insert("authorization", "Basic b3BzOnB3".parse().unwrap());
        assert_eq!(
            g.check(score, &basic, None),
            Err(Refusal::MalformedCredentials)
        );
        // Certificates: a configured name gets its roles; an unconfigured one is known but has none.
        let write = "/probity.v1.Outcomes/RecordOutcomes";
        let p = peer(Some("feeder.test"));
        assert_eq!(
            g.check(write, &HeaderMap::new(), Some(&p))
                .unwrap()
                .unwrap()
                .name
                .as_ref(),
            "feeder"
        );
        let stranger = peer(Some("stranger.test"));
        let e = g
            .check(write, &HeaderMap::new(), Some(&stranger))
            .unwrap_err();
        assert_eq!(e.reason(), "role_missing");
        // A token decides over the certificate, also when it is wrong.
        assert_eq!(
            g.check(write, &bearer("not-a-token-at-all-xx"), Some(&p)),
            Err(Refusal::InvalidToken)
        );
        // Health is open; an unknown method is refused once the caller is known.
        assert_eq!(
            g.check("/grpc.health.v1.Health/Check", &HeaderMap::new(), None),
            Ok(None)
        );
        assert_eq!(
            g.check("/probity.v1.Scoring/Nope", &HeaderMap::new(), None),
            Err(Refusal::MissingCredentials)
        );
        assert_eq!(
            g.check(
                "/probity.v1.Scoring/Nope",
                &bearer("admin-token-0123456789ab"),
                None
            ),
            Err(Refusal::UnknownMethod)
        );
        // Open grants admit everything.
        assert_eq!(
            Grants::open().check(score, &HeaderMap::new(), None),
            Ok(None)
        );
    }

    #[test]
    fn every_role_reaches_its_methods_only() {
        for role in Role::ALL {
            let g = Grants::new(
                vec![(digest(b"t-0123456789abcdef"), caller("c", &[role]))],
                HashMap::new(),
            );
            for (path, need) in METHODS {
                let result = g.check(path, &bearer("t-0123456789abcdef"), None);
                let allowed = match need {
                    Need::Open | Need::AnyCaller => true,
                    Need::Role(r) => *r == role,
                };
                assert_eq!(result.is_ok(), allowed, "{role} on {path}: {result:?}");
            }
        }
    }
}
