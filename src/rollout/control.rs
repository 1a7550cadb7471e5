//! The control service (`convoy.control.v1.Control`): an operator's calls into the rollout,
//! behind a bearer token.
//!
//! Every call passes [`TokenCheck`] first: the `authorization` header must be
//! `Bearer TOKEN` with the configured token (RFC 6750 §2.1's header form), compared in constant
//! time. Anything else is UNAUTHENTICATED before the handler runs, so a refused call changes
//! nothing. The server serves this service only on its own address, only when configured.

use std::sync::Arc;

use sha2::{Digest, Sha256};
use tonic::{Code, Request, Response, Status};

use super::{ChangeReport, Rollout, RolloutError};
use crate::service::api::control::{self as pb, control_server::Control};

/// The shortest token accepted: 16 bytes, so that guessing is hopeless even at many calls per
/// second (common practice for bearer secrets).
pub const MIN_TOKEN_LEN: usize = 16;

/// Checks the bearer token of every call.
#[derive(Clone)]
pub struct TokenCheck {
    /// SHA-256 of the expected token: comparing fixed-length digests takes the same time
    /// whatever the candidate's length or content.
    expected: [u8; 32],
}

impl TokenCheck {
    pub fn new(token: &str) -> TokenCheck {
        TokenCheck {
            expected: Sha256::digest(token.as_bytes()).into(),
        }
    }

    fn matches(&self, candidate: &[u8]) -> bool {
        let got: [u8; 32] = Sha256::digest(candidate).into();
        got.iter()
            .zip(&self.expected)
            .fold(0u8, |acc, (a, b)| acc | (a ^ b))
            == 0
    }
}

impl tonic::service::Interceptor for TokenCheck {
    fn call(&mut self, request: Request<()>) -> Result<Request<()>, Status> {
        let presented = request
            .metadata()
            .get("authorization")
            .and_then(|v| v.to_str().ok())
            // The scheme name is case-insensitive (RFC 7235 §2.1); the token is not.
            .and_then(|v| v.split_once(' '))
            .filter(|(scheme, _)| scheme.eq_ignore_ascii_case("bearer"))
            .map(|(_, token)| token);
        match presented {
            Some(token) if self.matches(token.as_bytes()) => Ok(request),
            other => {
                tracing::warn!(
                    peer = ?request.remote_addr(),
                    token = if other.is_some() { "wrong" } else { "missing" },
                    "control call refused"
                );
                Err(Status::unauthenticated(
                    "a control call needs the header `authorization: Bearer TOKEN` with the server's control token",
                ))
            }
        }
    }
}

/// The service object handed to tonic.
pub struct ControlService {
    rollout: Arc<Rollout>,
}

impl ControlService {
    pub fn new(rollout: Arc<Rollout>) -> ControlService {
        ControlService { rollout }
    }
}

fn status(e: RolloutError) -> Status {
    let code = match &e {
        RolloutError::NoFolder
        | RolloutError::NotActivated { .. }
        | RolloutError::LastVersion { .. } => Code::FailedPrecondition,
        RolloutError::Folder { .. } => Code::Unavailable,
        RolloutError::BadFileName { .. } => Code::InvalidArgument,
        RolloutError::NoSuchFile { .. } | RolloutError::Lookup(_) => Code::NotFound,
        RolloutError::Task(_) => Code::Internal,
    };
    Status::new(code, e.to_string())
}

fn reply(r: Result<ChangeReport, RolloutError>) -> Result<Response<pb::ChangeReport>, Status> {
    r.map(|r| Response::new(to_proto(&r))).map_err(status)
}

