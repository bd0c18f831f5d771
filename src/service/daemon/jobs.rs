//! Where steps run: each in a process of its own on this machine, one run (feed,
//! member, grid) at a time, or as a batch job ([`slurm`](super::slurm)); what a
//! worker's result means for the step.

use super::*;

/// A step handed to a worker.
pub(super) struct Job {
    pub(super) tag: StepTag,
    pub(super) key: StepKey,
    pub(super) files: Vec<Contribution>,
    pub(super) cfg: Arc<Config>,
    pub(super) store: PathBuf,
    pub(super) dir: PathBuf,
    pub(super) lock: Arc<Mutex<()>>,
    pub(super) suffix: Option<usize>,
    pub(super) partial: bool,
    pub(super) last_input: f64,
    pub(super) not_arrived: Vec<String>,
    pub(super) journal: Arc<Journal>,
}

impl Job {
    /// The spec of this job's run number `attempt`, on `threads` threads.
    fn spec(&self, attempt: u32, threads: u32) -> JobSpec {
        JobSpec::new(
            &self.tag,
            attempt,
            &self.key,
            &self.files,
            &self.store,
            &self.dir,
            self.suffix,
            self.partial,
            self.last_input,
            self.not_arrived.clone(),
            threads,
            (*self.cfg).clone(),
        )
    }
}

/// What a worker reports: how the step's run ended, made meaning published.
pub(super) type JobOutcome = StepOutcome<batch::Published>;

/// Where a step's batch job stands.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(super) enum JobPhase {
    /// Submitted. `ended`: since when Slurm has said the job ended (or no
    /// longer knows it) while its result record is not yet to be seen.
    Queued { ended: Option<Instant> },
    /// Its result is being taken (checked, moved, manifest written).
    Taking,
    /// Ended without a result; submitted again at `at`.
    Resubmit { at: Instant },
}

/// A step handed to the batch scheduler.
pub(super) struct InFlight {
    pub(super) job: String,
    pub(super) stage: PathBuf,
    /// Its spec; `spec.attempt` is which run of the step this job is.
    pub(super) spec: Arc<JobSpec>,
    pub(super) phase: JobPhase,
}

/// Steps of one run (feed, member, grid) read and complete each other's files:
/// they go one at a time, on this machine as on the scheduler, so that each
/// sees the ones before it published (its changes in time, and their images).
pub(super) fn chain(t: &StepTag) -> (&str, Option<u8>, &str) {
    (&t.feed, t.member, &t.grid)
}

pub(super) struct JobDone {
    pub(super) tag: StepTag,
    pub(super) outcome: JobOutcome,
}

/// Make a step on this machine in a process of its own (see [`child`]): its
/// spec into a staging directory of the feed's `.publish`, `leeward process
/// --job` on it, and its result taken and published as a batch job's is
/// ([`batch::take`]: the recorded publication, the cycle's tracks with it).
/// The staging directory is gone when this returns, unless a stop cut the
/// publication short (the next start finishes it from there).
pub(super) fn run_local(job: &Job, spec: &JobSpec, stage: &Path, log_format: &str) -> JobOutcome {
    if let Err(e) = std::fs::create_dir_all(&job.dir).and_then(|()| batch::write_spec(stage, spec))
    {
        commit::remove_stage(stage);
        return JobOutcome::OutputFailed {
            reason: format!(
                "cannot prepare the staging directory {}: {e}",
                stage.display()
            ),
        };
    }
    let outcome = match child::run(stage, log_format, batch::RESULT) {
        Ok(ran) => {
            let taken = batch::take(spec, stage, &job.lock, &job.journal);
            said_taken(&taken, Place::Here, Some(ran.seconds));
            decide::taken_outcome(taken, Place::Here)
        }
        Err(reason) => JobOutcome::Internal { reason },
    };
    commit::remove_stage(stage);
    outcome
}

/// Say in the log that a job's result was taken (on the scheduler, with the
/// job's facts at info; here, with the process's time and memory at debug).
pub(super) fn said_taken(t: &Result<Taken, String>, at: Place, process_s: Option<f64>) {
    let Ok(Taken {
        outcome: StepOutcome::Made(_),
        result: r,
    }) = t
    else {
        return;
    };
    match at {
        Place::Here => {
            debug!(feed = %r.tag.feed, cycle = %r.tag.cycle, step = r.tag.lead, process_s, peak_rss_mib = r.peak_rss_kib.map(|k| k / 1024), "step process's result taken");
        }
        Place::Scheduler => {
            info!(feed = %r.tag.feed, cycle = %r.tag.cycle, step = r.tag.lead, job = ?r.job_id, host = %r.host, restarts = r.restarts, attempt = r.attempt, "step job's result taken");
        }
    }
}

impl Daemon {
    pub(super) fn executor(&self, feed: &str) -> Executor {
        self.rules
            .iter()
            .find(|r| r.feed.name == feed)
            .map_or(Executor::Local, |r| r.feed.executor)
    }

    pub(super) fn dispatch(&mut self) {
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
            let free = decide::Free {
                worker: self.running.len() < workers,
                job: self.jobs.len() < max_jobs,
                scheduler: self.scheduler_usable(),
                fallback,
            };
            let pick = self.asm.next_where(self.cfg.service.order, &busy, |p| {
                !busy_chains.contains(&chain(&p.tag))
                    && decide::place(self.executor(&p.tag.feed), free).is_some()
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
            let at = decide::place(self.executor(&tag.feed), free);
            if at == Some(Place::Scheduler) {
                let attempt = self
                    .ledger
                    .state
                    .steps
                    .get(&tag)
                    .map_or(0, |s| s.job_attempts)
                    + 1;
                let spec = job.spec(attempt, self.cfg.service.slurm.cpus_per_step);
                match self.submit(spec) {
                    Ok(()) => continue,
                    Err(e) => {
                        self.scheduler_down(&e);
                        let down = decide::Free {
                            scheduler: false,
                            worker: self.running.len() < workers,
                            ..free
                        };
                        if decide::place(Executor::Slurm, down).is_none() {
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

    pub(super) fn lock_of(&mut self, feed: &str) -> Arc<Mutex<()>> {
        self.locks
            .entry(feed.to_string())
            .or_insert_with(|| Arc::new(Mutex::new(())))
            .clone()
    }

    pub(super) fn spawn_local(&mut self, job: Job) {
        let tag = job.tag.clone();
        info!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, partial = job.partial, files = job.files.len(), "processing");
        self.running.insert(tag.clone(), Instant::now());
        let attempt = self.asm.steps.get(&tag).map_or(0, |p| p.attempts) + 1;
        let threads = std::thread::available_parallelism().map_or(1, |n| n.get()) as u32;
        let spec = job.spec(attempt, threads);
        let stage = commit::local_stage(&job.store, &tag);
        let log_format = self.opts.log_format.clone();
        let tx = self.events.clone();
        self.pool.run(move || {
            let outcome =
                crate::service::pool::guarded(|| run_local(&job, &spec, &stage, &log_format))
                    .unwrap_or_else(|reason| JobOutcome::Internal { reason });
            let _ = tx.send(Event::Done(JobDone {
                tag: job.tag.clone(),
                outcome,
            }));
        });
    }

    pub(super) fn backoff(&self, attempts: u32) -> Duration {
        let s = &self.cfg.service;
        decide::backoff(s.retry_first_s, s.retry_max_s, attempts)
    }
}
