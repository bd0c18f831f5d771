//! The daemon: the main loop of `leeward serve`.
//!
//! In: the configuration file (and command-line overrides of its
//! directories), files landing in the feeds' incoming directories, signals,
//! reprocess requests in the state directory. Out: published steps, the
//! ledger, logs, notifications to systemd, the metrics endpoint. The main
//! thread owns the state; workers run one step each and report back.

use std::collections::{BTreeSet, HashMap};
use std::path::{Path, PathBuf};
use std::sync::mpsc::{channel, Receiver, Sender};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use chrono::{NaiveDateTime, TimeDelta, Utc};
use serde::{Deserialize, Serialize};
use tracing::{debug, error, info, warn};

use super::assemble::{isobaric, Assembly, Contribution, Phase};
use super::batch::{self, JobSpec, Scheduler, SchedulerError, Taken};
use super::child;
use super::commit;
use super::ledger::{FailKind, Journal, Ledger, Outcome, Record, StepTag};
use super::metrics::Metrics;
use super::pool::Pool;
use super::publish;
use super::settings::{Executor, FeedRule, FileRole, QuarantineMode, Unreachable};
use super::systemd::{status_line, Notifier};
use super::waiting::{self, Waiting, WaitingStep};
use super::watch::{watch, FinishedFiles};
use crate::config::Config;
use crate::escape::shown;
use crate::ingest::catalogue::catalogue_file;
use crate::ingest::grid::parse_grid;
use crate::ingest::source::{checksum_file, checksum_ranges, open_input, InputError, Opened};
use crate::output::store::cycle_dir_name;
use crate::pipeline::{grid_id, output_name, StepKey, StepReport};

/// Where `leeward serve` takes its settings from.
#[derive(Debug, Clone)]
pub struct ServeOptions {
    /// The configuration file.
    pub config: PathBuf,
    /// Overrides `service.watch_dir`.
    pub watch_dir: Option<PathBuf>,
    /// Overrides `service.out_dir`.
    pub out_dir: Option<PathBuf>,
    /// Overrides `service.state_dir`.
    pub state_dir: Option<PathBuf>,
    /// The log format (`text` or `json`), which the step processes use too.
    pub log_format: String,
}

/// Exit codes of `serve`.
pub mod code {
    /// Stopped on request.
    pub const OK: u8 = 0;
    /// Configuration or state directory unusable: do not restart until fixed.
    pub const CONFIG: u8 = 2;
}

/// A request, dropped into `<state_dir>/requests/` by `leeward reprocess`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ReprocessRequest {
    /// The feed.
    pub feed: String,
    /// The cycle, `YYYYMMDDTHHMMZ`.
    pub cycle: String,
    /// One lead only, hours.
    pub lead: Option<i64>,
}

/// The requests directory of a state directory.
pub fn requests_dir(state_dir: &Path) -> PathBuf {
    state_dir.join("requests")
}

/// The lock file that keeps two services off one state directory.
pub use super::ledger::lock_path;

/// Load the configuration and apply the command-line overrides.
pub fn load(opts: &ServeOptions) -> Result<Config, String> {
    // The overrides go in before validation: `--state-dir ""` meets the
    // same empty-path check as `state_dir = ""` in the file.
    let cfg = Config::load_with(&opts.config, |cfg| {
        if let Some(d) = &opts.watch_dir {
            cfg.service.watch_dir = d.clone();
        }
        if let Some(d) = &opts.out_dir {
            cfg.service.out_dir = d.clone();
        }
        if let Some(d) = &opts.state_dir {
            cfg.service.state_dir = d.clone();
        }
    })
    .map_err(|e| e.to_string())?;
    if cfg.feed.is_empty() {
        return Err(format!(
            "config {}: no [[feed]] table; the service needs at least one feed",
            opts.config.display()
        ));
    }
    Ok(cfg)
}

/// Feed rules and the configuration each feed runs with.
type Rules = (Vec<FeedRule>, HashMap<String, Arc<Config>>);

fn rules_of(cfg: &Config) -> Result<Rules, String> {
    let mut rules = Vec::new();
    let mut cfgs = HashMap::new();
    for f in &cfg.feed {
        let r = FeedRule::new(f, &cfg.service, &cfg.products)
            .map_err(|e| format!("feed {}: {e}", f.name))?;
        let mut c = cfg.clone();
        if let Some(p) = &f.products {
            c.products = p.clone();
        }
        c.feed.clear();
        cfgs.insert(f.name.clone(), Arc::new(c));
        rules.push(r);
    }
    Ok((rules, cfgs))
}

fn unix_now() -> f64 {
    Utc::now().timestamp_millis() as f64 / 1000.0
}

fn mtime_ns(m: &std::fs::Metadata) -> i64 {
    m.modified()
        .ok()
        .and_then(|t| t.duration_since(std::time::UNIX_EPOCH).ok())
        .map(|d| d.as_nanos() as i64)
        .unwrap_or(0)
}

/// A step's messages in one file (byte ranges) and the isobaric fields they hold.
type Gathered = (Vec<(u64, u64)>, Vec<(crate::ingest::params::Param, i64)>);

/// A file found finished and catalogued.
struct Caught {
    feed: String,
    path: PathBuf,
    /// Its name in the ledger.
    key: String,
    size: u64,
    mtime: i64,
    /// Of the whole file.
    checksum: String,
}

/// What became of a file's fields for one step.
enum Given {
    /// Added to the step.
    Yes,
    /// Not used: already used, not asked for, or arrived too late.
    No,
    /// Its cycle is older than catch-up: the step is recorded as skipped.
    Skipped,
    /// The step had been made without them: it waits again, with them.
    Reopened,
}

/// A step handed to a worker.
struct Job {
    tag: StepTag,
    key: StepKey,
    files: Vec<Contribution>,
    cfg: Arc<Config>,
    store: PathBuf,
    dir: PathBuf,
    lock: Arc<Mutex<()>>,
    suffix: Option<usize>,
    partial: bool,
    last_input: f64,
    not_arrived: Vec<String>,
    journal: Arc<Journal>,
}

/// What a worker reports.
enum JobOutcome {
    Published {
        path: PathBuf,
        manifest: PathBuf,
        latency: f64,
        report: Box<StepReport>,
    },
    OutputFailed(String),
    Vanished(PathBuf, String),
    InputFailed(String),
    Internal(String),
    /// A batch job ended without a usable result (failed, cancelled, timed
    /// out, lost, or its staged files did not check): run it again or give up.
    BatchRetry {
        state: String,
        reason: String,
    },
}

/// Where a step's batch job stands.
#[derive(Debug, Clone, Copy, PartialEq)]
enum JobPhase {
    /// Submitted. `ended`: since when Slurm has said the job ended (or no
    /// longer knows it) while its result record is not yet to be seen.
    Queued { ended: Option<Instant> },
    /// Its result is being taken (checked, moved, manifest written).
    Taking,
    /// Ended without a result; submitted again at `at`.
    Resubmit { at: Instant },
}

/// A step handed to the batch scheduler.
struct InFlight {
    job: String,
    stage: PathBuf,
    /// Its spec; `spec.attempt` is which run of the step this job is.
    spec: Arc<JobSpec>,
    phase: JobPhase,
}

/// Steps of one run (feed, member, grid) read and complete each other's files:
/// they go one at a time, on this machine as on the scheduler, so that each
/// sees the ones before it published (its changes in time, and their images).
fn chain(t: &StepTag) -> (&str, Option<u8>, &str) {
    (&t.feed, t.member, &t.grid)
}

struct JobDone {
    tag: StepTag,
    outcome: JobOutcome,
}

/// Make a step on this machine in a process of its own (see [`child`]): its
/// spec into a staging directory of the feed's `.publish`, `leeward process
/// --job` on it, and its result taken and published as a batch job's is
/// ([`batch::take`]: the recorded publication, the cycle's tracks with it).
/// The staging directory is gone when this returns, unless a stop cut the
/// publication short (the next start finishes it from there).
fn run_local(job: &Job, spec: &JobSpec, stage: &Path, log_format: &str) -> JobOutcome {
    if let Err(e) = std::fs::create_dir_all(&job.dir).and_then(|()| batch::write_spec(stage, spec))
    {
        commit::remove_stage(stage);
        return JobOutcome::OutputFailed(format!(
            "cannot prepare the staging directory {}: {e}",
            stage.display()
        ));
    }
    let outcome = match child::run(stage, log_format, batch::RESULT) {
        Ok(ran) => local_outcome(batch::take(spec, stage, &job.lock, &job.journal), ran),
        Err(reason) => JobOutcome::Internal(reason),
    };
    commit::remove_stage(stage);
    outcome
}

/// What a step process's taken result means for the step: as a local
/// worker's outcome (output failures and unreadable inputs retried here).
fn local_outcome(t: Taken, ran: child::Ran) -> JobOutcome {
    match t {
        Taken::Published {
            path,
            manifest,
            latency,
            report,
            result,
        } => {
            debug!(feed = %result.tag.feed, cycle = %result.tag.cycle, step = result.tag.lead, process_s = ran.seconds, peak_rss_mib = result.peak_rss_kib.map(|k| k / 1024), "step process's result taken");
            JobOutcome::Published {
                path,
                manifest,
                latency,
                report,
            }
        }
        Taken::Ended(r) => match r.ended {
            batch::Ended::InputFailed { reason } => JobOutcome::InputFailed(reason),
            batch::Ended::Internal { reason } => JobOutcome::Internal(reason),
            batch::Ended::OutputFailed { reason } => JobOutcome::OutputFailed(reason),
            batch::Ended::Vanished { file, reason } => JobOutcome::Vanished(file, reason),
            batch::Ended::Made { .. } => {
                JobOutcome::Internal("a made result was not taken (a defect in leeward)".into())
            }
        },
        Taken::Unusable(reason) => JobOutcome::OutputFailed(reason),
    }
}

/// What a taken batch result means for the step.
fn taken_outcome(t: Taken) -> JobOutcome {
    match t {
        Taken::Published {
            path,
            manifest,
            latency,
            report,
            result,
        } => {
            info!(feed = %result.tag.feed, cycle = %result.tag.cycle, step = result.tag.lead, job = ?result.job_id, host = %result.host, restarts = result.restarts, attempt = result.attempt, "step job's result taken");
            JobOutcome::Published {
                path,
                manifest,
                latency,
                report,
            }
        }
        Taken::Ended(r) => match r.ended {
            batch::Ended::InputFailed { reason } => JobOutcome::InputFailed(reason),
            batch::Ended::Internal { reason } => JobOutcome::Internal(reason),
            batch::Ended::OutputFailed { reason } => JobOutcome::BatchRetry {
                state: batch::outcome::UNWRITTEN.into(),
                reason: format!(
                    "the job on {} could not write the products: {reason}",
                    r.host
                ),
            },
            batch::Ended::Vanished { file, reason } => JobOutcome::BatchRetry {
                state: batch::outcome::UNREADABLE.into(),
                reason: format!(
                    "the job on {} could not read {}: {reason}",
                    r.host,
                    file.display()
                ),
            },
            batch::Ended::Made { .. } => {
                JobOutcome::Internal("a made result was not taken (a defect in leeward)".into())
            }
        },
        Taken::Unusable(reason) => JobOutcome::BatchRetry {
            state: batch::outcome::UNUSABLE.into(),
            reason,
        },
    }
}

