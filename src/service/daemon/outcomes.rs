//! What came of a step: published (recorded, counted, said), failed (retried, given up,
//! or waiting for more input), or reopened by input that came while it ran.

use super::*;

impl Daemon {
    pub(super) fn finished(&mut self, d: JobDone) {
        if let StepOutcome::JobFailed { state, reason } = d.outcome {
            self.job_failed(&d.tag, state, reason);
            return;
        }
        self.running.remove(&d.tag);
        // The staging directory goes before the outcome is recorded, so that
        // a recorded outcome leaves nothing of its job behind.
        if let Some(j) = self.jobs.remove(&d.tag) {
            if d.outcome.made().is_none() {
                batch::keep_log(&j.stage, &self.cfg.service.state_dir, &d.tag, &j.job);
            }
            batch::remove_stage(&j.stage);
        }
        self.finish_step(d);
    }

    /// What the service knows of a step as its run ends.
    fn standing(&self, tag: &StepTag) -> decide::Standing {
        let p = self.asm.steps.get(tag);
        decide::Standing {
            attempts: p.map_or(0, |p| p.attempts),
            more: p.is_some_and(|p| p.more),
            partial: p.is_some_and(|p| matches!(p.phase, Phase::Running { partial: true })),
        }
    }

    /// Act on a run's end as [`decide::after_run`] says.
    pub(super) fn finish_step(&mut self, d: JobDone) {
        let tag = d.tag;
        let standing = self.standing(&tag);
        match (decide::after_run(&d.outcome, standing), d.outcome) {
            (AfterRun::Published, StepOutcome::Made(p)) => self.published(&tag, p),
            (AfterRun::RetryWrite { attempts }, o) => {
                let reason = o.reason().unwrap_or_default().to_string();
                self.retry_write(&tag, attempts, standing.partial, reason);
            }
            (AfterRun::WaitAgain, _) => {
                // The file changed after it was handed out, and its new
                // content is already with the step: no attempt is spent.
                if let Some(p) = self.asm.steps.get_mut(&tag) {
                    p.more = false;
                    p.phase = Phase::Waiting;
                }
            }
            (
                AfterRun::RetryRead {
                    attempts,
                    drop_file,
                },
                StepOutcome::Vanished { file, reason },
            ) => {
                let read = Unread {
                    file,
                    reason,
                    attempts,
                    drop_file,
                };
                self.retry_read(&tag, read, standing.partial);
            }
            (
                AfterRun::Failed {
                    kind,
                    again_if_more,
                },
                o,
            ) => {
                let reason = o.reason().unwrap_or_default().to_string();
                if again_if_more {
                    let more = self.more_came(&tag);
                    self.fail(&tag, kind, reason);
                    self.after_run(&tag, more);
                } else {
                    self.asm.steps.remove(&tag);
                    self.fail(&tag, kind, reason);
                }
            }
            (_, o) => {
                // A batch job's end is taken in `finished`; no other pair is made.
                self.asm.steps.remove(&tag);
                let reason = format!("{}: {}", o.word(), o.reason().unwrap_or_default());
                self.fail(&tag, FailKind::Internal, reason);
            }
        }
    }

    fn published(&mut self, tag: &StepTag, p: batch::Published) {
        let batch::Published {
            path,
            manifest,
            latency,
            report,
        } = p;
        let partial = publish::read_manifest(&manifest).is_some_and(|m| m.state == "partial");
        commit::crash_point("before-record");
        let more = self.more_came(tag);
        info!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, file = %path.display(), manifest = %manifest.display(), partial, latency_s = latency, seconds = report.seconds, "published");
        for i in &report.issues {
            warn!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, file = %shown(&i.file), field = ?i.field, what = %i.what, reason = %i.reason, "input problem");
        }
        self.record(Record::Published {
            step: tag.clone(),
            path: path.display().to_string(),
            manifest: manifest.display().to_string(),
            partial,
            at: Utc::now().timestamp(),
        });
        self.metrics()
            .feed(&tag.feed)
            .published(partial, latency, unix_now());
        self.last_published = Some(format!("{tag}"));
        self.after_run(tag, more);
    }

    fn retry_write(&mut self, tag: &StepTag, attempts: u32, was_partial: bool, reason: String) {
        let wait = self.backoff(attempts);
        error!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, attempt = attempts, retry_in_s = wait.as_secs_f64(), reason = %reason, "products not written; retrying");
        self.record(Record::Failed {
            step: tag.clone(),
            kind: FailKind::Output,
            reason,
            at: Utc::now().timestamp(),
        });
        {
            let mut m = self.metrics();
            let f = m.feed(&tag.feed);
            *f.failed.entry(FailKind::Output.name()).or_default() += 1;
            f.retries += 1;
        }
        if let Some(p) = self.asm.steps.get_mut(tag) {
            p.attempts = attempts;
            p.phase = Phase::Retry {
                at: Instant::now() + wait,
                partial: was_partial,
            };
        }
    }

    fn retry_read(&mut self, tag: &StepTag, read: Unread, was_partial: bool) {
        let Unread {
            file,
            reason,
            attempts,
            drop_file,
        } = read;
        let wait = self.backoff(attempts);
        self.metrics().feed(&tag.feed).retries += 1;
        let Some(p) = self.asm.steps.get_mut(tag) else {
            return;
        };
        p.attempts = attempts;
        if drop_file {
            warn!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, file = %shown(&file), reason = %reason, "input gone; the step goes on without it");
            p.files.remove(&file);
        } else {
            warn!(feed = %tag.feed, cycle = %tag.cycle, step = tag.lead, file = %shown(&file), reason = %reason, retry_in_s = wait.as_secs_f64(), "input cannot be read; retrying");
        }
        p.phase = Phase::Retry {
            at: Instant::now() + wait,
            partial: was_partial || drop_file,
        };
        if p.files.is_empty() {
            self.asm.steps.remove(tag);
            let reason = format!("every input is gone ({reason})");
            self.fail(tag, FailKind::Missing, reason);
        }
    }

    /// A step whose run has just ended: did input come while it ran? (The
    /// ledger was told when it came, so the record of the end leaves the
    /// step waiting.)
    pub(super) fn more_came(&self, tag: &StepTag) -> bool {
        self.asm.steps.get(tag).is_some_and(|p| p.more)
    }

    /// After the record of a run's end: the step waits again, to be made
    /// with all its input (at once ready if its rule or its timeout says
    /// so), when input came while it ran; otherwise it is done.
    pub(super) fn after_run(&mut self, tag: &StepTag, more: bool) {
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

    pub(super) fn fail(&mut self, tag: &StepTag, kind: FailKind, reason: String) {
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
}

/// An input a step's run could not read, and what comes of it.
struct Unread {
    file: PathBuf,
    reason: String,
    attempts: u32,
    drop_file: bool,
}
