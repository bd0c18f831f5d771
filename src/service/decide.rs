//! The service's decisions about a step, as pure functions of what it knows:
//! where a ready step runs, what a run's end means for the step, what a batch
//! job that ended without a result does next, and how long a retry waits.
//! The daemon ([`super::daemon`]) acts on them (records, metrics, logs,
//! threads and jobs); here they are tested one by one.

use std::time::Duration;

use super::batch::{Published, Taken};
use super::job_state::outcome as state;
use super::ledger::FailKind;
use super::settings::Executor;
use crate::outcome::StepOutcome;

/// Where a step runs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Place {
    /// A step process on this machine, on one of `service.workers`.
    Here,
    /// A batch job on the scheduler.
    Scheduler,
}

/// What is free now, for [`place`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Free {
    /// A worker on this machine.
    pub worker: bool,
    /// Room for another batch job (`service.slurm.max_jobs`).
    pub job: bool,
    /// The scheduler answers.
    pub scheduler: bool,
    /// Steps of scheduler feeds run here while it does not
    /// (`service.slurm.when_unreachable = "local"`).
    pub fallback: bool,
}

/// Where a ready step of a feed run by `executor` goes now, or None when it
/// must wait for a place: a local feed on a free worker; a scheduler feed on
/// the scheduler while it answers and has room, otherwise here if falling
/// back is allowed and a worker is free.
pub fn place(executor: Executor, free: Free) -> Option<Place> {
    match executor {
        Executor::Local => free.worker.then_some(Place::Here),
        Executor::Slurm if free.scheduler => free.job.then_some(Place::Scheduler),
        Executor::Slurm => (free.fallback && free.worker).then_some(Place::Here),
    }
}

/// A taken result as the step's outcome, by where the step ran. An unusable
/// result, or a job that could not write its products or read its input, is
/// a retry: here a retry of this machine's step, on the scheduler a new job
/// (under the job's attempts), named by the state leeward gives it.
pub fn taken_outcome(taken: Result<Taken, String>, at: Place) -> StepOutcome<Published> {
    let taken = match (taken, at) {
        (Ok(t), _) => t,
        (Err(reason), Place::Here) => return StepOutcome::OutputFailed { reason },
        (Err(reason), Place::Scheduler) => {
            return StepOutcome::JobFailed {
                state: state::UNUSABLE.into(),
                reason,
            }
        }
    };
    let host = &taken.result.host;
    match (taken.outcome, at) {
        (StepOutcome::OutputFailed { reason }, Place::Scheduler) => StepOutcome::JobFailed {
            state: state::UNWRITTEN.into(),
            reason: format!("the job on {host} could not write the products: {reason}"),
        },
        (StepOutcome::Vanished { file, reason }, Place::Scheduler) => StepOutcome::JobFailed {
            state: state::UNREADABLE.into(),
            reason: format!(
                "the job on {host} could not read {}: {reason}",
                file.display()
            ),
        },
        (o, _) => o,
    }
}

/// What the service knows of a step when a run of it ends.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Standing {
    /// Runs of it that ended in a retry so far (this one not counted).
    pub attempts: u32,
    /// Input came while it ran.
    pub more: bool,
    /// It ran with what there was at its timeout.
    pub partial: bool,
}

/// Runs that could not read an input before the step goes on without it.
pub const READS_BEFORE_DROPPING: u32 = 3;

/// What the service does with a step whose run has ended.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum AfterRun {
    /// Published: recorded, and made again with all its input if more came.
    Published,
    /// The products could not be written: an output failure is recorded and
    /// the step tried again after the back-off of `attempts`.
    RetryWrite {
        /// Runs spent, this one counted.
        attempts: u32,
    },
    /// An input could not be read, but what changed in it is already with the
    /// step: it waits again, no attempt spent.
    WaitAgain,
    /// An input could not be read: tried again after the back-off of
    /// `attempts`, without that file (and so partial) from
    /// [`READS_BEFORE_DROPPING`] runs on.
    RetryRead {
        /// Runs spent, this one counted.
        attempts: u32,
        /// Go on without the file.
        drop_file: bool,
    },
    /// Nothing can be made: recorded as failed of `kind`; made again with
    /// all its input if more came and `again_if_more`.
    Failed {
        /// Why, in the ledger's words.
        kind: FailKind,
        /// Whether input that came meanwhile makes it again.
        again_if_more: bool,
    },
    /// A batch job ended without a result: see [`after_job`].
    JobFailed,
}

