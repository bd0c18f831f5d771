//! The words a step job's state is said in: the states in which Slurm says
//! a job has ended for good, and leeward's own words for an end it found
//! itself. The scheduler code, the main loop and the metrics all read them
//! here.

/// The base job states in which a Slurm job has ended for good: it runs no
/// more and writes nothing more into its staging directory (Slurm's
/// `squeue(1)` and `sacct(1)`, "JOB STATE CODES"). Every other state, and a
/// state leeward does not know, means the job is still going: it is pending,
/// running, being configured, completing (its processes are being killed or
/// its epilog runs), requeued, resized, suspended, staging out, held, or
/// signalled.
pub const ENDED_STATES: [&str; 9] = [
    "COMPLETED",
    "FAILED",
    "CANCELLED",
    "TIMEOUT",
    "OUT_OF_MEMORY",
    "NODE_FAIL",
    "PREEMPTED",
    "BOOT_FAIL",
    "DEADLINE",
];

/// True when a job state as `squeue --format=%T`, `scontrol show job`
/// (`JobState=`) or `sacct --parsable` prints it says the job has ended:
/// one of [`ENDED_STATES`]. `sacct` may add who cancelled it (`CANCELLED by
/// 0`); that is read as `CANCELLED`.
pub fn has_ended(state: &str) -> bool {
    let base = state
        .split_whitespace()
        .next()
        .unwrap_or("")
        .trim_end_matches('+')
        .to_ascii_uppercase();
    ENDED_STATES.contains(&base.as_str())
}

/// How a step job ended when leeward itself found the end, not the
/// scheduler: leeward's own lower-case words, kept apart from the states
/// the scheduler reports (upper case, such as `FAILED` or `TIMEOUT`).
pub mod outcome {
    /// The job could not write the step's products.
    pub const UNWRITTEN: &str = "unwritten";
    /// The job could not read one of the step's input files.
    pub const UNREADABLE: &str = "unreadable";
    /// The job's result (a staged file) could not be used.
    pub const UNUSABLE: &str = "unusable";
    /// The job's staging directory was gone after a restart.
    pub const LOST: &str = "lost";
    /// Every one of them.
    pub const ALL: [&str; 4] = [UNWRITTEN, UNREADABLE, UNUSABLE, LOST];
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn only_the_terminal_states_say_a_job_has_ended() {
        // Slurm's job state codes (squeue(1), "JOB STATE CODES", Slurm 22.05;
        // from memory): the nine base states after which a job runs no more.
        for s in [
            "COMPLETED",
            "FAILED",
            "CANCELLED",
            "TIMEOUT",
            "OUT_OF_MEMORY",
            "NODE_FAIL",
            "PREEMPTED",
            "BOOT_FAIL",
            "DEADLINE",
            // sacct --parsable names who cancelled a job.
            "CANCELLED by 0",
        ] {
            assert!(has_ended(s), "{s} is an end");
        }
        // Still going: queued, starting, running, its processes being killed
        // or its epilog running (COMPLETING), requeued, resized, suspended,
        // staging out, held, signalled; and any state not known here.
        for s in [
            "PENDING",
            "CONFIGURING",
            "RUNNING",
            "COMPLETING",
            "REQUEUED",
            "REQUEUE_HOLD",
            "REQUEUE_FED",
            "RESIZING",
            "SUSPENDED",
            "STOPPED",
            "SIGNALING",
            "STAGE_OUT",
            "SPECIAL_EXIT",
            "RESV_DEL_HOLD",
            "REVOKED",
            "POWER_UP_NODE",
            "",
            "SOMETHING_NEW",
        ] {
            assert!(!has_ended(s), "{s} is not an end");
        }
    }
}
