//! What came of a step: published (recorded, counted, said), failed (retried, given up,
//! or waiting for more input), or reopened by input that came while it ran.

use super::*;

impl Daemon {
    pub(super) fn finished(&mut self, d: JobDone) {
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

    pub(super) fn finish_step(&mut self, d: JobDone) {
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
