//! Which version of a model is active, and which versions stay loaded: pure decisions over a
//! [`ModelSlot`], so they can be tested without files or threads.
//!
//! - A version is a *candidate* when it can answer or be loaded again: ready (and its file, if
//!   it came from one, is still there), or retired with its file still there; not refused, and
//!   not held back by an operator.
//! - The active version is the pinned one when it is a candidate, else the highest candidate.
//!   A retired candidate must be loaded again before it can become active
//!   ([`Desired::Load`]).
//! - When no candidate is left (the last file was removed, the last version retired by an
//!   operator), the active version keeps answering unless the policy says `retire_last`.
//! - After a switch, versions that are neither active nor (with `keep_previous`) the one active
//!   just before are released.

use std::collections::BTreeMap;
use std::path::PathBuf;
use std::sync::Arc;

use super::{ModelSlot, ModelVersion, Settled, VersionSlot, VersionState};
use crate::bundle::version::compare_versions;

/// The rules for choosing and keeping versions.
#[derive(Clone, Debug, Default)]
pub struct Policy {
    /// Model name → version held active whatever higher versions exist.
    pub pins: BTreeMap<String, String>,
    /// Keep the version that was active before the current one loaded, as an instant rollback
    /// target. Otherwise it is released once its last batch is done, and rolling back loads it
    /// from its file again.
    pub keep_previous: bool,
    /// Let removing a model's last file (or retiring its last version) stop the model. By
    /// default the last version keeps answering.
    pub retire_last: bool,
}

/// What should be active.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum Desired {
    /// No version can answer.
    Nothing,
    /// This ready version.
    Ready(String),
    /// This retired version, once loaded again from its file.
    Load { version: String, file: PathBuf },
}

/// A version that came from a file whose file is still there, or that came from memory.
fn present(v: &VersionSlot) -> bool {
    v.file.is_none() || v.file_present
}

fn candidate(v: &VersionSlot, pinned: Option<&str>) -> bool {
    if v.held_back && pinned != Some(v.version.as_str()) {
        return false;
    }
    match v.state {
        VersionState::Ready => present(v),
        VersionState::Retired { .. } => v.file.is_some() && v.file_present,
        VersionState::Loading | VersionState::Refused(_) => false,
    }
}

/// What the policy wants active in `slot`.
pub fn desired(slot: &ModelSlot) -> Desired {
    let pinned = slot.pinned.as_deref();
    let candidates: Vec<&VersionSlot> = slot
        .versions
        .iter()
        .filter(|v| candidate(v, pinned))
        .collect();
    let target = pinned
        .and_then(|p| candidates.iter().find(|v| v.version == p))
        .or_else(|| {
            candidates
                .iter()
                .max_by(|a, b| compare_versions(&a.version, &b.version))
        });
    match target {
        Some(v) if v.model.is_some() => Desired::Ready(v.version.clone()),
        Some(v) => match &v.file {
            Some(file) => Desired::Load {
                version: v.version.clone(),
                file: file.clone(),
            },
            // `candidate` admits a version without a model only when it has a file.
            None => Desired::Nothing,
        },
        None => Desired::Nothing,
    }
}

/// Applies [`desired`] (when it names a ready version, or nothing) and releases what is no
/// longer needed. The caller marks the released versions retired and drains their queues.
pub(super) fn settle(slot: &mut ModelSlot, policy: &Policy) -> Settled {
    let current = slot.active.as_ref().map(|m| m.version.clone());
    let target = match desired(slot) {
        Desired::Ready(v) => Some(v),
        // Only reached if a caller settles before loading; keep what answers.
        Desired::Load { .. } => current.clone(),
        Desired::Nothing if policy.retire_last => None,
        Desired::Nothing => current.clone(),
    };
    let mut settled = Settled::default();
    if target != current {
        slot.active = target
            .as_deref()
            .and_then(|t| slot.get(t))
            .and_then(|v| v.model.clone());
        if let Some(to) = &target {
            settled.switched = Some((current.clone(), to.clone()));
        }
        if current.is_some() {
            slot.previous = current.clone();
        }
    }
    let active = slot.active.as_ref().map(|m| m.version.clone());
    let pinned = slot.pinned.clone();
    // The rollback target: the version active before this one; when there was none (the first
    // settle after start), the highest ready version below the active one.
    let keep_previous = if policy.keep_previous {
        slot.previous.clone().or_else(|| {
            slot.versions
                .iter()
                .filter(|v| v.model.is_some() && candidate(v, pinned.as_deref()))
                .filter(|v| active.as_deref() != Some(v.version.as_str()))
                .filter(|v| {
                    active
                        .as_deref()
                        .is_none_or(|a| compare_versions(&v.version, a) == std::cmp::Ordering::Less)
                })
                .map(|v| v.version.clone())
                .max_by(|a, b| compare_versions(a, b))
        })
    } else {
        None
    };
    let mut released: Vec<(Arc<ModelVersion>, String)> = Vec::new();
    for v in slot.versions.iter_mut() {
        if v.model.is_none() {
            continue;
        }
        let is_active = active.as_deref() == Some(v.version.as_str());
        if is_active {
            v.note = if present(v) {
                String::new()
            } else {
                "its file was removed; it keeps answering as the model's last version (setting retire_last)".into()
            };
            continue;
        }
        let kept =
            keep_previous.as_deref() == Some(v.version.as_str()) && candidate(v, pinned.as_deref());
        if kept {
            continue;
        }
        let reason = if !present(v) {
            "its file was removed".to_string()
        } else if v.held_back {
            "retired by an operator".to_string()
        } else {
            match &active {
                Some(a) => format!("superseded by {a}"),
                None => "the model was retired".to_string(),
            }
        };
        // `model.is_none()` was ruled out above.
        if let Some(m) = v.model.take() {
            released.push((m, reason.clone()));
        }
        v.state = VersionState::Retired { reason };
        v.note.clear();
    }
    settled.released = released;
    settled
}

#[cfg(test)]
mod tests {
    use super::*;

    fn slot(version: &str, state: VersionState, file: bool) -> VersionSlot {
        VersionSlot {
            version: version.into(),
            state,
            model: None,
            origin: format!("{version}.cvb"),
            file: file.then(|| PathBuf::from(format!("{version}.cvb"))),
            file_present: file,
            bundle_sha256: String::new(),
            held_back: false,
            note: String::new(),
        }
    }

    fn retired(version: &str) -> VersionSlot {
        slot(
            version,
            VersionState::Retired {
                reason: String::new(),
            },
            true,
        )
    }

    #[test]
    fn highest_candidate_wins_and_a_pin_overrides_it() {
        // The ordering of "1.10" above "1.9" is the version rule of bundle::version.
        let mut s = ModelSlot {
            versions: vec![retired("1.9"), retired("1.10"), retired("2")],
            ..ModelSlot::default()
        };
        s.versions[2].state = VersionState::Refused(super::super::Refusal::new(
            super::super::LoadStep::Verify,
            "bad",
        ));
        assert_eq!(
            desired(&s),
            Desired::Load {
                version: "1.10".into(),
                file: "1.10.cvb".into()
            }
        );
        s.pinned = Some("1.9".into());
        assert!(matches!(desired(&s), Desired::Load { version, .. } if version == "1.9"));
        // A held-back version is skipped unless pinned.
        s.pinned = None;
        s.versions[1].held_back = true;
        assert!(matches!(desired(&s), Desired::Load { version, .. } if version == "1.9"));
        s.versions[0].file_present = false;
        assert_eq!(desired(&s), Desired::Nothing);
    }
}
