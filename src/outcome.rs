//! How a step ended: one type for every part that makes or takes a step.
//!
//! A step is made by the pipeline ([`crate::products::run_step`]), in a step
//! process or a batch job that records it ([`crate::service::batch`]), and
//! taken by the service, which publishes it or decides what to do next
//! ([`crate::service::decide`]) and records that in its ledger. Each stage
//! holds something different once the step is made: the file written, the
//! files staged for publication, the publication itself. So the type is
//! generic over that one thing, `M`, and every way of failing is the same
//! variant everywhere ([`StepOutcome::failure`] hands it to the next stage).

use serde::{Deserialize, Serialize};
use std::path::PathBuf;

/// How a step ended. `M` is what a made step holds at this stage.
///
/// In a record (a job's `result.json`) it is written as an object tagged by
/// `outcome`: `{"outcome": "made", ...M's fields}` or
/// `{"outcome": "input_failed", "reason": ...}`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "outcome", rename_all = "snake_case")]
pub enum StepOutcome<M> {
    /// Products made.
    Made(M),
    /// Nothing could be made from the input: the input is at fault, trying
    /// again with the same input makes nothing either.
    InputFailed {
        /// Why.
        reason: String,
    },
    /// The products could not be written (disk full, permission denied):
    /// worth trying again.
    OutputFailed {
        /// Why.
        reason: String,
    },
    /// An input could not be read as catalogued (replaced, truncated or
    /// removed since): worth trying again, in the end without it.
    Vanished {
        /// The file.
        #[serde(with = "crate::escape::serde_path")]
        file: PathBuf,
        /// Why.
        reason: String,
    },
    /// A defect in leeward (a caught panic): reported, not retried.
    Internal {
        /// What.
        reason: String,
    },
    /// A batch job ended without a usable result (failed, cancelled, timed
    /// out, lost, could not write or read, or its staged files did not
    /// check): the scheduler's state or leeward's word for it, and why.
    JobFailed {
        /// The scheduler's final state, or what leeward found.
        state: String,
        /// Why.
        reason: String,
    },
}

/// What a pipeline run holds before it says more: nothing could be made.
impl<M> Default for StepOutcome<M> {
    fn default() -> Self {
        StepOutcome::InputFailed {
            reason: "nothing could be made from the input".into(),
        }
    }
}

impl<M> StepOutcome<M> {
    /// What a made step holds, if it was made.
    pub fn made(&self) -> Option<&M> {
        match self {
            StepOutcome::Made(m) => Some(m),
            _ => None,
        }
    }

    /// The same failure for the next stage, or None when the step was made.
    pub fn failure<N>(&self) -> Option<StepOutcome<N>> {
        Some(match self {
            StepOutcome::Made(_) => return None,
            StepOutcome::InputFailed { reason } => StepOutcome::InputFailed {
                reason: reason.clone(),
            },
            StepOutcome::OutputFailed { reason } => StepOutcome::OutputFailed {
                reason: reason.clone(),
            },
            StepOutcome::Vanished { file, reason } => StepOutcome::Vanished {
                file: file.clone(),
                reason: reason.clone(),
            },
            StepOutcome::Internal { reason } => StepOutcome::Internal {
                reason: reason.clone(),
            },
            StepOutcome::JobFailed { state, reason } => StepOutcome::JobFailed {
                state: state.clone(),
                reason: reason.clone(),
            },
        })
    }

    /// Why nothing was made, or None when it was.
    pub fn reason(&self) -> Option<&str> {
        match self {
            StepOutcome::Made(_) => None,
            StepOutcome::InputFailed { reason }
            | StepOutcome::OutputFailed { reason }
            | StepOutcome::Vanished { reason, .. }
            | StepOutcome::Internal { reason }
            | StepOutcome::JobFailed { reason, .. } => Some(reason),
        }
    }

    /// True when the products were made but could not be written: worth
    /// trying again, unlike a problem with the input.
    pub fn output_failed(&self) -> bool {
        matches!(self, StepOutcome::OutputFailed { .. })
    }

    /// A few words for logs: "made", "input failed", ...
    pub fn word(&self) -> &'static str {
        match self {
            StepOutcome::Made(_) => "made",
            StepOutcome::InputFailed { .. } => "input failed",
            StepOutcome::OutputFailed { .. } => "output failed",
            StepOutcome::Vanished { .. } => "input vanished",
            StepOutcome::Internal { .. } => "internal error",
            StepOutcome::JobFailed { .. } => "job failed",
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
    struct Files {
        product: String,
    }

    /// The record's shape is what step processes and batch jobs of another
    /// build read and write: the tag beside the made step's own fields.
    #[test]
    fn a_record_is_tagged_by_outcome_with_the_made_fields_beside_it() {
        let made: StepOutcome<Files> = StepOutcome::Made(Files {
            product: "a.nc".into(),
        });
        let text = serde_json::to_string(&made).unwrap();
        assert_eq!(text, r#"{"outcome":"made","product":"a.nc"}"#);
        assert_eq!(
            serde_json::from_str::<StepOutcome<Files>>(&text).unwrap(),
            made
        );
        let gone: StepOutcome<Files> = StepOutcome::Vanished {
            file: PathBuf::from(
                <std::ffi::OsString as std::os::unix::ffi::OsStringExt>::from_vec(
                    b"in\xff.grb2".to_vec(),
                ),
            ),
            reason: "truncated".into(),
        };
        let text = serde_json::to_string(&gone).unwrap();
        assert!(text.starts_with(r#"{"outcome":"vanished","file":"in\\xff.grb2""#));
        assert_eq!(
            serde_json::from_str::<StepOutcome<Files>>(&text).unwrap(),
            gone
        );
    }

    #[test]
    fn each_stage_hands_on_its_failures_unchanged() {
        let failed: StepOutcome<u8> = StepOutcome::OutputFailed {
            reason: "disk full".into(),
        };
        let next: StepOutcome<u32> = failed.failure().unwrap();
        assert_eq!(next.reason(), Some("disk full"));
        assert!(next.output_failed());
        let gone: StepOutcome<u8> = StepOutcome::Vanished {
            file: PathBuf::from("/in/a.grb2"),
            reason: "truncated".into(),
        };
        assert_eq!(
            gone.failure::<u32>(),
            Some(StepOutcome::Vanished {
                file: PathBuf::from("/in/a.grb2"),
                reason: "truncated".into(),
            })
        );
        assert_eq!(StepOutcome::Made(1u8).failure::<u32>(), None);
        assert_eq!(StepOutcome::Made(3u8).made(), Some(&3));
        assert_eq!(
            StepOutcome::<u8>::Internal { reason: "x".into() }.word(),
            "internal error"
        );
        assert_eq!(StepOutcome::<u8>::default().made(), None);
    }
}
