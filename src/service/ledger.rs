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
use std::sync::{Arc, Mutex};

use serde::{Deserialize, Serialize};
use thiserror::Error;

use super::state_dir::StateDir;

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
    /// The journal or the lock at their paths are no longer the files this
    /// service opened (the state directory was removed, moved or replaced).
    #[error("ledger {path}: {what}")]
    NotHeld {
        /// The journal.
        path: PathBuf,
        /// What is wrong.
        what: String,
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
        /// For each of `steps`, the checksum of the messages it holds for
        /// that step (FNV-1a 64, hex): more input for a step, or not, when
        /// the file is written again in place. Empty in older records.
        #[serde(default, skip_serializing_if = "Vec::is_empty")]
        digests: Vec<String>,
        /// When.
        at: i64,
    },
    /// A step got input it was not made from (a file new to it, or its
    /// messages in a file changed) while its cycle was within catch-up: it
    /// waits again, to be made with all its input, and its next publication
    /// is the manifest's next revision. Of a step published or failed, it
    /// reopens it at once. Of a step in hand (`in_hand`: input came while it
    /// was made), the end of that run (its `published` or `failed` record)
    /// leaves it waiting, unless a `step` record says it was handed out
    /// again with all its input; so a kill at any instant cannot lose the
    /// input.
    Reopened {
        /// The step.
        step: StepTag,
        /// The file that brought the input.
        file: String,
        /// The step was in hand.
        #[serde(default, skip_serializing_if = "std::ops::Not::not")]
        in_hand: bool,
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
    /// A step's files are staged and about to be renamed into place: every
    /// rename of its publication, written before the first one, so that a
    /// stop part of the way through is finished at the next start. Closed by
    /// the step's `published` record, or by `abandoned`.
    Publishing {
        /// The step.
        step: StepTag,
        /// The staging directory the files come from.
        stage: String,
        /// The step's product file in the output tree.
        product: String,
        /// Its manifest (the last rename).
        manifest: String,
        /// Made at the timeout with what was there.
        partial: bool,
        /// The renames, in order.
        moves: Vec<Move>,
        /// When.
        at: i64,
    },
    /// A publication cut short that could not be finished (a file neither
    /// staged nor in place): its manifests were made to match their files and
    /// the step is made again.
    Abandoned {
        /// The step.
        step: StepTag,
        /// Why.
        reason: String,
        /// When.
        at: i64,
    },
    /// A step as the state holds it (a ledger written anew from the state:
    /// its outcome, job and quarantine follow in their own records); also
    /// written when a step reopened in hand is handed out again with all
    /// its input (it clears that pending reopening).
    Step {
        /// The step.
        step: StepTag,
        /// When its first input was seen.
        first_seen: i64,
        /// Runs of it on the scheduler so far.
        job_attempts: u32,
    },
    /// The grids of a feed in the order first seen (they number its file
    /// names), in a ledger written anew from the state.
    Grids {
        /// The feed.
        feed: String,
        /// Grid fingerprints.
        grids: Vec<String>,
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

/// One rename of a publication: a staged file and its place in the output
/// tree, with the size and SHA-256 (hex) it has.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Move {
    /// In the staging directory.
    pub staged: String,
    /// In the output tree.
    pub target: String,
    /// Size, bytes.
    pub bytes: u64,
    /// SHA-256, hex.
    pub sha256: String,
}

/// A publication whose renames were recorded and whose end was not.
#[derive(Debug, Clone, PartialEq)]
pub struct Publishing {
    /// The staging directory.
    pub stage: String,
    /// The step's product.
    pub product: String,
    /// Its manifest.
    pub manifest: String,
    /// Made at the timeout.
    pub partial: bool,
    /// The renames, in order.
    pub moves: Vec<Move>,
    /// When it was recorded.
    pub at: i64,
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
    /// For each of `steps`, the checksum of its messages for that step
    /// (empty when recorded by an older version).
    pub digests: Vec<String>,
    /// When it was seen.
    pub at: i64,
}

impl SeenFile {
    /// The checksum of the messages this file held for `step` when seen.
    pub fn digest_of(&self, step: &StepTag) -> Option<&str> {
        let k = self.steps.iter().position(|t| t == step)?;
        self.digests.get(k).map(String::as_str)
    }
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
    /// Reopened while in hand: the end of this run leaves it waiting.
    pub more: bool,
}

impl StepState {
    fn new(first_seen: i64) -> StepState {
        StepState {
            first_seen,
            outcome: Outcome::Waiting,
            job: None,
            job_attempts: 0,
            more: false,
        }
    }

    /// Waiting again, to be made with all its input.
    fn reopen(&mut self) {
        self.outcome = Outcome::Waiting;
        self.job = None;
        self.job_attempts = 0;
        self.more = false;
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
    /// Publications recorded and not finished (a stop between their first
    /// rename and their `published` record): finished at the next start.
    pub publishing: BTreeMap<StepTag, Publishing>,
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
                digests,
                at,
            } => self.on_seen(
                file,
                SeenFile {
                    feed: feed.clone(),
                    size: *size,
                    mtime_ns: *mtime_ns,
                    checksum: checksum.clone(),
                    steps: steps.clone(),
                    digests: digests.clone(),
                    at: *at,
                },
            ),
            Record::Reopened { step, in_hand, .. } => self.on_reopened(step, *in_hand),
            Record::Published {
                step,
                path,
                manifest,
                partial,
                at,
            } => {
                self.publishing.remove(step);
                let outcome = Outcome::Published {
                    path: path.clone(),
                    manifest: manifest.clone(),
                    partial: *partial,
                    at: *at,
                };
                self.on_ended(step, outcome, *at, true);
            }
            Record::Failed {
                step,
                kind,
                reason,
                at,
            } => {
                let outcome = Outcome::Failed {
                    kind: *kind,
                    reason: reason.clone(),
                    at: *at,
                };
                // An output failure is retried as it is: more input waits for it.
                self.on_ended(step, outcome, *at, *kind != FailKind::Output);
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
            } => self.on_submitted(
                step,
                JobRef {
                    job: job.clone(),
                    staging: staging.clone(),
                    attempt: *attempt,
                    at: *at,
                },
            ),
            Record::JobEnded { step, job, .. } => {
                if let Some(s) = self.steps.get_mut(step) {
                    if s.job.as_ref().is_some_and(|j| &j.job == job) {
                        s.job = None;
                    }
                }
            }
            Record::Publishing {
                step,
                stage,
                product,
                manifest,
                partial,
                moves,
                at,
            } => {
                self.publishing.insert(
                    step.clone(),
                    Publishing {
                        stage: stage.clone(),
                        product: product.clone(),
                        manifest: manifest.clone(),
                        partial: *partial,
                        moves: moves.clone(),
                        at: *at,
                    },
                );
            }
            Record::Abandoned { step, .. } => {
                self.publishing.remove(step);
            }
            Record::Step {
                step,
                first_seen,
                job_attempts,
            } => {
                let s = self.step_mut(step, *first_seen);
                (s.first_seen, s.job_attempts, s.more) = (*first_seen, *job_attempts, false);
            }
            Record::Grids { feed, grids } => {
                for x in grids {
                    self.know_grid(feed, x);
                }
            }
            Record::Reprocess {
                feed,
                cycle,
                lead,
                at,
            } => self.on_reprocess(feed, cycle, *lead, *at),
        }
    }

    /// A file catalogued: its steps known, their grids kept, the file remembered.
    fn on_seen(&mut self, file: &str, f: SeenFile) {
        for s in &f.steps {
            self.step_mut(s, f.at);
            self.know_grid(&f.feed, &s.grid);
        }
        self.seen.insert(file.to_string(), f);
    }

    /// A grid the feed uses, kept once.
    fn know_grid(&mut self, feed: &str, grid: &str) {
        let g = self.grids.entry(feed.to_string()).or_default();
        if !g.iter().any(|x| x == grid) {
            g.push(grid.to_string());
        }
    }

    /// More input for a step: made again at once, or after the making in
    /// hand (`in_hand`) ends.
    fn on_reopened(&mut self, step: &StepTag, in_hand: bool) {
        let s = self.step_mut(step, 0);
        if in_hand {
            s.more = true;
        } else {
            s.reopen();
        }
    }

    /// A step's job submitted to the scheduler.
    fn on_submitted(&mut self, step: &StepTag, j: JobRef) {
        let s = self.step_mut(step, j.at);
        s.job_attempts = s.job_attempts.max(j.attempt);
        s.job = Some(j);
    }

    /// A step published or failed: no job any more, its outcome set, and made
    /// again if more input came meanwhile and `reopen` allows.
    fn on_ended(&mut self, step: &StepTag, outcome: Outcome, at: i64, reopen: bool) {
        let s = self.step_mut(step, at);
        s.job = None;
        s.outcome = outcome;
        if s.more && reopen {
            s.reopen();
        }
    }

    /// A reprocess request: the cycle's (or one lead's) steps wait again and
    /// their files are looked at again.
    fn on_reprocess(&mut self, feed: &str, cycle: &str, lead: Option<i64>, at: i64) {
        for (tag, st) in self.steps.iter_mut() {
            if tag.feed == feed && tag.cycle == cycle && lead.is_none_or(|l| l == tag.lead) {
                st.outcome = Outcome::Waiting;
                st.first_seen = at;
                st.job_attempts = 0;
            }
        }
        self.seen.retain(|_, f| {
            !(f.feed == feed
                && f.steps
                    .iter()
                    .any(|t| t.cycle == cycle && lead.is_none_or(|l| l == t.lead)))
        });
    }

    /// Records that replay into this very state: what a ledger written anew
    /// holds (a state directory that came back empty, a compaction).
    pub fn snapshot(&self) -> Vec<Record> {
        let mut out = Vec::new();
        if let Some((version, pid, at)) = &self.started {
            out.push(Record::Started {
                version: version.clone(),
                pid: *pid,
                at: *at,
            });
        }
        if let Some((reason, at)) = &self.stopped {
            out.push(Record::Stopped {
                reason: reason.clone(),
                at: *at,
            });
        }
        for (feed, grids) in &self.grids {
            out.push(Record::Grids {
                feed: feed.clone(),
                grids: grids.clone(),
            });
        }
        for (tag, st) in &self.steps {
            out.push(Record::Step {
                step: tag.clone(),
                first_seen: st.first_seen,
                job_attempts: st.job_attempts,
            });
            match &st.outcome {
                Outcome::Waiting => {}
                Outcome::Published {
                    path,
                    manifest,
                    partial,
                    at,
                } => out.push(Record::Published {
                    step: tag.clone(),
                    path: path.clone(),
                    manifest: manifest.clone(),
                    partial: *partial,
                    at: *at,
                }),
                Outcome::Failed { kind, reason, at } => out.push(Record::Failed {
                    step: tag.clone(),
                    kind: *kind,
                    reason: reason.clone(),
                    at: *at,
                }),
            }
            if let Some(j) = &st.job {
                out.push(Record::Submitted {
                    step: tag.clone(),
                    job: j.job.clone(),
                    staging: j.staging.clone(),
                    attempt: j.attempt,
                    at: j.at,
                });
            }
            if st.more {
                out.push(Record::Reopened {
                    step: tag.clone(),
                    file: String::new(),
                    in_hand: true,
                    at: st.first_seen,
                });
            }
        }
        for (file, f) in &self.seen {
            out.push(Record::Seen {
                feed: f.feed.clone(),
                file: file.clone(),
                size: f.size,
                mtime_ns: f.mtime_ns,
                checksum: f.checksum.clone(),
                steps: f.steps.clone(),
                digests: f.digests.clone(),
                at: f.at,
            });
        }
        for (file, q) in &self.quarantined {
            out.push(Record::Quarantined {
                feed: q.feed.clone(),
                file: file.clone(),
                reason: q.reason.clone(),
                moved_to: q.moved_to.clone(),
                at: q.at,
            });
        }
        for (tag, p) in &self.publishing {
            out.push(Record::Publishing {
                step: tag.clone(),
                stage: p.stage.clone(),
                product: p.product.clone(),
                manifest: p.manifest.clone(),
                partial: p.partial,
                moves: p.moves.clone(),
                at: p.at,
            });
        }
        out
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

impl State {
    /// Forget what settled before `before` (Unix time): steps published or
    /// failed for good then; input files none of whose steps is remembered
    /// any longer, unless `still_there` says the file is still in its incoming
    /// directory (then it is kept, with no steps, so that it is passed over as
    /// handled rather than read again); quarantine entries from before then.
    /// Steps waiting, to be retried, to be made again with more input or in
    /// the middle of a publication, their files and the grid numbering are
    /// kept. Returns how many steps were forgotten.
    pub fn forget(&mut self, before: i64, still_there: impl Fn(&str) -> bool) -> usize {
        let old: Vec<StepTag> = self
            .steps
            .iter()
            .filter(|(t, st)| {
                self.settled(t)
                    && !st.more
                    && !self.publishing.contains_key(*t)
                    && matches!(&st.outcome,
                        Outcome::Published { at, .. } | Outcome::Failed { at, .. } if *at < before)
            })
            .map(|(t, _)| t.clone())
            .collect();
        for t in &old {
            self.steps.remove(t);
        }
        let steps = &self.steps;
        self.seen.retain(|file, f| {
            // Each step's digest goes with it (an older record has none).
            let keep: Vec<bool> = f.steps.iter().map(|t| steps.contains_key(t)).collect();
            if f.digests.len() == f.steps.len() {
                let mut k = keep.iter();
                f.digests.retain(|_| k.next().copied().unwrap_or(false));
            }
            let mut k = keep.iter();
            f.steps.retain(|_| k.next().copied().unwrap_or(false));
            !f.steps.is_empty() || still_there(file)
        });
        self.quarantined.retain(|_, q| q.at >= before);
        old.len()
    }
}

/// Replay a journal into `state`. Returns the length of its whole lines (a
/// crash mid-write leaves a last line without its newline: the torn tail) and
/// the number of whole lines passed over because they do not parse (damage,
/// or a record of a newer version): those are skipped, not a reason to drop
/// the records after them.
fn replay(file: &File, state: &mut State) -> std::io::Result<(u64, usize, usize)> {
    let mut good_len = 0u64;
    let mut skipped = 0;
    let mut lines = 0;
    let mut reader = BufReader::new(file);
    let mut line = Vec::new();
    loop {
        line.clear();
        let n = reader.read_until(b'\n', &mut line)?;
        if n == 0 || !line.ends_with(b"\n") {
            break;
        }
        good_len += n as u64;
        lines += 1;
        match serde_json::from_slice::<Record>(line.trim_ascii_end()) {
            Ok(r) => state.apply(&r),
            Err(_) => skipped += 1,
        }
    }
    Ok((good_len, skipped, lines))
}

/// The journal's file name in the state directory.
pub const FILE_NAME: &str = super::state_dir::JOURNAL;

/// Read the state of a journal without changing it (for `leeward status`,
/// which may run beside the service).
pub fn read_state(state_dir: &Path) -> Result<State, LedgerError> {
    let path = StateDir(state_dir).journal();
    let io = |source| LedgerError::Io {
        path: path.clone(),
        source,
    };
    let file = File::open(&path).map_err(io)?;
    let mut state = State::default();
    replay(&file, &mut state).map_err(io)?;
    Ok(state)
}

/// A file's identity: its device and inode.
fn identity(m: &std::fs::Metadata) -> (u64, u64) {
    use std::os::unix::fs::MetadataExt;
    (m.dev(), m.ino())
}

/// The lock file that keeps two services off one state directory.
pub fn lock_path(state_dir: &Path) -> PathBuf {
    StateDir(state_dir).lock()
}

/// Hold the state directory for this process, in a way that survives the
/// directory's removal: an abstract Unix socket (Linux, unix(7)) whose name
/// is derived from the directory's canonical path. The kernel frees it when
/// the process ends, however it ends; a second service on the same
/// directory cannot bind it while the first lives, even after the directory
/// was removed and made again (binding fails with `AddrInUse`).
pub fn hold_state_dir(state_dir: &Path) -> std::io::Result<std::os::unix::net::UnixListener> {
    use sha2::Digest;
    use std::os::linux::net::SocketAddrExt;
    // The directory itself if it is there, else its parent's canonical path
    // and its name: a service that must not start takes nothing there, not
    // even the directory.
    let canonical = match std::fs::canonicalize(state_dir) {
        Ok(c) => c,
        Err(_) => {
            let abs = std::path::absolute(state_dir)?;
            match (abs.parent(), abs.file_name()) {
                (Some(p), Some(n)) => std::fs::canonicalize(p).unwrap_or(p.to_path_buf()).join(n),
                _ => abs,
            }
        }
    };
    let digest = sha2::Sha256::digest(canonical.as_os_str().as_encoded_bytes());
    let hex: String = digest.iter().take(20).map(|b| format!("{b:02x}")).collect();
    let addr = std::os::unix::net::SocketAddr::from_abstract_name(format!("leeward-state-{hex}"))?;
    std::os::unix::net::UnixListener::bind_addr(&addr)
}

/// Take the lock file of `state_dir` (an advisory lock, which `leeward
/// status` reads), with this process's id in it.
pub fn take_lock(state_dir: &Path) -> Result<File, String> {
    try_take_lock(state_dir)?.ok_or_else(|| {
        format!(
            "another leeward serve is using the state directory {}",
            state_dir.display()
        )
    })
}

/// [`take_lock`], with `None` when another process holds the lock.
pub fn try_take_lock(state_dir: &Path) -> Result<Option<File>, String> {
    let path = lock_path(state_dir);
    let mut f = OpenOptions::new()
        .create(true)
        .truncate(false)
        .read(true)
        .write(true)
        .open(&path)
        .map_err(|e| format!("cannot open {}: {e}", path.display()))?;
    match f.try_lock() {
        Ok(()) => {}
        Err(std::fs::TryLockError::WouldBlock) => return Ok(None),
        Err(std::fs::TryLockError::Error(e)) => {
            return Err(format!("cannot lock {}: {e}", path.display()))
        }
    }
    let _ = f.set_len(0);
    let _ = f.write_all(format!("{}\n", std::process::id()).as_bytes());
    let _ = f.sync_all();
    Ok(Some(f))
}

/// Bytes that must be free in the state directory for the service to take
/// new work: room for some hundred records (a step writes a few of about
/// 0.3-2 KB), so that it stops before a record cannot be written.
pub const ROOM: u64 = 256 * 1024;

/// The journal's open file, and the lock held with it.
struct Open {
    file: File,
    /// Its identity when opened.
    id: (u64, u64),
    /// The length of its whole records: a write that fails part of the way
    /// is cut back to it, so that no torn line sits before the next record.
    len: u64,
    /// Its whole lines (what a restart replays).
    lines: usize,
    /// The lock file and its identity, when held.
    lock: Option<(File, (u64, u64))>,
}

/// The journal's file, shared by the main loop and the threads that publish
/// (they record a publication's renames before making them). Each record is
/// one line, written whole and fsynced before `write` returns, and only
/// while the journal and the lock at their paths are still the files this
/// service opened: a state directory removed or replaced under a running
/// service is noticed at its next record, not written into the void.
pub struct Journal {
    path: PathBuf,
    state_dir: PathBuf,
    open: Mutex<Open>,
    /// A record could not be written: until the main loop has written what
    /// it kept (or written the journal anew), no publication is recorded.
    trouble: std::sync::atomic::AtomicBool,
}

impl Journal {
    fn held(&self, o: &Open) -> Result<(), LedgerError> {
        let gone = |what: String| LedgerError::NotHeld {
            path: self.path.clone(),
            what,
        };
        match std::fs::metadata(&self.path) {
            Ok(m) if identity(&m) == o.id => {}
            Ok(_) => return Err(gone("replaced by another file".into())),
            Err(e) => return Err(gone(format!("gone ({e})"))),
        }
        if let Some((_, id)) = &o.lock {
            let lock = lock_path(&self.state_dir);
            match std::fs::metadata(&lock) {
                Ok(m) if identity(&m) == *id => {}
                Ok(_) => return Err(gone(format!("{} replaced by another file", lock.display()))),
                Err(e) => return Err(gone(format!("{} gone ({e})", lock.display()))),
            }
        }
        Ok(())
    }

    /// Are the journal and the lock still this service's, and is there room
    /// to write on (the file system writable, [`ROOM`] bytes free)? Without
    /// room the service stops before a record fails, not after.
    pub fn check(&self) -> Result<(), LedgerError> {
        let o = self
            .open
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner);
        self.held(&o)?;
        let full = |what: String| LedgerError::Io {
            path: self.path.clone(),
            source: std::io::Error::new(std::io::ErrorKind::StorageFull, what),
        };
        let st = rustix::fs::statvfs(&self.state_dir).map_err(|e| LedgerError::Io {
            path: self.path.clone(),
            source: e.into(),
        })?;
        if st.f_flag.contains(rustix::fs::StatVfsMountFlags::RDONLY) {
            return Err(LedgerError::Io {
                path: self.path.clone(),
                source: std::io::Error::new(
                    std::io::ErrorKind::ReadOnlyFilesystem,
                    "Read-only file system",
                ),
            });
        }
        let free = st.f_bavail.saturating_mul(st.f_frsize);
        if free < ROOM {
            return Err(full(format!(
                "No space left on device: {free} bytes free in the state directory, {ROOM} needed"
            )));
        }
        Ok(())
    }

    /// Append one record and fsync it (a publishing thread). Refused while
    /// the journal is in trouble: what the main loop kept goes first.
    pub fn write(&self, r: &Record) -> Result<(), LedgerError> {
        if self.in_trouble() {
            return Err(LedgerError::NotHeld {
                path: self.path.clone(),
                what: "records wait to be written; the state directory needs attention".into(),
            });
        }
        self.write_now(r)
    }

    /// Did a record fail to be written, and not all kept ones been written since?
    pub fn in_trouble(&self) -> bool {
        self.trouble.load(std::sync::atomic::Ordering::SeqCst)
    }

    fn write_now(&self, r: &Record) -> Result<(), LedgerError> {
        let written = self.append_line(r);
        if written.is_err() {
            self.trouble
                .store(true, std::sync::atomic::Ordering::SeqCst);
        }
        written
    }

    fn append_line(&self, r: &Record) -> Result<(), LedgerError> {
        let io = |source| LedgerError::Io {
            path: self.path.clone(),
            source,
        };
        let mut line = serde_json::to_string(r).map_err(|e| io(std::io::Error::other(e)))?;
        line.push('\n');
        let mut o = self
            .open
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner);
        self.held(&o)?;
        let len = o.len;
        if o.file.metadata().map(|m| m.len()).map_err(io)? != len {
            o.file.set_len(len).map_err(io)?;
        }
        let written = o
            .file
            .write_all(line.as_bytes())
            .and_then(|()| o.file.sync_data());
        if let Err(e) = written {
            let _ = o.file.set_len(len);
            return Err(io(e));
        }
        o.len = len + line.len() as u64;
        o.lines += 1;
        Ok(())
    }

    /// Where the journal lives.
    pub fn path(&self) -> &Path {
        &self.path
    }
}

