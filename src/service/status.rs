//! The one place where candor's errors become gRPC status codes.
//!
//! | error | code |
//! |---|---|
//! | empty, wrong-length, NaN or infinite logits; empty model with several loaded | INVALID_ARGUMENT |
//! | unknown model | NOT_FOUND |
//! | no map loaded yet | UNAVAILABLE |

use super::row::RowError;
use crate::registry::LookupError;
use tonic::{Code, Status};

/// The gRPC code for a row error.
pub fn code(e: &RowError) -> Code {
    match e {
        RowError::Lookup(LookupError::NoMaps) => Code::Unavailable,
        RowError::Lookup(LookupError::UnknownModel { .. }) => Code::NotFound,
        RowError::Lookup(LookupError::ModelRequired { .. })
        | RowError::EmptyLogits { .. }
        | RowError::LogitsLen { .. }
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