/// What a step's run ending in `outcome` means for the step.
pub fn after_run<M>(outcome: &StepOutcome<M>, s: Standing) -> AfterRun {
    match outcome {
        StepOutcome::Made(_) => AfterRun::Published,
        StepOutcome::OutputFailed { .. } => AfterRun::RetryWrite {
            attempts: s.attempts + 1,
        },
        StepOutcome::Vanished { .. } if s.more => AfterRun::WaitAgain,
        StepOutcome::Vanished { .. } => AfterRun::RetryRead {
            attempts: s.attempts + 1,
            drop_file: s.attempts + 1 >= READS_BEFORE_DROPPING,
        },
        // A partial step that makes nothing lacked its input: it is missing.
        StepOutcome::InputFailed { .. } => AfterRun::Failed {
            kind: if s.partial {
                FailKind::Missing
            } else {
                FailKind::Input
            },
            again_if_more: true,
        },
        StepOutcome::Internal { .. } => AfterRun::Failed {
            kind: FailKind::Internal,
            again_if_more: false,
        },
        StepOutcome::JobFailed { .. } => AfterRun::JobFailed,
    }
}

/// What a step does after its batch job ended without a result.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum AfterJob {
    /// Input came since the job's spec was written: the step waits again and
    /// its next job is written afresh with all of it.
    WaitAgain,
    /// Submitted again after the back-off of this attempt.
    Resubmit,
    /// Every attempt is spent: the step failed.
    GiveUp,
}

/// After attempt `attempt` of `max_attempts` ended without a result.
pub fn after_job(more: bool, attempt: u32, max_attempts: u32) -> AfterJob {
    if more {
        AfterJob::WaitAgain
    } else if attempt < max_attempts {
        AfterJob::Resubmit
    } else {
        AfterJob::GiveUp
    }
}