/// An open journal.
pub struct Ledger {
    journal: Arc<Journal>,
    /// The state, kept in step with the journal.
    pub state: State,
    /// Records applied to the state and not yet written (the state
    /// directory could not be written): written first when it can be again.
    pending: Vec<Record>,
}

impl Ledger {
    /// Open (or create) the journal in `state_dir`, replay it, and cut a torn last line.
    pub fn open(state_dir: &Path) -> Result<Ledger, LedgerError> {
        let path = StateDir(state_dir).journal();
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
        let (good_len, skipped, lines) = replay(&file, &mut state).map_err(io)?;
        if skipped > 0 {
            tracing::warn!(ledger = %path.display(), lines = skipped, "ledger lines that do not parse were passed over");
        }
        let len = file.seek(SeekFrom::End(0)).map_err(io)?;
        if len != good_len {
            file.set_len(good_len).map_err(io)?;
            file.sync_all().map_err(io)?;
        }
        let id = identity(&file.metadata().map_err(io)?);
        Ok(Ledger {
            journal: Arc::new(Journal {
                path,
                state_dir: state_dir.to_path_buf(),
                open: Mutex::new(Open {
                    file,
                    id,
                    len: good_len,
                    lines,
                    lock: None,
                }),
                trouble: std::sync::atomic::AtomicBool::new(false),
            }),
            state,
            pending: Vec::new(),
        })
    }