enum Event {
    Signal(i32),
}

struct Daemon {
    opts: ServeOptions,
    cfg: Config,
    rules: Vec<FeedRule>,
    feed_cfgs: HashMap<String, Arc<Config>>,
    ledger: Ledger,
    asm: Assembly,
    watchers: Vec<(String, FinishedFiles)>,
    metrics: Arc<Mutex<Metrics>>,
    notifier: Notifier,
    done_tx: Sender<JobDone>,
    done_rx: Receiver<JobDone>,
    /// The threads local steps and the taking of batch results run on.
    pool: Pool,
    running: HashMap<StepTag, Instant>,
    /// Steps on the batch scheduler.
    jobs: HashMap<StepTag, InFlight>,
    /// Since when (Unix time) and why the scheduler cannot be used.
    sched_down: Option<(f64, String)>,
    /// When to try the scheduler again for new steps while it is down.
    sched_retry: Instant,
    last_poll: Instant,
    locks: HashMap<String, Arc<Mutex<()>>>,
    too_old: BTreeSet<(String, String)>,
    last_status: String,
    last_published: Option<String>,
    last_ping: Instant,
    /// Files read with their last message cut off at their end: (size, mtime
    /// then, since when). Read again once settled, or when they change.
    growing: HashMap<PathBuf, (u64, i64, Instant)>,
    /// The waiting steps as last reported (state file, /health).
    last_waiting: Vec<WaitingStep>,
    /// Since when and why the state directory cannot be used: no new work
    /// is taken until it can be again.
    state_problem: Option<(Instant, String)>,
}

impl Daemon {
    /// The main loop is alive: heartbeat for /health, and the watchdog ping
    /// when due. Called between files of a long batch too, so that a large
    /// catch-up never looks like a hang.
    fn keepalive(&mut self) {
        self.metrics().heartbeat = Some(Instant::now());
        if let Some(w) = self.notifier.watchdog {
            if self.last_ping.elapsed() >= w / 2 {
                self.last_ping = Instant::now();
                self.notifier.send("WATCHDOG=1");
            }
        }
    }

    /// Steps the ledger knows as waiting whose inputs are no longer in any
    /// incoming directory (deleted while the service was down): reported
    /// missing once they are older than the timeout, so they do not wait for ever.
    fn expire_orphans(&mut self) {
        let limit = Utc::now().timestamp() as f64
            - self.cfg.service.step_timeout_s
            - 2.0 * self.cfg.service.scan_interval_s
            - self.cfg.service.settle_s
            - 60.0;
        let orphans: Vec<StepTag> = self
            .ledger
            .state
            .steps
            .iter()
            .filter(|(t, s)| {
                matches!(s.outcome, Outcome::Waiting)
                    && (s.first_seen as f64) < limit
                    && !self.asm.steps.contains_key(*t)
                    && self.rules.iter().any(|r| r.feed.name == t.feed)
            })
            .map(|(t, _)| t.clone())
            .collect();
        for t in orphans {
            self.fail(
                &t,
                FailKind::Missing,
                "its inputs are no longer in the incoming directory".into(),
            );
        }
    }

