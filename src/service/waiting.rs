//! The steps a service is waiting for, and why: what each still lacks and
//! when it will be made anyway, kept in a small file of the state directory
//! for `leeward status` (the ledger records what happened; this says what is
//! awaited now, and is replaced whole as that changes).
//!
//! In: the daemon's waiting steps. Out: `<state_dir>/waiting.json`, written
//! atomically; read back without a lock.

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use super::ledger::StepTag;

/// One waiting step.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct WaitingStep {
    /// The step.
    pub step: StepTag,
    /// What its feed's completeness rule still lacks (quantities and levels,
    /// files, or the marker).
    pub missing: Vec<String>,
    /// Unix time its first input was seen.
    pub first_seen: i64,
    /// Unix time it is made anyway, with what is there (first input plus
    /// `service.step_timeout_s`).
    pub made_by: i64,
}

impl WaitingStep {
    /// One line for people: the step, what it lacks, when it is made anyway.
    pub fn line(&self, now: i64) -> String {
        let left = self.made_by - now;
        let when = if left > 0 {
            format!("in {}", span(left))
        } else {
            "now".into()
        };
        format!(
            "{} waiting for {}; made anyway with what is there {when} (at {})",
            self.step,
            if self.missing.is_empty() {
                "its turn".to_string()
            } else {
                self.missing.join("; ")
            },
            chrono::DateTime::from_timestamp(self.made_by, 0)
                .map(|d| d.format("%Y-%m-%d %H:%M:%SZ").to_string())
                .unwrap_or_default()
        )
    }
}

/// Seconds as people read them: `45 s`, `12 min`, `3 h 5 min`.
pub fn span(s: i64) -> String {
    match s {
        s if s < 120 => format!("{s} s"),
        s if s < 7200 => format!("{} min", s / 60),
        s => format!("{} h {} min", s / 3600, (s % 3600) / 60),
    }
}

/// What the file holds.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct Waiting {
    /// When it was written, Unix time.
    pub written: i64,
    /// The service that wrote it.
    pub pid: u32,
    /// The waiting steps, in order.
    pub steps: Vec<WaitingStep>,
}

/// The file's path in a state directory.
pub fn path(state_dir: &Path) -> PathBuf {
    super::state_dir::StateDir(state_dir).waiting()
}

/// Replace the file.
pub fn write(state_dir: &Path, w: &Waiting) -> std::io::Result<()> {
    let text = serde_json::to_vec_pretty(w).map_err(std::io::Error::other)?;
    crate::output::write_file_atomic(&path(state_dir), &text)
}

/// Read the file, if there is one that parses.
pub fn read(state_dir: &Path) -> Option<Waiting> {
    serde_json::from_slice(&std::fs::read(path(state_dir)).ok()?).ok()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_line_says_what_and_when() {
        let w = WaitingStep {
            step: StepTag {
                feed: "m".into(),
                cycle: "20260314T0000Z".into(),
                lead: 6,
                member: None,
                grid: "g".into(),
            },
            missing: vec!["Temperature at 925 hPa".into()],
            first_seen: 1_773_446_400,
            made_by: 1_773_446_400 + 2700,
        };
        assert_eq!(
            w.line(1_773_446_400 + 60),
            "m/20260314T0000Z/006h waiting for Temperature at 925 hPa; made anyway with what is there in 44 min (at 2026-03-14 00:45:00Z)"
        );
        assert!(w.line(1_773_446_400 + 3000).contains(" now (at "));
        assert_eq!(span(7500), "2 h 5 min");
    }
}