    /// Lines in the journal now (what a restart replays).
    pub fn lines(&self) -> usize {
        self.journal
            .open
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner)
            .lines
    }

    /// Rewrite the journal as the records of its state: written beside it,
    /// fsynced, renamed over it, and the directory fsynced, so that a crash
    /// at any moment leaves either the old journal or the new one whole.
    /// Records kept while the directory could not be written go first; the
    /// journal must still be this service's. Returns the lines before and
    /// after.
    pub fn compact(&mut self) -> Result<(usize, usize), LedgerError> {
        self.flush()?;
        let path = self.journal.path.clone();
        let io = |source| LedgerError::Io {
            path: path.clone(),
            source,
        };
        let mut open = self
            .journal
            .open
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner);
        self.journal.held(&open)?;
        let records = self.state.snapshot();
        let mut text = Vec::new();
        for r in &records {
            serde_json::to_writer(&mut text, r).map_err(|e| io(std::io::Error::other(e)))?;
            text.push(b'\n');
        }
        let tmp = path.with_extension("jsonl.compacting");
        {
            let mut f = File::create(&tmp).map_err(io)?;
            f.write_all(&text).map_err(io)?;
            f.sync_all().map_err(io)?;
        }
        std::fs::rename(&tmp, &path).map_err(io)?;
        File::open(&self.journal.state_dir)
            .and_then(|d| d.sync_all())
            .map_err(io)?;
        let file = OpenOptions::new()
            .read(true)
            .append(true)
            .open(&path)
            .map_err(io)?;
        open.id = identity(&file.metadata().map_err(io)?);
        open.file = file;
        open.len = text.len() as u64;
        let before = open.lines;
        open.lines = records.len();
        Ok((before, open.lines))
    }

    /// Keep `lock` (taken with [`take_lock`]) with the journal: every record
    /// then checks that it is still the lock file of the state directory.
    pub fn hold(&mut self, lock: File) -> Result<(), LedgerError> {
        let id = identity(&lock.metadata().map_err(|source| LedgerError::Io {
            path: lock_path(&self.journal.state_dir),
            source,
        })?);
        self.journal
            .open
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner)
            .lock = Some((lock, id));
        Ok(())
    }

    /// Append one record, fsynced before returning, and apply it to the
    /// state. If it cannot be written, it is applied all the same and kept,
    /// with the records after it, until [`Ledger::flush`] or
    /// [`Ledger::rewrite`] writes them.
    pub fn append(&mut self, r: Record) -> Result<(), LedgerError> {
        let written = self.flush().and_then(|()| self.journal.write_now(&r));
        self.state.apply(&r);
        if written.is_err() {
            self.pending.push(r);
        }
        written
    }

    /// Write the records kept while the journal could not be written.
    pub fn flush(&mut self) -> Result<(), LedgerError> {
        while let Some(r) = self.pending.first() {
            self.journal.write_now(r)?;
            self.pending.remove(0);
        }
        Ok(())
    }

    /// Is the journal in trouble (a record not written, by this thread or a
    /// publishing one)?
    pub fn in_trouble(&self) -> bool {
        self.journal.in_trouble()
    }

    /// Every record kept is written and the journal is this service's: let
    /// the publishing threads record again.
    pub fn clear_trouble(&self) {
        self.journal
            .trouble
            .store(false, std::sync::atomic::Ordering::SeqCst);
    }

    /// Records kept, not yet written.
    pub fn pending(&self) -> usize {
        self.pending.len()
    }

    /// Are the journal and the lock at their paths still this service's?
    pub fn check(&self) -> Result<(), LedgerError> {
        self.journal.check()
    }

    /// The state directory is back after it was removed or replaced: take
    /// its lock again and write the journal anew from the state (every
    /// record kept included). A journal found there that is not this
    /// service's is kept beside it as `ledger.jsonl.replaced-<unix time>`.
    pub fn rewrite(&mut self) -> Result<(), LedgerError> {
        let dir = self.journal.state_dir.clone();
        let path = self.journal.path.clone();
        let io = |source| LedgerError::Io {
            path: path.clone(),
            source,
        };
        if !dir.is_dir() {
            return Err(LedgerError::NotHeld {
                path: path.clone(),
                what: format!("the state directory {} is not there", dir.display()),
            });
        }
        let mut open = self
            .journal
            .open
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner);
        // The lock file still ours (only the journal went): kept; else taken anew.
        let ours = open.lock.as_ref().is_some_and(|(_, id)| {
            std::fs::metadata(lock_path(&dir)).is_ok_and(|m| identity(&m) == *id)
        });
        let lock = match open.lock.take() {
            Some(l) if ours => l,
            _ => {
                let f = take_lock(&dir).map_err(|what| LedgerError::NotHeld {
                    path: path.clone(),
                    what,
                })?;
                let id = identity(&f.metadata().map_err(io)?);
                (f, id)
            }
        };
        let tmp = dir.join(format!(".{FILE_NAME}.partial-{}", std::process::id()));
        let mut text = String::new();
        for r in self.state.snapshot() {
            text.push_str(&serde_json::to_string(&r).map_err(|e| io(std::io::Error::other(e)))?);
            text.push('\n');
        }
        let mut f = File::create(&tmp).map_err(io)?;
        f.write_all(text.as_bytes())
            .and_then(|()| f.sync_all())
            .map_err(io)?;
        let mine = std::fs::metadata(&path).is_ok_and(|m| identity(&m) == open.id);
        if path.exists() && !mine {
            let aside = dir.join(format!(
                "{FILE_NAME}.replaced-{}",
                chrono::Utc::now().timestamp()
            ));
            std::fs::rename(&path, &aside).map_err(io)?;
            tracing::warn!(ledger = %path.display(), kept_as = %aside.display(), "a ledger that is not this service's was found and kept aside");
        }
        std::fs::rename(&tmp, &path).map_err(io)?;
        File::open(&dir).and_then(|d| d.sync_all()).map_err(io)?;
        let file = OpenOptions::new()
            .read(true)
            .append(true)
            .open(&path)
            .map_err(io)?;
        let id = identity(&file.metadata().map_err(io)?);
        *open = Open {
            file,
            id,
            len: text.len() as u64,
            lines: text.lines().count(),
            lock: Some(lock),
        };
        drop(open);
        self.pending.clear();
        Ok(())
    }

    /// The journal, for a thread that records a publication.
    pub fn journal(&self) -> Arc<Journal> {
        self.journal.clone()
    }

    /// Where the journal lives.
    pub fn path(&self) -> &Path {
        self.journal.path()
    }
}