    fn metrics(&self) -> std::sync::MutexGuard<'_, Metrics> {
        self.metrics
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner)
    }

    fn record(&mut self, r: Record) {
        if let Err(e) = self.ledger.append(r) {
            self.metrics().ledger_errors += 1;
            self.state_unusable(e.to_string());
        }
    }

    /// The state directory or its ledger is gone, replaced or cannot be
    /// written: say so once, and take no new work until it can be used.
    fn state_unusable(&mut self, why: String) {
        if self.state_problem.is_none() {
            error!(state_dir = %self.cfg.service.state_dir.display(), error = %why, "state directory unusable: no new work is taken until it is back; records are kept until they can be written");
            self.state_problem = Some((Instant::now(), why.clone()));
        }
        self.metrics().state_problem = Some(why);
    }

    /// Once a second: is the state directory still this service's, and, when
    /// it was not, can it be used again? A ledger still ours is written on
    /// (the records kept first); one removed or replaced is written anew from
    /// the state once the directory is there again.
    fn watch_state(&mut self) {
        if self.state_problem.is_none() && self.ledger.in_trouble() {
            // A publishing thread could not record its publication.
            self.state_unusable("a record could not be written".into());
            return;
        }
        match self.ledger.check() {
            Ok(()) if self.state_problem.is_none() => return,
            Err(e) if self.state_problem.is_none() => {
                self.state_unusable(e.to_string());
                return;
            }
            Ok(()) => {
                if self.ledger.flush().is_err() {
                    return;
                }
            }
            Err(e @ super::ledger::LedgerError::Io { .. }) => {
                // No room, or not writable: wait for it.
                self.metrics().state_problem = Some(e.to_string());
                return;
            }
            Err(super::ledger::LedgerError::NotHeld { .. }) => {
                if let Err(e) = self.ledger.rewrite() {
                    self.metrics().state_problem = Some(e.to_string());
                    return;
                }
                warn!(ledger = %self.ledger.path().display(), steps = self.ledger.state.steps.len(), "ledger written anew from the service's state");
            }
        }
        self.ledger.clear_trouble();
        if let Some((since, why)) = self.state_problem.take() {
            info!(state_dir = %self.cfg.service.state_dir.display(), unusable_s = since.elapsed().as_secs_f64(), was = %why, "state directory usable again; taking work again");
        }
        self.metrics().state_problem = None;
    }

    fn start_watchers(&mut self) {
        self.watchers.clear();
        let settle = Duration::from_secs_f64(self.cfg.service.settle_s);
        let scan = Duration::from_secs_f64(self.cfg.service.scan_interval_s);
        let mut dirs: Vec<PathBuf> = Vec::new();
        for r in &self.rules {
            if !r.dir.exists() {
                // Group-writable, so that the feed's own user (in leeward's group)
                // can deliver into it; the set-group-id bit comes from the parent
                // (the unit forbids setting it by chmod, and its UMask=0002 keeps
                // group write, so no chmod is needed there).
                use std::os::unix::fs::PermissionsExt;
                let made = std::fs::create_dir_all(&r.dir).and_then(|()| {
                    let mode = std::fs::metadata(&r.dir)?.permissions().mode();
                    if mode & 0o020 == 0 && mode & 0o6000 == 0 {
                        std::fs::set_permissions(
                            &r.dir,
                            std::fs::Permissions::from_mode((mode & 0o777) | 0o070),
                        )?;
                    }
                    Ok(())
                });
                if let Err(e) = made {
                    warn!(feed = %r.feed.name, dir = %r.dir.display(), error = %e, "cannot create the incoming directory");
                } else if std::fs::metadata(&r.dir)
                    .is_ok_and(|m| m.permissions().mode() & 0o020 == 0)
                {
                    warn!(feed = %r.feed.name, dir = %r.dir.display(), "incoming directory made without group write: the feed's user may not deliver into it (see docs/operations.md)");
                }
            }
            if dirs.contains(&r.dir) {
                continue;
            }
            dirs.push(r.dir.clone());
            match watch(&r.dir, settle, scan) {
                Ok(w) => {
                    info!(feed = %r.feed.name, dir = %r.dir.display(), "watching");
                    self.watchers.push((r.feed.name.clone(), w));
                }
                Err(e) => {
                    error!(feed = %r.feed.name, dir = %r.dir.display(), error = %e, "cannot watch; the directory is retried at the next reload or restart")
                }
            }
        }
    }

    /// A finished file in some feed's directory.
    fn ingest(&mut self, path: &Path, force: Option<&ReprocessRequest>) {
        let Some(raw) = path.file_name() else {
            return;
        };
        // A name that is not UTF-8 is matched in its escaped form (`\xff`);
        // the file itself is opened by its bytes.
        let name = crate::escape::path(Path::new(raw));
        let dir = path.parent().map(Path::to_path_buf).unwrap_or_default();
        let found = self
            .rules
            .iter()
            .filter(|r| r.dir == dir)
            .find_map(|r| r.role(&name).map(|role| (r.feed.name.clone(), role)));
        let Some((feed, role)) = found else {
            debug!(file = %shown(path), "not a file of any feed");
            return;
        };
        match role {
            FileRole::Marker(parts) => {
                if let Some(c) = parts.cycle {
                    info!(feed = %feed, file = %shown(path), cycle = %cycle_dir_name(c), step = ?parts.step, "marker");
                    self.asm
                        .markers
                        .insert((feed, cycle_dir_name(c), parts.step));
                } else {
                    warn!(feed = %feed, file = %shown(path), "marker file without a readable cycle in its name");
                }
            }
            FileRole::Data(parts) => self.ingest_data(&feed, path, parts, force),
        }
    }

    /// Open a feed's input file as its link policy allows. Whatever is not
    /// read is said in the log once (the watcher hands each file over once per
    /// change); a link the policy refuses is quarantined by its name, its
    /// target never opened.
    fn open_feed_input(
        &mut self,
        feed: &str,
        path: &Path,
        size: u64,
        mtime: i64,
    ) -> Option<Opened> {
        let is_link = std::fs::symlink_metadata(path).is_ok_and(|m| m.file_type().is_symlink());
        let target = if is_link {
            let target = match std::fs::canonicalize(path) {
                Ok(t) => t,
                Err(e) => {
                    let to = std::fs::read_link(path)
                        .map(|t| crate::escape::path(&t))
                        .unwrap_or_default();
                    warn!(feed, file = %shown(path), link_to = %to, error = %e, "symbolic link whose target cannot be reached (dangling): skipped until it can");
                    return None;
                }
            };
            let rule = self.rules.iter().find(|r| r.feed.name == feed)?;
            if !rule.link_allowed(&target) {
                let policy = match rule.feed.follow_links {
                    super::settings::FollowLinks::Never => "follow_links = \"never\"".to_string(),
                    _ => format!(
                        "follow_links = \"inside\": the target is not under {} or the feed's link_roots",
                        crate::escape::path(&rule.dir)
                    ),
                };
                let reason = format!(
                    "symbolic link to {} refused ({policy}); its target was not read",
                    crate::escape::path(&target)
                );
                self.quarantine(feed, path, &reason, size, mtime, String::new());
                return None;
            }
            target
        } else {
            path.to_path_buf()
        };
        // The resolved target has no link left in it: opened without following one.
        match open_input(&target, false) {
            Ok(o) => Some(o),
            Err(InputError::NotRegular(kind)) => {
                warn!(feed, file = %shown(path), kind, "not a regular file: skipped");
                None
            }
            Err(e) => {
                warn!(feed, file = %shown(path), error = %e, "input could not be read; it is taken again if it changes");
                None
            }
        }
    }

    /// A file read with its last message cut off at its end: true once it has
    /// kept that size and mtime for the settle time (a file that settled cut
    /// short), false while it may still be written (it is looked at again).
    fn settled_cut_short(&mut self, path: &Path, size: u64, mtime: i64) -> bool {
        let settle = Duration::from_secs_f64(self.cfg.service.settle_s);
        match self.growing.get(path) {
            Some(&(s, m, since)) if (s, m) == (size, mtime) => since.elapsed() >= settle,
            _ => {
                self.growing
                    .insert(path.to_path_buf(), (size, mtime, Instant::now()));
                false
            }
        }
    }

    /// Files cut short at their end are read again once they have settled;
    /// one that changed meanwhile is handed over again by its watcher.
    fn recheck_growing(&mut self) {
        let settle = Duration::from_secs_f64(self.cfg.service.settle_s);
        let due: Vec<PathBuf> = self
            .growing
            .iter()
            .filter(|(_, (_, _, since))| since.elapsed() >= settle)
            .map(|(p, _)| p.clone())
            .collect();
        for p in due {
            let (size, mtime, since) = self.growing[&p];
            if std::fs::metadata(&p).is_ok_and(|m| (m.len(), mtime_ns(&m)) == (size, mtime)) {
                self.ingest(&p, None);
            }
            // Read now (or not readable any more): not looked at again unless it changes.
            if self.growing.get(&p).is_some_and(|g| g.2 == since) {
                self.growing.remove(&p);
            }
        }
    }

    fn quarantine(
        &mut self,
        feed: &str,
        path: &Path,
        reason: &str,
        size: u64,
        mtime: i64,
        checksum: String,
    ) {
        let moved_to = match self.cfg.service.quarantine {
            QuarantineMode::Move => {
                match publish::quarantine(path, &self.cfg.service.quarantine_dir(), feed, reason) {
                    Ok(d) => Some(crate::escape::path(&d)),
                    Err(e) => {
                        warn!(feed, file = %shown(path), error = %e, "cannot move the file to quarantine; recorded only");
                        None
                    }
                }
            }
            QuarantineMode::Record => None,
        };
        error!(feed, file = %shown(path), reason, moved_to = ?moved_to, "input file quarantined");
        self.metrics().feed(feed).quarantined += 1;
        self.record(Record::Seen {
            feed: feed.into(),
            file: crate::escape::path(path),
            size,
            mtime_ns: mtime,
            checksum,
            steps: Vec::new(),
            digests: Vec::new(),
            at: Utc::now().timestamp(),
        });
        self.record(Record::Quarantined {
            feed: feed.into(),
            file: crate::escape::path(path),
            reason: reason.into(),
            moved_to,
            at: Utc::now().timestamp(),
        });
    }

    fn ingest_data(
        &mut self,
        feed: &str,
        path: &Path,
        parts: super::settings::NameParts,
        force: Option<&ReprocessRequest>,
    ) {
        // Its identity as last seen (a link: its target's), without opening it.
        let meta = match std::fs::metadata(path).or_else(|_| std::fs::symlink_metadata(path)) {
            Ok(m) => m,
            Err(e) => {
                warn!(feed, file = %shown(path), error = %e, "input vanished before it could be read");
                return;
            }
        };
        let (size, mtime) = (meta.len(), mtime_ns(&meta));
        let key = crate::escape::path(path);
        if force.is_none() {
            if let Some(s) = self.ledger.state.seen.get(&key) {
                if s.size == size
                    && s.mtime_ns == mtime
                    && s.steps.iter().all(|t| self.ledger.state.settled(t))
                {
                    debug!(feed, file = %shown(path), "already done");
                    return;
                }
            }
        }
        let Some(opened) = self.open_feed_input(feed, path, size, mtime) else {
            return;
        };
        let (size, mtime) = (opened.size, opened.mtime_ns);
        let checksum = match checksum_file(&opened.file, size) {
            Ok(c) => c,
            Err(e) => {
                warn!(feed, file = %shown(path), error = %e, "input could not be read; it is taken again if it changes");
                return;
            }
        };
        let cat = catalogue_file(&opened.file, size);
        if cat.cut_at_end && !self.settled_cut_short(path, size, mtime) {
            debug!(feed, file = %shown(path), bytes = size, "last message cut off at the end of the file: still being written; read again when it changes or has settled");
            return;
        }
        self.growing.remove(path);
        for p in &cat.problems {
            warn!(feed, file = %shown(path), field = ?p.field, offset = p.offset, reason = %p.reason, "input problem");
        }
        let usable: Vec<_> = cat.fields.iter().filter(|f| f.unusable.is_none()).collect();
        if usable.is_empty() {
            let reason = cat
                .problems
                .first()
                .map(|p| format!("{} (at byte {})", p.reason, p.offset))
                .or_else(|| cat.fields.iter().find_map(|f| f.unusable.clone()))
                .unwrap_or_else(|| "no GRIB2 message in the file".into());
            self.quarantine(feed, path, &reason, size, mtime, checksum);
            return;
        }
        // Grids leeward cannot use make a file unusable only if every field is on one.
        let mut grid_ok: HashMap<Arc<[u8]>, Result<(), String>> = HashMap::new();
        for f in &usable {
            grid_ok.entry(f.grid_definition.clone()).or_insert_with(|| {
                parse_grid(&f.grid_definition)
                    .map(|_| ())
                    .map_err(|e| e.to_string())
            });
        }
        let good: Vec<_> = usable
            .into_iter()
            .filter(|f| matches!(grid_ok.get(&f.grid_definition), Some(Ok(()))))
            .collect();
        if good.is_empty() {
            let reason = grid_ok
                .values()
                .find_map(|r| r.clone().err())
                .unwrap_or_else(|| "grid not usable".into());
            self.quarantine(
                feed,
                path,
                &format!("unsupported grid: {reason}"),
                size,
                mtime,
                checksum,
            );
            return;
        }
        self.metrics().feed(feed).files_seen += 1;
        // Group the fields into steps.
        let mut by_step: std::collections::BTreeMap<StepKey, Gathered> =
            std::collections::BTreeMap::new();
        for f in &good {
            let k = crate::pipeline::step_key(f);
            let e = by_step.entry(k).or_default();
            // Only the messages the products may use are read again for the
            // step (and the step's first from this file, which names its grid).
            let range = (f.message_offset as u64, f.message_len as u64);
            if (e.0.is_empty() || crate::pipeline::may_use(f)) && !e.0.contains(&range) {
                e.0.push(range);
            }
            if let Some(q) = isobaric(f) {
                e.1.push(q);
            }
        }
        let file = Caught {
            feed: feed.to_string(),
            path: path.to_path_buf(),
            key,
            size,
            mtime,
            checksum,
        };
        self.assign(&file, &opened.file, by_step, &parts, force);
    }

    /// Give a catalogued file's fields to their steps, and record the file.
    fn assign(
        &mut self,
        file: &Caught,
        opened: &std::fs::File,
        by_step: std::collections::BTreeMap<StepKey, Gathered>,
        parts: &super::settings::NameParts,
        force: Option<&ReprocessRequest>,
    ) {
        let (feed, path) = (file.feed.as_str(), file.path.as_path());
        // What the file gives each step: the checksum of the step's messages,
        // read again in pieces from the file as it was opened.
        let step_digests: Result<Vec<String>, std::io::Error> = by_step
            .values()
            .map(|(messages, _)| checksum_ranges(opened, messages))
            .collect();
        let step_digests = match step_digests {
            Ok(d) => d,
            Err(e) => {
                warn!(feed, file = %shown(path), error = %e, "input could not be read; it is taken again if it changes");
                return;
            }
        };
        let now = unix_now();
        let mut tags = Vec::new();
        let mut digests = Vec::new();
        let mut skipped = Vec::new();
        let mut reopened = Vec::new();
        if let Some(s) = parts.step {
            let leads: Vec<i64> = by_step
                .keys()
                .map(|k| (k.valid_time - k.reference_time).num_hours())
                .collect();
            if !leads.contains(&s) {
                warn!(feed, file = %shown(path), name_step = s, leads = ?leads, "the file name and the contents disagree on the step; the contents are used");
            }
        }
        for ((k, (messages, fields)), digest) in by_step.into_iter().zip(step_digests) {
            if let Some(c) = parts.cycle {
                if c != k.reference_time {
                    warn!(feed, file = %shown(path), name_cycle = %cycle_dir_name(c), cycle = %cycle_dir_name(k.reference_time), "the file name and the contents disagree on the cycle; the contents are used");
                }
            }
            let tag = StepTag {
                feed: feed.to_string(),
                cycle: cycle_dir_name(k.reference_time),
                lead: (k.valid_time - k.reference_time).num_hours(),
                member: k.member,
                grid: grid_id(&k.grid_key),
            };
            tags.push(tag.clone());
            digests.push(digest.clone());
            let c = Contribution {
                path: path.to_path_buf(),
                size: file.size,
                checksum: file.checksum.clone(),
                messages,
                digest,
                seen_at: now,
            };
            match self.step_input(file, tag.clone(), k, c, &fields, force) {
                Given::Yes | Given::No => {}
                Given::Skipped => skipped.push(tag),
                Given::Reopened => reopened.push(tag),
            }
        }
        let known = self.ledger.state.seen.get(&file.key).is_some_and(|s| {
            s.size == file.size && s.mtime_ns == file.mtime && s.checksum == file.checksum
        });
        if !known {
            self.record(Record::Seen {
                feed: feed.into(),
                file: file.key.clone(),
                size: file.size,
                mtime_ns: file.mtime,
                checksum: file.checksum.clone(),
                steps: tags,
                digests,
                at: now as i64,
            });
        }
        let catch_up = self.cfg.service.catch_up_hours;
        for tag in skipped {
            *self
                .metrics()
                .feed(feed)
                .failed
                .entry(FailKind::Skipped.name())
                .or_default() += 1;
            self.record(Record::Failed {
                step: tag,
                kind: FailKind::Skipped,
                reason: format!(
                    "cycle older than service.catch_up_hours ({catch_up} h) when its input came"
                ),
                at: now as i64,
            });
        }
        // A step made again is made from all its input: its other files are
        // read again (they go to the step, which waits again).
        for tag in reopened {
            for other in self.other_inputs(&tag, &file.key) {
                self.ingest(&other, None);
            }
        }
    }

    /// Give one step a file's fields (see [`Given`]).
    fn step_input(
        &mut self,
        file: &Caught,
        tag: StepTag,
        k: StepKey,
        c: Contribution,
        fields: &[(crate::ingest::params::Param, i64)],
        force: Option<&ReprocessRequest>,
    ) -> Given {
        let asked = force.is_some_and(|r| {
            r.feed == tag.feed && r.cycle == tag.cycle && r.lead.is_none_or(|l| l == tag.lead)
        });
        let (feed, path) = (file.feed.as_str(), file.path.as_path());
        if force.is_some() && !asked {
            // A reprocess looks at every file of the feed: the steps not asked
            // for go their normal way, quietly.
            if self.ledger.state.settled(&tag) || self.asm.steps.contains_key(&tag) {
                return Given::No;
            }
        }
        let skipped_before = matches!(
            self.ledger.state.steps.get(&tag).map(|s| &s.outcome),
            Some(Outcome::Failed {
                kind: FailKind::Skipped,
                ..
            })
        );
        if skipped_before && !asked {
            return Given::No;
        }
        let catch_up = self.cfg.service.catch_up_hours;
        let too_old = catch_up > 0
            && TimeDelta::try_hours(i64::from(catch_up))
                .is_some_and(|h| k.reference_time < Utc::now().naive_utc() - h);
        let mut taken = Given::Yes;
        if self.ledger.state.settled(&tag) {
            let used = self.ledger.state.seen.get(&file.key).is_some_and(|s| {
                s.checksum == file.checksum || s.digest_of(&tag) == Some(c.digest.as_str())
            });
            if used {
                return Given::No;
            }
            if let Err(why) = self.may_remake(&tag, &file.key, too_old) {
                warn!(feed, file = %shown(path), cycle = %tag.cycle, step = tag.lead, reason = %why, "input arrived after its step was made; not used (reprocess the cycle to use it)");
                self.metrics().feed(feed).late_files += 1;
                return Given::No;
            }
            info!(feed, file = %shown(path), cycle = %tag.cycle, step = tag.lead, "more input for a step already made; made again with all its input");
            self.metrics().feed(feed).remade += 1;
            self.record(Record::Reopened {
                step: tag.clone(),
                file: file.key.clone(),
                in_hand: false,
                at: Utc::now().timestamp(),
            });
            taken = Given::Reopened;
        } else if too_old && !asked {
            if self.too_old.insert((feed.to_string(), tag.cycle.clone())) {
                warn!(feed, cycle = %tag.cycle, file = %shown(path), catch_up_hours = catch_up, "cycle older than service.catch_up_hours; not processed (use leeward reprocess)");
            }
            return Given::Skipped;
        }
        let first_seen = self
            .ledger
            .state
            .steps
            .get(&tag)
            .map_or(c.seen_at, |s| s.first_seen as f64);
        let in_hand = self
            .asm
            .steps
            .get(&tag)
            .is_some_and(|p| matches!(p.phase, Phase::Running { .. }));
        let n = fields.len();
        let more_before = self.ledger.state.steps.get(&tag).is_some_and(|s| s.more);
        if self.asm.add(tag.clone(), k, c, fields, first_seen, asked) {
            if more_before {
                // Reopened in hand before a restart, by input now caught again.
                if let Some(p) = self.asm.steps.get_mut(&tag) {
                    p.more = true;
                }
            }
            let w = self.waiting_step(&tag);
            let missing = w
                .as_ref()
                .map_or_else(|| "nothing: complete".to_string(), |w| w.missing.join("; "));
            let made_by = w.map_or(0, |w| w.made_by);
            let now = unix_now() as i64;
            info!(feed, file = %shown(path), cycle = %tag.cycle, step = tag.lead, fields = n, missing = %missing, made_anyway_in_s = made_by.saturating_sub(now).max(0), "input for step");
            if in_hand {
                // Told to the ledger now: the end of the run in hand then
                // leaves the step waiting, whatever stops the service meanwhile.
                info!(feed, file = %shown(path), cycle = %tag.cycle, step = tag.lead, "input for a step being made; made again with all its input once this run ends");
                self.record(Record::Reopened {
                    step: tag,
                    file: file.key.clone(),
                    in_hand: true,
                    at: Utc::now().timestamp(),
                });
            }
        }
        taken
    }

    /// May a step already made be made again with more input? Not when its
    /// cycle is older than catch-up, nor when one of the files it was made
    /// from is gone (the new make would lack it).
    fn may_remake(&self, tag: &StepTag, file: &str, too_old: bool) -> Result<(), String> {
        if too_old {
            return Err(format!(
                "its cycle is older than service.catch_up_hours ({} h)",
                self.cfg.service.catch_up_hours
            ));
        }
        for other in self.other_inputs(tag, file) {
            if !other.is_file() {
                return Err(format!(
                    "{} it was made from is no longer there",
                    shown(&other)
                ));
            }
        }
        Ok(())
    }

    /// The files a step was made from, as the ledger knows them, but `file`.
    fn other_inputs(&self, tag: &StepTag, file: &str) -> Vec<PathBuf> {
        self.ledger
            .state
            .seen
            .iter()
            .filter(|(f, s)| f.as_str() != file && s.steps.contains(tag))
            .filter_map(|(f, _)| crate::escape::unescape_path(f))
            .collect()
    }

    fn suffix(&self, tag: &StepTag) -> Option<usize> {
        let k = self
            .ledger
            .state
            .grids
            .get(&tag.feed)
            .and_then(|g| g.iter().position(|x| *x == tag.grid))
            .unwrap_or(0);
        (k > 0).then_some(k + 1)
    }

    /// A product already published whose manifest matches the step's inputs
    /// (a crash after the manifest and before the ledger): adopt it.
    fn adopt(&mut self, tag: &StepTag) -> bool {
        let Some(p) = self.asm.steps.get(tag) else {
            return false;
        };
        if p.forced {
            return false;
        }
        let dir = publish::cycle_dir(&self.cfg.service.out_dir, &tag.feed, p.key.reference_time);
        let product = dir.join(output_name(&p.key, self.suffix(tag)));
        let manifest = publish::manifest_path(&product);
        let Some(m) = publish::read_manifest(&manifest) else {
            return false;
        };
        let have: BTreeSet<(String, String)> = p
            .files
            .values()
            .map(|c| (crate::escape::path(&c.path), c.checksum.clone()))
            .collect();
        let had: BTreeSet<(String, String)> = m
            .inputs
            .iter()
            .map(|i| (i.file.clone(), i.checksum.clone()))
            .collect();
        if have != had || !product.exists() {
            return false;
        }
        info!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, manifest = %manifest.display(), "already published before a restart; adopted");
        self.record(Record::Published {
            step: tag.clone(),
            path: product.display().to_string(),
            manifest: manifest.display().to_string(),
            partial: m.state == "partial",
            at: Utc::now().timestamp(),
        });
        self.asm.steps.remove(tag);
        true
    }

    fn executor(&self, feed: &str) -> Executor {
        self.rules
            .iter()
            .find(|r| r.feed.name == feed)
            .map_or(Executor::Local, |r| r.feed.executor)
    }

    fn scheduler(&self) -> Scheduler {
        Scheduler {
            cfg: self.cfg.service.slurm.clone(),
        }
    }

    /// The scheduler may take new steps now: it answered last time, or it is
    /// time to try it again.
    fn scheduler_usable(&self) -> bool {
        self.sched_down.is_none() || Instant::now() >= self.sched_retry
    }

    fn scheduler_up(&mut self) {
        if let Some((since, why)) = self.sched_down.take() {
            info!(down_s = unix_now() - since, was = %why, "scheduler reachable again");
        }
        let mut m = self.metrics();
        m.scheduler.reachable = true;
        m.scheduler.problem.clear();
    }

    fn scheduler_down(&mut self, e: &SchedulerError) {
        let now = unix_now();
        let first = self.sched_down.is_none();
        let since = self.sched_down.as_ref().map_or(now, |d| d.0);
        self.sched_down = Some((since, e.to_string()));
        // Try again for new steps after a pause that grows with the outage.
        let wait = ((now - since) / 2.0).clamp(10.0, 300.0);
        self.sched_retry = Instant::now() + Duration::from_secs_f64(wait);
        let local = self.cfg.service.slurm.when_unreachable == Unreachable::Local;
        if first {
            error!(error = %e, new_steps = if local { "run locally" } else { "wait" }, "scheduler cannot be used");
        }
        let mut m = self.metrics();
        m.scheduler.reachable = false;
        m.scheduler.problem = e.to_string();
        m.scheduler.down_since = Some(since);
        m.scheduler.fallback = local;
    }

    fn dispatch(&mut self) {
        let workers = self.cfg.service.workers as usize;
        let max_jobs = self.cfg.service.slurm.max_jobs as usize;
        let fallback = self.cfg.service.slurm.when_unreachable == Unreachable::Local;
        loop {
            let any_slurm = self
                .rules
                .iter()
                .any(|r| r.feed.executor == Executor::Slurm);
            if self.running.len() >= workers && (!any_slurm || self.jobs.len() >= max_jobs) {
                break; // no slot anywhere: do not look through the steps in hand
            }
            let busy: Vec<StepTag> = self
                .running
                .keys()
                .chain(self.jobs.keys())
                .cloned()
                .collect();
            let busy_chains: BTreeSet<(&str, Option<u8>, &str)> = busy.iter().map(chain).collect();
            let local_free = self.running.len() < workers;
            let sched_ok = self.scheduler_usable();
            let jobs_free = self.jobs.len() < max_jobs;
            let pick = self.asm.next_where(self.cfg.service.order, &busy, |p| {
                if busy_chains.contains(&chain(&p.tag)) {
                    return false;
                }
                if self.executor(&p.tag.feed) == Executor::Local {
                    return local_free;
                }
                if sched_ok {
                    jobs_free
                } else {
                    fallback && local_free
                }
            });
            let Some(tag) = pick else {
                break;
            };
            if self.adopt(&tag) {
                continue;
            }
            let suffix = self.suffix(&tag);
            let Some(p) = self.asm.steps.get(&tag) else {
                break;
            };
            let partial = matches!(p.phase, Phase::Ready { partial: true });
            let not_arrived = if partial {
                self.rules
                    .iter()
                    .find(|r| r.feed.name == tag.feed)
                    .map(|r| self.asm.not_arrived(p, r))
                    .unwrap_or_default()
            } else {
                Vec::new()
            };
            self.asm.last_dispatched = Some(p.key.reference_time);
            let lock = self.lock_of(&tag.feed);
            let Some(p) = self.asm.steps.get_mut(&tag) else {
                break;
            };
            p.phase = Phase::Running { partial };
            p.more = false;
            let Some(cfg) = self.feed_cfgs.get(&tag.feed).cloned() else {
                continue;
            };
            let store = self.cfg.service.out_dir.join(&tag.feed);
            let job = Job {
                tag: tag.clone(),
                key: p.key.clone(),
                files: p.files.values().cloned().collect(),
                cfg,
                dir: publish::cycle_dir(&self.cfg.service.out_dir, &tag.feed, p.key.reference_time),
                store,
                lock,
                suffix,
                partial,
                last_input: p.last_input(),
                not_arrived,
                journal: self.ledger.journal(),
            };
            if let Some(st) = self.ledger.state.steps.get(&tag).filter(|s| s.more) {
                // Handed out again with all its input: the reopening is done.
                let (first_seen, job_attempts) = (st.first_seen, st.job_attempts);
                self.record(Record::Step {
                    step: tag.clone(),
                    first_seen,
                    job_attempts,
                });
            }
            if self.executor(&tag.feed) == Executor::Slurm && sched_ok {
                let attempt = self
                    .ledger
                    .state
                    .steps
                    .get(&tag)
                    .map_or(0, |s| s.job_attempts)
                    + 1;
                let spec = JobSpec::new(
                    &job.tag,
                    attempt,
                    &job.key,
                    &job.files,
                    &job.store,
                    &job.dir,
                    job.suffix,
                    job.partial,
                    job.last_input,
                    job.not_arrived.clone(),
                    self.cfg.service.slurm.cpus_per_step,
                    (*job.cfg).clone(),
                );
                match self.submit(spec) {
                    Ok(()) => continue,
                    Err(e) => {
                        self.scheduler_down(&e);
                        if !fallback || self.running.len() >= workers {
                            if let Some(p) = self.asm.steps.get_mut(&tag) {
                                p.phase = Phase::Ready { partial };
                            }
                            continue;
                        }
                        warn!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, error = %e, "scheduler unusable: running the step on this machine");
                        self.metrics().scheduler.local_fallback += 1;
                    }
                }
            } else if self.executor(&tag.feed) == Executor::Slurm {
                info!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, "scheduler unusable: running the step on this machine");
                self.metrics().scheduler.local_fallback += 1;
            }
            self.spawn_local(job);
        }
    }

    fn lock_of(&mut self, feed: &str) -> Arc<Mutex<()>> {
        self.locks
            .entry(feed.to_string())
            .or_insert_with(|| Arc::new(Mutex::new(())))
            .clone()
    }

    fn spawn_local(&mut self, job: Job) {
        let tag = job.tag.clone();
        info!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, partial = job.partial, files = job.files.len(), "processing");
        self.running.insert(tag.clone(), Instant::now());
        let attempt = self.asm.steps.get(&tag).map_or(0, |p| p.attempts) + 1;
        let threads = std::thread::available_parallelism().map_or(1, |n| n.get()) as u32;
        let spec = JobSpec::new(
            &job.tag,
            attempt,
            &job.key,
            &job.files,
            &job.store,
            &job.dir,
            job.suffix,
            job.partial,
            job.last_input,
            job.not_arrived.clone(),
            threads,
            (*job.cfg).clone(),
        );
        let stage = commit::local_stage(&job.store, &tag);
        let log_format = self.opts.log_format.clone();
        let tx = self.done_tx.clone();
        self.pool.run(move || {
            let outcome = super::pool::guarded(|| run_local(&job, &spec, &stage, &log_format))
                .unwrap_or_else(JobOutcome::Internal);
            let _ = tx.send(JobDone {
                tag: job.tag.clone(),
                outcome,
            });
        });
    }

    /// Prepare a staging directory for `spec`, submit it, and record the job.
    fn submit(&mut self, spec: JobSpec) -> Result<(), SchedulerError> {
        let tag = spec.tag.clone();
        let stage = batch::staging_dir(&self.cfg.service.out_dir, &tag, spec.attempt);
        let program = if self.cfg.service.slurm.program.as_os_str().is_empty() {
            std::env::current_exe().unwrap_or_else(|_| PathBuf::from("leeward"))
        } else {
            self.cfg.service.slurm.program.clone()
        };
        if let Err(e) = batch::prepare(&stage, &spec, &program, &self.cfg.service.slurm.setup) {
            batch::remove_stage(&stage);
            return Err(SchedulerError::Refused(format!(
                "cannot prepare the staging directory {}: {e}",
                stage.display()
            )));
        }
        let job = match self.scheduler().submit(&tag, &stage) {
            Ok(j) => j,
            Err(e) => {
                batch::remove_stage(&stage);
                return Err(e);
            }
        };
        self.scheduler_up();
        info!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, job = %job, attempt = spec.attempt, name = %batch::job_name(&tag), stage = %stage.display(), "submitted to the scheduler");
        self.record(Record::Submitted {
            step: tag.clone(),
            job: job.clone(),
            staging: stage.display().to_string(),
            attempt: spec.attempt,
            at: Utc::now().timestamp(),
        });
        self.metrics().scheduler.submitted += 1;
        self.jobs.insert(
            tag,
            InFlight {
                job,
                stage,
                spec: Arc::new(spec),
                phase: JobPhase::Queued { ended: None },
            },
        );
        Ok(())
    }

    /// Look at the jobs in flight: take finished results, notice jobs that
    /// ended without one, submit again those whose wait is over.
    fn poll_jobs(&mut self) {
        if self.jobs.is_empty() {
            return;
        }
        let now = Instant::now();
        let due: Vec<StepTag> = self
            .jobs
            .iter()
            .filter(|(_, j)| matches!(j.phase, JobPhase::Resubmit { at } if at <= now))
            .map(|(t, _)| t.clone())
            .collect();
        for tag in due {
            self.resubmit(&tag);
        }
        let queued = self.scheduler().queued();
        match &queued {
            Ok(_) => self.scheduler_up(),
            Err(e) => self.scheduler_down(e),
        }
        let tags: Vec<StepTag> = self
            .jobs
            .iter()
            .filter(|(_, j)| matches!(j.phase, JobPhase::Queued { .. }))
            .map(|(t, _)| t.clone())
            .collect();
        for tag in tags {
            let Some(j) = self.jobs.get_mut(&tag) else {
                continue;
            };
            let listed = queued.as_ref().ok().and_then(|q| q.get(&j.job)).cloned();
            // Only a terminal state (or a job the controller no longer holds)
            // is an end: COMPLETING, CONFIGURING, REQUEUED, SUSPENDED, ... go on.
            // While squeue does not answer, a result record (the job's last
            // act) is still taken from the file system.
            let going = listed.as_ref().is_some_and(|(st, _)| !batch::has_ended(st));
            let has_result = j.stage.join(batch::RESULT).exists();
            if has_result && !going {
                j.phase = JobPhase::Taking;
                let (spec, stage) = (j.spec.clone(), j.stage.clone());
                let lock = self.lock_of(&tag.feed);
                let journal = self.ledger.journal();
                let tx = self.done_tx.clone();
                self.pool.run(move || {
                    let outcome = super::pool::guarded(|| {
                        taken_outcome(batch::take(&spec, &stage, &lock, &journal))
                    })
                    .unwrap_or_else(|_| JobOutcome::BatchRetry {
                        state: "TAKE_FAILED".into(),
                        reason: "internal error while taking the result".into(),
                    });
                    let _ = tx.send(JobDone {
                        tag: spec.tag.clone(),
                        outcome,
                    });
                });
                continue;
            }
            if going || queued.is_err() {
                j.phase = JobPhase::Queued { ended: None };
                continue;
            }
            // Ended, and no result to be seen. A shared file system may show
            // the result late: wait up to `result_grace_s` from the end.
            let since = match j.phase {
                JobPhase::Queued { ended: Some(t) } => t,
                _ => now,
            };
            j.phase = JobPhase::Queued { ended: Some(since) };
            if since.elapsed().as_secs_f64() < self.cfg.service.slurm.result_grace_s {
                continue;
            }
            let job = j.job.clone();
            let facts = self.scheduler().facts(&job).or_else(|| {
                listed.map(|(state, reason)| batch::JobFacts {
                    state,
                    reason,
                    exit_code: String::new(),
                })
            });
            if facts.as_ref().is_some_and(|f| !batch::has_ended(&f.state)) {
                // Requeued or started again meanwhile: it goes on.
                if let Some(j) = self.jobs.get_mut(&tag) {
                    j.phase = JobPhase::Queued { ended: None };
                }
                continue;
            }
            let grace = self.cfg.service.slurm.result_grace_s;
            let (state, reason) = match facts {
                Some(f) => (
                    f.state.clone(),
                    format!(
                        "Slurm job {job} ended {} (reason {}, exit code {}) without a result (none seen {grace} s after its end)",
                        f.state,
                        if f.reason.is_empty() {
                            "none"
                        } else {
                            &f.reason
                        },
                        if f.exit_code.is_empty() {
                            "unknown"
                        } else {
                            &f.exit_code
                        },
                    ),
                ),
                None => (
                    "UNKNOWN".into(),
                    format!(
                        "Slurm job {job} is no longer known to the scheduler and left no result (none seen {grace} s later)"
                    ),
                ),
            };
            self.job_failed(&tag, state, reason);
        }
    }

    /// A run of a step on the scheduler ended without publishing: keep its
    /// log, record it, and submit again after a back-off, or give up at the limit.
    fn job_failed(&mut self, tag: &StepTag, state: String, reason: String) {
        let Some(mut j) = self.jobs.remove(tag) else {
            return;
        };
        let log = batch::keep_log(&j.stage, &self.cfg.service.state_dir, tag, &j.job);
        batch::remove_stage(&j.stage);
        let log_text = log
            .as_ref()
            .map_or_else(|| "no log".to_string(), |l| format!("log {}", l.display()));
        self.record(Record::JobEnded {
            step: tag.clone(),
            job: j.job.clone(),
            state: state.clone(),
            reason: reason.clone(),
            log: log.as_ref().map(|l| l.display().to_string()),
            at: Utc::now().timestamp(),
        });
        *self
            .metrics()
            .scheduler
            .ended
            .entry(state.clone())
            .or_default() += 1;
        let max = self.cfg.service.slurm.max_attempts;
        let attempt = j.spec.attempt;
        if let Some(p) = self.asm.steps.get_mut(tag).filter(|p| p.more) {
            // Input came since the job's spec was written: the next job is
            // written afresh with all of it.
            p.more = false;
            p.phase = Phase::Waiting;
            warn!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, job = %j.job, state = %state, reason = %reason, log = %log_text, "step job ended without a result; made again with the input that came meanwhile");
        } else if attempt < max {
            let wait = self.backoff(attempt);
            warn!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, job = %j.job, state = %state, attempt, max_attempts = max, retry_in_s = wait.as_secs_f64(), reason = %reason, log = %log_text, "step job ended without a result; submitting again");
            self.metrics().scheduler.retries += 1;
            j.phase = JobPhase::Resubmit {
                at: Instant::now() + wait,
            };
            self.jobs.insert(tag.clone(), j);
        } else {
            self.asm.steps.remove(tag);
            self.fail(
                tag,
                FailKind::Job,
                format!("{reason}; {attempt} of {max} attempts used; {log_text}"),
            );
        }
    }

    /// Submit a step again from its spec (a new staging directory, the next
    /// attempt); while the scheduler is unusable, run it here if so configured.
    fn resubmit(&mut self, tag: &StepTag) {
        let Some(j) = self.jobs.remove(tag) else {
            return;
        };
        if self.scheduler_usable() {
            let mut next = (*j.spec).clone();
            next.attempt += 1;
            match self.submit(next) {
                Ok(()) => return,
                Err(e) => self.scheduler_down(&e),
            }
        }
        let fallback = self.cfg.service.slurm.when_unreachable == Unreachable::Local;
        if fallback && self.running.len() < self.cfg.service.workers as usize {
            warn!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, "scheduler unusable: running the step on this machine");
            self.metrics().scheduler.local_fallback += 1;
            let job = self.job_from_spec(&j.spec);
            self.spawn_local(job);
            return;
        }
        let at = self
            .sched_retry
            .max(Instant::now() + Duration::from_secs(1));
        self.jobs.insert(
            tag.clone(),
            InFlight {
                phase: JobPhase::Resubmit { at },
                ..j
            },
        );
    }

    fn job_from_spec(&mut self, spec: &JobSpec) -> Job {
        let cfg = self
            .feed_cfgs
            .get(&spec.tag.feed)
            .cloned()
            .unwrap_or_else(|| Arc::new(spec.config.clone()));
        Job {
            tag: spec.tag.clone(),
            key: spec.key().unwrap_or(StepKey {
                centre: spec.centre,
                reference_time: NaiveDateTime::default(),
                valid_time: NaiveDateTime::default(),
                member: spec.member,
                grid_key: Vec::new(),
            }),
            files: spec.contributions(),
            cfg,
            store: spec.store.clone(),
            dir: spec.dir.clone(),
            lock: self.lock_of(&spec.tag.feed),
            suffix: spec.suffix,
            partial: spec.partial,
            last_input: spec.last_input,
            not_arrived: spec.not_arrived.clone(),
            journal: self.ledger.journal(),
        }
    }

    /// At start: finish the publications a stop cut short (recorded in the
    /// ledger, not yet recorded as published). One the file system refuses
    /// now stays recorded and is tried again at the next start; one that
    /// cannot be finished is abandoned and its step made again. Then the
    /// local workers' staging directories left behind are removed.
    fn recover_publications(&mut self) {
        let open: Vec<(StepTag, super::ledger::Publishing)> = self
            .ledger
            .state
            .publishing
            .iter()
            .map(|(t, p)| (t.clone(), p.clone()))
            .collect();
        let mut kept = Vec::new();
        for (tag, p) in open {
            match commit::recover(&tag, &p) {
                Ok(true) => {
                    self.record(Record::Published {
                        step: tag.clone(),
                        path: p.product.clone(),
                        manifest: p.manifest.clone(),
                        partial: p.partial,
                        at: Utc::now().timestamp(),
                    });
                    self.last_published = Some(format!("{tag}"));
                }
                Ok(false) => {
                    self.record(Record::Abandoned {
                        step: tag.clone(),
                        reason: "a file of the publication is neither staged nor in place".into(),
                        at: Utc::now().timestamp(),
                    });
                    self.fail(
                        &tag,
                        FailKind::Output,
                        "a publication cut short could not be finished; made again".into(),
                    );
                }
                Err(e) => {
                    error!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, error = %e, "publication cut short not finished: the file system refused; tried again at the next start");
                    kept.push(PathBuf::from(&p.stage));
                }
            }
        }
        let feeds: Vec<PathBuf> = self
            .rules
            .iter()
            .map(|r| self.cfg.service.out_dir.join(&r.feed.name))
            .collect();
        for f in &feeds {
            let Ok(rd) = std::fs::read_dir(f.join(commit::STAGE_DIR)) else {
                continue;
            };
            for e in rd.flatten() {
                if !kept.contains(&e.path()) {
                    info!(dir = %e.path().display(), "staging directory of a step in hand at the last stop removed");
                    commit::remove_stage(&e.path());
                }
            }
        }
    }

    /// After a restart: the jobs the ledger has in flight, from their staging
    /// directories; a staging directory that is gone ends its job's record.
    fn recover_jobs(&mut self) {
        let inflight: Vec<(StepTag, super::ledger::JobRef)> = self
            .ledger
            .state
            .steps
            .iter()
            .filter(|(_, s)| !matches!(s.outcome, Outcome::Published { .. }))
            .filter_map(|(t, s)| s.job.clone().map(|j| (t.clone(), j)))
            .collect();
        for (tag, r) in inflight {
            let stage = PathBuf::from(&r.staging);
            let spec: Option<JobSpec> = [batch::SPEC, batch::CLAIMED]
                .iter()
                .find_map(|n| serde_json::from_slice(&std::fs::read(stage.join(n)).ok()?).ok());
            match spec {
                Some(spec) => {
                    info!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, job = %r.job, attempt = r.attempt, "step job from before the restart followed again");
                    self.jobs.insert(
                        tag,
                        InFlight {
                            job: r.job,
                            stage,
                            spec: Arc::new(spec),
                            phase: JobPhase::Queued { ended: None },
                        },
                    );
                }
                None => {
                    warn!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, job = %r.job, stage = %stage.display(), "staging directory of a job from before the restart is gone; the step is made again");
                    self.record(Record::JobEnded {
                        step: tag,
                        job: r.job,
                        state: batch::outcome::LOST.into(),
                        reason: format!("staging directory {} gone", stage.display()),
                        log: None,
                        at: Utc::now().timestamp(),
                    });
                }
            }
        }
        // Staging directories no job in flight owns (a crash between sbatch and
        // the ledger, or an old failure) are removed.
        let owned: BTreeSet<PathBuf> = self.jobs.values().map(|j| j.stage.clone()).collect();
        for r in &self.rules {
            let jobs_dir = self
                .cfg
                .service
                .out_dir
                .join(&r.feed.name)
                .join(batch::JOBS_DIR);
            let Ok(rd) = std::fs::read_dir(&jobs_dir) else {
                continue;
            };
            for e in rd.flatten() {
                let p = e.path();
                if p.is_dir() && !owned.contains(&p) {
                    info!(dir = %p.display(), "staging directory of no job in flight removed");
                    batch::remove_stage(&p);
                }
            }
        }
        self.metrics().scheduler.in_flight = self.jobs.len();
    }

    fn backoff(&self, attempts: u32) -> Duration {
        let s = &self.cfg.service;
        let secs = (s.retry_first_s * 2f64.powi(attempts.saturating_sub(1).min(30) as i32))
            .min(s.retry_max_s);
        Duration::from_secs_f64(secs)
    }

    fn finished(&mut self, d: JobDone) {
        if let JobOutcome::BatchRetry { state, reason } = &d.outcome {
            self.job_failed(&d.tag, state.clone(), reason.clone());
            return;
        }
        self.running.remove(&d.tag);
        // The staging directory goes before the outcome is recorded, so that
        // a recorded outcome leaves nothing of its job behind.
        if let Some(j) = self.jobs.remove(&d.tag) {
            if !matches!(d.outcome, JobOutcome::Published { .. }) {
                batch::keep_log(&j.stage, &self.cfg.service.state_dir, &d.tag, &j.job);
            }
            batch::remove_stage(&j.stage);
        }
        self.finish_step(d);
    }

    fn finish_step(&mut self, d: JobDone) {
        let tag = d.tag;
        let now = Utc::now().timestamp();
        let was_partial = self
            .asm
            .steps
            .get(&tag)
            .is_some_and(|p| matches!(p.phase, Phase::Running { partial: true }));
        match d.outcome {
            JobOutcome::Published {
                path,
                manifest,
                latency,
                report,
            } => {
                let partial =
                    publish::read_manifest(&manifest).is_some_and(|m| m.state == "partial");
                commit::crash_point("before-record");
                let more = self.more_came(&tag);
                info!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, file = %path.display(), manifest = %manifest.display(), partial, latency_s = latency, seconds = report.seconds, "published");
                for i in &report.issues {
                    warn!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, file = %shown(&i.file), field = ?i.field, what = %i.what, reason = %i.reason, "input problem");
                }
                self.record(Record::Published {
                    step: tag.clone(),
                    path: path.display().to_string(),
                    manifest: manifest.display().to_string(),
                    partial,
                    at: now,
                });
                self.metrics()
                    .feed(&tag.feed)
                    .published(partial, latency, unix_now());
                self.last_published = Some(format!("{tag}"));
                self.after_run(&tag, more);
            }
            JobOutcome::OutputFailed(reason) => {
                let attempts = self.asm.steps.get(&tag).map_or(1, |p| p.attempts + 1);
                let wait = self.backoff(attempts);
                error!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, attempt = attempts, retry_in_s = wait.as_secs_f64(), reason = %reason, "products not written; retrying");
                self.record(Record::Failed {
                    step: tag.clone(),
                    kind: FailKind::Output,
                    reason,
                    at: now,
                });
                {
                    let mut m = self.metrics();
                    let f = m.feed(&tag.feed);
                    *f.failed.entry(FailKind::Output.name()).or_default() += 1;
                    f.retries += 1;
                }
                if let Some(p) = self.asm.steps.get_mut(&tag) {
                    p.attempts = attempts;
                    p.phase = Phase::Retry {
                        at: Instant::now() + wait,
                        partial: was_partial,
                    };
                }
            }
            JobOutcome::Vanished(_, _) if self.asm.steps.get(&tag).is_some_and(|p| p.more) => {
                // The file changed after it was handed out, and its new
                // content is already with the step: no attempt is spent.
                if let Some(p) = self.asm.steps.get_mut(&tag) {
                    p.more = false;
                    p.phase = Phase::Waiting;
                }
            }
            JobOutcome::Vanished(file, reason) => {
                let attempts = self.asm.steps.get(&tag).map_or(1, |p| p.attempts + 1);
                let wait = self.backoff(attempts);
                self.metrics().feed(&tag.feed).retries += 1;
                if let Some(p) = self.asm.steps.get_mut(&tag) {
                    p.attempts = attempts;
                    if attempts >= 3 {
                        warn!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, file = %shown(&file), reason = %reason, "input gone; the step goes on without it");
                        p.files.remove(&file);
                    } else {
                        warn!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, file = %shown(&file), reason = %reason, retry_in_s = wait.as_secs_f64(), "input cannot be read; retrying");
                    }
                    p.phase = Phase::Retry {
                        at: Instant::now() + wait,
                        partial: was_partial || attempts >= 3,
                    };
                    if p.files.is_empty() {
                        self.asm.steps.remove(&tag);
                        self.fail(
                            &tag,
                            FailKind::Missing,
                            format!("every input is gone ({reason})"),
                        );
                    }
                }
            }
            JobOutcome::InputFailed(reason) => {
                let kind = if was_partial {
                    FailKind::Missing
                } else {
                    FailKind::Input
                };
                let more = self.more_came(&tag);
                self.fail(&tag, kind, reason);
                self.after_run(&tag, more);
            }
            JobOutcome::Internal(reason) => {
                self.asm.steps.remove(&tag);
                self.fail(&tag, FailKind::Internal, reason);
            }
            JobOutcome::BatchRetry { state, reason } => {
                // Handled in `finished`; a local run never ends this way.
                self.asm.steps.remove(&tag);
                self.fail(&tag, FailKind::Job, format!("{state}: {reason}"));
            }
        }
    }

    /// A step whose run has just ended: did input come while it ran? (The
    /// ledger was told when it came, so the record of the end leaves the
    /// step waiting.)
    fn more_came(&self, tag: &StepTag) -> bool {
        self.asm.steps.get(tag).is_some_and(|p| p.more)
    }

    /// After the record of a run's end: the step waits again, to be made
    /// with all its input (at once ready if its rule or its timeout says
    /// so), when input came while it ran; otherwise it is done.
    fn after_run(&mut self, tag: &StepTag, more: bool) {
        let Some(p) = self.asm.steps.get_mut(tag).filter(|_| more) else {
            self.asm.steps.remove(tag);
            return;
        };
        p.more = false;
        p.phase = Phase::Waiting;
        p.attempts = 0;
        p.forced = false;
        info!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, "more input came while the step was made; made again with all its input");
        self.metrics().feed(&tag.feed).remade += 1;
    }

    fn fail(&mut self, tag: &StepTag, kind: FailKind, reason: String) {
        error!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, kind = ?kind, reason = %reason, "step produced nothing");
        let name = kind.name();
        *self
            .metrics()
            .feed(&tag.feed)
            .failed
            .entry(name)
            .or_default() += 1;
        self.record(Record::Failed {
            step: tag.clone(),
            kind,
            reason,
            at: Utc::now().timestamp(),
        });
    }

    /// A step still waiting for input: what it lacks and when it is made anyway;
    /// `None` when it is not waiting or lacks nothing.
    fn waiting_step(&self, tag: &StepTag) -> Option<WaitingStep> {
        let p = self.asm.steps.get(tag)?;
        if p.phase != Phase::Waiting {
            return None;
        }
        let rule = self.rules.iter().find(|r| r.feed.name == tag.feed)?;
        let missing = self.asm.waiting_for(p, rule);
        if missing.is_empty() {
            return None;
        }
        Some(WaitingStep {
            step: tag.clone(),
            missing,
            first_seen: p.first_seen.ceil() as i64,
            made_by: (p.first_seen + self.cfg.service.step_timeout_s).ceil() as i64,
        })
    }

    /// Say what the waiting steps lack, in the state directory (for `leeward
    /// status`) and on /health, whenever that changes.
    fn report_waiting(&mut self) {
        let now: Vec<WaitingStep> = self
            .asm
            .steps
            .keys()
            .filter_map(|t| self.waiting_step(t))
            .collect();
        if now == self.last_waiting {
            return;
        }
        let w = Waiting {
            written: Utc::now().timestamp(),
            pid: std::process::id(),
            steps: now.clone(),
        };
        if let Err(e) = waiting::write(&self.cfg.service.state_dir, &w) {
            warn!(file = %waiting::path(&self.cfg.service.state_dir).display(), error = %e, "waiting steps not written to the state directory");
        }
        self.metrics().waiting = now.clone();
        self.last_waiting = now;
    }

    fn timeouts(&mut self) {
        let ready = self.asm.promote(
            &self.rules,
            unix_now(),
            Instant::now(),
            self.cfg.service.step_timeout_s,
        );
        for tag in ready {
            if let Some(p) = self.asm.steps.get(&tag) {
                if matches!(p.phase, Phase::Ready { partial: true }) && p.attempts == 0 {
                    warn!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, files = p.files.len(), "step still incomplete at the timeout; made with what is there");
                }
            }
        }
    }

    fn requests(&mut self) {
        let dir = requests_dir(&self.cfg.service.state_dir);
        let Ok(rd) = std::fs::read_dir(&dir) else {
            return;
        };
        let mut files: Vec<PathBuf> = rd
            .flatten()
            .map(|e| e.path())
            .filter(|p| p.extension().is_some_and(|x| x == "json"))
            .collect();
        files.sort();
        for f in files {
            let req: Option<ReprocessRequest> = std::fs::read(&f)
                .ok()
                .and_then(|b| serde_json::from_slice(&b).ok());
            let _ = std::fs::remove_file(&f);
            let Some(req) = req else {
                warn!(file = %f.display(), "unreadable reprocess request removed");
                continue;
            };
            let Some(rule) = self.rules.iter().find(|r| r.feed.name == req.feed).cloned() else {
                warn!(feed = %req.feed, "reprocess request for an unknown feed ignored");
                continue;
            };
            info!(feed = %req.feed, cycle = %req.cycle, step = ?req.lead, "reprocess requested");
            self.record(Record::Reprocess {
                feed: req.feed.clone(),
                cycle: req.cycle.clone(),
                lead: req.lead,
                at: Utc::now().timestamp(),
            });
            self.too_old.remove(&(req.feed.clone(), req.cycle.clone()));
            // Look at every file of the feed again; only the asked steps are reopened.
            let Ok(rd) = std::fs::read_dir(&rule.dir) else {
                warn!(feed = %req.feed, dir = %rule.dir.display(), "incoming directory unreadable; nothing to reprocess from");
                continue;
            };
            let mut paths: Vec<PathBuf> = rd
                .flatten()
                .map(|e| e.path())
                .filter(|p| p.is_file())
                .collect();
            paths.sort();
            for p in paths {
                if p.file_name()
                    .is_some_and(|n| !super::watch::ignored(&crate::escape::path(Path::new(n))))
                {
                    self.ingest(&p, Some(&req));
                    self.keepalive();
                }
            }
            let n = self
                .asm
                .steps
                .values()
                .filter(|p| {
                    p.forced
                        && p.tag.feed == req.feed
                        && p.tag.cycle == req.cycle
                        && req.lead.is_none_or(|l| l == p.tag.lead)
                })
                .count();
            info!(feed = %req.feed, cycle = %req.cycle, steps = n, "reprocess: steps to make again");
            if n == 0 {
                warn!(feed = %req.feed, cycle = %req.cycle, "reprocess: no input of the cycle is in the incoming directory");
            }
        }
    }

    fn retention(&mut self) {
        let days = self.cfg.service.retention_days;
        if days > 0 {
            let now = Utc::now().naive_utc();
            for r in &self.rules {
                publish::apply_retention(&self.cfg.service.out_dir.join(&r.feed.name), days, now);
            }
        }
        self.forget_old();
    }

    /// Forget what settled longer ago than `service.ledger_days` and compact
    /// the journal when anything was forgotten or it has grown to more than
    /// twice what its state needs: memory and restart time stay bounded by
    /// that window, not by how long the service has run.
    fn forget_old(&mut self) {
        let days = i64::from(self.cfg.service.ledger_days_in_effect());
        let forgotten = self
            .ledger
            .state
            .forget(Utc::now().timestamp() - days * 86_400, |file| {
                crate::escape::unescape_path(file).is_some_and(|p| p.symlink_metadata().is_ok())
            });
        // Cycles already said to be too old are said again at most once a window.
        let cutoff = cycle_dir_name((Utc::now() - TimeDelta::days(days)).naive_utc());
        self.too_old.retain(|(_, c)| *c >= cutoff);
        let live = self.ledger.state.snapshot().len();
        if forgotten == 0 && self.ledger.lines() <= 2 * live + 10_000 {
            return;
        }
        if self.state_problem.is_some() || self.ledger.in_trouble() {
            return; // compacted once the state directory can be written again
        }
        let t = Instant::now();
        match self.ledger.compact() {
            Ok((was, now)) => info!(
                steps_forgotten = forgotten,
                lines_before = was,
                lines_after = now,
                seconds = t.elapsed().as_secs_f64(),
                ledger_days = days,
                "ledger compacted"
            ),
            Err(e) => {
                error!(error = %e, "ledger not compacted; the state directory needs attention");
                self.metrics().ledger_errors += 1;
            }
        }
    }

    fn update_status(&mut self) {
        let mut tot = (0, 0, 0, 0);
        {
            let names: Vec<String> = self.rules.iter().map(|r| r.feed.name.clone()).collect();
            let counts: Vec<(String, (usize, usize, usize, usize))> = names
                .iter()
                .map(|n| (n.clone(), self.asm.counts(n)))
                .collect();
            let in_flight = self.jobs.len();
            let mut m = self.metrics();
            m.heartbeat = Some(Instant::now());
            m.scheduler.in_flight = in_flight;
            for (n, c) in counts {
                m.feed(&n).queue = c;
                tot = (tot.0 + c.0, tot.1 + c.1, tot.2 + c.2, tot.3 + c.3);
            }
        }
        let mut s = format!(
            "{} feed(s): {} running, {} ready, {} waiting for input, {} retrying",
            self.rules.len(),
            tot.2,
            tot.1,
            tot.0,
            tot.3
        );
        if !self.jobs.is_empty() {
            s.push_str(&format!("; {} on the scheduler", self.jobs.len()));
        }
        if let Some((_, why)) = &self.sched_down {
            s.push_str(&format!("; {why}"));
        }
        if let Some((_, why)) = &self.state_problem {
            s.push_str(&format!("; no new work: state directory unusable ({why})"));
        }
        if let Some(l) = &self.last_published {
            s.push_str(&format!("; last published {l}"));
        }
        if s != self.last_status {
            self.notifier.send(&status_line(&s));
            self.last_status = s;
        }
    }

    fn reload(&mut self) {
        match load(&self.opts).and_then(|c| rules_of(&c).map(|r| (c, r))) {
            Ok((cfg, (rules, cfgs))) => {
                if cfg.service.state_dir != self.cfg.service.state_dir {
                    warn!(old = %self.cfg.service.state_dir.display(), new = %cfg.service.state_dir.display(), "service.state_dir changes only at a restart; the old one is kept");
                }
                let state_dir = self.cfg.service.state_dir.clone();
                self.cfg = cfg;
                self.cfg.service.state_dir = state_dir;
                self.rules = rules;
                self.feed_cfgs = cfgs;
                let names: Vec<String> = self.rules.iter().map(|r| r.feed.name.clone()).collect();
                self.asm.steps.retain(|t, p| {
                    names.contains(&t.feed) || matches!(p.phase, Phase::Running { .. })
                });
                self.start_watchers();
                self.metrics().reloads.0 += 1;
                info!(config = %self.opts.config.display(), feeds = %super::settings::describe_dirs(&self.rules), "configuration reloaded");
            }
            Err(e) => {
                self.metrics().reloads.1 += 1;
                error!(config = %self.opts.config.display(), error = %e, "configuration not reloaded: the running one is kept");
            }
        }
    }
}

