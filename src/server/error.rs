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
    /// A session of that name exists (with another definition).
    #[error("a session named '{0}' already exists with a different definition")]
    SessionExists(String),
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
    /// The server is shutting down.
    #[error("the server is shutting down")]
    ShuttingDown,
    /// A bug or an I/O failure on the server.
    #[error("internal error: {0}")]
    Internal(String),
}

impl From<ServiceError> for tonic::Status {
    fn from(e: ServiceError) -> tonic::Status {
        use tonic::Code;
        let code = match &e {
            ServiceError::UnknownSession(_) | ServiceError::UnknownRefSet(_) => Code::NotFound,
            ServiceError::SessionExists(_) | ServiceError::RefSetExists(_) => Code::AlreadyExists,
            ServiceError::Name(_) | ServiceError::Invalid(_) | ServiceError::Input(_) => Code::InvalidArgument,
            ServiceError::PathDenied(_) => Code::PermissionDenied,
            ServiceError::Limit { .. } => Code::ResourceExhausted,
            ServiceError::ProducerBusy { .. } => Code::FailedPrecondition,
            ServiceError::ShuttingDown => Code::Unavailable,
            ServiceError::Internal(_) => Code::Internal,
        };
        tonic::Status::new(code, e.to_string())
    }
}

/// Result of a service operation.
pub type Result<T> = std::result::Result<T, ServiceError>;
