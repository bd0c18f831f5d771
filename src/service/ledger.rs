//! The ledger: a durable record of what the service has seen, published,
//! failed and quarantined, kept as an append-only journal in the state
//! directory.
//!
//! In: records to append. Out: the state replayed from the journal at start.
//! Each record is one JSON line, written and fsynced before the call returns,
//! so a crash (kill -9 at any moment) loses at most the line being written; a
//! torn last line is dropped at replay and cut from the file. Why a journal
//! and not an embedded database: one writer, a few records per step, no
//! queries beyond "what happened to this step" -- a journal an operator can
//! read with `tail` does that with no dependency and no schema to migrate.

use std::collections::BTreeMap;
use std::fs::{File, OpenOptions};
use std::io::{BufRead, BufReader, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};
use thiserror::Error;

/// Why the ledger could not be used.
#[derive(Debug, Error)]
pub enum LedgerError {
    /// The file system refused.
    #[error("ledger {path}: {source}")]
    Io {
        /// The journal.
        path: PathBuf,
        /// The system's error.
        source: std::io::Error,
    },
}

/// Why a step produced nothing.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum FailKind {
    /// Still incomplete at the timeout, and too little for any product.
    Missing,
    /// The input could not be used (grid refused, fields broken).
    Input,
    /// The products could not be written; retried with back-off.
    Output,
    /// A defect in leeward itself (a caught panic); reported, not retried.
    Internal,
    /// Not made: its cycle is older than `service.catch_up_hours` (reprocess makes it).
    Skipped,
    /// Its batch jobs failed, were cancelled or timed out `max_attempts` times.
    Job,
}

impl FailKind {
    /// Every kind, in the order the metrics list them.
    pub const ALL: [FailKind; 6] = [
        FailKind::Missing,
        FailKind::Input,
        FailKind::Output,
        FailKind::Internal,
        FailKind::Skipped,
        FailKind::Job,
    ];

    /// Its name in the journal and in the metrics' `reason` label.
    pub fn name(self) -> &'static str {
        match self {
            FailKind::Missing => "missing",
            FailKind::Input => "input",
            FailKind::Output => "output",
            FailKind::Internal => "internal",
            FailKind::Skipped => "skipped",
            FailKind::Job => "job",
        }
    }
}

/// One event in the journal. Times are Unix seconds.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "event", rename_all = "snake_case")]
pub enum Record {
    /// The service started.
    Started {
        /// leeward's version.
        version: String,
        /// Its process id.
        pid: u32,
        /// When.
        at: i64,
    },
    /// The service stopped cleanly.
    Stopped {
        /// Why.
        reason: String,
        /// When.
        at: i64,
    },
    /// An input file was found finished and catalogued.
    Seen {
        /// The feed it belongs to.
        feed: String,
        /// Its path.
        file: String,
        /// Its size in bytes.
        size: u64,
        /// Its modification time, nanoseconds since the Unix epoch.
        mtime_ns: i64,
        /// Its checksum (FNV-1a 64, hex).
        checksum: String,
        /// The steps it holds fields of.
        steps: Vec<StepTag>,
        /// When.
        at: i64,
    },
    /// A step was published: its file and manifest are in place.
    Published {
        /// The step.
        step: StepTag,
        /// The product file.
        path: String,
        /// The manifest.
        manifest: String,
        /// Made with what was there at the timeout, not complete.
        partial: bool,
        /// When.
        at: i64,
    },
    /// A step produced nothing, with the reason.
    Failed {
        /// The step.
        step: StepTag,
        /// What kind of failure.
        kind: FailKind,
        /// What went wrong.
        reason: String,
        /// When.
        at: i64,
    },
    /// An input file was set aside.
    Quarantined {
        /// The feed.
        feed: String,
        /// Its path.
        file: String,
        /// Why.
        reason: String,
        /// Where it was moved, if it was.
        moved_to: Option<String>,
        /// When.
        at: i64,
    },
    /// A step was handed to the batch scheduler.
    Submitted {
        /// The step.
        step: StepTag,
        /// The scheduler's job id.
        job: String,
        /// The job's staging directory (its spec, products and result record).
        staging: String,
        /// Which run of the step on the scheduler this is, from 1.
        attempt: u32,
        /// When.
        at: i64,
    },
    /// A step's batch job ended without its products being published (failed,
    /// cancelled, timed out, lost): retried or, at the limit, failed.
    JobEnded {
        /// The step.
        step: StepTag,
        /// The job id.
        job: String,
        /// The scheduler's state of the job (`FAILED`, `CANCELLED`, `TIMEOUT`, ...),
        /// or leeward's own lower-case word for an end it found itself
        /// (`unwritten`, `unreadable`, `unusable`, `lost`).
        state: String,
        /// What the scheduler or the job said.
        reason: String,
        /// The job's log, kept in the state directory.
        log: Option<String>,
        /// When.
        at: i64,
    },
    /// An operator asked for a cycle (or one step of it) to be made again.
    Reprocess {
        /// The feed.
        feed: String,
        /// The cycle, `YYYYMMDDTHHMMZ`.
        cycle: String,
        /// One lead time only, hours.
        lead: Option<i64>,
        /// When.
        at: i64,
    },
}