/// The wire form of a [`ChangeReport`].
pub fn to_proto(r: &ChangeReport) -> pb::ChangeReport {
    pb::ChangeReport {
        loads: r
            .loads
            .iter()
            .map(|l| pb::LoadResult {
                origin: l.origin.clone(),
                model: l.name.clone().unwrap_or_default(),
                version: l.version.clone().unwrap_or_default(),
                ok: l.result.is_ok(),
                step: l
                    .result
                    .as_ref()
                    .err()
                    .map(|r| r.step.as_str().to_string())
                    .unwrap_or_default(),
                reason: l
                    .result
                    .as_ref()
                    .err()
                    .map(|r| r.reason.clone())
                    .unwrap_or_default(),
                took_us: l.took.as_micros() as u64,
            })
            .collect(),
        switches: r
            .switches
            .iter()
            .map(|s| pb::Switch {
                model: s.model.clone(),
                from_version: s.from.clone().unwrap_or_default(),
                to_version: s.to.clone(),
                took_us: s.took.as_micros() as u64,
            })
            .collect(),
        releases: r
            .released
            .iter()
            .map(|r| pb::Release {
                model: r.model.clone(),
                version: r.version.clone(),
                reason: r.reason.clone(),
            })
            .collect(),
    }
}

fn required<'a>(field: &str, value: &'a str) -> Result<&'a str, Status> {
    if value.is_empty() {
        Err(Status::invalid_argument(format!("{field} is required")))
    } else {
        Ok(value)
    }
}

#[tonic::async_trait]
impl Control for ControlService {
    async fn rescan(
        &self,
        _request: Request<pb::RescanRequest>,
    ) -> Result<Response<pb::ChangeReport>, Status> {
        tracing::info!("control: rescan");
        reply(self.rollout.rescan().await)
    }

    async fn load_file(
        &self,
        request: Request<pb::LoadFileRequest>,
    ) -> Result<Response<pb::ChangeReport>, Status> {
        let r = request.into_inner();
        let name = required("file_name", &r.file_name)?;
        tracing::info!(file = name, "control: load file");
        reply(self.rollout.load_file(name).await)
    }

    async fn activate(
        &self,
        request: Request<pb::ActivateRequest>,
    ) -> Result<Response<pb::ChangeReport>, Status> {
        let r = request.into_inner();
        let (model, version) = (
            required("model", &r.model)?,
            required("version", &r.version)?,
        );
        tracing::info!(model, version, "control: activate");
        reply(self.rollout.activate(model, version).await)
    }

    async fn follow_highest(
        &self,
        request: Request<pb::FollowHighestRequest>,
    ) -> Result<Response<pb::ChangeReport>, Status> {
        let r = request.into_inner();
        let model = required("model", &r.model)?;
        tracing::info!(model, "control: follow highest");
        reply(self.rollout.follow_highest(model).await)
    }

    async fn retire(
        &self,
        request: Request<pb::RetireRequest>,
    ) -> Result<Response<pb::ChangeReport>, Status> {
        let r = request.into_inner();
        let (model, version) = (
            required("model", &r.model)?,
            required("version", &r.version)?,
        );
        tracing::info!(model, version, "control: retire");
        reply(self.rollout.retire(model, version).await)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use tonic::service::Interceptor;

    fn call(check: &mut TokenCheck, header: Option<&str>) -> Result<(), Code> {
        let mut req = Request::new(());
        if let Some(h) = header {
            req.metadata_mut()
                .insert("authorization", h.parse().unwrap());
        }
        check.call(req).map(|_| ()).map_err(|s| s.code())
    }

    #[test]
    fn only_the_exact_bearer_token_passes() {
        let mut check = TokenCheck::new("a-token-of-some-length");
        assert_eq!(
            call(&mut check, Some("Bearer a-token-of-some-length")),
            Ok(())
        );
        assert_eq!(
            call(&mut check, Some("bearer a-token-of-some-length")),
            Ok(())
        );
        for bad in [
            None,
            Some("Bearer a-token-of-some-lengtH"),
            Some("Bearer a-token-of-some-length "),
            Some("a-token-of-some-length"),
            Some("Basic a-token-of-some-length"),
            Some("Bearer "),
        ] {
            assert_eq!(call(&mut check, bad), Err(Code::Unauthenticated), "{bad:?}");
        }
    }
}