/// Checksum of an input file's bytes (FNV-1a 64, hex; a fingerprint, not a security hash).
pub fn checksum(bytes: &[u8]) -> String {
    crate::ingest::bytes::fnv1a_hex(bytes)
}

/// [`checksum`] of the concatenation of `parts`.
pub fn checksum_parts(parts: &[&[u8]]) -> String {
    crate::ingest::bytes::fnv1a_hex_parts(parts)
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
                digests: vec![],
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
    fn late_input_reopens_one_step_and_keeps_its_first_input_time() {
        let d = dir("reopen");
        let mut l = Ledger::open(&d).unwrap();
        l.append(Record::Seen {
            feed: "m".into(),
            file: "/in/a".into(),
            size: 1,
            mtime_ns: 1,
            checksum: "c".into(),
            steps: vec![tag(6), tag(12)],
            digests: vec!["d6".into(), "d12".into()],
            at: 50,
        })
        .unwrap();
        for lead in [6, 12] {
            l.append(Record::Submitted {
                step: tag(lead),
                job: "7".into(),
                staging: "/s".into(),
                attempt: 3,
                at: 60,
            })
            .unwrap();
            l.append(Record::Published {
                step: tag(lead),
                path: "p".into(),
                manifest: "m".into(),
                partial: true,
                at: 70,
            })
            .unwrap();
        }
        assert_eq!(l.state.seen["/in/a"].digest_of(&tag(12)), Some("d12"));
        assert_eq!(l.state.seen["/in/a"].digest_of(&tag(18)), None);
        l.append(Record::Reopened {
            step: tag(12),
            file: "/in/a".into(),
            in_hand: false,
            at: 80,
        })
        .unwrap();
        assert!(l.state.settled(&tag(6)));
        assert!(!l.state.settled(&tag(12)));
        let s = &l.state.steps[&tag(12)];
        assert_eq!((s.first_seen, s.job_attempts), (50, 0));
        assert_eq!(read_state(&d).unwrap(), l.state);
        // A record of an older version, without digests, still reads.
        let old = r#"{"event":"seen","feed":"m","file":"/in/b","size":1,"mtime_ns":1,"checksum":"c","steps":[],"at":1}"#;
        assert!(matches!(
            serde_json::from_str::<Record>(old),
            Ok(Record::Seen { digests, .. }) if digests.is_empty()
        ));
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn input_that_came_while_a_step_was_made_reopens_it_at_the_end_of_that_run() {
        let d = dir("reopen-in-hand");
        let mut l = Ledger::open(&d).unwrap();
        let published = |at| Record::Published {
            step: tag(6),
            path: "p".into(),
            manifest: "m".into(),
            partial: false,
            at,
        };
        let in_hand = Record::Reopened {
            step: tag(6),
            file: "/in/a".into(),
            in_hand: true,
            at: 10,
        };
        l.append(in_hand.clone()).unwrap();
        // Killed here: the step is not settled, it is made again at start.
        assert!(!l.state.settled(&tag(6)));
        assert_eq!(read_state(&d).unwrap(), l.state);
        // The run that was in hand ends: the step waits again, and a ledger
        // written anew from the state says so too.
        l.append(published(20)).unwrap();
        assert!(!l.state.settled(&tag(6)));
        assert!(!l.state.steps[&tag(6)].more);
        // The next run, with everything, settles it.
        l.append(published(30)).unwrap();
        assert!(l.state.settled(&tag(6)));
        // Reopened in hand, then handed out again with all its input (the
        // `step` record): the end of that run settles it.
        l.append(in_hand).unwrap();
        let mut snap = State::default();
        for r in l.state.snapshot() {
            snap.apply(&r);
        }
        assert!(
            snap.steps[&tag(6)].more,
            "a ledger written anew keeps the reopening"
        );
        l.append(Record::Step {
            step: tag(6),
            first_seen: 0,
            job_attempts: 0,
        })
        .unwrap();
        l.append(Record::Failed {
            step: tag(6),
            kind: FailKind::Input,
            reason: "r".into(),
            at: 40,
        })
        .unwrap();
        assert!(l.state.settled(&tag(6)));
        assert_eq!(read_state(&d).unwrap(), l.state);
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn more_input_during_a_failed_run_reopens_the_step_unless_the_output_failed() {
        // An input failure with more input in hand is made again with it; an
        // output failure keeps its outcome (its retry is the output's, on a
        // timer) and the reopening waits (leeward's own rules).
        for (kind, reopened) in [(FailKind::Input, true), (FailKind::Output, false)] {
            let mut st = State::default();
            st.apply(&Record::Reopened {
                step: tag(6),
                file: "/in/a".into(),
                in_hand: true,
                at: 10,
            });
            st.apply(&Record::Failed {
                step: tag(6),
                kind,
                reason: "r".into(),
                at: 20,
            });
            let s = &st.steps[&tag(6)];
            assert_eq!(
                matches!(s.outcome, Outcome::Waiting),
                reopened,
                "{kind:?}: {:?}",
                s.outcome
            );
            assert_eq!(s.more, !reopened, "{kind:?}");
        }
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

    /// A journal with every kind of record, over `n` steps.
    fn busy_ledger(d: &Path, n: i64) -> Ledger {
        let mut l = Ledger::open(d).unwrap();
        l.append(Record::Started {
            version: "v".into(),
            pid: 1,
            at: 1,
        })
        .unwrap();
        for k in 0..n {
            let mut t = tag(6 * k);
            t.grid = ["abc", "def"][(k % 2) as usize].into();
            l.append(Record::Seen {
                feed: "m".into(),
                file: format!("/in/f{k}.grib2"),
                size: 10,
                mtime_ns: k,
                checksum: "c".into(),
                steps: vec![t.clone()],
                digests: vec![format!("d{k}")],
                at: 100 + k,
            })
            .unwrap();
            match k % 5 {
                0 => l
                    .append(Record::Published {
                        step: t,
                        path: format!("/out/{k}.nc"),
                        manifest: format!("/out/{k}.json"),
                        partial: k % 2 == 0,
                        at: 200 + k,
                    })
                    .unwrap(),
                1 => l
                    .append(Record::Failed {
                        step: t,
                        kind: FailKind::Input,
                        reason: "bad".into(),
                        at: 200 + k,
                    })
                    .unwrap(),
                2 => l
                    .append(Record::Submitted {
                        step: t,
                        job: format!("{k}"),
                        staging: "/s".into(),
                        attempt: 2,
                        at: 150 + k,
                    })
                    .unwrap(),
                3 => l
                    .append(Record::Failed {
                        step: t,
                        kind: FailKind::Output,
                        reason: "disk full".into(),
                        at: 200 + k,
                    })
                    .unwrap(),
                _ => {}
            }
        }
        l.append(Record::Quarantined {
            feed: "m".into(),
            file: "/in/bad".into(),
            reason: "garbage".into(),
            moved_to: Some("/q/bad".into()),
            at: 120,
        })
        .unwrap();
        l.append(Record::Reprocess {
            feed: "m".into(),
            cycle: "20260314T0000Z".into(),
            lead: Some(0),
            at: 300,
        })
        .unwrap();
        l.append(Record::Stopped {
            reason: "signal".into(),
            at: 400,
        })
        .unwrap();
        l
    }

    #[test]
    fn a_compacted_journal_replays_to_the_same_state() {
        let d = dir("compact");
        let mut l = busy_ledger(&d, 40);
        let before = l.state.clone();
        let lines = l.lines();
        assert!(lines > 70, "{lines}");
        let (was, now) = l.compact().unwrap();
        assert_eq!((was, now), (lines, l.state.snapshot().len()));
        assert_eq!(l.state, before);
        drop(l);
        let l = Ledger::open(&d).unwrap();
        assert_eq!(l.state, before, "replayed from the compacted journal");
        assert_eq!(l.lines(), now);
        // Appending goes on after a compaction.
        let mut l = l;
        l.append(Record::Stopped {
            reason: "again".into(),
            at: 500,
        })
        .unwrap();
        assert_eq!(
            Ledger::open(&d).unwrap().state.stopped,
            Some(("again".into(), 500))
        );
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn forgetting_keeps_what_is_open_and_files_still_there() {
        let d = dir("forget");
        let mut l = Ledger::open(&d).unwrap();
        // Steps k settled at 150 (k odd) or 250 (k even): published (k % 4 == 1
        // or 0), failed for output, so retried (k % 4 == 2), or waiting (k % 4 == 3).
        let step = |k: i64| tag(6 * k);
        let settled_at = |k: i64| if k % 2 == 1 { 150 } else { 250 };
        for k in 0..16 {
            l.append(Record::Seen {
                feed: "m".into(),
                file: format!("/in/f{k}.grib2"),
                size: 1,
                mtime_ns: 1,
                checksum: "c".into(),
                steps: vec![step(k)],
                digests: vec![format!("d{k}")],
                at: 100,
            })
            .unwrap();
            match k % 4 {
                0 | 1 => l
                    .append(Record::Published {
                        step: step(k),
                        path: "p".into(),
                        manifest: "m".into(),
                        partial: false,
                        at: settled_at(k),
                    })
                    .unwrap(),
                2 => l
                    .append(Record::Failed {
                        step: step(k),
                        kind: FailKind::Output,
                        reason: "disk full".into(),
                        at: settled_at(k),
                    })
                    .unwrap(),
                _ => {}
            }
        }
        // A file with fields of a step forgotten (1) and one waiting (3).
        l.append(Record::Seen {
            feed: "m".into(),
            file: "/in/two.grib2".into(),
            size: 1,
            mtime_ns: 1,
            checksum: "c".into(),
            steps: vec![step(1), step(3)],
            digests: vec!["x1".into(), "x3".into()],
            at: 100,
        })
        .unwrap();
        for (file, at) in [("/in/bad-old", 100), ("/in/bad-new", 300)] {
            l.append(Record::Quarantined {
                feed: "m".into(),
                file: file.into(),
                reason: "garbage".into(),
                moved_to: None,
                at,
            })
            .unwrap();
        }
        let grids = l.state.grids.clone();
        let n = l.state.forget(200, |f| f == "/in/f5.grib2");
        // Only the steps published before 200: 1, 5, 9, 13.
        assert_eq!(n, 4);
        for k in 0..16 {
            let gone = k % 2 == 1 && k % 4 == 1;
            assert_eq!(l.state.steps.contains_key(&step(k)), !gone, "step {k}");
        }
        // A forgotten step's file goes unless it is still there: then it stays, with no steps.
        assert!(!l.state.seen.contains_key("/in/f9.grib2"));
        assert_eq!(l.state.seen["/in/f5.grib2"].steps, vec![]);
        assert_eq!(l.state.seen["/in/f5.grib2"].digests, Vec::<String>::new());
        let two = &l.state.seen["/in/two.grib2"];
        assert_eq!(
            (two.steps.clone(), two.digests.clone()),
            (vec![step(3)], vec!["x3".to_string()]),
            "each step's digest goes with it"
        );
        assert!(
            l.state.seen.contains_key("/in/f3.grib2"),
            "a waiting step's file"
        );
        assert!(
            l.state.seen.contains_key("/in/f4.grib2"),
            "a file of a step published later"
        );
        let q: Vec<&String> = l.state.quarantined.keys().collect();
        assert_eq!(q, vec!["/in/bad-new"]);
        assert_eq!(l.state.grids, grids, "grid numbering is never forgotten");
        let after = l.state.clone();
        l.compact().unwrap();
        drop(l);
        assert_eq!(Ledger::open(&d).unwrap().state, after);
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn a_snapshot_replays_into_the_same_state() {
        let d = dir("snapshot");
        let mut l = Ledger::open(&d).unwrap();
        let mut other_grid = tag(18);
        other_grid.grid = "def".into();
        let records = vec![
            Record::Started {
                version: "0.1.0".into(),
                pid: 7,
                at: 1,
            },
            Record::Seen {
                feed: "m".into(),
                file: "a.grib2".into(),
                size: 10,
                mtime_ns: 5,
                checksum: "x".into(),
                steps: vec![tag(6), tag(12), other_grid.clone()],
                digests: vec!["d6".into(), "d12".into(), "d18".into()],
                at: 100,
            },
            Record::Seen {
                feed: "m".into(),
                file: "b.grib2".into(),
                size: 11,
                mtime_ns: 6,
                checksum: "y".into(),
                steps: vec![tag(0)],
                digests: vec![],
                at: 90,
            },
            Record::Published {
                step: tag(6),
                path: "p6".into(),
                manifest: "m6".into(),
                partial: true,
                at: 120,
            },
            Record::Failed {
                step: tag(0),
                kind: FailKind::Input,
                reason: "r".into(),
                at: 121,
            },
            Record::Submitted {
                step: tag(12),
                job: "44".into(),
                staging: "/s".into(),
                attempt: 2,
                at: 122,
            },
            Record::Quarantined {
                feed: "m".into(),
                file: "bad".into(),
                reason: "junk".into(),
                moved_to: Some("q/bad".into()),
                at: 123,
            },
            Record::Reprocess {
                feed: "m".into(),
                cycle: "20260314T0000Z".into(),
                lead: Some(0),
                at: 130,
            },
            Record::Publishing {
                step: other_grid,
                stage: "/st".into(),
                product: "p18".into(),
                manifest: "m18".into(),
                partial: false,
                moves: vec![Move {
                    staged: "/st/p18".into(),
                    target: "p18".into(),
                    bytes: 3,
                    sha256: "ab".into(),
                }],
                at: 131,
            },
        ];
        for r in records {
            l.append(r).unwrap();
        }
        let mut again = State::default();
        for r in l.state.snapshot() {
            again.apply(&r);
        }
        assert_eq!(again, l.state);
        assert_eq!(again.grids["m"], vec!["abc".to_string(), "def".to_string()]);
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn a_removed_state_directory_is_noticed_and_written_anew_when_back() {
        let d = dir("removed");
        std::fs::create_dir_all(&d).unwrap();
        let mut l = Ledger::open(&d).unwrap();
        l.hold(take_lock(&d).unwrap()).unwrap();
        let stop = |at| Record::Stopped {
            reason: "s".into(),
            at,
        };
        l.append(stop(1)).unwrap();
        std::fs::remove_dir_all(&d).unwrap();
        // Written into a removed file, a record would go nowhere: it is refused and kept.
        assert!(matches!(l.check(), Err(LedgerError::NotHeld { .. })));
        assert!(matches!(
            l.append(stop(2)),
            Err(LedgerError::NotHeld { .. })
        ));
        assert_eq!(l.pending(), 1);
        assert!(l.rewrite().is_err(), "not while the directory is gone");
        std::fs::create_dir_all(&d).unwrap();
        // Someone else's lock on the new directory keeps this service off it.
        let other = take_lock(&d).unwrap();
        assert!(l.rewrite().is_err());
        drop(other);
        l.rewrite().unwrap();
        assert_eq!(l.pending(), 0);
        l.append(stop(3)).unwrap();
        assert_eq!(read_state(&d).unwrap().stopped, Some(("s".into(), 3)));
        assert!(l.check().is_ok());
        let _ = std::fs::remove_dir_all(&d);
    }

    #[test]
    fn a_full_state_directory_keeps_the_records_and_leaves_no_torn_line() {
        // A 1 MiB tmpfs (needs root to mount; skipped with a reason otherwise).
        let d = dir("full");
        std::fs::create_dir_all(&d).unwrap();
        let mounted = std::process::Command::new("mount")
            .args(["-t", "tmpfs", "-o", "size=1m", "tmpfs"])
            .arg(&d)
            .output();
        if !mounted.as_ref().is_ok_and(|o| o.status.success()) {
            eprintln!("SKIPPED: cannot mount a small tmpfs (needs root): {mounted:?}");
            return;
        }
        struct Unmount<'a>(&'a Path);
        impl Drop for Unmount<'_> {
            fn drop(&mut self) {
                let _ = std::process::Command::new("umount")
                    .arg("-l")
                    .arg(self.0)
                    .status();
                let _ = std::fs::remove_dir_all(self.0);
            }
        }
        let _unmount = Unmount(&d);
        let mut l = Ledger::open(&d).unwrap();
        l.hold(take_lock(&d).unwrap()).unwrap();
        let seen = |k: i64| Record::Seen {
            feed: "m".into(),
            file: format!("/in/{k:03}_{}.grib2", "f".repeat(300)),
            size: 10,
            mtime_ns: k,
            checksum: "c".into(),
            steps: vec![tag(k)],
            digests: vec![format!("{k:016x}")],
            at: k,
        };
        l.append(seen(0)).unwrap();
        assert!(l.check().is_ok());
        // Fill the file system: the check says so before any record fails.
        let mut filler = File::create(d.join("filler")).unwrap();
        while filler.write_all(&[0u8; 4096]).is_ok() {}
        let e = l.check().unwrap_err();
        assert!(e.to_string().contains("No space left on device"), "{e}");
        // Records go on until the last page of the journal is full; the one
        // that does not fit is refused and kept, and so is every one after it.
        let mut k = 1;
        while l.append(seen(k)).is_ok() {
            k += 1;
            assert!(k < 100, "a full file system took 100 records");
        }
        l.append(seen(k + 1)).unwrap_err();
        assert_eq!(l.pending(), 2);
        assert!(l.in_trouble());
        let text = std::fs::read_to_string(d.join(FILE_NAME)).unwrap();
        assert!(text.ends_with('\n'), "a torn line was left in the journal");
        assert_eq!(text.lines().count() as i64, k);
        drop(filler);
        std::fs::remove_file(d.join("filler")).unwrap();
        assert!(l.check().is_ok());
        l.flush().unwrap();
        assert_eq!(l.pending(), 0);
        let again = read_state(&d).unwrap();
        assert_eq!(again, l.state);
        assert_eq!(again.seen.len() as i64, k + 2);
    }

    #[test]
    fn checksum_is_fnv1a() {
        // FNV-1a 64 test vectors (Fowler, Noll and Vo; from memory): "" and "a".
        assert_eq!(checksum(b""), "cbf29ce484222325");
        assert_eq!(checksum(b"a"), "af63dc4c8601ec8c");
        // In parts: the checksum of the concatenation.
        assert_eq!(checksum_parts(&[b"a", b""]), checksum(b"a"));
        assert_eq!(checksum_parts(&[b"gr", b"ib", b"2"]), checksum(b"grib2"));
        assert_ne!(checksum_parts(&[b"ib", b"gr", b"2"]), checksum(b"grib2"));
    }
}