/// Run the service until SIGTERM or SIGINT. Returns the exit code.
pub fn serve(opts: ServeOptions) -> u8 {
    child::set_log_format(&opts.log_format);
    match start(opts) {
        // The hold on the state directory lives as long as the loop.
        Ok((_held, d, signals)) => run(d, signals),
        Err(code) => code,
    }
}

/// Refuse to start: the reason on standard error, the configuration's exit code.
fn refuse(e: &dyn std::fmt::Display) -> u8 {
    eprintln!("leeward: {e}");
    code::CONFIG
}

/// Everything before the loop: the configuration, the state directory held,
/// the ledger, the output tree, the metrics endpoint, the signals, then the
/// recovery of publications and jobs and the watchers' first scan.
fn start(
    opts: ServeOptions,
) -> Result<(std::os::unix::net::UnixListener, Daemon, Receiver<Event>), u8> {
    let cfg = load(&opts).map_err(|e| {
        error!(error = %e, "cannot start");
        refuse(&e)
    })?;
    let (rules, feed_cfgs) = rules_of(&cfg).map_err(|e| refuse(&e))?;
    let (held, ledger) = open_state(&cfg.service.state_dir)?;
    prepare_dirs(&cfg.service);
    crate::output::limit_hdf5_free_lists();
    let removed = publish::clean_temporaries(&cfg.service.out_dir);
    let metrics = start_metrics(&cfg.service, &rules);
    let sig_rx = signal_events().map_err(|e| refuse(&format!("cannot handle signals: {e}")))?;
    let (done_tx, done_rx) = channel();
    let mut d = Daemon {
        opts,
        cfg,
        rules,
        feed_cfgs,
        ledger,
        asm: Assembly::default(),
        watchers: Vec::new(),
        metrics,
        notifier: Notifier::from_env(),
        done_tx,
        done_rx,
        pool: Pool::new("leeward-worker"),
        running: HashMap::new(),
        jobs: HashMap::new(),
        sched_down: None,
        sched_retry: Instant::now(),
        last_poll: Instant::now(),
        locks: HashMap::new(),
        too_old: BTreeSet::new(),
        last_status: String::new(),
        last_published: None,
        last_ping: Instant::now(),
        growing: HashMap::new(),
        last_waiting: Vec::new(),
        state_problem: None,
    };
    d.begin(removed);
    Ok((held, d, sig_rx))
}