/// What identifies a step in the ledger.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
pub struct StepTag {
    /// The feed.
    pub feed: String,
    /// The cycle, `YYYYMMDDTHHMMZ`.
    pub cycle: String,
    /// Lead time, hours.
    pub lead: i64,
    /// Ensemble member.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub member: Option<u8>,
    /// Grid fingerprint.
    pub grid: String,
}

impl std::fmt::Display for StepTag {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}/{}/{:03}h", self.feed, self.cycle, self.lead)?;
        if let Some(m) = self.member {
            write!(f, "/m{m:02}")?;
        }
        Ok(())
    }
}

/// An input file as last seen.
#[derive(Debug, Clone, PartialEq)]
pub struct SeenFile {
    /// The feed.
    pub feed: String,
    /// Size, bytes.
    pub size: u64,
    /// Modification time, ns.
    pub mtime_ns: i64,
    /// Checksum.
    pub checksum: String,
    /// Steps it holds fields of.
    pub steps: Vec<StepTag>,
    /// When it was seen.
    pub at: i64,
}

/// Where a step stands.
#[derive(Debug, Clone, PartialEq)]
pub enum Outcome {
    /// Inputs seen, not yet published.
    Waiting,
    /// Published.
    Published {
        /// Product file.
        path: String,
        /// Manifest.
        manifest: String,
        /// Made at the timeout with what was there.
        partial: bool,
        /// When.
        at: i64,
    },
    /// Produced nothing (last attempt).
    Failed {
        /// Kind.
        kind: FailKind,
        /// Reason.
        reason: String,
        /// When.
        at: i64,
    },
}

/// A batch job of a step, submitted and not yet ended.
#[derive(Debug, Clone, PartialEq)]
pub struct JobRef {
    /// The scheduler's job id.
    pub job: String,
    /// Its staging directory.
    pub staging: String,
    /// Which run of the step on the scheduler, from 1.
    pub attempt: u32,
    /// When it was submitted.
    pub at: i64,
}

/// A step's history.
#[derive(Debug, Clone, PartialEq)]
pub struct StepState {
    /// When its first input was seen.
    pub first_seen: i64,
    /// Where it stands.
    pub outcome: Outcome,
    /// Its batch job in flight, if one is.
    pub job: Option<JobRef>,
    /// Runs of it on the scheduler so far.
    pub job_attempts: u32,
}

impl StepState {
    fn new(first_seen: i64) -> StepState {
        StepState {
            first_seen,
            outcome: Outcome::Waiting,
            job: None,
            job_attempts: 0,
        }
    }
}

/// A quarantined file.
#[derive(Debug, Clone, PartialEq)]
pub struct QuarantinedFile {
    /// The feed.
    pub feed: String,
    /// Why.
    pub reason: String,
    /// Where it went.
    pub moved_to: Option<String>,
    /// When.
    pub at: i64,
}

/// The state replayed from the journal.
#[derive(Debug, Default, Clone, PartialEq)]
pub struct State {
    /// Input files seen: path -> last sighting.
    pub seen: BTreeMap<String, SeenFile>,
    /// Steps.
    pub steps: BTreeMap<StepTag, StepState>,
    /// Files quarantined: path -> why.
    pub quarantined: BTreeMap<String, QuarantinedFile>,
    /// Grid fingerprints per feed, in order of first sight (they number the
    /// file names of a feed with more than one grid).
    pub grids: BTreeMap<String, Vec<String>>,
    /// Last start: (version, pid, at).
    pub started: Option<(String, u32, i64)>,
    /// Last clean stop after the last start.
    pub stopped: Option<(String, i64)>,
}

