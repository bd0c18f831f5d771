//! Steps as Slurm jobs: submitting, polling until the result record is there (a state
//! Slurm gives is never taken as final on its own), retrying, and following the jobs
//! and unfinished publications of an earlier run at start.

use super::*;

impl Daemon {
    pub(super) fn scheduler(&self) -> Scheduler {
        Scheduler {
            cfg: self.cfg.service.slurm.clone(),
        }
    }

    /// The scheduler may take new steps now: it answered last time, or it is
    /// time to try it again.
    pub(super) fn scheduler_usable(&self) -> bool {
        self.sched_down.is_none() || Instant::now() >= self.sched_retry
    }

    pub(super) fn scheduler_up(&mut self) {
        if let Some((since, why)) = self.sched_down.take() {
            info!(down_s = unix_now() - since, was = %why, "scheduler reachable again");
        }
        let mut m = self.metrics();
        m.scheduler.reachable = true;
        m.scheduler.problem.clear();
    }

    pub(super) fn scheduler_down(&mut self, e: &SchedulerError) {
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

    /// Prepare a staging directory for `spec`, submit it, and record the job.
    pub(super) fn submit(&mut self, spec: JobSpec) -> Result<(), SchedulerError> {
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
    pub(super) fn poll_jobs(&mut self) {
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
                let tx = self.events.clone();
                self.pool.run(move || {
                    let outcome = crate::service::pool::guarded(|| {
                        let taken = batch::take(&spec, &stage, &lock, &journal);
                        said_taken(&taken, Place::Scheduler, None);
                        decide::taken_outcome(taken, Place::Scheduler)
                    })
                    .unwrap_or_else(|_| JobOutcome::JobFailed {
                        state: "TAKE_FAILED".into(),
                        reason: "internal error while taking the result".into(),
                    });
                    let _ = tx.send(Event::Done(JobDone {
                        tag: spec.tag.clone(),
                        outcome,
                    }));
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
    pub(super) fn job_failed(&mut self, tag: &StepTag, state: String, reason: String) {
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
        let more = self.asm.steps.get(tag).is_some_and(|p| p.more);
        match decide::after_job(more, attempt, max) {
            AfterJob::WaitAgain => {
                // Input came since the job's spec was written: the next job is
                // written afresh with all of it.
                if let Some(p) = self.asm.steps.get_mut(tag) {
                    p.more = false;
                    p.phase = Phase::Waiting;
                }
                warn!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, job = %j.job, state = %state, reason = %reason, log = %log_text, "step job ended without a result; made again with the input that came meanwhile");
            }
            AfterJob::Resubmit => {
                let wait = self.backoff(attempt);
                warn!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, job = %j.job, state = %state, attempt, max_attempts = max, retry_in_s = wait.as_secs_f64(), reason = %reason, log = %log_text, "step job ended without a result; submitting again");
                self.metrics().scheduler.retries += 1;
                j.phase = JobPhase::Resubmit {
                    at: Instant::now() + wait,
                };
                self.jobs.insert(tag.clone(), j);
            }
            AfterJob::GiveUp => {
                self.asm.steps.remove(tag);
                self.fail(
                    tag,
                    FailKind::Job,
                    format!("{reason}; {attempt} of {max} attempts used; {log_text}"),
                );
            }
        }
    }

    /// Submit a step again from its spec (a new staging directory, the next
    /// attempt); while the scheduler is unusable, run it here if so configured.
    pub(super) fn resubmit(&mut self, tag: &StepTag) {
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

    pub(super) fn job_from_spec(&mut self, spec: &JobSpec) -> Job {
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
    pub(super) fn recover_publications(&mut self) {
        let open: Vec<(StepTag, crate::service::ledger::Publishing)> = self
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
    pub(super) fn recover_jobs(&mut self) {
        let inflight: Vec<(StepTag, crate::service::ledger::JobRef)> = self
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
}