/// Hold the state directory (one service per directory: a hold that survives
/// the directory's removal, and the lock file that `leeward status` reads)
/// and open its ledger.
fn open_state(sdir: &Path) -> Result<(std::os::unix::net::UnixListener, Ledger), u8> {
    let held = super::ledger::hold_state_dir(sdir).map_err(|e| {
        if e.kind() == std::io::ErrorKind::AddrInUse {
            refuse(&format!(
                "another leeward serve is using the state directory {}",
                sdir.display()
            ))
        } else {
            refuse(&format!(
                "cannot hold the state directory {}: {e}",
                sdir.display()
            ))
        }
    })?;
    std::fs::create_dir_all(requests_dir(sdir)).map_err(|e| {
        refuse(&format!(
            "cannot use the state directory {}: {e}",
            sdir.display()
        ))
    })?;
    let lock = super::ledger::take_lock(sdir).map_err(|e| refuse(&e))?;
    let mut ledger = Ledger::open(sdir).map_err(|e| refuse(&e))?;
    ledger.hold(lock).map_err(|e| refuse(&e))?;
    Ok((held, ledger))
}

/// The quarantine and the output tree; neither is fatal when it fails.
fn prepare_dirs(svc: &super::settings::Service) {
    if svc.quarantine == QuarantineMode::Move {
        if let Err(e) = std::fs::create_dir_all(svc.quarantine_dir()) {
            warn!(dir = %svc.quarantine_dir().display(), error = %e, "cannot create the quarantine directory; bad files are recorded only");
        }
    }
    if let Err(e) = std::fs::create_dir_all(&svc.out_dir) {
        // Not fatal: the output may come back (a mount); steps are retried.
        error!(dir = %svc.out_dir.display(), error = %e, "output directory unusable; steps will be retried");
    }
}

