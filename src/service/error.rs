//! The service's failures and their gRPC status codes: the one place where library errors
//! become `tonic::Status`.

use tonic::{Code, Status};

use crate::prepare::PrepareError;
use crate::registry::LookupError;
use crate::scheduler::{ComputeError, SubmitError};

/// Everything a request can fail with.
#[derive(Debug, thiserror::Error)]
pub enum ServiceError {
    #[error(transparent)]
    Lookup(#[from] LookupError),
    #[error("the request has no samples")]
    NoSamples,
    #[error(
        "{count} samples exceed the limit of {limit} per request (setting max_samples_per_request)"
    )]
    TooManySamples { count: usize, limit: usize },
    #[error("sample {index}: {source}")]
    Sample { index: usize, source: PrepareError },
    #[error("sample {index}: empty sample (set encoded_image or tensor)")]
    EmptySample { index: usize },
    #[error(transparent)]
    Submit(#[from] SubmitError),
    #[error(transparent)]
    Compute(#[from] ComputeError),
    #[error(
        "the server is shutting down and takes no new requests; send this one to another replica"
    )]
    ShuttingDown,
    #[error("internal error: {0}")]
    Internal(String),
}

impl ServiceError {
    /// The gRPC code a client sees.
    pub fn code(&self) -> Code {
        match self {
            ServiceError::Lookup(LookupError::NoModels | LookupError::NotServing { .. }) => {
                Code::Unavailable
            }
            ServiceError::Lookup(LookupError::NoDefault { .. }) => Code::InvalidArgument,
            ServiceError::Lookup(_) => Code::NotFound,
            ServiceError::NoSamples | ServiceError::EmptySample { .. } => Code::InvalidArgument,
            ServiceError::TooManySamples { .. } => Code::ResourceExhausted,
            ServiceError::Sample { source, .. } => match source {
                PrepareError::EncodedTooLarge { .. } | PrepareError::TooManyPixels { .. } => {
                    Code::ResourceExhausted
                }
                _ => Code::InvalidArgument,
            },
            ServiceError::Submit(SubmitError::Full { .. }) => Code::ResourceExhausted,
            ServiceError::Compute(ComputeError::DeadlineExceeded { .. }) => Code::DeadlineExceeded,
            // Reached only after choosing again failed twice (a request naming no version), or
            // for a request naming the version that was retired: either way, try again.
            ServiceError::Submit(SubmitError::Closed | SubmitError::Retired { .. }) => {
                Code::Unavailable
            }
            // Nothing of the request was done: safe to send again (doc/statuscodes.md of the
            // gRPC project: UNAVAILABLE is the retryable, transient code).
            ServiceError::ShuttingDown => Code::Unavailable,
            ServiceError::Compute(_) | ServiceError::Internal(_) => Code::Internal,
        }
    }
}

impl From<ServiceError> for Status {
    fn from(e: ServiceError) -> Status {
        Status::new(e.code(), e.to_string())
    }
}
