//! Domain errors of the service and their one mapping to gRPC status codes.

use crate::refs::InputError;
use crate::session::NameError;

/// Everything a request can fail with.
#[derive(Debug, thiserror::Error)]
pub enum ServiceError {
    /// No session of that name.
    #[error("no session named '{0}'")]
    UnknownSession(String),
    /// No reference set of that name.
    #[error("no reference set named '{0}'")]
    UnknownRefSet(String),
    /// A session of that name exists (`differs`: the parts of its definition that differ
    /// from the request; empty when only `if_not_exists` was missing).
    #[error("a session named '{name}' already exists{}", describe_differences(differs))]
    SessionExists {
        /// Session name.
        name: String,
        /// What differs: "reference set", "configuration", "labels", "window".
        differs: Vec<&'static str>,
    },
    /// A reference set of that name exists and `replace` was not set.
    #[error("a reference set named '{0}' already exists (set replace to replace it)")]
    RefSetExists(String),
    /// Bad name or labels.
    #[error(transparent)]
    Name(#[from] NameError),
    /// A field is missing or malformed.
    #[error("{0}")]
    Invalid(String),
    /// The reference-set input does not parse.
    #[error("{0}")]
    Input(#[from] InputError),
    /// A server-side path that leaves the reference-set directory, or loading is disabled.
    #[error("{0}")]
    PathDenied(String),
    /// A configured limit was exceeded.
    #[error("{what} exceeds the limit of {limit} (config key {key})")]
    Limit {
        /// What was too large.
        what: String,
        /// The limit.
        limit: u64,
        /// Its configuration key.
        key: &'static str,
    },
    /// The same producer is already streaming into the session.
    #[error("producer '{producer}' already has a live stream into session '{session}'")]
    ProducerBusy {
        /// Session name.
        session: String,
        /// Producer id.
        producer: String,
    },
    /// Two sessions that cannot be compared (another reference-set version or configuration).
    #[error("{0}")]
    NotComparable(String),
    /// A batch sent to a replica its producer does not belong to (the producer affinity rule).
    #[error("{0}")]
    WrongReplica(String),
    /// No valid credentials on a call that needs them.
    #[error("{0}")]
    Unauthenticated(String),
    /// Valid credentials without the permission the call needs.
    #[error("{0}")]
    Forbidden(String),
    /// A listener with no configurable limit is full.
    #[error("{0}")]
    Busy(String),
    /// The server is shutting down.
    #[error("the server is shutting down")]
    ShuttingDown,
    /// The store cannot be written: the batch was not applied durably, and the server stops.
    #[error("the server cannot write its store and is stopping (the batch was not acknowledged; send it again): {0}")]
    StoreFailed(String),
    /// A bug or an I/O failure on the server.
    #[error("internal error: {0}")]
    Internal(String),
}

fn describe_differences(differs: &[&str]) -> String {
    if differs.is_empty() {
        " (ask with if_not_exists to reuse it)".into()
    } else {
        format!(" with another definition (differs in {})", differs.join(", "))
    }
}

impl From<ServiceError> for tonic::Status {
    fn from(e: ServiceError) -> tonic::Status {
        use tonic::Code;
        let code = match &e {
            ServiceError::UnknownSession(_) | ServiceError::UnknownRefSet(_) => Code::NotFound,
            ServiceError::SessionExists { .. } | ServiceError::RefSetExists(_) => Code::AlreadyExists,
            ServiceError::Name(_) | ServiceError::Invalid(_) | ServiceError::Input(_) => Code::InvalidArgument,
            ServiceError::PathDenied(_) | ServiceError::Forbidden(_) => Code::PermissionDenied,
            ServiceError::Unauthenticated(_) => Code::Unauthenticated,
            ServiceError::Limit { .. } | ServiceError::Busy(_) => Code::ResourceExhausted,
            ServiceError::ProducerBusy { .. } | ServiceError::NotComparable(_) | ServiceError::WrongReplica(_) => Code::FailedPrecondition,
            ServiceError::ShuttingDown | ServiceError::StoreFailed(_) => Code::Unavailable,
            ServiceError::Internal(_) => Code::Internal,
        };
        tonic::Status::new(code, e.to_string())
    }
}

/// Result of a service operation.
pub type Result<T> = std::result::Result<T, ServiceError>;

/// tonic's own refusal of a message past `max_message_bytes` (OUT_OF_RANGE, with a text naming
/// no setting) as the limit error every other limit gives: RESOURCE_EXHAUSTED naming the key.
pub fn name_message_limit(s: &tonic::Status, max: usize) -> Option<tonic::Status> {
    if s.code() != tonic::Code::OutOfRange {
        return None;
    }
    let m = s.message();
    let what = if m.contains("decoded message length too large") {
        "message"
    } else if m.contains("encoded message length too large") {
        "response"
    } else {
        return None;
    };
    let found = m.split("found ").nth(1).and_then(|r| r.split(' ').next()).unwrap_or("?");
    Some(ServiceError::Limit { what: format!("{what} of {found} bytes"), limit: max as u64, key: "max_message_bytes" }.into())
}

/// Wraps a generated gRPC server so that a trailers-only answer of tonic's message-size refusal
/// becomes [`name_message_limit`]'s status (unary and client-streaming calls are decoded before
/// a handler runs; the bidirectional stream maps the error itself).
#[derive(Clone)]
pub struct NameMessageLimit<S> {
    inner: S,
    max: usize,
}

impl<S> NameMessageLimit<S> {
    /// Wrap `inner`, whose message limit is `max` bytes.
    pub fn new(inner: S, max: usize) -> Self {
        NameMessageLimit { inner, max }
    }
}

impl<S: tonic::server::NamedService> tonic::server::NamedService for NameMessageLimit<S> {
    const NAME: &'static str = S::NAME;
}

impl<S, B> tonic::codegen::Service<tonic::codegen::http::Request<B>> for NameMessageLimit<S>
where
    S: tonic::codegen::Service<tonic::codegen::http::Request<B>, Response = tonic::codegen::http::Response<tonic::body::Body>, Error = std::convert::Infallible>,
    S::Future: Send + 'static,
{
    type Response = tonic::codegen::http::Response<tonic::body::Body>;
    type Error = std::convert::Infallible;
    type Future = tonic::codegen::BoxFuture<Self::Response, Self::Error>;

    fn poll_ready(&mut self, cx: &mut std::task::Context<'_>) -> std::task::Poll<std::result::Result<(), Self::Error>> {
        self.inner.poll_ready(cx)
    }

    fn call(&mut self, req: tonic::codegen::http::Request<B>) -> Self::Future {
        let (call, max) = (self.inner.call(req), self.max);
        Box::pin(async move {
            let resp = call.await?;
            let renamed = tonic::Status::from_header_map(resp.headers()).and_then(|s| name_message_limit(&s, max));
            Ok(match renamed {
                Some(s) => s.into_http(),
                None => resp,
            })
        })
    }
}