/// The service's metrics, one entry per feed, served at `metrics_listen` if set.
fn start_metrics(svc: &super::settings::Service, rules: &[FeedRule]) -> Arc<Mutex<Metrics>> {
    let metrics = Arc::new(Mutex::new(Metrics {
        started: unix_now(),
        heartbeat: Some(Instant::now()),
        ..Metrics::default()
    }));
    for r in rules {
        let mut m = metrics
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner);
        m.feed(&r.feed.name);
        if r.feed.executor == Executor::Slurm {
            m.scheduler.used = true;
            m.scheduler.reachable = true;
        }
    }
    if !svc.metrics_listen.is_empty() {
        if let Err(e) = super::metrics::serve(&svc.metrics_listen, metrics.clone()) {
            error!(address = %svc.metrics_listen, error = %e, "metrics endpoint not started");
        }
    }
    metrics
}

/// SIGTERM, SIGINT and SIGHUP as events of the loop.
fn signal_events() -> std::io::Result<Receiver<Event>> {
    let (sig_tx, sig_rx) = channel::<Event>();
    let mut signals = signal_hook::iterator::Signals::new([
        signal_hook::consts::SIGTERM,
        signal_hook::consts::SIGINT,
        signal_hook::consts::SIGHUP,
    ])?;
    std::thread::spawn(move || {
        for s in signals.forever() {
            if sig_tx.send(Event::Signal(s)).is_err() {
                return;
            }
        }
    });
    Ok(sig_rx)
}