impl State {
    /// A step's state, new (first seen `at`) if the journal has not named it yet.
    fn step_mut(&mut self, step: &StepTag, at: i64) -> &mut StepState {
        self.steps
            .entry(step.clone())
            .or_insert_with(|| StepState::new(at))
    }

    fn apply(&mut self, r: &Record) {
        match r {
            Record::Started { version, pid, at } => {
                self.started = Some((version.clone(), *pid, *at));
                self.stopped = None;
            }
            Record::Stopped { reason, at } => self.stopped = Some((reason.clone(), *at)),
            Record::Seen {
                feed,
                file,
                size,
                mtime_ns,
                checksum,
                steps,
                at,
            } => {
                for s in steps {
                    self.step_mut(s, *at);
                    let g = self.grids.entry(feed.clone()).or_default();
                    if !g.contains(&s.grid) {
                        g.push(s.grid.clone());
                    }
                }
                self.seen.insert(
                    file.clone(),
                    SeenFile {
                        feed: feed.clone(),
                        size: *size,
                        mtime_ns: *mtime_ns,
                        checksum: checksum.clone(),
                        steps: steps.clone(),
                        at: *at,
                    },
                );
            }
            Record::Published {
                step,
                path,
                manifest,
                partial,
                at,
            } => {
                let s = self.step_mut(step, *at);
                s.job = None;
                s.outcome = Outcome::Published {
                    path: path.clone(),
                    manifest: manifest.clone(),
                    partial: *partial,
                    at: *at,
                };
            }
            Record::Failed {
                step,
                kind,
                reason,
                at,
            } => {
                let s = self.step_mut(step, *at);
                s.job = None;
                s.outcome = Outcome::Failed {
                    kind: *kind,
                    reason: reason.clone(),
                    at: *at,
                };
            }
            Record::Quarantined {
                feed,
                file,
                reason,
                moved_to,
                at,
            } => {
                self.quarantined.insert(
                    file.clone(),
                    QuarantinedFile {
                        feed: feed.clone(),
                        reason: reason.clone(),
                        moved_to: moved_to.clone(),
                        at: *at,
                    },
                );
            }
            Record::Submitted {
                step,
                job,
                staging,
                attempt,
                at,
            } => {
                let s = self.step_mut(step, *at);
                s.job = Some(JobRef {
                    job: job.clone(),
                    staging: staging.clone(),
                    attempt: *attempt,
                    at: *at,
                });
                s.job_attempts = s.job_attempts.max(*attempt);
            }
            Record::JobEnded { step, job, .. } => {
                if let Some(s) = self.steps.get_mut(step) {
                    if s.job.as_ref().is_some_and(|j| &j.job == job) {
                        s.job = None;
                    }
                }
            }
            Record::Reprocess {
                feed,
                cycle,
                lead,
                at,
            } => {
                for (tag, st) in self.steps.iter_mut() {
                    if &tag.feed == feed
                        && &tag.cycle == cycle
                        && lead.is_none_or(|l| l == tag.lead)
                    {
                        st.outcome = Outcome::Waiting;
                        st.first_seen = *at;
                        st.job_attempts = 0;
                    }
                }
                // Files of the cycle are looked at again.
                self.seen.retain(|_, f| {
                    !(f.feed == *feed
                        && f.steps
                            .iter()
                            .any(|t| &t.cycle == cycle && lead.is_none_or(|l| l == t.lead)))
                });
            }
        }
    }

    /// True if the step is published or has failed for good (not an output
    /// failure, which is retried).
    pub fn settled(&self, step: &StepTag) -> bool {
        match self.steps.get(step).map(|s| &s.outcome) {
            Some(Outcome::Published { .. }) => true,
            Some(Outcome::Failed { kind, .. }) => *kind != FailKind::Output,
            _ => false,
        }
    }
}

/// Replay a journal into `state`. Returns the length of its whole lines (a
/// crash mid-write leaves a last line without its newline: the torn tail) and
/// the number of whole lines passed over because they do not parse (damage,
/// or a record of a newer version): those are skipped, not a reason to drop
/// the records after them.
fn replay(file: &File, state: &mut State) -> std::io::Result<(u64, usize)> {
    let mut good_len = 0u64;
    let mut skipped = 0;
    let mut reader = BufReader::new(file);
    let mut line = Vec::new();
    loop {
        line.clear();
        let n = reader.read_until(b'\n', &mut line)?;
        if n == 0 || !line.ends_with(b"\n") {
            break;
        }
        good_len += n as u64;
        match serde_json::from_slice::<Record>(line.trim_ascii_end()) {
            Ok(r) => state.apply(&r),
            Err(_) => skipped += 1,
        }
    }
    Ok((good_len, skipped))
}

