//! Every path under the service's state directory (`service.state_dir`), named
//! in one place. The parts that read or write them ([`super::ledger`],
//! [`super::waiting`], reprocess requests, quarantine, kept job logs) take
//! their paths from here.
//!
//! ```text
//! <state_dir>/
//!   ledger.jsonl     the journal of what happened (super::ledger)
//!   leeward.lock     held by the running service; its socket says it lives
//!   waiting.json     what each waiting step lacks (super::waiting)
//!   requests/        reprocess requests dropped by `leeward reprocess`
//!   quarantine/      bad input kept aside, unless service.quarantine_dir says elsewhere
//!   job-logs/        logs of step jobs that ended without publishing
//! ```

use std::path::{Path, PathBuf};

/// The journal's file name.
pub const JOURNAL: &str = "ledger.jsonl";

/// The state directory at `root`.
#[derive(Debug, Clone, Copy)]
pub struct StateDir<'a>(pub &'a Path);

impl StateDir<'_> {
    /// The ledger's journal.
    pub fn journal(&self) -> PathBuf {
        self.0.join(JOURNAL)
    }

    /// The lock the running service holds.
    pub fn lock(&self) -> PathBuf {
        self.0.join("leeward.lock")
    }

    /// What each waiting step lacks, rewritten as it changes.
    pub fn waiting(&self) -> PathBuf {
        self.0.join("waiting.json")
    }

    /// Reprocess requests.
    pub fn requests(&self) -> PathBuf {
        self.0.join("requests")
    }

    /// Bad input kept aside, when no other directory is configured.
    pub fn quarantine(&self) -> PathBuf {
        self.0.join("quarantine")
    }

    /// Logs of step jobs that ended without publishing.
    pub fn job_logs(&self) -> PathBuf {
        self.0.join("job-logs")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_path_is_its_own_and_inside_the_state_directory() {
        let root = Path::new("/var/lib/leeward");
        let s = StateDir(root);
        let all = [
            s.journal(),
            s.lock(),
            s.waiting(),
            s.requests(),
            s.quarantine(),
            s.job_logs(),
        ];
        for (i, p) in all.iter().enumerate() {
            assert_eq!(p.parent(), Some(root), "{}", p.display());
            assert!(all[..i].iter().all(|q| q != p), "{} twice", p.display());
        }
        // The names operators, the docs and the deployment files use.
        assert_eq!(s.journal(), Path::new("/var/lib/leeward/ledger.jsonl"));
        assert_eq!(s.requests(), Path::new("/var/lib/leeward/requests"));
    }
}
