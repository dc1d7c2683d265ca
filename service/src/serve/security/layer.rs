//! The tower layer that admits or refuses every gRPC call before it reaches a service: the one place access is
//! enforced. It reads the method path, the `authorization` metadata and the connection's [`PeerInfo`], asks
//! [`Grants::check`](crate::serve::security::access::Grants::check), and either passes the call on with its
//! [`Caller`](crate::serve::security::access::Caller) in the request extensions or answers with the refusal's
//! status (through [`crate::serve::status`], like every other error). Each refusal is logged with the method, the
//! reason, the caller's configured name when known and the peer address (at most one line per method and reason in ten seconds, with
//! the number left out since), and counted in `probity_auth_refusals_total{reason, method}`; the token itself is never
//! logged.

use std::future::Future;
use std::pin::Pin;
use std::sync::Arc;
use std::task::{Context, Poll};

use tonic::codegen::http;
use tower::{Layer, Service, ServiceExt as _};

use crate::serve::error::ServeError;
use crate::serve::metrics;
use crate::serve::refusals::Throttle;
use crate::serve::security::access::{need_of, PeerInfo, RENAMED_METHODS};
use crate::serve::security::Security;

/// The refusal log line, at most once per [`crate::serve::refusals::LOG_EVERY`] with the count left out since: a
/// client retrying without credentials cannot flood the log.
static REFUSED: Throttle = Throttle::new("call refused");

/// Wraps the gRPC services with the access check.
#[derive(Clone)]
pub struct AccessLayer {
    security: Arc<Security>,
}

impl AccessLayer {
    /// The layer over `security`'s current grants.
    pub fn new(security: Arc<Security>) -> AccessLayer {
        AccessLayer { security }
    }
}

impl<S> Layer<S> for AccessLayer {
    type Service = AccessService<S>;

    fn layer(&self, inner: S) -> AccessService<S> {
        AccessService {
            inner,
            security: Arc::clone(&self.security),
        }
    }
}

/// The service [`AccessLayer`] makes.
#[derive(Clone)]
pub struct AccessService<S> {
    inner: S,
    security: Arc<Security>,
}

impl<S, B> Service<http::Request<B>> for AccessService<S>
where
    S: Service<http::Request<B>, Response = http::Response<tonic::body::Body>>
        + Clone
        + Send
        + 'static,
    S::Future: Send + 'static,
    S::Error: Send + 'static,
    B: Send + 'static,
{
    type Response = http::Response<tonic::body::Body>;
    type Error = S::Error;
    type Future = Pin<Box<dyn Future<Output = Result<Self::Response, Self::Error>> + Send>>;

    // Readiness of the inner service is awaited in `call`, only for admitted calls: a refused call never takes a
    // concurrency slot.
    fn poll_ready(&mut self, _cx: &mut Context<'_>) -> Poll<Result<(), Self::Error>> {
        Poll::Ready(Ok(()))
    }

    fn call(&mut self, mut request: http::Request<B>) -> Self::Future {
        if let Some((old, new)) = RENAMED_METHODS
            .iter()
            .find(|(old, _)| *old == request.uri().path())
        {
            tracing::warn!(
                method = old,
                renamed = new,
                "call to a renamed method refused"
            );
            let status = tonic::Status::unimplemented(format!(
                "{} was renamed {}",
                old.trim_start_matches('/'),
                new.trim_start_matches('/')
            ));
            return Box::pin(std::future::ready(Ok(status.into_http())));
        }
        let peer = request.extensions().get::<PeerInfo>();
        let checked = self
            .security
            .grants()
            .check(request.uri().path(), request.headers(), peer);
        match checked {
            Ok(caller) => {
                if let Some(caller) = caller {
                    request.extensions_mut().insert(caller);
                }
                let clone = self.inner.clone();
                let inner = std::mem::replace(&mut self.inner, clone);
                Box::pin(async move { inner.oneshot(request).await })
            }
            Err(refusal) => {
                let method = need_of(request.uri().path()).map_or("unknown", |(p, _)| p);
                let peer = peer
                    .and_then(|p| p.remote_addr)
                    .or_else(|| {
                        request
                            .extensions()
                            .get::<tonic::transport::server::TcpConnectInfo>()
                            .and_then(|i| i.remote_addr())
                    })
                    .map(|a| a.to_string())
                    .unwrap_or_default();
                metrics::auth_refused(refusal.reason(), method);
                if let Some(unlogged) = REFUSED.admit(method, refusal.reason()) {
                    tracing::warn!(
                        method,
                        reason = refusal.reason(),
                        caller = refusal.caller().unwrap_or("-"),
                        %peer,
                        unlogged_since_last = unlogged,
                        "call refused"
                    );
                }
                let status = tonic::Status::from(ServeError::from(refusal));
                Box::pin(std::future::ready(Ok(status.into_http())))
            }
        }
    }
}
