//! The one place where candor's errors become gRPC status codes.
//!
//! | error | code |
//! |---|---|
//! | empty, wrong-length, NaN or infinite logits; more logits than --max-classes; empty model with several loaded | INVALID_ARGUMENT |
//! | unknown model; pinned map version not loaded | NOT_FOUND |
//! | no map loaded yet | UNAVAILABLE |

use super::row::RowError;
use crate::registry::LookupError;
use tonic::{Code, Status};

/// The gRPC code for a row error.
pub fn code(e: &RowError) -> Code {
    match e {
        RowError::Lookup(LookupError::NoMaps) => Code::Unavailable,
        RowError::Lookup(LookupError::UnknownModel { .. } | LookupError::UnknownVersion { .. }) => {
            Code::NotFound
        }
        RowError::Lookup(LookupError::ModelRequired { .. })
        | RowError::EmptyLogits { .. }
        | RowError::LogitsLen { .. }
        | RowError::TooManyLogits { .. }
        | RowError::NonFinite { .. } => Code::InvalidArgument,
    }
}

impl From<RowError> for Status {
    fn from(e: RowError) -> Self {
        Status::new(code(&e), e.to_string())
    }
}

/// The per-row error message of a batch or stream.
pub fn row_error(e: &RowError, index: usize, request_id: &str) -> crate::proto::v1::RowError {
    crate::proto::v1::RowError {
        code: code(e) as i32,
        message: e.to_string(),
        request_id: request_id.to_owned(),
        index: index as u64,
    }
}

/// The status of a request refused because every in-flight slot is taken
/// (`--max-concurrent-requests`): RESOURCE_EXHAUSTED, answered at once.
pub fn overloaded(max: usize) -> Status {
    Status::resource_exhausted(format!(
        "{max} requests are in flight, the most this sidecar takes at once; retry with backoff"
    ))
}

/// The status of a request whose client deadline (`grpc-timeout`) passed before it was
/// answered: DEADLINE_EXCEEDED.
pub fn deadline_passed(timeout: std::time::Duration) -> Status {
    Status::deadline_exceeded(format!(
        "the client's deadline ({timeout:?} after the request arrived) passed"
    ))
}

/// The status of a CalibrateBatch request with more rows than `--max-batch`: INVALID_ARGUMENT.
pub fn batch_too_large(rows: usize, max: usize) -> Status {
    Status::invalid_argument(format!(
        "batch has {rows} rows; at most {max} are accepted (--max-batch)"
    ))
}

/// The gRPC status for a refused outcome.
///
/// | error | code |
/// |---|---|
/// | empty request id, label not a class of the map | INVALID_ARGUMENT |
/// | unknown or expired request id | NOT_FOUND |
/// | another label already recorded | ALREADY_EXISTS |
/// | decision log busy | RESOURCE_EXHAUSTED |
/// | decision log stopped | UNAVAILABLE |
pub fn outcome_code(e: &crate::journal::OutcomeError) -> Code {
    use crate::journal::OutcomeError as E;
    match e {
        E::EmptyId | E::LabelOutOfRange { .. } => Code::InvalidArgument,
        E::Unknown(_) => Code::NotFound,
        E::Conflict { .. } => Code::AlreadyExists,
        E::Busy => Code::ResourceExhausted,
        E::Stopped => Code::Unavailable,
    }
}

/// The gRPC status for a refused admin change.
///
/// | error | code |
/// |---|---|
/// | invalid map, canary fraction outside (0, 1] | INVALID_ARGUMENT |
/// | unknown model or version | NOT_FOUND |
/// | version exists with other content | ALREADY_EXISTS |
/// | shape differs from the active version, no history, canary/shadow = active, no store, store changed meanwhile | FAILED_PRECONDITION |
/// | store could not be written | UNAVAILABLE |
pub fn rollout_status(e: &crate::registry::RolloutError) -> Status {
    use crate::registry::RolloutError as E;
    let code = match e {
        E::InvalidMap(_) | E::BadFraction { .. } => Code::InvalidArgument,
        E::UnknownModel { .. } | E::UnknownVersion { .. } => Code::NotFound,
        E::VersionConflict { .. } => Code::AlreadyExists,
        E::ShapeMismatch { .. }
        | E::NoStore
        | E::NoHistory { .. }
        | E::IsActive { .. }
        | E::NotHonoured { .. } => Code::FailedPrecondition,
        E::Store(_) => Code::Unavailable,
    };
    Status::new(code, e.to_string())
}
