//! Refusals made below the handlers: by the gRPC layer (a body that is not the method's protobuf message, a message
//! over `limits.max_message_bytes`) or by a call ending before its answer (the deadline, or the client went away).
//! The handlers count what they answer in `probity_grpc_requests_total`; these never reach a handler, so this
//! layer counts them there too (route label empty), and logs them at most once per [`LOG_EVERY`] per kind with the
//! number left out since the last line, so a flood of them cannot flood the log.
//!
//! Codes follow the gRPC status table (grpc/grpc doc/statuscodes.md): a request body that cannot be parsed is
//! INTERNAL, a message larger than the server accepts is RESOURCE_EXHAUSTED. The gRPC library answers the second
//! with OUT_OF_RANGE; this layer rewrites that answer, naming the limit's configuration key.

use std::collections::HashMap;
use std::future::Future;
use std::pin::Pin;
use std::sync::Mutex;
use std::task::{Context, Poll};
use std::time::{Duration, Instant};

use tonic::codegen::http;
use tower::{Layer, Service, ServiceExt as _};

use crate::serve::metrics;
use crate::serve::security::access::need_of;

/// Longest silence of one kind of refusal in the log while refusals of that kind go on.
pub const LOG_EVERY: Duration = Duration::from_secs(10);

/// Per (method, reason): when the last line was written and how many were left out since.
type Seen = HashMap<(&'static str, &'static str), (Instant, u64)>;

/// One kind of refusal: when its next log line is due, per (method, reason), and how many went unlogged since. The
/// keys are `'static` labels (methods from the access table, fixed reasons), so the table stays bounded.
pub struct Throttle {
    what: &'static str,
    seen: Mutex<Option<Seen>>,
}

impl Throttle {
    /// A throttle for refusals described as `what`.
    pub const fn new(what: &'static str) -> Throttle {
        Throttle {
            what,
            seen: Mutex::new(None),
        }
    }

    /// What this throttle's refusals are, for the log line.
    pub fn what(&self) -> &'static str {
        self.what
    }

    /// `Some(refusals left out since the last line)` when a line for (`method`, `reason`) is due (none within
    /// [`LOG_EVERY`]); `None` when this one is only counted for the next line.
    pub fn admit(&self, method: &'static str, reason: &'static str) -> Option<u64> {
        let now = Instant::now();
        let mut seen = self.seen.lock().ok()?;
        let entry = seen
            .get_or_insert_with(HashMap::new)
            .entry((method, reason))
            .or_insert((now - LOG_EVERY * 2, 0));
        if now.duration_since(entry.0) >= LOG_EVERY {
            let unlogged = entry.1;
            *entry = (now, 0);
            Some(unlogged)
        } else {
            entry.1 += 1;
            None
        }
    }

    /// Logs a refusal with a bounded `detail`, when one is due.
    fn warn(&self, method: &'static str, detail: &str) {
        if let Some(unlogged) = self.admit(method, "") {
            tracing::warn!(
                method,
                detail,
                unlogged_since_last = unlogged,
                "{}",
                self.what
            );
        }
    }
}

static UNDECODABLE: Throttle = Throttle::new("request body is not the method's message");
static TOO_LARGE: Throttle = Throttle::new("request message over limits.max_message_bytes");
static UNANSWERED: Throttle =
    Throttle::new("call ended before its answer (deadline or client cancel)");

/// Wraps the gRPC services (inside the access check and the concurrency limit).
#[derive(Clone, Copy, Default)]
pub struct RefusalLayer;

impl<S> Layer<S> for RefusalLayer {
    type Service = RefusalService<S>;

    fn layer(&self, inner: S) -> RefusalService<S> {
        RefusalService { inner }
    }
}

/// The service [`RefusalLayer`] makes.
#[derive(Clone)]
pub struct RefusalService<S> {
    inner: S,
}

/// Counts a call whose future was dropped before it answered.
struct Unanswered {
    method: &'static str,
    started: Instant,
    answered: bool,
}

impl Drop for Unanswered {
    fn drop(&mut self) {
        if !self.answered {
            let seconds = self.started.elapsed().as_secs_f64();
            metrics::request(self.method, "", tonic::Code::Cancelled, seconds);
            UNANSWERED.warn(self.method, "");
        }
    }
}