/// The wait before retry number `attempts` (from 1): `first_s` doubled with
/// each attempt, at most `max_s` (common practice: exponential back-off).
pub fn backoff(first_s: f64, max_s: f64, attempts: u32) -> Duration {
    let exponent = attempts.saturating_sub(1).min(30) as i32;
    Duration::from_secs_f64((first_s * 2f64.powi(exponent)).min(max_s).max(0.0))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::service::batch::{JobReport, JobResult, Staged};
    use crate::service::ledger::StepTag;
    use std::path::PathBuf;

    const ALL_FREE: Free = Free {
        worker: true,
        job: true,
        scheduler: true,
        fallback: true,
    };

    #[test]
    fn a_step_goes_where_its_feed_runs_and_falls_back_only_when_allowed() {
        assert_eq!(place(Executor::Local, ALL_FREE), Some(Place::Here));
        let busy = Free {
            worker: false,
            ..ALL_FREE
        };
        assert_eq!(place(Executor::Local, busy), None);
        assert_eq!(place(Executor::Slurm, ALL_FREE), Some(Place::Scheduler));
        // The scheduler answers but has no room: wait, even with a free worker.
        let full = Free {
            job: false,
            ..ALL_FREE
        };
        assert_eq!(place(Executor::Slurm, full), None);
        // It does not answer: here if allowed and a worker is free.
        let down = Free {
            scheduler: false,
            ..ALL_FREE
        };
        assert_eq!(place(Executor::Slurm, down), Some(Place::Here));
        let no_fallback = Free {
            fallback: false,
            ..down
        };
        assert_eq!(place(Executor::Slurm, no_fallback), None);
        assert_eq!(
            place(
                Executor::Slurm,
                Free {
                    worker: false,
                    ..down
                }
            ),
            None
        );
    }

    fn standing(attempts: u32, more: bool, partial: bool) -> Standing {
        Standing {
            attempts,
            more,
            partial,
        }
    }

    fn vanished() -> StepOutcome<()> {
        StepOutcome::Vanished {
            file: PathBuf::from("/in/a.grb2"),
            reason: "truncated".into(),
        }
    }

    #[test]
    fn an_unreadable_input_is_retried_then_dropped_unless_its_news_is_already_in() {
        let s = standing(0, false, false);
        assert_eq!(
            after_run(&vanished(), s),
            AfterRun::RetryRead {
                attempts: 1,
                drop_file: false
            }
        );
        assert_eq!(
            after_run(&vanished(), standing(2, false, false)),
            AfterRun::RetryRead {
                attempts: 3,
                drop_file: true
            }
        );
        assert_eq!(
            after_run(&vanished(), standing(2, true, false)),
            AfterRun::WaitAgain
        );
    }

    #[test]
    fn a_failed_run_is_retried_only_where_trying_again_can_help() {
        let s = standing(1, false, false);
        let out: StepOutcome<()> = StepOutcome::OutputFailed {
            reason: "disk full".into(),
        };
        assert_eq!(after_run(&out, s), AfterRun::RetryWrite { attempts: 2 });
        let input: StepOutcome<()> = StepOutcome::InputFailed {
            reason: "no fields".into(),
        };
        assert_eq!(
            after_run(&input, s),
            AfterRun::Failed {
                kind: FailKind::Input,
                again_if_more: true
            }
        );
        // Made at the timeout with what was there, and nothing came of it.
        assert_eq!(
            after_run(&input, standing(0, false, true)),
            AfterRun::Failed {
                kind: FailKind::Missing,
                again_if_more: true
            }
        );
        let defect: StepOutcome<()> = StepOutcome::Internal {
            reason: "panic".into(),
        };
        assert_eq!(
            after_run(&defect, s),
            AfterRun::Failed {
                kind: FailKind::Internal,
                again_if_more: false
            }
        );
        assert_eq!(after_run(&StepOutcome::Made(()), s), AfterRun::Published);
        let job: StepOutcome<()> = StepOutcome::JobFailed {
            state: "TIMEOUT".into(),
            reason: "time limit".into(),
        };
        assert_eq!(after_run(&job, s), AfterRun::JobFailed);
    }

    #[test]
    fn a_job_without_a_result_is_resubmitted_until_its_attempts_are_spent() {
        assert_eq!(after_job(false, 1, 3), AfterJob::Resubmit);
        assert_eq!(after_job(false, 2, 3), AfterJob::Resubmit);
        assert_eq!(after_job(false, 3, 3), AfterJob::GiveUp);
        assert_eq!(after_job(true, 3, 3), AfterJob::WaitAgain);
    }

    #[test]
    fn the_wait_doubles_from_the_first_up_to_the_longest() {
        let s = |a| backoff(10.0, 300.0, a).as_secs_f64();
        assert_eq!(
            [s(1), s(2), s(3), s(5), s(6)],
            [10.0, 20.0, 40.0, 160.0, 300.0]
        );
        assert_eq!(s(0), 10.0);
        assert_eq!(s(u32::MAX), 300.0);
    }

    fn taken(outcome: StepOutcome<Published>) -> Result<Taken, String> {
        let tag = StepTag {
            feed: "alps".into(),
            cycle: "2026031400".into(),
            lead: 6,
            member: None,
            grid: "g".into(),
        };
        Ok(Taken {
            outcome,
            result: Box::new(JobResult {
                result_version: 1,
                tag,
                attempt: 1,
                job_id: None,
                restarts: 0,
                host: "node7".into(),
                finished_at: String::new(),
                ended: StepOutcome::<Staged>::default(),
                report: JobReport::default(),
                peak_rss_kib: None,
            }),
        })
    }

    #[test]
    fn a_jobs_failure_to_write_or_read_is_a_new_job_there_and_a_retry_here() {
        let unwritten = || {
            taken(StepOutcome::OutputFailed {
                reason: "disk full".into(),
            })
        };
        let o = taken_outcome(unwritten(), Place::Scheduler);
        assert!(matches!(
            o,
            StepOutcome::JobFailed { state: s, reason: r }
                if s == state::UNWRITTEN && r == "the job on node7 could not write the products: disk full"
        ));
        assert!(taken_outcome(unwritten(), Place::Here).output_failed());
        let unread = || {
            taken(StepOutcome::Vanished {
                file: PathBuf::from("/in/a.grb2"),
                reason: "gone".into(),
            })
        };
        assert!(matches!(
            taken_outcome(unread(), Place::Scheduler),
            StepOutcome::JobFailed { state: s, reason: r } if s == state::UNREADABLE && r.contains("/in/a.grb2")
        ));
        assert!(matches!(
            taken_outcome(unread(), Place::Here),
            StepOutcome::Vanished { .. }
        ));
        let bad = || Err::<Taken, String>("result.json: unreadable".into());
        assert!(matches!(
            taken_outcome(bad(), Place::Scheduler),
            StepOutcome::JobFailed { state: s, .. } if s == state::UNUSABLE
        ));
        assert!(taken_outcome(bad(), Place::Here).output_failed());
        let input = taken(StepOutcome::InputFailed {
            reason: "no fields".into(),
        });
        assert_eq!(
            taken_outcome(input, Place::Scheduler).reason(),
            Some("no fields")
        );
    }
}