/// When the loop's periodic work last ran.
struct Timers {
    second: Instant,
    retention: Instant,
    orphans: Instant,
}

impl Daemon {
    /// The start's last acts: what the ledger knows, the recovery, the
    /// watchers, the log line and systemd's READY.
    fn begin(&mut self, removed: usize) {
        for (tag, st) in &self.ledger.state.steps {
            if let Outcome::Published { at, .. } = st.outcome {
                let mut m = self.metrics();
                let f = m.feed(&tag.feed);
                f.last_success = Some(f.last_success.unwrap_or(0.0).max(at as f64));
            }
        }
        self.record(Record::Started {
            version: env!("CARGO_PKG_VERSION").into(),
            pid: std::process::id(),
            at: Utc::now().timestamp(),
        });
        // Steps the ledger knows as waiting keep their first-seen time; their
        // files come back through the watchers' first scan (the catch-up).
        let waiting = self
            .ledger
            .state
            .steps
            .values()
            .filter(|s| matches!(s.outcome, Outcome::Waiting))
            .count();
        self.recover_publications();
        self.recover_jobs();
        self.start_watchers();
        self.retention();
        info!(
            version = env!("CARGO_PKG_VERSION"),
            feeds = %super::settings::describe_dirs(&self.rules),
            out_dir = %self.cfg.service.out_dir.display(),
            state_dir = %self.cfg.service.state_dir.display(),
            workers = self.cfg.service.workers,
            stale_temporaries_removed = removed,
            steps_waiting_from_before = waiting,
            "leeward serve started"
        );
        self.notifier.send("READY=1");
        self.update_status();
    }