/// The journal's file name in the state directory.
pub const FILE_NAME: &str = "ledger.jsonl";

/// Read the state of a journal without changing it (for `leeward status`,
/// which may run beside the service).
pub fn read_state(state_dir: &Path) -> Result<State, LedgerError> {
    let path = state_dir.join(FILE_NAME);
    let io = |source| LedgerError::Io {
        path: path.clone(),
        source,
    };
    let file = File::open(&path).map_err(io)?;
    let mut state = State::default();
    replay(&file, &mut state).map_err(io)?;
    Ok(state)
}

/// An open journal.
pub struct Ledger {
    path: PathBuf,
    file: File,
    /// The state, kept in step with the journal.
    pub state: State,
}

impl Ledger {
    /// Open (or create) the journal in `state_dir`, replay it, and cut a torn last line.
    pub fn open(state_dir: &Path) -> Result<Ledger, LedgerError> {
        let path = state_dir.join(FILE_NAME);
        let io = |source| LedgerError::Io {
            path: path.clone(),
            source,
        };
        std::fs::create_dir_all(state_dir).map_err(io)?;
        let mut file = OpenOptions::new()
            .create(true)
            .read(true)
            .append(true)
            .open(&path)
            .map_err(io)?;
        let mut state = State::default();
        let (good_len, skipped) = replay(&file, &mut state).map_err(io)?;
        if skipped > 0 {
            tracing::warn!(ledger = %path.display(), lines = skipped, "ledger lines that do not parse were passed over");
        }
        let len = file.seek(SeekFrom::End(0)).map_err(io)?;
        if len != good_len {
            file.set_len(good_len).map_err(io)?;
            file.sync_all().map_err(io)?;
        }
        Ok(Ledger { path, file, state })
    }

    /// Append one record, fsynced before returning, and apply it to the state.
    pub fn append(&mut self, r: Record) -> Result<(), LedgerError> {
        let io = |source| LedgerError::Io {
            path: self.path.clone(),
            source,
        };
        let mut line = serde_json::to_string(&r).map_err(|e| io(std::io::Error::other(e)))?;
        line.push('\n');
        self.file.write_all(line.as_bytes()).map_err(io)?;
        self.file.sync_data().map_err(io)?;
        self.state.apply(&r);
        Ok(())
    }

    /// Where the journal lives.
    pub fn path(&self) -> &Path {
        &self.path
    }
}

