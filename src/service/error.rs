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
    #[error("sample {index}: {source}{}", limit_setting(source))]
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
                PrepareError::EncodedTooLarge { .. }
                | PrepareError::TooManyPixels { .. }
                | PrepareError::ResizeTooLarge { .. }
                | PrepareError::DecoderLimit { .. } => Code::ResourceExhausted,
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

/// The setting a sample's limit comes from, for the client's message (the preparation code
/// knows the limit's value, not what the server calls it).
fn limit_setting(e: &PrepareError) -> &'static str {
    match e {
        PrepareError::EncodedTooLarge { .. } => " (setting max_image_bytes)",
        // The decoder's memory budget is derived from max_image_pixels (prepare::decode).
        PrepareError::TooManyPixels { .. }
        | PrepareError::ResizeTooLarge { .. }
        | PrepareError::DecoderLimit { .. } => " (setting max_image_pixels)",
        _ => "",
    }
}

impl From<ServiceError> for Status {
    fn from(e: ServiceError) -> Status {
        Status::new(e.code(), e.to_string())
    }
}

/// An error and its sources on one line. tonic's transport errors say only "transport error";
/// the reason (a refused connection, an unknown certificate authority, rustls' complaint about
/// a key) sits a level or two down.
pub fn error_chain(e: &dyn std::error::Error) -> String {
    with_sources(e.to_string(), e.source())
}

/// `top`, then each error of the chain from `first` on that says something `top` does not.
pub fn with_sources(top: String, first: Option<&(dyn std::error::Error + 'static)>) -> String {
    let mut s = top;
    let mut next = first;
    while let Some(cause) = next {
        let text = cause.to_string();
        if !s.contains(&text) {
            s.push_str(": ");
            s.push_str(&text);
        }
        next = cause.source();
    }
    s
}