    /// Signals: SIGHUP reloads; SIGTERM and SIGINT begin the stop (no new
    /// work, the steps in hand finished within the grace time).
    fn on_signals(&mut self, sig_rx: &Receiver<Event>, stopping: &mut Option<Instant>) {
        while let Ok(Event::Signal(s)) = sig_rx.try_recv() {
            if s == signal_hook::consts::SIGHUP {
                self.reload();
            } else if stopping.is_none() {
                info!(
                    signal = s,
                    running = self.running.len(),
                    grace_s = self.cfg.service.shutdown_grace_s,
                    "stopping: no new work; finishing the steps in hand"
                );
                self.notifier.send(&format!(
                    "STOPPING=1\n{}",
                    status_line(&format!(
                        "stopping: finishing {} step(s) in hand",
                        self.running.len()
                    ))
                ));
                self.watchers.clear();
                *stopping = Some(Instant::now());
            }
        }
    }

    /// One round of the loop's work: new files (when `taking`), finished
    /// steps, the scheduler's jobs, and the periodic checks.
    fn round(&mut self, taking: bool, t: &mut Timers) {
        if taking {
            let mut files = Vec::new();
            for (_, w) in &self.watchers {
                while let Some(p) = w.next(Duration::ZERO) {
                    files.push(p);
                }
            }
            for p in files {
                self.ingest(&p, None);
                self.keepalive();
            }
        }
        while let Ok(done) = self.done_rx.try_recv() {
            self.finished(done);
        }
        if taking && self.last_poll.elapsed().as_secs_f64() >= self.cfg.service.slurm.poll_s {
            self.last_poll = Instant::now();
            self.poll_jobs();
        }
        if t.second.elapsed() >= Duration::from_secs(1) {
            t.second = Instant::now();
            self.watch_state();
            if taking {
                self.requests();
                self.recheck_growing();
                self.report_waiting();
            }
            self.timeouts();
        }
        if t.retention.elapsed() >= Duration::from_secs(600) {
            t.retention = Instant::now();
            self.retention();
        }
        if t.orphans.elapsed() >= Duration::from_secs(60) {
            t.orphans = Instant::now();
            self.expire_orphans();
        }
    }

    /// While stopping since `t0`: the exit code once the steps in hand are
    /// done (jobs on the scheduler go on without the service and are followed
    /// again after its restart; a result being taken is finished first), or
    /// the exit when the grace time is over.
    fn stopped(&mut self, t0: Instant) -> Option<u8> {
        let taking = self.jobs.values().any(|j| j.phase == JobPhase::Taking);
        if self.running.is_empty() && !taking {
            info!("stopped cleanly");
            self.record(Record::Stopped {
                reason: "signal".into(),
                at: Utc::now().timestamp(),
            });
            return Some(code::OK);
        }
        if t0.elapsed().as_secs_f64() >= self.cfg.service.shutdown_grace_s {
            let left: Vec<String> = self.running.keys().map(ToString::to_string).collect();
            warn!(steps = ?left, "grace time over: abandoning the steps in hand; they are made again at the next start");
            self.record(Record::Stopped {
                reason: format!("signal; abandoned {}", left.join(", ")),
                at: Utc::now().timestamp(),
            });
            // The step processes die with the service; their staging
            // directories are removed at the next start.
            std::process::exit(i32::from(code::OK));
        }
        None
    }
}

/// The loop: signals, a round of work, dispatch or the stop, the watchdog
/// and the status line, then a wait of at most a tick for a finished step.
fn run(mut d: Daemon, sig_rx: Receiver<Event>) -> u8 {
    let tick = Duration::from_millis(100);
    let mut timers = Timers {
        second: Instant::now(),
        retention: Instant::now(),
        orphans: Instant::now(),
    };
    let ping_every = d.notifier.watchdog.map(|w| w / 2);
    let mut stopping: Option<Instant> = None;
    if let Some(w) = ping_every {
        d.notifier.send("WATCHDOG=1");
        debug!(every_s = w.as_secs_f64(), "watchdog pings");
    }
    loop {
        d.on_signals(&sig_rx, &mut stopping);
        let taking = stopping.is_none() && d.state_problem.is_none();
        d.round(taking, &mut timers);
        match stopping {
            None => {
                d.timeouts();
                if d.state_problem.is_none() {
                    d.dispatch();
                }
            }
            Some(t0) => {
                if let Some(code) = d.stopped(t0) {
                    return code;
                }
            }
        }
        d.keepalive();
        d.update_status();
        if let Ok(done) = d.done_rx.recv_timeout(tick) {
            d.finished(done);
        }
    }
}

/// Parse a cycle as an operator types it: `2026031400`, `20260314T0000Z`,
/// `2026-03-14T00`, `2026-03-14T00:00Z`.
pub fn parse_cycle(s: &str) -> Option<NaiveDateTime> {
    let s = s.trim();
    for (f, add) in [
        ("%Y%m%d%H%M", ""),
        ("%Y%m%d%H%M", "00"),
        ("%Y%m%dT%H%MZ", ""),
        ("%Y-%m-%dT%H:%MZ", ""),
        ("%Y-%m-%dT%H:%M", ""),
        ("%Y-%m-%dT%H:%M", ":00"),
        ("%Y-%m-%dT%H:%M:%SZ", ""),
    ] {
        if let Ok(t) = NaiveDateTime::parse_from_str(&format!("{s}{add}"), f) {
            return Some(t);
        }
    }
    None
}

/// Drop a reprocess request for the service to pick up.
pub fn request_reprocess(state_dir: &Path, req: &ReprocessRequest) -> std::io::Result<PathBuf> {
    let dir = requests_dir(state_dir);
    std::fs::create_dir_all(&dir)?;
    let path = dir.join(format!(
        "{}-{}.json",
        Utc::now().format("%Y%m%dT%H%M%S%.6f"),
        std::process::id()
    ));
    let text = serde_json::to_vec(req).map_err(std::io::Error::other)?;
    publish::write_atomic(&path, &text)?;
    Ok(path)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cycles_as_operators_type_them() {
        let want = chrono::NaiveDate::from_ymd_opt(2026, 3, 14)
            .unwrap()
            .and_hms_opt(6, 0, 0)
            .unwrap();
        for s in [
            "2026031406",
            "20260314T0600Z",
            "2026-03-14T06",
            "2026-03-14T06:00Z",
        ] {
            assert_eq!(parse_cycle(s), Some(want), "{s}");
        }
        assert_eq!(parse_cycle("yesterday"), None);
    }
}
