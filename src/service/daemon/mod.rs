//! The daemon: the main loop of `leeward serve`.
//!
//! In: the configuration file (and command-line overrides of its
//! directories), files landing in the feeds' incoming directories, signals,
//! reprocess requests in the state directory. Out: published steps, the
//! ledger, logs, notifications to systemd, the metrics endpoint. The main
//! thread owns the state; workers run one step each and report back.
//!
//! This file holds the state (`Daemon`) and its loop; the state's methods
//! are grouped by concern in the files beside it:
//!
//! - `start`: settings checked, the state directory locked, the ledger replayed;
//! - `files`: finished files catalogued and given to their steps, quarantine;
//! - `jobs`: where a step runs (a process of its own, one run at a time) and
//!   what a worker's result means;
//! - `slurm`: steps as batch jobs, polled until their result is there;
//! - `outcomes`: what came of a step (published, retried, given up, reopened);
//! - `upkeep`: waiting steps explained and timed out, reprocess requests,
//!   retention, the status file, reloading.

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
use super::decide::{self, AfterJob, AfterRun, Place};
use super::ledger::{FailKind, Journal, Ledger, Outcome, Record, StepTag};
use super::metrics::{Endpoint, Metrics};
use super::pool::Pool;
use super::publish;
use super::settings::{Executor, FeedRule, FileRole, QuarantineMode, Unreachable};
use super::shutdown::Shutdown;
use super::state_dir::StateDir;
use super::systemd::{status_line, Notifier};
use super::waiting::{self, Waiting, WaitingStep};
use super::watch::{watch_with, Watcher};
use crate::config::Config;
use crate::escape::shown;
use crate::ingest::catalogue::catalogue_file;
use crate::ingest::grid::parse_grid;
use crate::ingest::source::{checksum_file, checksum_ranges, open_input, InputError, Opened};
use crate::outcome::StepOutcome;
use crate::output::store::cycle_dir_name;
use crate::pipeline::{grid_id, output_name, StepKey};

mod files;
mod jobs;
mod outcomes;
mod slurm;
mod start;
mod upkeep;

use jobs::{said_taken, InFlight, Job, JobDone, JobOutcome, JobPhase};
pub use start::serve;

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
    StateDir(state_dir).requests()
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
        cfgs.insert(f.name.clone(), Arc::new(cfg.for_feed(f)));
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

/// Everything the loop waits for, on one channel ([`Daemon::inbox`]): the loop
/// blocks on it for at most a tick, then does its periodic work.
enum Event {
    /// SIGTERM or SIGINT (stop), SIGHUP (reload).
    Signal(i32),
    /// A finished file in an incoming directory, from its watcher.
    File(PathBuf),
    /// A worker's report: a step made on this machine, or a batch result taken.
    Done(JobDone),
}

struct Daemon {
    opts: ServeOptions,
    cfg: Config,
    rules: Vec<FeedRule>,
    feed_cfgs: HashMap<String, Arc<Config>>,
    ledger: Ledger,
    asm: Assembly,
    watchers: Vec<(String, Watcher)>,
    metrics: Arc<Mutex<Metrics>>,
    /// The metrics and health endpoint, if it listens.
    endpoint: Option<Endpoint>,
    /// The stop, shared with the endpoint's thread.
    shutdown: Shutdown,
    notifier: Notifier,
    /// Where watchers, workers and the signal thread send their [`Event`]s.
    events: Sender<Event>,
    inbox: Receiver<Event>,
    /// Files finished while the state directory could not be used: taken once it can.
    deferred: Vec<PathBuf>,
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
            let tx = self.events.clone();
            match watch_with(&r.dir, settle, scan, move |p| {
                tx.send(Event::File(p)).is_ok()
            }) {
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
}

/// When the loop's periodic work last ran.
struct Timers {
    second: Instant,
    retention: Instant,
    orphans: Instant,
}

impl Daemon {
    /// A signal: SIGHUP reloads; SIGTERM and SIGINT begin the stop (no new
    /// work, the steps in hand finished within the grace time).
    fn on_signal(&mut self, s: i32) {
        if s == signal_hook::consts::SIGHUP {
            self.reload();
        } else if !self.shutdown.is_stopping() {
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
            let grace = Duration::from_secs_f64(self.cfg.service.shutdown_grace_s.max(0.0));
            self.shutdown.begin(grace);
        }
    }

    /// One event. A file found while stopping is left for the next start's scan;
    /// one found while the state directory cannot be used waits until it can.
    fn handle(&mut self, ev: Event) {
        match ev {
            Event::Signal(s) => self.on_signal(s),
            Event::File(_) if self.shutdown.is_stopping() => {}
            Event::File(p) if self.state_problem.is_some() => self.deferred.push(p),
            Event::File(p) => {
                self.ingest(&p, None);
                self.keepalive();
            }
            Event::Done(done) => self.finished(done),
        }
    }

    /// One round of the loop's periodic work: files held back while the state
    /// directory could not be used (when `taking`), the scheduler's jobs, and
    /// the periodic checks.
    fn round(&mut self, taking: bool, t: &mut Timers) {
        if taking {
            for p in std::mem::take(&mut self.deferred) {
                self.ingest(&p, None);
                self.keepalive();
            }
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

    /// While stopping: the exit code once the steps in hand are done (jobs on
    /// the scheduler go on without the service and are followed again after
    /// its restart; a result being taken is finished first), with the worker
    /// threads and the endpoint's joined; or the exit when the grace time is
    /// over.
    fn stopped(&mut self) -> Option<u8> {
        let taking = self.jobs.values().any(|j| j.phase == JobPhase::Taking);
        if self.running.is_empty() && !taking {
            self.shutdown.end();
            let deadline = self.shutdown.deadline().unwrap_or_else(Instant::now);
            let pool = std::mem::replace(&mut self.pool, Pool::new("leeward-worker"));
            let left = pool.close(deadline);
            if let Some(ep) = self.endpoint.take() {
                ep.join();
            }
            info!(threads_left = left, "stopped cleanly");
            self.record(Record::Stopped {
                reason: "signal".into(),
                at: Utc::now().timestamp(),
            });
            return Some(code::OK);
        }
        if self.shutdown.grace_over() {
            self.shutdown.end();
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

/// The loop: a round of periodic work, dispatch or the stop, the watchdog and
/// the status line, then the events: a wait of at most a tick for the first,
/// and every one already there.
fn run(mut d: Daemon) -> u8 {
    let tick = Duration::from_millis(100);
    let mut timers = Timers {
        second: Instant::now(),
        retention: Instant::now(),
        orphans: Instant::now(),
    };
    let ping_every = d.notifier.watchdog.map(|w| w / 2);
    if let Some(w) = ping_every {
        d.notifier.send("WATCHDOG=1");
        debug!(every_s = w.as_secs_f64(), "watchdog pings");
    }
    loop {
        let stopping = d.shutdown.is_stopping();
        let taking = !stopping && d.state_problem.is_none();
        d.round(taking, &mut timers);
        if !stopping {
            d.timeouts();
            if d.state_problem.is_none() {
                d.dispatch();
            }
        } else if let Some(code) = d.stopped() {
            return code;
        }
        d.keepalive();
        d.update_status();
        let mut next = d.inbox.recv_timeout(tick).ok();
        while let Some(ev) = next {
            d.handle(ev);
            next = d.inbox.try_recv().ok();
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