/// Checksum of an input file's bytes (FNV-1a 64, hex; a fingerprint, not a security hash).
pub fn checksum(bytes: &[u8]) -> String {
    crate::ingest::bytes::fnv1a_hex(bytes)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn dir(name: &str) -> PathBuf {
        let d = std::env::temp_dir().join(format!("leeward-ledger-{name}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&d);
        d
    }

    fn tag(lead: i64) -> StepTag {
        StepTag {
            feed: "m".into(),
            cycle: "20260314T0000Z".into(),
            lead,
            member: None,
            grid: "abc".into(),
        }
    }

    #[test]
    fn replay_gives_back_the_state() {
        let d = dir("replay");
        {
            let mut l = Ledger::open(&d).unwrap();
            l.append(Record::Seen {
                feed: "m".into(),
                file: "a.grib2".into(),
                size: 10,
                mtime_ns: 5,
                checksum: checksum(b"x"),
                steps: vec![tag(6), tag(12)],
                at: 100,
            })
            .unwrap();
            l.append(Record::Failed {
                step: tag(6),
                kind: FailKind::Output,
                reason: "disk full".into(),
                at: 110,
            })
            .unwrap();
            assert!(!l.state.settled(&tag(6)), "an output failure is retried");
            l.append(Record::Published {
                step: tag(6),
                path: "out/x.nc".into(),
                manifest: "out/x.json".into(),
                partial: false,
                at: 120,
            })
            .unwrap();
        }
        let l = Ledger::open(&d).unwrap();
        assert!(l.state.settled(&tag(6)));
        assert!(!l.state.settled(&tag(12)));
        assert_eq!(l.state.steps[&tag(12)].first_seen, 100);
        assert_eq!(l.state.seen["a.grib2"].size, 10);
        assert_eq!(l.state.grids["m"], vec!["abc".to_string()]);
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn batch_jobs_are_in_flight_from_submission_to_their_end() {
        let d = dir("jobs");
        let mut l = Ledger::open(&d).unwrap();
        let sub = |job: &str, attempt| Record::Submitted {
            step: tag(6),
            job: job.into(),
            staging: format!("/out/m/.jobs/{job}"),
            attempt,
            at: 5,
        };
        l.append(sub("11", 1)).unwrap();
        assert_eq!(l.state.steps[&tag(6)].job.as_ref().unwrap().job, "11");
        l.append(Record::JobEnded {
            step: tag(6),
            job: "11".into(),
            state: "CANCELLED".into(),
            reason: "scancel".into(),
            log: None,
            at: 6,
        })
        .unwrap();
        assert_eq!(l.state.steps[&tag(6)].job, None);
        l.append(sub("12", 2)).unwrap();
        drop(l);
        // After a restart the job in flight and the attempts so far come back.
        let l = Ledger::open(&d).unwrap();
        let st = &l.state.steps[&tag(6)];
        assert_eq!(
            st.job.as_ref().map(|j| (j.job.as_str(), j.attempt)),
            Some(("12", 2))
        );
        assert_eq!(st.job_attempts, 2);
        assert_eq!(st.outcome, Outcome::Waiting);
        let mut l = l;
        l.append(Record::Published {
            step: tag(6),
            path: "p".into(),
            manifest: "m".into(),
            partial: false,
            at: 7,
        })
        .unwrap();
        assert_eq!(l.state.steps[&tag(6)].job, None);
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn reprocess_reopens_the_cycle() {
        let d = dir("reprocess");
        let mut l = Ledger::open(&d).unwrap();
        for lead in [6, 12] {
            l.append(Record::Published {
                step: tag(lead),
                path: "p".into(),
                manifest: "m".into(),
                partial: false,
                at: 1,
            })
            .unwrap();
        }
        l.append(Record::Reprocess {
            feed: "m".into(),
            cycle: "20260314T0000Z".into(),
            lead: Some(12),
            at: 2,
        })
        .unwrap();
        assert!(l.state.settled(&tag(6)));
        assert!(!l.state.settled(&tag(12)));
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn a_torn_last_line_is_dropped_and_cut() {
        let d = dir("torn");
        {
            let mut l = Ledger::open(&d).unwrap();
            l.append(Record::Stopped {
                reason: "s".into(),
                at: 1,
            })
            .unwrap();
        }
        let path = d.join(FILE_NAME);
        let good = std::fs::metadata(&path).unwrap().len();
        // What a kill -9 in the middle of a write leaves behind.
        std::fs::OpenOptions::new()
            .append(true)
            .open(&path)
            .unwrap()
            .write_all(b"{\"event\":\"publ")
            .unwrap();
        assert!(read_state(&d).is_ok(), "a reader passes over the torn tail");
        // A damaged line in the middle is passed over; the records after it count.
        {
            let mut f = std::fs::OpenOptions::new().write(true).open(&path).unwrap();
            f.set_len(good).unwrap();
            f.seek(SeekFrom::End(0)).unwrap();
            f.write_all(b"{\"event\":\"from_a_newer_version\"}\n")
                .unwrap();
        }
        {
            let mut l = Ledger::open(&d).unwrap();
            l.append(Record::Stopped {
                reason: "after".into(),
                at: 3,
            })
            .unwrap();
        }
        assert_eq!(read_state(&d).unwrap().stopped, Some(("after".into(), 3)));
        let good = std::fs::metadata(&path).unwrap().len();
        std::fs::OpenOptions::new()
            .append(true)
            .open(&path)
            .unwrap()
            .write_all(b"{\"event\":\"publ")
            .unwrap();
        let mut l = Ledger::open(&d).unwrap();
        assert_eq!(std::fs::metadata(&path).unwrap().len(), good);
        l.append(Record::Quarantined {
            feed: "m".into(),
            file: "bad".into(),
            reason: "garbage".into(),
            moved_to: None,
            at: 2,
        })
        .unwrap();
        let l = Ledger::open(&d).unwrap();
        assert_eq!(l.state.quarantined["bad"].reason, "garbage");
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn checksum_is_fnv1a() {
        // FNV-1a 64 test vectors (Fowler, Noll and Vo; from memory): "" and "a".
        assert_eq!(checksum(b""), "cbf29ce484222325");
        assert_eq!(checksum(b"a"), "af63dc4c8601ec8c");
    }
}