impl<S, B> Service<http::Request<B>> for RefusalService<S>
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

    fn poll_ready(&mut self, cx: &mut Context<'_>) -> Poll<Result<(), Self::Error>> {
        self.inner.poll_ready(cx)
    }

    fn call(&mut self, request: http::Request<B>) -> Self::Future {
        // The handlers' label: the method's own name (`Score`), from the access table, so a client cannot add labels.
        let method = need_of(request.uri().path()).map_or("unknown", |(p, _)| {
            p.rsplit_once('/').map_or(p, |(_, name)| name)
        });
        let clone = self.inner.clone();
        let inner = std::mem::replace(&mut self.inner, clone);
        Box::pin(async move {
            let mut guard = Unanswered {
                method,
                started: Instant::now(),
                answered: false,
            };
            let response = inner.oneshot(request).await;
            guard.answered = true;
            response.map(|r| classify(method, guard.started, r))
        })
    }
}

/// A trailers-only answer made by the gRPC layer itself: counted, logged, and a size refusal given its table code.
fn classify(
    method: &'static str,
    started: Instant,
    response: http::Response<tonic::body::Body>,
) -> http::Response<tonic::body::Body> {
    let Some(status) = tonic::Status::from_header_map(response.headers()) else {
        return response;
    };
    let seconds = started.elapsed().as_secs_f64();
    match status.code() {
        // tonic's codec: "failed to decode Protobuf message: ..." (prost's error, naming the field).
        tonic::Code::Internal
            if status
                .message()
                .starts_with("failed to decode Protobuf message") =>
        {
            metrics::request(method, "", tonic::Code::Internal, seconds);
            UNDECODABLE.warn(method, &bounded(status.message()));
            response
        }
        // tonic's codec: "Error, decoded message length too large: found N bytes, the limit is: M bytes".
        tonic::Code::OutOfRange if status.message().contains("message length too large") => {
            metrics::request(method, "", tonic::Code::ResourceExhausted, seconds);
            TOO_LARGE.warn(method, &bounded(status.message()));
            tonic::Status::resource_exhausted(format!(
                "request message too large for limits.max_message_bytes ({})",
                status.message()
            ))
            .into_http()
        }
        _ => response,
    }
}

/// At most 200 characters of a library message, for a log line.
fn bounded(text: &str) -> String {
    match text.char_indices().nth(200) {
        Some((at, _)) => format!("{}... ({} characters)", &text[..at], text.chars().count()),
        None => text.to_string(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_size_refusal_gets_the_table_code_and_names_the_key() {
        let library = tonic::Status::out_of_range(
            "Error, decoded message length too large: found 5000000 bytes, the limit is: 4194304 bytes",
        );
        let answer = classify(
            "/probity.v1.Scoring/Score",
            Instant::now(),
            library.into_http(),
        );
        let status = tonic::Status::from_header_map(answer.headers()).unwrap();
        assert_eq!(status.code(), tonic::Code::ResourceExhausted);
        assert!(
            status.message().contains("limits.max_message_bytes"),
            "{}",
            status.message()
        );
        assert!(
            status.message().contains("found 5000000 bytes"),
            "{}",
            status.message()
        );
        // Any other answer passes unchanged.
        let ours = tonic::Status::out_of_range("rows[2].named: value out of range");
        let answer = classify(
            "/probity.v1.Scoring/Score",
            Instant::now(),
            ours.into_http(),
        );
        let status = tonic::Status::from_header_map(answer.headers()).unwrap();
        assert_eq!(status.code(), tonic::Code::OutOfRange);
    }

    #[test]
    fn one_line_per_method_and_reason_then_a_count() {
        let t = Throttle::new("test refusal");
        assert_eq!(t.admit("/a", "x"), Some(0));
        assert_eq!(t.admit("/a", "x"), None);
        assert_eq!(t.admit("/a", "x"), None);
        // Another method or reason has its own line.
        assert_eq!(t.admit("/b", "x"), Some(0));
        assert_eq!(t.admit("/a", "y"), Some(0));
    }

    #[test]
    fn long_library_messages_are_cut_for_the_log() {
        let text = "x".repeat(1000);
        let cut = bounded(&text);
        assert!(
            cut.len() < 240 && cut.ends_with("(1000 characters)"),
            "{cut}"
        );
        assert_eq!(bounded("short"), "short");
    }
}
